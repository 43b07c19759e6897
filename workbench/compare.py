"""Compare candidate designs on one table: which predicts better, and where.

Each design is checked in full (fits reused from the on-disk cache when the
same design, data, seed and settings were fitted before). Then:

* a PSIS-LOO comparison (ArviZ ``compare``): each design's elpd, the
  difference to the best with the standard error of that difference, the
  effective number of parameters and rows whose Pareto k is too high;
  where PSIS-LOO cannot rank them (fewer than ten units to leave out, or a
  Pareto k too high in any design) every design is refitted without each
  fold instead (:mod:`workbench.kfold`, the same folds for all), and with
  fewer than ten units a gap counts only beyond :data:`SMALL_DIFFERENCE`,
  whatever its standard error;
* stacking weights, the mix of predictive distributions that predicts best;
* the pointwise elpd difference against the recipe's covariate, which shows
  where in the data each design wins;
* every design's assumption verdicts side by side.

When a difference is within two standard errors the comparison says so
instead of naming a winner.

References
----------
Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model
evaluation using leave-one-out cross-validation and WAIC. Statistics and
Computing 27, 1413-1432.
Yao, Y., Vehtari, A., Simpson, D. and Gelman, A. (2018). Using stacking to
average Bayesian predictive distributions. Bayesian Analysis 13(3), 917-1007.
Sivula, T., Magnusson, M., Matamoros, A. A. and Vehtari, A. (2022).
Uncertainty in Bayesian leave-one-out cross-validation based model
comparison. arXiv:2008.10296 (when the normal approximation of the
difference can be trusted).
Vehtari, A., Simpson, D., Gelman, A., Yao, Y. and Gabry, J. (2024). Pareto
smoothed importance sampling. JMLR 25(72).
"""

from __future__ import annotations

import hashlib
import html
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np

from workbench import writers
from workbench.errors import OptionError
from workbench.plans import DesignSpec, Plan, check_seed, manifest, now, parse_design, read_plan

if TYPE_CHECKING:
    from workbench import engine

SCHEMA = "workbench.compare/1"
# A difference counts as clear when it exceeds this many standard errors of
# the difference; closer designs are reported as predicting about equally
# well. Common practice (Vehtari et al. 2017, sec. 5.1 use the SE this way).
SE_MULTIPLE = 2.0
# Below this absolute elpd difference the normal approximation of its
# uncertainty is poor and the designs predict almost alike (Sivula et al. 2022).
SMALL_DIFFERENCE = 4.0
# Pareto k above this makes a row's PSIS estimate unreliable (Vehtari et al. 2024).
PARETO_K_LIMIT = 0.7
# Stacking (Yao et al. 2018) rather than pseudo-BMA: it weighs predictive
# distributions for the best combined prediction, not for which model is "true".
WEIGHT_METHOD = "stacking"


@dataclass
class CompareResult:
    """A finished comparison.

    Attributes
    ----------
    checks : list of workbench.api.CheckResult
        The full check of each design, in the order given.
    doc : dict
        The ``workbench.compare/1`` document (equal to compare.json).
    folder : Path or None
        Where it was written.
    files : dict
        Written files by role.
    """

    checks: list
    doc: dict
    folder: Path | None = None
    files: dict[str, Path] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return self.doc

    @property
    def best(self) -> str | None:
        """The design that predicts clearly best, or None when the top is within two SE."""
        return self.doc["best"]

    def table(self):
        """The comparison table as a pandas DataFrame, best first."""
        import pandas as pd

        return pd.DataFrame(self.doc["comparison"]).set_index("design")

    def _repr_html_(self) -> str:
        rows = "".join(
            f"<tr><td>{html.escape(r['design'])}</td><td>{r['elpd']:.1f}</td>"
            f"<td>{r['gap']:.1f}</td><td>{r['gap_se']:.1f}</td><td>{r['stacking_weight']:.2f}</td></tr>"
            for r in self.doc["comparison"]
        )
        where = (f"<p>Report: {html.escape(str(self.files['report']))}</p>"
                 if "report" in self.files else "")
        return (f"<p><strong>{html.escape(self.doc['statement'])}</strong></p>"
                "<table><tr><th>design</th><th>elpd</th><th>gap to the best</th><th>SE of the gap</th>"
                f"<th>stacking weight</th></tr>{rows}</table>{where}")


