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

from workbench import engine, harness, plans, registry, tables, writers
from workbench.errors import OutputError
from workbench.recipe import make_design, option_text


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
    options = {k: (v if isinstance(v, str) else option_text(v)) for k, v in (options or {}).items()}
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
    cache: bool | str | Path | None = None,
    history: bool | str | Path | None = True,
    plan_file: str | Path | None = None,
    truth: Mapping[str, Any] | None = None,
) -> CheckResult:
    """Run the full check of a design on a table and (by default) write its files.

    ``cache`` reuses and stores fits in the fit cache (True: the default
    folder; a path: that folder). ``history`` appends a row to the run
    history when files are written (True: the default history file; False:
    none). ``plan_file`` names the plan the run came from, for the manifest.
    ``truth`` gives the true parameter values of simulated data (a demo), which
    the report shows beside the estimates.
    """
    plans.check_seed(seed, "seed")
    design = resolve_design(target, options, priors, recipe_folders)
    dataset, info = load_data(design, data)
    if sbc and hasattr(design, "check_simulator"):
        design.check_simulator(dataset)  # a model file's story: one clear line before any fit
    created = not (out and Path(out).exists())
    folder = writers.run_folder(str(out) if out else None, design.label(), force) if write else None
    # A run that fails leaves no empty folder behind, and library warnings
    # go to the run's warnings.log instead of the terminal.
    with writers.kept_unless_empty(folder, created), writers.warnings_logged(folder):
        settings = settings or engine.Settings()
        calibrate = None
        if sbc:
            from workbench.calibration import run_calibration

            def calibrate():
                return run_calibration(design, dataset, sbc, seed, workers=workers, cluster=cluster,
                                       folder=folder, quiet=not progress)
        command = command or _api_command(target, data, options, priors, seed, sbc)
        run = harness.run_check(design, dataset, info, seed, settings, relax=relax, workers=workers,
                                calibrate=calibrate, say=say, progress=progress,
                                fitter=fitter_for(cache, info.sha256))
        doc = writers.summary(run)
        doc["manifest"] = writers.clean(plans.manifest(
            command=command, data_path=info.path, data_sha256=info.sha256, seed=seed, started=run.started,
            plan={"file": str(plan_file) if plan_file else None, "designs": [design.label()],
                  "target": str(target), "options": {k: option_text(v) for k, v in (options or {}).items()},
                  "priors": dict(priors or {}), "seed": seed, "sbc": sbc, "relax": relax,
                  "sampling": settings.to_dict()}))
        result = CheckResult(run, doc, folder)
        if write:
            result.files = write_check(result, command, truth)
            if history:
                from workbench import history as run_history

                run_history.record(history_path(history), run_history.check_entry(
                    "check", run.design, doc, result.files["report"]))
        return result


def fitter_for(cache: bool | str | Path | None, data_sha256: str):
    """The fit function for a ``cache`` argument: None/False fits afresh every time."""
    if not cache:
        return None
    from workbench import fitcache

    folder = fitcache.DEFAULT_FOLDER if cache is True else Path(cache)
    return fitcache.CachedFitter(str(folder), data_sha256)


def history_path(history: bool | str | Path) -> Path:
    """The history file for a ``history`` argument (True: the default one)."""
    from workbench import history as run_history

    return run_history.default_path() if history is True else Path(history)


def _api_command(target, data, options, priors, seed, sbc) -> str:
    parts = ["workbench", "check", str(target), "--data", str(data)]
    parts += [f"--set {k}={v}" for k, v in (options or {}).items()]
    parts += [f"--prior {k}={v}" for k, v in (priors or {}).items()]
    parts += ["--seed", str(seed)] + (["--sbc", str(sbc)] if sbc else [])
    return " ".join(parts)


