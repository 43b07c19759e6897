"""Posterior predictive checks of each assumption's targeted statistic.

For every declared assumption with a statistic T, compare the realised
discrepancy T(y, theta_s) with T(y_rep_s, theta_s) over posterior draws s and
report the posterior predictive p-value.

References
----------
Gelman, A., Meng, X.-L. and Stern, H. (1996). Posterior predictive assessment
of model fitness via realized discrepancies. Statistica Sinica 6, 733-807.
Gelman, A. et al. (2013). Bayesian Data Analysis, 3rd ed., chapter 6.
"""

from __future__ import annotations

import numpy as np

from workbench.checks import Context, check
from workbench.findings import Finding
from workbench.statistics import predictive_p_value


def observed_outcomes(fit, draws: int) -> dict[str, np.ndarray]:
    """Observed values of each outcome, repeated ``draws`` times on a leading axis."""
    obs = fit.idata["observed_data"].to_dataset()
    return {name: np.broadcast_to(obs[name].values, (draws,) + obs[name].shape) for name in obs.data_vars}


def discrepancies(statistic, data, fit) -> tuple[np.ndarray, np.ndarray]:
    """T(y, theta_s) and T(y_rep_s, theta_s) over all posterior draws."""
    posterior = fit.draws()
    predictive = fit.draws(group="posterior_predictive")
    s = next(iter(predictive.values())).shape[0]
    observed = statistic.compute(data, observed_outcomes(fit, s), posterior)
    replicated = statistic.compute(data, predictive, posterior)
    return np.asarray(observed, dtype=float), np.asarray(replicated, dtype=float)


@check
def targeted_statistics(context: Context) -> list[Finding]:
    """One finding per assumption that declares a targeted statistic."""
    findings = []
    for assumption in context.design.assumptions:
        statistic = assumption.statistic
        # An assumption the table cannot inform is `unchecked`: nothing to score.
        if statistic is None or assumption.uninformed(context.data):
            continue
        observed, replicated = discrepancies(statistic, context.data, context.fit)
        p = predictive_p_value(observed, replicated, statistic.sides)
        ppc = context.extras.setdefault("ppc", {})
        # An assumption checked by several statistics keeps one figure per statistic.
        slot = assumption.key if assumption.key not in ppc else f"{assumption.key}-{statistic.name}"
        ppc[slot] = (statistic.name, observed, replicated, p)
        lo, hi = np.nanpercentile(replicated, [5, 95])
        value = float(np.nanmean(observed))
        findings.append(
            Finding(
                assumption=assumption.key,
                kind="ppc",
                check=f"ppc:{statistic.name}",
                value=value,
                p_value=p,
                detail=(
                    f"{statistic.meaning[:1].upper()}{statistic.meaning[1:]}: observed {value:.3g}, "
                    f"replicated 90% range {lo:.3g} to {hi:.3g}."
                ),
                numbers={"sides": statistic.sides, "replicated_mean": float(np.nanmean(replicated))},
                figure=f"ppc-{slot}",
            )
        )
    return findings