def compare(
    designs: Sequence[str | DesignSpec] | str | Path,
    data: str | Path | None = None,
    *,
    seed: int | None = None,
    out: str | Path | None = None,
    force: bool = False,
    settings: engine.Settings | None = None,
    relax: bool | None = None,
    workers: int | None = None,
    cache: bool | str | Path | None = True,
    history: bool | str | Path | None = True,
    recipe_folders: list[str] | None = None,
    write: bool = True,
    say: Callable[[str], None] = lambda _: None,
    progress: bool = False,
    command: str = "",
) -> CompareResult:
    """Check several designs on one table and compare their predictions.

    Parameters
    ----------
    designs : list of str or DesignSpec, or a plan file path
        Each design as ``RECIPE_OR_FILE[:KEY=VALUE]...`` (at least two), or
        the path of a TOML plan listing them under ``designs``.
    data : path, optional
        The table (required unless the plan names it).
    seed : int, optional
        Seed of every fit (default: the plan's, else 1).
    out, force
        Output folder and whether it may already hold files.
    settings : workbench.engine.Settings, optional
        Sampling settings (default: the plan's, else a report's).
    relax : bool, optional
        Fit each design's relaxed models (default: the plan's, else True).
    workers : int, optional
        Processes for the relaxed fits.
    cache : bool or path, default True
        Reuse and store fits in the fit cache (True: ``reports/.fit-cache``).
    history : bool or path, default True
        Append a row to the run history (True: the default history file).
    write : bool, default True
        Write compare.html, compare.json, notebook.ipynb and each design's
        report; False computes only.

    Returns
    -------
    CompareResult

    References
    ----------
    Vehtari, Gelman and Gabry (2017), Statistics and Computing 27 (PSIS-LOO).
    Yao, Vehtari, Simpson and Gelman (2018), Bayesian Analysis 13 (stacking).
    """
    from workbench import api

    started = now()
    plan = _plan_of(designs, data, seed, relax)
    seed = plan.seed
    settings = settings or plan.settings()
    if plan.data is None:
        raise OptionError("compare: expected a data table (--data FILE or 'data' in the plan); found none")
    if len(plan.designs) < 2:
        raise OptionError(f"compare: expected at least two designs; found {len(plan.designs)}")
    resolved = [api.resolve_design(d.target, d.options, d.priors, recipe_folders) for d in plan.designs]
    labels = [d.label() for d in resolved]
    keys = [d.key() for d in resolved]
    twice = [label for label, key in zip(labels, keys) if keys.count(key) > 1]
    if twice:
        raise OptionError(f"compare: design '{twice[0]}' is given twice; expected distinct designs")
    for design in resolved:
        api.load_data(design, plan.data)  # every design accepts the table, before any fit
    folder = writers.run_folder(str(out) if out else None, "compare", force) if write else None
    checks = []
    for spec, label in zip(plan.designs, labels):
        say(f"design {label}")
        checks.append(api.check(spec.target, plan.data, options=spec.options, priors=spec.priors,
                                seed=seed, settings=settings, relax=plan.relax, workers=workers,
                                recipe_folders=recipe_folders, write=False, cache=cache,
                                history=False, say=say, progress=progress))
    command = command or _api_command(plan, seed)
    doc = document(checks, labels, plan, settings,
                   manifest(command=command, data_path=plan.data,
                            data_sha256=checks[0].summary["data"]["sha256"], seed=seed,
                            plan={**plan.to_dict(), "sampling": settings.to_dict()},
                            started=started), say)
    result = CompareResult(checks, doc, folder)
    if write:
        result.files = write_compare(result, command)
        if history:
            from workbench import history as run_history

            run_history.record(run_history.default_path() if history is True else history,
                               history_entry(result))
    return result


