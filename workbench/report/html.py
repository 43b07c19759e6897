"""The self-contained HTML report of a check run.

One file: CSS inline, figures as inline PNG, no script and no network fetch.
Every user-supplied string passes through Jinja's autoescaping.
"""

from __future__ import annotations

import hashlib
import html
from pathlib import Path

import jinja2
import numpy as np

from workbench import wording
from workbench.checks.relaxation import relaxation_figure
from workbench.recipe import outcome_words
from workbench.report import plots
from workbench.verdicts import BROKEN, DOUBTFUL, HOLDS, UNCHECKED, headline

TEMPLATES = Path(__file__).parent / "templates"

# Verdicts are told apart by word and shape, not colour alone.
BADGES = {
    HOLDS: ("✓", "holds"),
    DOUBTFUL: ("△", "doubtful"),
    BROKEN: ("✕", "broken"),
    UNCHECKED: ("○", "unchecked"),
}

CAUTION = (
    "This model may inform decisions about people. Its checks say whether the model is "
    "internally consistent with the data, not whether a decision based on it is fair, lawful "
    "or safe: follow your organisation's model-risk policy, local regulation and licensed "
    "professional practice before acting on it."
)


def environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES)),
        autoescape=jinja2.select_autoescape(["html", "j2"], default=True),
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["num"] = wording.number
    env.filters["p"] = wording.p_value
    env.filters["count"] = wording.count
    env.filters["check"] = check_words
    env.globals["badges"] = BADGES
    return env


# How the report names each family of checks; the ids stay in summary.json.
SAMPLER_CHECKS = {
    "divergences": "Divergent transitions",
    "funnel": "Funnel at a centred scale",
    "boundary": "Divergences at a bound",
    "rhat": "Chains agree (R-hat)",
    "ess": "Effective draws (ESS)",
    "bfmi": "Energy transitions (E-BFMI)",
    "treedepth": "Tree depth",
    "ridge": "Correlated parameters",
    "contraction": "Learning from the data (contraction)",
}
STATISTICS = {"mean": "mean", "sd": "spread"}


def check_words(check: str, outcomes: dict[str, str] | None = None) -> str:
    """A check id (``prior_coverage:y:sd``, ``ppc:late_trend|cohort_sd``) in words.

    ``outcomes`` names observed variables by the table's columns (``y`` is
    ``successes``).
    """
    outcomes = outcomes or {}
    family, _, rest = check.partition(":")
    if "|" in family:  # a check re-scored under a relaxed model: "sampling|cohort_sd"
        family, relaxed = family.split("|", 1)
        rest = f"|{relaxed}"
    subject, _, relaxed = rest.partition("|")
    words = subject.replace("_", " ")
    if family == "prior_coverage":
        name, _, stat = subject.rpartition(":")
        text = f"Prior predictive {STATISTICS.get(stat, stat)} of {outcomes.get(name, name)}"
    elif family == "prior_tail":
        text = f"Posterior of {subject} among its prior draws" if subject else "Posteriors among their prior draws"
    elif family == "prior_sensitivity":
        text = f"Prior and likelihood weight on {subject}" if subject else "Prior and likelihood weight"
    elif family == "computation":
        text = SAMPLER_CHECKS.get(subject, words.capitalize())
    elif family == "sampling":
        text = "Sampler"
    elif family == "ppc":
        text = f"Predictive check: {words}"
    elif family == "relaxation":
        text = f"Relaxed model: {subject}"
    elif family == "calibration":
        text = "Calibration: failed fits" if subject == "failures" else f"Calibration of {subject}"
    else:
        text = check.replace("_", " ").replace(":", ": ")
    return f"{text}, with {relaxed} free" if relaxed else text


