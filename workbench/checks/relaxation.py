"""Relaxation checks: continuous model expansion, one parameter at a time.

Each relaxable assumption has a nested expansion whose extra parameter equals
``null`` when the assumption holds. The check reports how much posterior mass
of that parameter lies beyond ``negligible`` of the null and the PSIS-LOO
difference between expanded and original model with its standard error.

References
----------
Gelman, A., Vehtari, A., Simpson, D. et al. (2020). Bayesian workflow.
arXiv:2011.01808, section 6.3 (continuous model expansion).
Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model
evaluation using leave-one-out cross-validation and WAIC. Statistics and
Computing 27, 1413-1432 (elpd differences and their standard errors; exact
refits where PSIS fails).

The elpd difference comes from PSIS-LOO when there are enough units and
every Pareto k is good; otherwise from the exact refits of
:mod:`workbench.kfold` when they ran, and otherwise the relaxation is judged
by its parameter alone, against the same parameter under its prior. The
finding says which and why (``elpd_method``, ``why_not_psis``).
"""

from __future__ import annotations

import numpy as np

from workbench.checks import Context, check
from workbench import kfold
from workbench.checks.loo import loo_numbers, loo_of, loo_terms
from workbench.checks.predictive import discrepancies
from workbench.findings import COMPUTATION, Finding
from workbench.statistics import predictive_p_value
from workbench.wording import p_equals

# The rows named as carrying a relaxation's gain: the largest positive
# contributions, at most this many, stopping once they hold this share of the
# total positive gain (a reader follows up a handful of rows, not a list).
TOP_CONTRIBUTORS = 5
CONTRIBUTOR_SHARE = 0.8


def pointwise_gain(expanded, original) -> np.ndarray:
    """Pointwise elpd of the expanded fit minus the original's (PSIS-LOO, paired rows)."""
    a, b = loo_of(expanded), loo_of(original)
    return np.asarray(a.elpd_i, dtype=float).ravel() - np.asarray(b.elpd_i, dtype=float).ravel()


def unit_word(data, n_terms: int) -> str:
    """What one pointwise LOO term is in the table's words: a label column (``cohort``) or ``row``."""
    columns = getattr(data, "columns", {}) or {}
    for name, levels in (getattr(data, "labels", {}) or {}).items():
        if len(levels) == n_terms and len(levels) > 1 and name in columns \
                and np.asarray(columns[name]).size != n_terms:
            return name
    return "row"


def term_labels(design, data, n_terms: int) -> list[str]:
    """A label for each pointwise LOO term in the table's words (see :func:`loo_terms`)."""
    return loo_terms(design, data, n_terms)[1]


def contributors(gain: np.ndarray, labels: list[str]) -> list[dict]:
    """The terms that carry most of the positive gain: ``[{row, label, share}]``.

    ``row`` numbers the pointwise term from 0 (as ``loo.bad_pareto_k`` does);
    ``share`` is its part of the sum of the positive contributions.
    """
    gain = np.asarray(gain, dtype=float)
    positive = float(gain[gain > 0].sum())
    if positive <= 0:
        return []
    out, held = [], 0.0
    for i in np.argsort(-gain, kind="stable")[:TOP_CONTRIBUTORS]:
        if gain[i] <= 0 or held >= CONTRIBUTOR_SHARE:
            break
        share = float(gain[i] / positive)
        out.append({"row": int(i), "label": labels[i], "share": share})
        held += share
    return out


def share_beyond(relaxation, fit) -> float:
    """Share of the expansion parameter's posterior draws beyond ``negligible`` of its null."""
    draws = fit.draws([relaxation.parameter])[relaxation.parameter].ravel()
    return float(np.mean(np.abs(draws - relaxation.null) > relaxation.negligible))


# Prior draws of an expansion parameter when it is judged alone: the share
# beyond its negligible distance is then known to about +-0.01.
PRIOR_DRAWS = 4000


def prior_share_beyond(design, data, relaxation, seed: int = 0) -> float:
    """The same share under the parameter's prior (forward draws of the relaxed model)."""
    import pymc as pm

    model = design.build(data, relaxation)
    draws = np.asarray(pm.draw(model[relaxation.parameter], draws=PRIOR_DRAWS, random_seed=seed))
    return float(np.mean(np.abs(draws.reshape(PRIOR_DRAWS, -1) - relaxation.null) > relaxation.negligible))