def _plan_of(designs, data, seed, relax) -> Plan:
    if isinstance(designs, (str, Path)):
        if not str(designs).endswith(".toml"):
            raise OptionError(f"compare: expected a list of designs or a .toml plan; found {str(designs)!r}")
        plan = read_plan(designs)
    else:
        specs = [d if isinstance(d, DesignSpec) else parse_design(d) for d in designs]
        plan = Plan(path=None, data=None, designs=specs)
    if data is not None:
        plan.data = Path(data)
    if seed is not None:
        plan.seed = check_seed(seed, "seed")
    if relax is not None:
        plan.relax = bool(relax)
    return plan


def _api_command(plan: Plan, seed: int) -> str:
    if plan.path is not None:
        return f"workbench compare {plan.path}"
    return "workbench compare --data " + " ".join([str(plan.data)] + [d.text() for d in plan.designs]
                                                  + ["--seed", str(seed)])


# --- the comparison -----------------------------------------------------------------------


def held_out_by_design(checks, labels, elpds: dict, seed: int,
                       say: Callable[[str], None] = lambda _: None) -> tuple[dict | None, str, str]:
    """Exact refits of every design when PSIS-LOO cannot rank them: ``(elpds, why, unit)``.

    ``elpds`` is None when PSIS-LOO can decide (at least
    :data:`workbench.kfold.MIN_LOO_UNITS` units and no Pareto k above
    :data:`PARETO_K_LIMIT` in any design); otherwise it holds each design's
    K-fold result (ArviZ's ``ELPDDataLOOKFold``), every design refitted on the
    same folds so that their held-out densities pair unit by unit. A
    design whose check already refitted its base model on those folds is
    not refitted again. ``why`` says why PSIS-LOO could not decide, ``unit``
    what one pointwise term leaves out (``cohort``, ``row``).
    """
    from workbench import engine, kfold
    from workbench.checks.relaxation import unit_word

    n = int(np.asarray(elpds[labels[0]].elpd_i).size)
    high: set[int] = set()
    for e in elpds.values():
        if e.pareto_k is not None:
            high |= {int(i) for i in np.flatnonzero(np.asarray(e.pareto_k).ravel() > PARETO_K_LIMIT)}
    unit = unit_word(checks[0].run.data, n)
    why = kfold.why_not_psis(n, len(high), PARETO_K_LIMIT, unit)
    if not why:
        return None, "", unit
    done = {label: c.run.refits.base for c, label in zip(checks, labels)
            if c.run.refits is not None and c.run.refits.base is not None
            and c.run.refits.base.fold_of is not None}
    folds = next(iter(done.values())).fold_of if done else kfold.folds_for(n, seed)
    seeds = engine.seed_stream(seed, *[f"design:{label}" for label in labels])
    out = {}
    for check, label in zip(checks, labels):
        run = check.run
        name = list(run.fit.idata["log_likelihood"].data_vars)[0]
        held = done.get(label)
        if held is None or not np.array_equal(held.fold_of, folds):
            say(f"refit {label} without each fold: {why}")
            held = kfold.held_out_elpd(run.design, run.data, None, name, folds, seeds[f"design:{label}"],
                                       run.settings, say)
        out[label] = kfold_elpd(held, run.fit, name)
    return out, why, unit


def kfold_elpd(held, fit, name: str):
    """A K-fold result as ArviZ's ``ELPDDataLOOKFold``, so that ``compare`` ranks and weighs it.

    Its effective number of parameters is the in-sample log pointwise
    predictive density of the full fit minus the held-out one (Vehtari,
    Gelman and Gabry 2017, sec. 2.3).
    """
    import xarray as xr
    from arviz_stats.utils import ELPDDataLOOKFold

    from workbench.kfold import log_mean_density

    ll = np.asarray(fit.idata["log_likelihood"][name].values, dtype=float)
    lpd = log_mean_density(ll.reshape(ll.shape[0] * ll.shape[1], -1))
    pointwise = np.asarray(held.pointwise, dtype=float)
    n = pointwise.size
    return ELPDDataLOOKFold(
        elpd=float(pointwise.sum()), se=float(np.sqrt(n * np.var(pointwise))),
        p=float((lpd - pointwise).sum()), n_samples=int(ll.shape[0]), n_data_points=n, scale="log",
        warning=False, good_k=None, elpd_i=xr.DataArray(pointwise, dims=["unit"]),
        n_folds=int(held.folds))


