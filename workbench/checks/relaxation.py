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
Computing 27, 1413-1432 (elpd differences and their standard errors).
"""

from __future__ import annotations

import numpy as np

from workbench.checks import Context, check
from workbench.checks.loo import loo_of, loo_terms
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


def relaxation_finding(assumption, relaxation, expanded, original, labels=None) -> Finding:
    draws = expanded.draws([relaxation.parameter])[relaxation.parameter].ravel()
    beyond = float(np.mean(np.abs(draws - relaxation.null) > relaxation.negligible))
    lo, mid, hi = np.percentile(draws, [5, 50, 95])
    gain = pointwise_gain(expanded, original)
    diff, se = float(gain.sum()), float(np.sqrt(gain.size * np.var(gain)))
    labels = labels or [f"row {i + 1}" for i in range(gain.size)]
    return Finding(
        assumption=assumption.key,
        kind="relaxation",
        check=f"relaxation:{relaxation.parameter}",
        value=float(mid),
        detail=(
            f"Expanded model ({relaxation.meaning}): {relaxation.parameter} median {mid:.3g}, "
            f"90% interval {lo:.3g} to {hi:.3g} (null {relaxation.null:g}); "
            f"{beyond:.0%} of draws lie beyond ±{relaxation.negligible:g} of the null; "
            f"elpd difference {diff:+.1f} (SE {se:.1f})."
        ),
        numbers={
            "parameter": relaxation.parameter,
            "null": relaxation.null,
            "negligible": relaxation.negligible,
            "share_beyond": beyond,
            "interval": [float(lo), float(hi)],
            "elpd_diff": diff,
            "elpd_se": se,
            "absorbs_misfit": bool(relaxation.absorbs_misfit),
            "contributors": contributors(gain, labels),
        },
        figure=f"relaxation-{assumption.key}",
    )


@check
def relaxations(context: Context) -> list[Finding]:
    findings = []
    labels = None
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
        findings.append(
            relaxation_finding(assumption, relaxation, context.relaxed[relaxation.parameter],
                               context.fit, labels)
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
