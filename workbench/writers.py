"""Writers: turn a finished run into files. They compute no statistics.

Every file is written atomically (a temporary file in the same folder, then a
rename), so a crash or Ctrl-C mid-write leaves the previous file or none,
never a truncated one. An existing run folder is only reused with ``force``.
"""

from __future__ import annotations

import json
import math
import os
import re
import tempfile
import warnings
from contextlib import contextmanager
from datetime import datetime
from pathlib import Path
from typing import Any, Iterator

from workbench.errors import OutputError
from workbench.interrupts import raise_if_interrupted

SCHEMA = "workbench.summary/1"


def _file_mode() -> int:
    """The mode a plain ``open`` would give a new file under this process's umask."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


# Temporary files are created private (0600); the finished file gets the usual mode.
FILE_MODE = _file_mode()


# --- files -------------------------------------------------------------------

# A temporary file of atomic_write is ".NAME.XXXXXXXX.tmp" (mkstemp's eight
# random characters); a killed run can leave one behind, a rerun removes it.
TEMP_SUFFIX = ".tmp"
TEMP_PATTERN = re.compile(r"\..+\.[a-z0-9_]{8}" + re.escape(TEMP_SUFFIX))


def clear_temporary(folder: str | Path) -> list[Path]:
    """Remove the temporary files an earlier, killed run left in ``folder`` (only
    names of :func:`atomic_write`'s pattern); returns what was removed."""
    removed = []
    for item in Path(folder).iterdir():
        if TEMP_PATTERN.fullmatch(item.name) and item.is_file() and not item.is_symlink():
            item.unlink(missing_ok=True)
            removed.append(item)
    return removed



def atomic_write(path: str | Path, data: bytes | str) -> Path:
    """Write ``data`` to ``path`` through a temporary file and a rename."""
    raw = data.encode("utf-8") if isinstance(data, str) else data

    def write(tmp):
        with open(tmp, "wb") as handle:
            handle.write(raw)
            handle.flush()
            os.fsync(handle.fileno())

    return atomic_write_with(path, write)


def atomic_write_with(path: str | Path, write) -> Path:
    """Let ``write(temp_path)`` produce the file, then rename it into place."""
    raise_if_interrupted()
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=TEMP_SUFFIX, dir=path.parent)
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, FILE_MODE)
        raise_if_interrupted()
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def run_folder(out: str | None, label: str, force: bool, root: str | Path = "reports") -> Path:
    """The folder a run writes into.

    With ``out``: that folder, refused if it already holds a run unless
    ``force``; temporary files of a killed earlier run are removed first. Without: a new folder under ``root`` named by time and design.
    """
    if out:
        folder = Path(out)
        if folder.exists() and not folder.is_dir():
            raise OutputError(f"output folder {str(folder)!r}: expected a folder (new or empty); "
                              f"found a file")
        if folder.exists():
            clear_temporary(folder)
        if folder.exists() and any(folder.iterdir()) and not force:
            raise OutputError(
                f"output folder {str(folder)!r} already holds files; expected a new or empty "
                f"folder (use --force to overwrite)"
            )
    else:
        stamp = datetime.now().strftime("%Y%m%d-%H%M%S")
        slug = re.sub(r"[^A-Za-z0-9_.=-]+", "_", label)[:60].strip("_") or "run"
        folder = Path(root) / f"{stamp}-{slug}"
        n = 1
        while folder.exists():
            n += 1
            folder = Path(root) / f"{stamp}-{slug}-{n}"
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as err:  # e.g. a file where a parent folder should be
        raise OutputError(f"output folder {str(folder)!r}: cannot create it ({err.strerror})") from None
    return folder


# Files a failed run keeps in a folder it created: a calibration checkpoint
# resumes the same command where it stopped.
KEPT_AFTER_FAILURE = ("calibration.jsonl",)
WARNINGS_LOG = "warnings.log"


@contextmanager
def kept_unless_empty(folder: Path | None, created: bool = True) -> Iterator[None]:
    """On failure, remove what this run wrote into the ``folder`` it ``created``.

    A calibration checkpoint stays (rerunning the command continues from it);
    a folder left with nothing is removed, so a failed run leaves no empty or
    half-made run folder behind.
    """
    try:
        yield
    except BaseException:
        if folder is not None and created and folder.is_dir():
            for item in folder.iterdir():
                if item.name not in KEPT_AFTER_FAILURE and item.is_file():
                    item.unlink(missing_ok=True)
            if not any(folder.iterdir()):
                folder.rmdir()
        raise


