"""The Python API: what the command line does, as functions returning results.

>>> import workbench
>>> result = workbench.check("threshold-geometry", "throws.csv", options={"clearance": 0.35})
>>> result.verdicts()          # {assumption: verdict}
>>> result.to_dict()           # equal to summary.json
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from workbench import engine, harness, registry, tables, writers
from workbench.errors import OptionError
from workbench.recipe import make_design


@dataclass
class CheckResult:
    """A finished check: the run, its summary document and where it was written."""

    run: harness.CheckRun
    summary: dict
    folder: Path | None = None
    files: dict[str, Path] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return self.summary

    def verdicts(self) -> dict[str, str]:
        return {a["key"]: a["verdict"] for a in self.summary["assumptions"]}

    def _repr_html_(self) -> str:
        rows = "".join(
            f"<tr><td>{html.escape(a['key'])}</td><td>{html.escape(a['verdict'])}</td>"
            f"<td>{html.escape(a['advice'])}</td></tr>"
            for a in self.summary["assumptions"]
        )
        where = f"<p>Report: {html.escape(str(self.files.get('report', '')))}</p>" if self.files else ""
        return (f"<p><strong>{html.escape(self.run.design.label())}</strong></p>"
                f"<table><tr><th>assumption</th><th>verdict</th><th>next step</th></tr>{rows}</table>{where}")


def resolve_design(target: str, options: Mapping[str, Any] | None = None,
                   priors: Mapping[str, str] | None = None, recipe_folders: list[str] | None = None):
    """A recipe name (or a recipe/model file) bound to options and priors."""
    options = {k: (v if isinstance(v, str) else str(v)) for k, v in (options or {}).items()}
    if str(target).endswith(".py"):
        from workbench import modelfile

        return modelfile.design_from_file(target, options, dict(priors or {}))
    recipe = registry.load(recipe_folders).get(target)
    return make_design(recipe, options, dict(priors or {}))


def load_data(design, path: str | Path):
    """Read and validate the table; returns (dataset, DataInfo)."""
    table = tables.read_table(path)
    data = design.validate(table)
    info = harness.DataInfo(str(path), tables.file_sha256(path), int(len(table)))
    return data, info


def check(
    target: str,
    data: str | Path,
    *,
    options: Mapping[str, Any] | None = None,
    priors: Mapping[str, str] | None = None,
    seed: int = 1,
    out: str | Path | None = None,
    force: bool = False,
    sbc: int = 0,
    workers: int | None = None,
    cluster: str | None = None,
    settings: engine.Settings | None = None,
    relax: bool = True,
    recipe_folders: list[str] | None = None,
    write: bool = True,
    say: Callable[[str], None] = lambda _: None,
    progress: bool = False,
    command: str = "",
) -> CheckResult:
    """Run the full check of a design on a table and (by default) write its files."""
    if seed < 0:
        raise OptionError(f"--seed: expected an integer >= 0; found {seed}")
    design = resolve_design(target, options, priors, recipe_folders)
    dataset, info = load_data(design, data)
    if sbc and hasattr(design, "check_simulator"):
        design.check_simulator(dataset)  # a model file's story: one clear line before any fit
    folder = writers.run_folder(str(out) if out else None, design.label(), force) if write else None
    settings = settings or engine.Settings()
    calibrate = None
    if sbc:
        from workbench.calibration import run_calibration

        def calibrate():
            return run_calibration(design, dataset, sbc, seed, workers=workers, cluster=cluster,
                                   folder=folder, quiet=not progress)
    run = harness.run_check(design, dataset, info, seed, settings, relax=relax, workers=workers,
                            calibrate=calibrate, say=say, progress=progress)
    doc = writers.summary(run)
    result = CheckResult(run, doc, folder)
    if write:
        result.files = write_check(result, command or _api_command(target, data, options, priors, seed, sbc))
    return result


def _api_command(target, data, options, priors, seed, sbc) -> str:
    parts = ["workbench", "check", str(target), "--data", str(data)]
    parts += [f"--set {k}={v}" for k, v in (options or {}).items()]
    parts += [f"--prior {k}={v}" for k, v in (priors or {}).items()]
    parts += ["--seed", str(seed)] + (["--sbc", str(sbc)] if sbc else [])
    return " ".join(parts)


def write_check(result: CheckResult, command: str) -> dict[str, Path]:
    """report.html, summary.json, posterior.nc and notebook.ipynb, each atomically."""
    from workbench import notebook
    from workbench.report import html as report_html

    folder = result.folder
    run = result.run
    files = {
        "summary": writers.write_json(folder / "summary.json", result.summary),
        "posterior": writers.write_posterior(folder / "posterior.nc", run.fit.idata),
        "notebook": writers.atomic_write(folder / "notebook.ipynb", notebook.for_check(run, result.summary)),
        "report": writers.atomic_write(folder / "report.html", report_html.render(run, result.summary, command)),
    }
    return files