def odds_ratio(posterior_share: float, prior_share: float, draws: int) -> float:
    """Posterior over prior odds of lying beyond the negligible distance (a Bayes factor).

    Half a draw is added to each side of both shares so that a share of 0 or 1
    from finitely many draws gives a finite ratio.
    """
    def odds(share, n):
        return (share * n + 0.5) / ((1.0 - share) * n + 0.5)

    return float(odds(posterior_share, draws) / odds(prior_share, PRIOR_DRAWS))


def _plural(word: str, n: int) -> str:
    return word if n == 1 else f"{word}s"


def relaxation_finding(assumption, relaxation, expanded, original, labels=None, refits=None,
                       unit: str = "row", prior_share=None) -> Finding:
    """The expansion parameter against its null and the elpd difference that may decide.

    ``refits`` is the run's :class:`workbench.kfold.CrossValidation` (None:
    no refits ran); ``prior_share()`` gives the parameter's share beyond the
    negligible distance under its prior, asked only when the parameter is
    judged alone.
    """
    draws = expanded.draws([relaxation.parameter])[relaxation.parameter].ravel()
    beyond = share_beyond(relaxation, expanded)
    lo, mid, hi = np.percentile(draws, [5, 50, 95])
    psis_gain = pointwise_gain(expanded, original)
    psis_diff, psis_se = float(psis_gain.sum()), float(np.sqrt(psis_gain.size * np.var(psis_gain)))
    units = int(psis_gain.size)
    labels = labels or [f"row {i + 1}" for i in range(units)]
    base_loo, relaxed_loo = loo_numbers(original), loo_numbers(expanded)
    high = len(set(base_loo["bad_pareto_k"]) | set(relaxed_loo["bad_pareto_k"]))
    doubt = kfold.why_not_psis(units, high, base_loo["k_threshold"], unit)
    refits = refits or kfold.CrossValidation()
    numbers = {
        "parameter": relaxation.parameter,
        "null": relaxation.null,
        "negligible": relaxation.negligible,
        "share_beyond": beyond,
        "interval": [float(lo), float(hi)],
        "units": units,
        "psis_elpd_diff": psis_diff,
        "psis_elpd_se": psis_se,
        "why_not_psis": doubt,
        "absorbs_misfit": bool(relaxation.absorbs_misfit),
    }
    head = (f"Expanded model ({relaxation.meaning}): {relaxation.parameter} median {mid:.3g}, "
            f"90% interval {lo:.3g} to {hi:.3g} (null {relaxation.null:g}); "
            f"{beyond:.0%} of draws lie beyond ±{relaxation.negligible:g} of the null; ")
    if not doubt:
        gain, method = psis_gain, "psis-loo"
        tail = (f"elpd difference {psis_diff:+.1f} (SE {psis_se:.1f}) by PSIS-LOO over {units} "
                f"{_plural(unit, units)}.")
    elif refits.base is not None and relaxation.parameter in refits.relaxed:
        done = refits.relaxed[relaxation.parameter]
        gain, method = done.pointwise - refits.base.pointwise, "k-fold"
        how = (f"leaving out each of the {units} {_plural(unit, units)} in turn" if done.folds == units
               else f"in {done.folds} folds of the {units} {_plural(unit, units)}")
        numbers["folds"] = done.folds
        tail = (f"elpd difference {gain.sum():+.1f} (SE {np.sqrt(gain.size * np.var(gain)):.1f}) from "
                f"exact refits {how}, not PSIS-LOO: {doubt}.")
    else:
        gain, method = None, "parameter"
        prior = float(prior_share()) if prior_share is not None else float("nan")
        ratio = odds_ratio(beyond, prior, draws.size)
        why = refits.skipped.get(relaxation.parameter, "no refits ran")
        numbers.update(prior_share_beyond=prior, odds_ratio=ratio, why_no_refits=why)
        tail = (f"judged by {relaxation.parameter} alone ({prior:.0%} of its prior draws lie beyond "
                f"±{relaxation.negligible:g}, so the data moved the odds by {ratio:.3g} times), not by "
                f"an elpd difference: PSIS-LOO cannot decide ({doubt}) and no exact refits ran ({why}).")
    numbers["elpd_method"] = method
    if gain is None:
        numbers.update(elpd_diff=None, elpd_se=None, contributors=[])
    else:
        numbers.update(elpd_diff=float(gain.sum()), elpd_se=float(np.sqrt(gain.size * np.var(gain))),
                       contributors=contributors(gain, labels))
    return Finding(
        assumption=assumption.key,
        kind="relaxation",
        check=f"relaxation:{relaxation.parameter}",
        value=float(mid),
        detail=head + tail,
        numbers=numbers,
        figure=relaxation_figure(relaxation),
    )