def loo_by_design(checks, labels) -> dict:
    """PSIS-LOO (pointwise) of each design's main fit, checked to cover the same observations."""
    from workbench.checks.loo import loo_of

    elpds = {label: loo_of(c.run.fit) for c, label in zip(checks, labels)}
    sizes = {label: int(np.asarray(e.elpd_i).size) for label, e in elpds.items()}
    first, n_first = next(iter(sizes.items()))
    for label, n in sizes.items():
        if n != n_first:
            raise OptionError(f"compare: designs must predict the same observations; '{first}' has "
                              f"{n_first} pointwise terms and '{label}' has {n}")
    return elpds


# Cautions about a gap, in plain words, keyed by the comparison's own flags.
GAP_CAUTIONS = {
    "N < 100": "fewer than 100 observations: the SE of the gap is itself rough",
    "|elpd_diff| < 4": "a gap below 4 is no evidence whatever its SE",
}


FEW_UNITS_CAUTION = (f"fewer than 10 units to leave out: the SE of the gap means nothing, "
                     f"so only a gap beyond {SMALL_DIFFERENCE:g} counts")


def comparison_rows(elpds: dict, few: bool = False) -> list[dict]:
    """The PSIS-LOO comparison with stacking weights, best first, as plain rows.

    Each row: ``design``, ``place`` (1 for the best), ``elpd`` and
    ``elpd_se``, ``gap`` (how far its elpd falls below the best's, >= 0) and
    ``gap_se`` (the standard error of that gap), ``level_with_best`` (the
    best itself, or a gap within :data:`SE_MULTIPLE` SE or below
    :data:`SMALL_DIFFERENCE`), ``stacking_weight``, ``p_loo``,
    ``high_k_rows`` (row indices with Pareto k above :data:`PARETO_K_LIMIT`)
    and ``caution`` (plain words, '' when none). With ``few`` units the SE
    of a gap means nothing (Sivula et al. 2022): a design then stands level
    with the best while its gap is below :data:`SMALL_DIFFERENCE`.

    References
    ----------
    Vehtari, Gelman and Gabry (2017); Yao et al. (2018).
    """
    import arviz as az

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = az.compare(elpds, method=WEIGHT_METHOD, round_to="none")
    rows = []
    for label, r in table.iterrows():
        k = np.asarray(elpds[label].pareto_k).ravel() if elpds[label].pareto_k is not None else np.zeros(0)
        gap, gap_se = -float(r["elpd_diff"]), float(r["dse"])
        place = int(r["rank"]) + 1
        rows.append({
            "design": str(label),
            "place": place,
            "elpd": float(r["elpd"]),
            "elpd_se": float(r["se"]),
            "gap": gap,
            "gap_se": gap_se,
            "level_with_best": place == 1 or (abs(gap) < SMALL_DIFFERENCE if few
                                              else too_close_to_call(gap, gap_se)),
            "stacking_weight": float(r["weight"]),
            "p_loo": float(r["p"]),
            "high_k_rows": [int(i) for i in np.flatnonzero(k > PARETO_K_LIMIT)],
            "caution": (FEW_UNITS_CAUTION if few and place > 1
                        else GAP_CAUTIONS.get(str(r.get("diag_diff") or ""), "")),
        })
    return rows


def too_close_to_call(gap: float, gap_se: float) -> bool:
    """Whether a design's gap to the best leaves the top open.

    Open when the gap is within :data:`SE_MULTIPLE` standard errors, or
    below :data:`SMALL_DIFFERENCE` whatever its standard error (two
    near-identical designs have a tiny gap with a tinier SE).
    """
    return abs(gap) <= SE_MULTIPLE * gap_se or abs(gap) < SMALL_DIFFERENCE