def write_check(result: CheckResult, command: str, truth: Mapping[str, Any] | None = None
                ) -> dict[str, Path]:
    """report.html, summary.json, posterior.nc and notebook.ipynb, each atomically."""
    from workbench import notebook
    from workbench.report import html as report_html

    folder = result.folder
    run = result.run
    files = {
        "summary": writers.write_json(folder / "summary.json", result.summary),
        "posterior": writers.write_posterior(folder / "posterior.nc", run.fit.idata),
        "notebook": writers.atomic_write(folder / "notebook.ipynb", notebook.for_check(run, result.summary, folder)),
        "report": writers.atomic_write(folder / "report.html", report_html.render(run, result.summary, command, truth)),
    }
    return files


# --- calibration on its own ----------------------------------------------------------------

CALIBRATION_SCHEMA = "workbench.calibration-run/1"


@dataclass
class CalibrateResult:
    """A finished simulation-based calibration of one design.

    ``calibration`` is the :class:`workbench.calibration.CalibrationResult`;
    ``doc`` equals calibration.json.
    """

    design: Any
    calibration: Any
    doc: dict
    folder: Path | None = None
    files: dict[str, Path] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return self.doc

    @property
    def verdict(self) -> str:
        """The ``implementation`` verdict the calibration supports."""
        return self.doc["implementation"]["verdict"]

    def _repr_html_(self) -> str:
        cal = self.doc["calibration"]
        rows = "".join(f"<tr><td>{html.escape(k)}</td><td>{v['p_value']:.3g}</td></tr>"
                       for k, v in cal["parameters"].items())
        return (f"<p><strong>{html.escape(self.doc['design'])}</strong>: implementation "
                f"{html.escape(self.verdict)} ({cal['completed']} of {cal['sims']} replicates)</p>"
                f"<table><tr><th>quantity</th><th>uniformity p-value</th></tr>{rows}</table>")


def calibration_folder(out: str | Path | None, label: str, force: bool, sims: int | None = None) -> Path:
    """The run folder of a calibration: a folder holding this calibration's
    checkpoint is reused (the run resumes); any other non-empty folder needs ``force``,
    and so does a finished result (calibration.json) of another number of replicates.

    Resuming needs no ``--force`` because it overwrites nothing that matters:
    each replicate's result depends only on (design, data, seed, index,
    settings), so kept replicates equal recomputed ones. A checkpoint of
    another calibration is never deleted, even with ``force``: the runner
    refuses it with one line.
    """
    from workbench.calibration import CHECKPOINT

    if out is not None and (Path(out) / CHECKPOINT).is_file():
        finished = _finished_sims(Path(out) / "calibration.json")
        if sims is not None and finished is not None and finished != sims and not force:
            raise OutputError(
                f"output folder {str(out)!r} holds a finished calibration of {finished} replicates; "
                f"expected one of {sims} or none (use --force to replace its calibration.json; "
                f"the checkpoint keeps every replicate)")
        writers.clear_temporary(out)
        return Path(out)
    return writers.run_folder(str(out) if out else None, f"calibrate-{label}", force)