def relaxation_figure(relaxation) -> str:
    """The figure key of a relaxation's posterior (one per relaxed model: an assumption may have several)."""
    return f"relaxation-{relaxation.parameter}"


@check
def relaxations(context: Context) -> list[Finding]:
    findings = []
    labels = unit = None
    for assumption in context.design.assumptions:
        relaxation = assumption.relaxation
        # Without a relaxed fit there is no pointwise gain to split into rows,
        # even where the targeted statistic is a sum over rows: such an
        # assumption names no contributors.
        if relaxation is None or relaxation.parameter not in context.relaxed:
            continue
        if labels is None:
            n_terms = np.asarray(loo_of(context.fit).elpd_i).size
            labels = term_labels(context.design, context.data, n_terms)
            unit = unit_word(context.data, n_terms)
        findings.append(
            relaxation_finding(assumption, relaxation, context.relaxed[relaxation.parameter],
                               context.fit, labels, context.refits, unit,
                               lambda r=relaxation: prior_share_beyond(context.design, context.data, r))
        )
    return findings


@check
def statistics_under_relaxations(context: Context) -> list[Finding]:
    """Each assumption's statistic re-scored under every other relaxed model.

    When relaxing assumption B makes assumption A's statistic look ordinary
    again, A's alarm was a side effect of B's failure; the verdict step uses
    this to point at the cause rather than at every symptom.
    """
    findings = []
    for other in context.design.assumptions:
        relaxation = other.relaxation
        if relaxation is None or relaxation.parameter not in context.relaxed:
            continue
        relaxed = context.relaxed[relaxation.parameter]
        if "posterior_predictive" not in relaxed.idata.children:
            continue
        for assumption in context.design.assumptions:
            statistic = assumption.statistic
            if statistic is None or assumption.key == other.key or assumption.uninformed(context.data):
                continue
            observed, replicated = discrepancies(statistic, context.data, relaxed)
            p = predictive_p_value(observed, replicated, statistic.sides)
            findings.append(
                Finding(
                    assumption=assumption.key,
                    kind="ppc_under_relaxation",
                    check=f"ppc:{statistic.name}|{relaxation.parameter}",
                    value=float(np.nanmean(observed)),
                    p_value=p,
                    detail=(f"Under the model that relaxes {other.key} ({relaxation.parameter}), "
                            f"'{statistic.name}' has {p_equals(p)}."),
                    numbers={"relaxation_of": other.key},
                )
            )
    return findings


@check
def sampling_under_relaxations(context: Context) -> list[Finding]:
    """Sampler health of each relaxed fit, filed under ``computation``.

    A misspecified model can have a posterior the sampler cannot explore
    (separate modes, divergences) that disappears once the failing
    assumption is relaxed; the verdict step then calls the sampler trouble a
    symptom rather than a cause.
    """
    from workbench.checks.computation import computation_summary

    findings = []
    for assumption in context.design.assumptions:
        relaxation = assumption.relaxation
        if relaxation is None or relaxation.parameter not in context.relaxed:
            continue
        numbers = computation_summary(context.relaxed[relaxation.parameter].idata)
        if any(f.numbers.get("relaxation_of") == assumption.key for f in findings):
            continue
        findings.append(
            Finding(
                assumption=COMPUTATION,
                kind="computation_under_relaxation",
                check=f"sampling|{relaxation.parameter}",
                value=numbers["max_rhat"],
                detail=(f"With {assumption.key} relaxed ({relaxation.parameter}): largest R-hat "
                        f"{numbers['max_rhat']:.3f}, {numbers['divergences']} divergent transitions."),
                numbers={**numbers, "relaxation_of": assumption.key},
            )
        )
    return findings
