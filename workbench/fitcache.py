"""An on-disk cache of fits, so that comparing or auditing a design again
reuses its DataTree instead of sampling it again.

A fit is keyed by a hash of everything its numbers depend on: the design
label, options and prior overrides, the SHA-256 of the recipe or model file
(a new revision is a new model), the data's SHA-256, the seed, the sampling
settings, which relaxation (if any) was fitted, which groups were kept, and
the versions of the scientific libraries. Each entry is the DataTree as
NetCDF plus a JSON sidecar holding the file's SHA-256; an entry whose file no
longer matches its hash (a torn copy, a disk error, an edit) is reported with
a :class:`CorruptFitWarning`, then refitted and stored again.

Writes are atomic (temporary file, then rename), NetCDF first and sidecar
last, so a reader never trusts a half-written entry and two processes
filling the same entry at once leave one whole copy.
"""

from __future__ import annotations

import hashlib
import json
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from workbench import tables, writers
from workbench.errors import WorkbenchWarning

FORMAT = "workbench.fit/1"
# Cache folder used by compare and audit unless told otherwise.
DEFAULT_FOLDER = Path("reports") / ".fit-cache"
# fit_design keyword arguments that change what the stored tree holds
# (others, like progress output, do not).
TREE_ARGUMENTS = ("predictive", "prior")


class CorruptFitWarning(WorkbenchWarning):
    """A cached fit did not match its recorded SHA-256 and was recomputed."""


def source_sha256(design) -> str:
    """SHA-256 of the file defining the design's recipe or model ('' when unknown)."""
    source = getattr(getattr(design, "recipe", None), "source", "") or ""
    return tables.file_sha256(source) if source and Path(source).is_file() else ""


def fit_key(design, data_sha256: str, seed: int, settings, relaxation=None,
            tree: dict | None = None) -> tuple[str, dict]:
    """The cache key of one fit and the fields it hashes.

    Returns
    -------
    (str, dict)
        The hex SHA-256 of the canonical JSON of the fields, and the fields.
    """
    from workbench.harness import versions

    fields = {
        "format": FORMAT,
        "design": design.key(),
        "options": {str(k): str(v) for k, v in sorted(dict(design.options).items())},
        "priors": {str(k): str(v) for k, v in sorted(dict(design.priors).items())},
        "source": source_sha256(design),
        "data": data_sha256,
        "seed": int(seed),
        "settings": settings.to_dict(),
        "relaxation": getattr(relaxation, "parameter", None),
        "tree": {k: bool(v) for k, v in sorted((tree or {}).items())},
        "versions": versions(),
    }
    text = json.dumps(fields, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest(), fields


@dataclass(frozen=True)
class CachedFitter:
    """Drop-in for :func:`workbench.harness.fit_design` that reads and fills the cache.

    Bound to one data file (its SHA-256); picklable, so relaxations fitted in
    worker processes share the cache.
    """

    folder: str
    data_sha256: str

    def __call__(self, design, data, seed: int, settings, relaxation=None, **kwargs):
        from workbench import engine
        from workbench.harness import fit_design

        tree_args = {k: kwargs[k] for k in TREE_ARGUMENTS if k in kwargs}
        key, fields = fit_key(design, self.data_sha256, seed, settings, relaxation, tree_args)
        say = kwargs.get("say") or (lambda _: None)
        label = kwargs.get("label", design.name)
        found = load(self.folder, key)
        if found is not None:
            idata, seconds = found
            say(f"{label}: reusing the cached fit {key[:12]}")
            # The model graph (no compilation) serves checks that read its structure.
            return engine.Fit(idata, design.build(data, relaxation), None, seconds, label)
        fit = fit_design(design, data, seed, settings, relaxation, **kwargs)
        store(self.folder, key, fields, fit.idata, fit.seconds)
        return fit


def paths(folder, key: str) -> tuple[Path, Path]:
    """(NetCDF file, sidecar) of a cache entry."""
    folder = Path(folder)
    return folder / f"{key}.nc", folder / f"{key}.json"


def load(folder, key: str) -> tuple[Any, float] | None:
    """The cached DataTree and its sampling seconds, or None when absent or corrupt.

    A corrupt entry (file missing, unreadable or not matching its recorded
    SHA-256) raises a :class:`CorruptFitWarning` and counts as absent.
    """
    import xarray as xr

    tree_path, side_path = paths(folder, key)
    if not side_path.exists():
        return None
    try:
        side = json.loads(side_path.read_text(encoding="utf-8"))
        recorded = side["sha256"]
    except (OSError, ValueError, KeyError, TypeError):
        _warn(side_path, "its sidecar is unreadable")
        return None
    if not tree_path.exists():
        _warn(tree_path, "the file is missing")
        return None
    if tables.file_sha256(tree_path) != recorded:
        _warn(tree_path, "the file does not match its recorded SHA-256")
        return None
    try:
        with xr.open_datatree(tree_path, engine="h5netcdf") as tree:
            idata = tree.load().copy()
    except Exception as err:  # a file with the right hash that cannot be read is still unusable
        _warn(tree_path, f"it cannot be read ({type(err).__name__})")
        return None
    return idata, float(side.get("seconds", 0.0))


def store(folder, key: str, fields: dict, idata, seconds: float) -> Path:
    """Write a cache entry: the tree, then its sidecar with the tree's SHA-256."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    tree_path, side_path = paths(folder, key)
    writers.write_posterior(tree_path, idata)
    side = {"format": FORMAT, "key": key, "fields": fields, "sha256": tables.file_sha256(tree_path),
            "seconds": float(seconds)}
    writers.write_json(side_path, side)
    return tree_path


def _warn(path: Path, why: str) -> None:
    warnings.warn(f"cached fit {path.name}: {why}; fitting again", CorruptFitWarning, stacklevel=3)