@contextmanager
def warnings_logged(folder: Path | None) -> Iterator[None]:
    """Keep library warnings off the terminal; write them to the run's warnings.log.

    Without a folder (``write=False``) they are dropped: the run's numbers
    carry what matters (a NaN R-hat of a constant, say, is reported as such).
    """
    from workbench.errors import WorkbenchWarning

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        finally:
            library = [w for w in caught if not issubclass(w.category, WorkbenchWarning)]
            own = [w for w in caught if issubclass(w.category, WorkbenchWarning)]
    for w in own:  # the workbench's own warnings are for the user to see
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    if folder is not None and library and folder.is_dir():
        lines = sorted({f"{w.category.__name__}: {w.message} ({Path(w.filename).name}:{w.lineno})"
                        for w in library})
        atomic_write(folder / WARNINGS_LOG, "\n".join(lines) + "\n")


# --- summary.json --------------------------------------------------------------


def clean(value: Any) -> Any:
    """JSON-safe copy: NaN and infinities become null, NumPy scalars plain."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [clean(v) for v in value]
    if hasattr(value, "item") and not isinstance(value, (str, bytes)):
        try:
            value = value.item()
        except (ValueError, AttributeError):
            return clean(list(value))
    if isinstance(value, float) and (math.isnan(value) or math.isinf(value)):
        return None
    return value


def summary(run) -> dict:
    """The ``workbench.summary/1`` document of a check run."""
    doc = {
        "schema": SCHEMA,
        "recipe": run.design.name,
        "design": dict(run.design.options),
        "priors": dict(run.design.priors),
        "seed": run.seed,
        "data": {"path": run.data_info.path, "sha256": run.data_info.sha256, "rows": run.data_info.rows},
        "versions": run.versions,
        "started": run.started,
        "computation": {**run.extras.get("computation", {}), "seconds": round(run.seconds, 2)},
        "assumptions": [v.to_dict() for v in run.verdicts],
        "loo": {k: run.extras["loo"][k] for k in ("elpd", "se", "p_loo", "bad_pareto_k")}
        if "loo" in run.extras else None,
        "loo_pit": loo_pit_readings(run),
        "calibration": run.calibration.to_dict() if run.calibration is not None else None,
        "parameters": run.extras.get("parameters", {}),
        "sampling": run.settings.to_dict(),
        "revisions": [_revision(r) for r in run.extras.get("revisions", [])],
    }
    if "derived" in run.extras:
        doc["derived"] = run.extras["derived"]
    return clean(doc)


def _revision(record: dict) -> dict:
    """A revision as summary.json lists it: what changed, before and after, agreement."""
    keys = ("assumption", "change", "design", "before", "after", "agreement", "fixed")
    return {k: record[k] for k in keys}


def loo_pit_readings(run) -> dict:
    """The LOO-PIT reading of each observed variable, by variable name.

    ``reading`` is ``fine``, ``too narrow``, ``too wide`` or ``shifted`` (see
    :func:`workbench.rules.model_fit.loo_pit_reading`), with the values'
    ``mean`` and ``variance`` (0.5 and 1/12 for a calibrated model), whether
    the ECDF leaves its simultaneous band (``outside_band``, at ``band_level``)
    and how many values there are.
    """
    from workbench.recipe import outcome_words
    from workbench.rules.model_fit import loo_pit_reading

    words = outcome_words(run.design)
    out = {}
    for name, numbers in (run.extras.get("loo_pit") or {}).items():
        reading, sentence = loo_pit_reading(numbers, words.get(name, name))
        out[name] = {"label": words.get(name, name), "reading": reading, "mean": numbers["mean"],
                     "variance": numbers["variance"], "outside_band": numbers["outside"],
                     "band_level": numbers["level"], "values": int(len(numbers["pit"])),
                     "sentence": sentence}
    return out


def write_json(path: str | Path, doc: dict) -> Path:
    return atomic_write(path, json.dumps(clean(doc), indent=2, ensure_ascii=False, allow_nan=False) + "\n")


def write_posterior(path: str | Path, idata) -> Path:
    """The run's DataTree as NetCDF (object-typed sampler messages dropped)."""

    def write(tmp):
        tree = idata.copy()
        for node in tree.subtree:
            drop = [n for n, v in node.dataset.data_vars.items() if v.dtype == object]
            if drop:
                node.dataset = node.dataset.drop_vars(drop)
        tree.to_netcdf(tmp, engine="h5netcdf")

    return atomic_write_with(path, write)