def anchor(key: str) -> str:
    """A safe in-page id for an assumption key.

    Characters other than letters, digits, ``-`` and ``_`` become ``-``; a
    key that needed such a change also gets a short hash of itself, so two
    keys that differ only there (``a<b``, ``a>b``) keep distinct ids.
    """
    safe = "".join(c if c.isalnum() or c in "-_" else "-" for c in key)
    if safe != key:
        safe += "-" + hashlib.sha1(key.encode("utf-8")).hexdigest()[:8]
    return "a-" + safe


def _free_names(fit) -> list[str]:
    post = fit.idata["posterior"]
    names = [rv.name for rv in fit.model.free_RVs] if fit.model is not None else list(post.data_vars)
    return [n for n in names if n in post.data_vars and post[n].ndim == 2]


FIT_CAPTION = ("Observed data against the fitted model: each point with the 90% interval of "
               "its replicated values, a point outside it marked ◆.")


def figures(run) -> dict[str, dict]:
    """Every figure of the report by name: {name: {"uri", "caption"}}."""
    out: dict[str, dict] = {}
    fit = run.fit
    recipe = getattr(run.design, "recipe", None)
    posterior = fit.draws()
    predictive = fit.draws(group="posterior_predictive")
    prior_predictive = fit.draws(group="prior_predictive") if "prior_predictive" in fit.idata.children else {}
    if recipe is not None and recipe.figure is not None:
        drawn = recipe.figure(run.data, run.design.options, posterior, predictive)
        # A recipe's figure may bring its own caption: (figure, caption).
        fig, caption = drawn if isinstance(drawn, tuple) else (drawn, FIT_CAPTION)
        out["fit"] = {"uri": plots.to_data_uri(fig), "caption": caption}
    else:
        covariate = getattr(recipe, "covariate", None) if recipe else None
        observed = fit.idata["observed_data"].to_dataset()
        for name in observed.data_vars:
            y = observed[name].values
            if y.ndim != 1:
                continue
            x = run.data[covariate] if covariate and covariate in getattr(run.data, "columns", {}) else np.arange(y.size)
            fig = plots.predictive_by_covariate(
                x, y, prior_predictive.get(name), predictive.get(name), covariate or "row", name)
            out[f"fit-{name}"] = {"uri": plots.to_data_uri(fig),
                                  "caption": f"{name}: observed against prior and posterior predictive, each point with "
                                             f"the 90% interval of its replicated values, a point outside it marked ◆."}
    from workbench.rules.model_fit import loo_pit_reading

    words = outcome_words(run.design)
    for name, numbers in (run.extras.get("loo_pit") or {}).items():
        shown = words.get(name, name)
        out[f"loo-pit-{name}"] = {
            "uri": plots.to_data_uri(plots.loo_pit(numbers, shown)),
            "caption": f"{shown}: LOO-PIT ECDF minus the uniform CDF, with its "
                       f"{numbers['level']:.0%} simultaneous band.",
            "reading": loo_pit_reading(numbers, shown)[1]}
    for key, (stat_name, observed, replicated, p) in run.extras.get("ppc", {}).items():
        out[f"ppc-{key}"] = {"uri": plots.to_data_uri(plots.statistic_check(observed, replicated, stat_name, p)),
                             "caption": f"Targeted statistic '{stat_name}': observed against replicated data."}
    for assumption in getattr(run.design, "assumptions", ()):
        relaxation = assumption.relaxation
        if relaxation and relaxation.parameter in run.relaxed:
            draws = run.relaxed[relaxation.parameter].draws([relaxation.parameter])[relaxation.parameter]
            fig = plots.relaxation_posterior(draws, relaxation.null, relaxation.negligible, relaxation.parameter,
                                             parameter_support(run.relaxed[relaxation.parameter], run.design,
                                                               relaxation.parameter))
            out[relaxation_figure(relaxation)] = {
                "uri": plots.to_data_uri(fig),
                "caption": f"Posterior of '{relaxation.parameter}' in the expanded model, against its null."}
    names = _free_names(fit)
    post_ds = fit.idata["posterior"].to_dataset()
    if names:
        fig = plots.rank_plot({n: post_ds[n].values for n in names}, names)
        out["ranks"] = {"uri": plots.to_data_uri(fig),
                        "caption": "Rank histograms per chain: flat and overlapping when chains agree."}
        divergent = fit.idata["sample_stats"]["diverging"].values.ravel().astype(bool)
        fig = plots.pair_plot({n: post_ds[n].values for n in names}, names, divergent)
        out["pairs"] = {"uri": plots.to_data_uri(fig),
                        "caption": "Posterior draws of the parameters in pairs; divergent transitions marked x."}
    loo = run.extras.get("loo")
    if loo:
        unit, labels = loo.get("unit", "row"), loo.get("labels")
        out["pareto-k"] = {"uri": plots.to_data_uri(plots.pareto_k(loo["pareto_k"], loo["k_threshold"], unit, labels)),
                           "caption": pareto_caption(unit, len(loo["pareto_k"]), loo["k_threshold"],
                                                     getattr(run.data_info, "rows", None))}
    if run.calibration is not None and run.calibration.ranks:
        from workbench.checks.calibration import ECDF_FIGURE, HISTOGRAM_FIGURE
        from workbench.report import calibration_plots

        source = ("Outcomes simulated by an independent simulator (this checks the model code)."
                  if run.calibration.checks_model_code else
                  "Outcomes simulated from the model's own prior predictive: this checks the "
                  "sampler, not the model code.")
        out[ECDF_FIGURE] = {
            "uri": plots.to_data_uri(calibration_plots.ecdf_difference_figure(run.calibration)),
            "caption": f"Calibration ranks: ECDF minus uniform with its 95% simultaneous band. {source}"}
        out[HISTOGRAM_FIGURE] = {
            "uri": plots.to_data_uri(calibration_plots.rank_histogram_figure(run.calibration)),
            "caption": f"Calibration rank histograms with the 99% range of each bar. {source}"}
    return out