def statement(rows: list[dict], refits: str = "", few: bool = False) -> tuple[str, str | None]:
    """The comparison in words, and the clear winner (None when the top is within two SE).

    A design is named best only when every other design's elpd is lower by
    more than :data:`SE_MULTIPLE` standard errors of the difference (with
    ``few`` units: by more than :data:`SMALL_DIFFERENCE`). ``refits`` is why
    the elpds come from exact refits instead of PSIS-LOO ('' when they do not).
    """
    best, others = rows[0], rows[1:]
    if few and not [r for r in others if r["level_with_best"]]:
        nearest = others[0]
        text = (f"{best['design']} predicts best: its elpd exceeds {nearest['design']}'s by "
                f"{nearest['gap']:.1f}, more than {SMALL_DIFFERENCE:g} (with so few units the SE of "
                f"a gap means nothing, so the gap alone decides)")
        text += "." if len(others) == 1 else ", and every other design's by more still."
        return _with_method(text, rows, refits), best["design"]
    close = [r for r in others if r["level_with_best"]]
    far = [r for r in others if not r["level_with_best"]]

    def diff(r):
        return f"{r['gap']:.1f} (SE {r['gap_se']:.1f})"

    if not close:
        nearest = others[0]
        text = (f"{best['design']} predicts best: its elpd exceeds {nearest['design']}'s by "
                f"{diff(nearest)}, more than {SE_MULTIPLE:g} standard errors")
        text += "." if len(others) == 1 else (
            f", and every other design's by more still.")
        winner = best["design"]
    else:
        names = ", ".join(r["design"] for r in close)
        rule = (f"below {SMALL_DIFFERENCE:g}, and with so few units their SE means nothing" if few
                else f"within {SE_MULTIPLE:g} standard errors or below {SMALL_DIFFERENCE:g}")
        text = (f"No clear winner: {best['design']} and {names} predict about equally well "
                f"(elpd differences {', '.join(diff(r) for r in close)} are {rule})")
        if far:
            text += "; " + ", ".join(f"{r['design']} predicts worse by {diff(r)}" for r in far)
        text += "."
        winner = None
    small = [r for r in others if abs(r["gap"]) < SMALL_DIFFERENCE]
    if small:
        text += (f" Differences below {SMALL_DIFFERENCE:g} ({', '.join(r['design'] for r in small)}) "
                 "are small: their standard errors are themselves uncertain.")
    return _with_method(text, rows, refits), winner


def _with_method(text: str, rows: list[dict], refits: str) -> str:
    """The statement with how the elpds were estimated, the rows to doubt and the weights."""
    if refits:
        text += f" Each elpd comes from exact refits without each fold, not PSIS-LOO: {refits}."
    for r in rows:
        if r["high_k_rows"]:
            text += (f" {r['design']} has {len(r['high_k_rows'])} row(s) with Pareto k above "
                     f"{PARETO_K_LIMIT:g}; its elpd may be too optimistic.")
    weights = ", ".join(f"{r['design']} {r['stacking_weight']:.2f}" for r in rows)
    return text + f" Stacking weights: {weights}."


def point_covariate(design, data, n_points: int) -> tuple[np.ndarray, str]:
    """The covariate value of each pointwise LOO term, and its axis label.

    One term per table row: the row's covariate. One term per cohort (or
    other label, e.g. a multinomial per cohort): the largest covariate value
    of that label's rows. Otherwise the term's number.
    """
    recipe = getattr(design, "recipe", None)
    covariate = getattr(recipe, "covariate", None)
    columns = getattr(data, "columns", {})
    if covariate and covariate in columns:
        values = np.asarray(columns[covariate], dtype=float)
        if values.size == n_points:
            return values, covariate
        for name, labels in getattr(data, "labels", {}).items():
            if len(labels) == n_points and name in columns:
                codes = np.asarray(columns[name], dtype=int)
                out = np.full(n_points, -np.inf)
                np.maximum.at(out, codes, values)
                return out, f"{covariate} (oldest of each {name})"
    return np.arange(1, n_points + 1, dtype=float), "pointwise term"