def _finished_sims(path: Path) -> int | None:
    """The replicates of the finished calibration in ``path`` (None: no readable result)."""
    import json

    try:
        return int(json.loads(path.read_text(encoding="utf-8"))["calibration"]["sims"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def calibrate(
    target: str,
    data: str | Path,
    *,
    sims: int,
    options: Mapping[str, Any] | None = None,
    priors: Mapping[str, str] | None = None,
    seed: int = 1,
    workers: int | None = None,
    cluster: str | None = None,
    out: str | Path | None = None,
    force: bool = False,
    settings: engine.Settings | None = None,
    recipe_folders: list[str] | None = None,
    write: bool = True,
    history: bool | str | Path | None = True,
    quiet: bool = True,
    command: str = "",
) -> CalibrateResult:
    """Simulation-based calibration of a design on a table's covariates.

    Parameters
    ----------
    target : str
        Recipe name or model file.
    data : path
        The table; its covariates (distances, cohort sizes) shape every
        replicate, its outcomes are replaced by simulated ones.
    sims : int
        Replicates.
    seed : int, default 1
        Every replicate's seeds derive from ``(seed, replicate index)``.
    workers, cluster
        Local worker processes, or a Dask scheduler address.
    out, force
        Run folder; a folder holding this calibration's checkpoint resumes it.
    settings : workbench.engine.Settings, optional
        Sampling per replicate fit (default: the runner's calibration settings).
    write : bool, default True
        Write calibration.json, calibration.html and notebook.ipynb (and keep
        the checkpoint); False computes only.
    history : bool or path, default True
        Append a row to the run history.

    Returns
    -------
    CalibrateResult

    References
    ----------
    Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
    Validating Bayesian inference algorithms with simulation-based
    calibration. arXiv:1804.06788.
    """
    from workbench import verdicts
    from workbench.calibration import run_calibration
    from workbench.checks.calibration import calibration_findings
    from workbench.recipe import likelihood_approximation

    plans.check_seed(seed, "seed")
    started = plans.now()
    design = resolve_design(target, options, priors, recipe_folders)
    dataset, info = load_data(design, data)
    if hasattr(design, "check_simulator"):
        design.check_simulator(dataset)  # a model file's story: one clear line before any fit
    folder = calibration_folder(out, design.label(), force, sims) if write else None
    result = run_calibration(design, dataset, sims, seed, workers=workers, cluster=cluster,
                             folder=folder, settings=settings, quiet=quiet)
    findings = calibration_findings(result, likelihood_approximation(design, dataset))
    judged = next(v for v in verdicts.decide([], findings) if v.key == "implementation")
    command = command or (f"workbench calibrate {target} --data {data} --sims {sims} --seed {seed}"
                          + "".join(f" --set {k}={v}" for k, v in (options or {}).items())
                          + "".join(f" --prior {k}={v}" for k, v in (priors or {}).items()))
    sampling = settings.to_dict() if settings else None
    doc = writers.clean({
        "schema": CALIBRATION_SCHEMA,
        "recipe": design.name,
        "design": design.label(),
        "options": {k: option_text(v) for k, v in design.options.items()},
        "priors": dict(design.priors),
        "seed": seed,
        "data": {"path": info.path, "sha256": info.sha256, "rows": info.rows},
        "implementation": judged.to_dict(),
        "calibration": result.to_dict(),
        "manifest": plans.manifest(
            command=command, data_path=info.path, data_sha256=info.sha256, seed=seed, started=started,
            plan={"target": str(target), "designs": [design.label()],
                  "options": {k: option_text(v) for k, v in (options or {}).items()},
                  "priors": dict(priors or {}), "sims": sims, "seed": seed, "sampling": sampling}),
    })
    out_result = CalibrateResult(design, result, doc, folder)
    if write:
        out_result.files = write_calibration(out_result, command)
        if history:
            from workbench import history as run_history

            run_history.record(history_path(history), run_history.check_entry(
                "calibrate", design, {**doc, "assumptions": [doc["implementation"]]},
                out_result.files["report"]))
    return out_result


def write_calibration(result: CalibrateResult, command: str) -> dict[str, Path]:
    """calibration.json, calibration.html and notebook.ipynb in the run folder."""
    from workbench import notebook
    from workbench.report import calibration_plots, plots
    from workbench.report import html as report_html

    folder = result.folder
    figures = [
        {"uri": plots.to_data_uri(calibration_plots.ecdf_difference_figure(result.calibration)),
         "caption": "ECDF of the fractional ranks minus the uniform CDF, with the 95% simultaneous band."},
        {"uri": plots.to_data_uri(calibration_plots.rank_histogram_figure(result.calibration)),
         "caption": "Rank histograms with the range each bar keeps 99% of the time under uniformity."},
    ]
    page = report_html.environment().get_template("calibration.html.j2").render(
        doc=result.doc, figures=figures, command=command)
    return {
        "json": writers.write_json(folder / "calibration.json", result.doc),
        "report": writers.atomic_write(folder / "calibration.html", page),
        "notebook": writers.atomic_write(folder / "notebook.ipynb", notebook.for_calibration(result.doc)),
    }