def high_pareto_k(loo: dict) -> list[str]:
    """Labels of the terms whose Pareto k is above the threshold (their numbers from 1 without labels)."""
    labels = loo.get("labels")
    return [labels[i] if labels else f"{loo.get('unit', 'row')} {i + 1}" for i in loo.get("bad_pareto_k", [])]


def pareto_caption(unit: str, terms: int, threshold: float, rows: int | None) -> str:
    """What the Pareto k plot shows, in the unit PSIS-LOO leaves out."""
    plural = unit if unit.endswith("s") else unit + "s"
    text = f"Pareto k of each {unit} in PSIS-LOO ({terms} {plural}; each term leaves one {unit} out"
    if rows is not None and rows != terms:
        text += f" of a table of {rows} rows"
    return text + f"); above {threshold:.2f} importance sampling cannot stand in for refitting."


def parameter_support(fit, design, name: str) -> tuple[float, float]:
    """The interval a parameter lives on: from its transform in the fitted model, else its prior."""
    from pymc.distributions.transforms import Interval, LogOddsTransform, LogTransform

    model = getattr(fit, "model", None)
    if model is not None and name in model.named_vars:
        rv = model[name]
        transform = model.rvs_to_transforms.get(rv)
        if isinstance(transform, LogTransform):
            return 0.0, np.inf
        if isinstance(transform, LogOddsTransform):
            return 0.0, 1.0
        if isinstance(transform, Interval):
            bounds = [b if b is None else float(np.asarray(b.eval() if hasattr(b, "eval") else b))
                      for b in transform.args_fn(*rv.owner.inputs)]
            return (-np.inf if bounds[0] is None else bounds[0]), (np.inf if bounds[1] is None else bounds[1])
        if rv in model.free_RVs:
            return -np.inf, np.inf
    from workbench.errors import OptionError
    from workbench.priors import parse_prior, support

    try:
        found = support(parse_prior(design.prior_text(name), where=name))
    except (AttributeError, OptionError):  # a model file's parameter has no prior text
        found = None
    return found or (-np.inf, np.inf)