def verdict_table(checks, labels) -> list[dict]:
    """Every assumption with each design's verdict (``None`` where a design lacks it)."""
    order: list[str] = []
    by_design = {}
    for check, label in zip(checks, labels):
        verdicts = {a["key"]: a["verdict"] for a in check.summary["assumptions"]}
        declared = ["priors", "computation", "implementation"] + [a.key for a in check.run.design.assumptions]
        for key in declared + list(verdicts):
            if key not in order:
                order.append(key)
        by_design[label] = verdicts
    return [{"assumption": key, "verdicts": {label: by_design[label].get(key) for label in labels}}
            for key in order]


def document(checks, labels, plan: Plan, settings: engine.Settings, run_manifest: dict,
             say: Callable[[str], None] = lambda _: None) -> dict:
    """The ``workbench.compare/1`` document."""
    from workbench import kfold

    elpds = loo_by_design(checks, labels)
    refitted, why, unit = held_out_by_design(checks, labels, elpds, plan.seed, say)
    elpds = refitted or elpds
    few = int(np.asarray(elpds[labels[0]].elpd_i).size) < kfold.MIN_LOO_UNITS
    rows = comparison_rows(elpds, few=few)
    text, winner = statement(rows, refits=why, few=few)
    reference = rows[0]["design"]
    first = checks[0]
    x, x_name = point_covariate(first.run.design, first.run.data, int(np.asarray(elpds[reference].elpd_i).size))
    doc = {
        "schema": SCHEMA,
        "title": plan.title or "Comparison of " + " and ".join(labels),
        "data": dict(first.summary["data"]),
        "seed": plan.seed,
        "sampling": settings.to_dict(),
        "relax": plan.relax,
        "designs": [{"label": label, "target": spec.target, "options": dict(spec.options),
                     "priors": dict(spec.priors), "summary": c.summary}
                    for spec, label, c in zip(plan.designs, labels, checks)],
        "comparison": rows,
        "elpd_method": "k-fold" if refitted else "psis-loo",
        "why": why,
        "unit": unit,
        "statement": text,
        "best": winner,
        "reference": reference,
        "verdicts": verdict_table(checks, labels),
        "pointwise": {"covariate": x_name, "x": x.tolist(),
                      "elpd": {label: np.asarray(e.elpd_i).ravel().tolist() for label, e in elpds.items()}},
        "manifest": run_manifest,
    }
    return writers.clean(doc)


# --- figure and files -------------------------------------------------------------------------


def pointwise_figure(doc: dict):
    """Pointwise elpd difference of each design against the best one, over the covariate.

    Points above zero are observations the design predicts better than the
    best-ranked design; a cluster of them shows where in the data it wins.
    """
    from workbench.report import plots

    point = doc["pointwise"]
    x = np.asarray(point["x"], dtype=float)
    reference = doc["reference"]
    base = np.asarray(point["elpd"][reference])
    fig, ax = plots._figure(6.6, 3.4)
    ax.axhline(0.0, color=plots.INK, lw=1, ls="--")
    markers = "osD^v<>"
    colours = [plots.FIT, plots.PRIOR, plots.ALERT, plots.FAINT]
    order = np.argsort(x, kind="stable")
    for i, row in enumerate(r for r in doc["comparison"] if r["design"] != reference):
        d = np.asarray(point["elpd"][row["design"]]) - base
        colour = colours[i % len(colours)]
        ax.plot(x[order], d[order], markers[i % len(markers)], ms=4.5, color=colour, alpha=0.85,
                label=plots.wrap_text(f"{row['design']} minus {reference} (sum {d.sum():+.1f})", 48))
    ax.set_xlabel(point["covariate"])
    ax.set_ylabel("pointwise elpd difference")
    ax.set_title(plots.wrap_text(f"above 0: predicted better than by {reference}"), fontsize=8.5, loc="left")
    # Below the axes: design labels are long and the legend must not cover points or be cut.
    ax.legend(frameon=False, fontsize=7.5, loc="upper left", bbox_to_anchor=(0.0, -0.2), borderaxespad=0.0)
    return fig


def slug(label: str) -> str:
    """A file-system-safe folder name for a design label, distinct for distinct labels.

    A label that had to change (a ``:`` or ``,`` replaced, a long one cut)
    keeps a short hash of itself: ``covariates=a,b`` and ``covariates=a_b``
    would otherwise share a folder.
    """
    safe = re.sub(r"[^A-Za-z0-9_.=-]+", "_", label)[:80].strip("_") or "design"
    if safe == label:
        return safe
    return f"{safe}-{hashlib.sha1(label.encode('utf-8')).hexdigest()[:8]}"


def write_compare(result: CompareResult, command: str) -> dict[str, Path]:
    """compare.json, compare.html, notebook.ipynb and each design's report and summary."""
    from workbench import notebook
    from workbench.kfold import MIN_LOO_UNITS
    from workbench.report import html as report_html
    from workbench.report import plots

    folder = result.folder
    files: dict[str, Path] = {}
    reports = {}
    for check, entry in zip(result.checks, result.doc["designs"]):
        sub = folder / "designs" / slug(entry["label"])
        sub.mkdir(parents=True, exist_ok=True)
        writers.write_json(sub / "summary.json", check.summary)
        page = report_html.render(check.run, check.summary, _design_command(result.doc, entry))
        reports[entry["label"]] = writers.atomic_write(sub / "report.html", page)
    files["json"] = writers.write_json(folder / "compare.json", result.doc)
    figure = plots.to_data_uri(pointwise_figure(result.doc))
    page = report_html.environment().get_template("compare.html.j2").render(
        doc=result.doc, figure=figure, command=command,
        reports={label: str(p.relative_to(folder)) for label, p in reports.items()},
        se_multiple=SE_MULTIPLE, k_limit=PARETO_K_LIMIT, small=SMALL_DIFFERENCE,
        few=len(result.doc["pointwise"]["x"]) < MIN_LOO_UNITS)
    files["report"] = writers.atomic_write(folder / "compare.html", page)
    files["notebook"] = writers.atomic_write(folder / "notebook.ipynb", notebook.for_compare(result.doc))
    return files


def _design_command(doc: dict, entry: dict) -> str:
    s = doc["sampling"]
    parts = ["workbench check", entry["target"], "--data", doc["data"]["path"]]
    parts += [f"--set {k}={v}" for k, v in entry["options"].items()]
    parts += [f"--prior {k}={v}" for k, v in entry["priors"].items()]
    parts += ["--seed", str(doc["seed"]), "--draws", str(s["draws"]), "--tune", str(s["tune"]),
              "--chains", str(s["chains"]), "--target-accept", str(s["target_accept"])]
    parts += [] if doc["relax"] else ["--no-relax"]
    return " ".join(parts)


def history_entry(result: CompareResult):
    """The run-history row of a comparison: every design, each with its verdicts."""
    from workbench import fitcache
    from workbench.history import Entry

    doc = result.doc
    designs = [c.run.design for c in result.checks]
    targets = list(dict.fromkeys(d["target"] for d in doc["designs"]))
    hashes = list(dict.fromkeys(fitcache.source_sha256(d) for d in designs))
    return Entry(
        command="compare",
        target=" | ".join(targets),
        target_hash=" | ".join(h[:16] for h in hashes),
        design=" | ".join(d["label"] for d in doc["designs"]),
        data_path=doc["data"]["path"],
        data_hash=doc["data"]["sha256"],
        seed=doc["seed"],
        verdicts={d["label"]: {a["key"]: a["verdict"] for a in d["summary"]["assumptions"]}
                  for d in doc["designs"]},
        report=str(result.files.get("report", "")),
    )