def figure_order(verdict, available) -> list[str]:
    """Names of an assumption's figures, the one of the deciding evidence first.

    When the relaxed model's parameter decided a verdict its posterior leads;
    when the targeted statistic decided, its predictive histogram does. The
    rest follow in the order of the evidence.
    """
    names = [f.figure for f, _ in verdict.evidence if f.figure and f.figure in available]
    decided = verdict.decided_by
    if decided is not None and decided.figure in names:
        names.insert(0, decided.figure)
    return list(dict.fromkeys(names))


def estimate_rows(run, summary: dict, truth=None) -> list[dict]:
    """The parameter table: each estimate with its true value when ``truth`` names it."""
    from workbench.estimates import beside_truth

    estimates = summary.get("parameters") or {}
    true = beside_truth(run.fit.idata, estimates, truth) if truth else {}
    rows = []
    for label, e in estimates.items():
        t = true.get(label)
        outside = t is not None and e["low"] is not None and e["high"] is not None \
            and not e["low"] <= t <= e["high"]
        rows.append({"label": label, **e, "truth": t, "outside": outside})
    return rows


def render(run, summary: dict, command: str = "", truth=None) -> str:
    """The report as one HTML string; ``truth`` holds the true values of simulated data."""
    with plots.literal_text():  # group and outcome names are user text, not mathtext
        figs = figures(run)
    recipe = getattr(run.design, "recipe", None)
    outcomes = outcome_words(run.design)
    verdicts = []
    for v in run.verdicts:
        worst = max((j.level for _, j in v.evidence), default=0)
        # An assumption that holds is summed up by its judgement alone, so the
        # diagnosis table fits the first screen; the numbers stay in its evidence.
        lead = wording.readable(next(((f"{f.detail} {j.sentence}" if worst else j.sentence or f.detail)
                                      for f, j in v.evidence if j.level == worst), ""))
        figure_names = figure_order(v, figs)
        verdicts.append({
            "key": v.key, "anchor": anchor(v.key), "statement": v.statement, "verdict": v.verdict,
            "lead": lead.strip(), "advice": wording.readable(v.advice),
            "evidence": [{"check": f.check, "words": check_words(f.check, outcomes), "value": f.value, "p_value": f.p_value,
                          "detail": wording.readable(f.detail),
                          "judgement": wording.readable(j.sentence), "level": j.level}
                         for f, j in v.evidence],
            "figures": [dict(figs[n], name=n) for n in figure_names],
            "carriers": wording.gain_carriers(v.contributors),
        })
    used = {f["name"] for v in verdicts for f in v["figures"]}
    fit_figs = [dict(v, name=k) for k, v in figs.items() if k.startswith(("fit", "loo-pit-"))]
    sampler_figs = [dict(figs[k], name=k) for k in ("ranks", "pairs") if k in figs]
    loo_figs = [dict(figs[k], name=k) for k in ("pareto-k",) if k in figs]
    calibration_figs = [dict(v, name=k) for k, v in figs.items() if k.startswith("calibration-") and k not in used]
    template = environment().get_template("report.html.j2")
    return template.render(
        title=f"Model check: {run.design.label()}",
        design_label=run.design.label(),
        summary=summary,
        verdicts=verdicts,
        headline=wording.readable(headline(run.verdicts)),
        worst=verdicts[0]["verdict"] if verdicts else HOLDS,
        estimates=estimate_rows(run, summary, truth),
        has_truth=bool(truth),
        caution=CAUTION if recipe is not None and recipe.people_decisions else "",
        fit_figs=fit_figs,
        pit_skipped=[outcomes.get(n, n) for n in run.extras.get("loo_pit_skipped", [])],
        sampler_figs=sampler_figs,
        loo_figs=loo_figs,
        calibration_figs=calibration_figs,
        derived=summary.get("derived") or {},
        loo_unit=(run.extras.get("loo") or {}).get("unit", "row"),
        high_k=high_pareto_k(run.extras.get("loo") or {}),
        command=command,
        escape=html.escape,
    )
