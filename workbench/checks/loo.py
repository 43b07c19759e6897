"""PSIS-LOO of the main fit and the rows whose Pareto k is high.

The LOO numbers feed the summary's ``loo`` section and model comparison; rows
with a high Pareto k are rows the model finds surprising enough that
importance sampling cannot stand in for refitting without them.

References
----------
Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model
evaluation using leave-one-out cross-validation and WAIC. Statistics and
Computing 27, 1413-1432.
Vehtari, A., Simpson, D., Gelman, A., Yao, Y. and Gabry, J. (2024). Pareto
smoothed importance sampling. JMLR 25(72).
"""

from __future__ import annotations

import warnings

import numpy as np

from workbench.checks import Context, check
from workbench.findings import Finding


# Size of the noise that breaks exact ties in log-likelihood draws: far below
# the 0.1 elpd resolution anyone reads, far above float64 rounding of typical values.
TIE_BREAK = 1e-9


def pareto_k_threshold(draws: int) -> float:
    """Sample-size dependent k threshold, min(1 - 1/log10(S), 0.7) (Vehtari et al. 2024)."""
    return float(min(1.0 - 1.0 / np.log10(draws), 0.7))


def psis_weights(idata, name: str):
    """ArviZ's PSIS log weights and Pareto k of one log-likelihood variable.

    A row whose log-likelihood is the same in every draw (a probability
    pinned at its bound) gets uniform weights and k = 0: leaving it out does
    not change the posterior weights. Exact ties in the other rows (a
    probability pinned in some draws only) are broken by noise far below any
    elpd resolution, because PSIS cannot fit a tail made of equal values.
    """
    import xarray as xr
    from arviz_stats.loo.loo_helper import _get_r_eff

    ll = idata["log_likelihood"][name]
    sample_dims = ["chain", "draw"]
    n = ll.sizes["chain"] * ll.sizes["draw"]
    constant = (ll.max(sample_dims) - ll.min(sample_dims)) == 0
    # Seeded so the same fit always gives the same LOO.
    jitter = xr.DataArray(np.random.default_rng(0).normal(0, TIE_BREAK, ll.shape), dims=ll.dims, coords=ll.coords)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        log_weights, k = (ll + jitter).azstats.psislw(r_eff=_get_r_eff(idata, n), dim=sample_dims)
    log_weights = xr.where(constant, -np.log(n), log_weights).transpose(*ll.dims)
    return log_weights, xr.where(constant, 0.0, k)


def loo_of(fit):
    """ArviZ PSIS-LOO of a fit, pointwise, with the weights of :func:`psis_weights`."""
    import arviz as az

    idata = fit.idata
    name = list(idata["log_likelihood"].data_vars)[0]
    log_weights, k = psis_weights(idata, name)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return az.loo(idata, pointwise=True, var_name=name, log_weights=log_weights, pareto_k=k)


def loo_terms(design, data, n_terms: int) -> tuple[str, list[str]]:
    """What one pointwise LOO term leaves out, and a label for each term.

    One term per table row: the unit is the recipe's covariate (``distance``)
    and a term reads ``distance 3``, with its label columns when they have
    several levels (``cohort c02, distance 4``). One term per level of a
    label column (a multinomial cohort): the unit is that column
    (``cohort``, ``cohort c02``). One term per step of a cohort from one
    period to the next: ``step``, ``cohort c02, from period 3``. Otherwise
    ``row`` and the term's number from 1 (``row 7``).
    """
    from workbench.wording import number

    recipe = getattr(design, "recipe", None)
    covariate = getattr(recipe, "covariate", None)
    columns = getattr(data, "columns", {}) or {}
    labels = getattr(data, "labels", {}) or {}
    extra = getattr(data, "extra", {}) or {}
    for name, levels in labels.items():
        if len(levels) == n_terms and len(levels) > 1 and name in columns \
                and np.asarray(columns[name]).size != n_terms:
            return name, [f"{name} {level}" for level in levels]
    if covariate and covariate in columns and np.asarray(columns[covariate]).size == n_terms:
        values = np.asarray(columns[covariate], dtype=float)
        words = [f"{covariate} {number(v)}" for v in values]
        for name, levels in labels.items():
            codes = np.asarray(columns.get(name, []))
            if len(levels) > 1 and codes.size == n_terms:
                words = [f"{name} {levels[int(c)]}, {w}" for c, w in zip(codes, words)]
        return covariate, words
    cohorts, periods = np.asarray(extra.get("step_cohort", [])), np.asarray(extra.get("step_period", []))
    if "cohort" in labels and cohorts.size == n_terms and periods.size == n_terms:
        return "step", [f"cohort {labels['cohort'][int(c)]}, from period {number(t)}"
                        for c, t in zip(cohorts, periods)]
    return "row", [f"row {i + 1}" for i in range(n_terms)]


def loo_numbers(fit) -> dict:
    """The summary's ``loo`` section: elpd, se, p_loo and the rows with high k."""
    result = loo_of(fit)
    k = np.asarray(result.pareto_k).ravel()
    limit = pareto_k_threshold(int(result.n_samples))
    return {
        "elpd": float(result.elpd),
        "se": float(result.se),
        "p_loo": float(result.p),
        "bad_pareto_k": [int(i) for i in np.flatnonzero(k > limit)],
        "pareto_k": [float(x) for x in k],
        "k_threshold": limit,
    }


@check
def psis_loo(context: Context) -> list[Finding]:
    """A finding listing rows whose Pareto k exceeds the threshold."""
    numbers = loo_numbers(context.fit)
    unit, labels = loo_terms(context.design, context.data, len(numbers["pareto_k"]))
    context.extras["loo"] = {**numbers, "unit": unit, "labels": labels}
    bad = numbers["bad_pareto_k"]
    rows = ", ".join(labels[i] for i in bad[:10]) + (" ..." if len(bad) > 10 else "")
    detail = (
        f"PSIS-LOO elpd {numbers['elpd']:.1f} (SE {numbers['se']:.1f}), p_loo {numbers['p_loo']:.1f}; "
        + (f"{len(bad)} {unit}(s) with Pareto k above {numbers['k_threshold']:.2f}: {rows}."
           if bad else f"every Pareto k is below {numbers['k_threshold']:.2f}.")
    )
    return [
        Finding("loo", "loo", "psis_loo", numbers["elpd"], detail=detail,
                numbers={k: v for k, v in numbers.items() if k != "pareto_k"}, figure="pareto-k")
    ]


# LOO-PIT ECDFs are drawn with ArviZ's default envelope (its 99% simultaneous
# band); the band's simulation is seeded so a report is reproducible.
LOO_PIT_SIMULATIONS = 1000
LOO_PIT_SEED = 214


def loo_pit_numbers(fit) -> dict[str, dict]:
    """LOO-PIT of each observed variable, with its ECDF and simultaneous band.

    The values are ArviZ's ``loo_pit`` on the weights of :func:`psis_weights`
    (randomised within ties for discrete
    outcomes, as ArviZ does); the band is ArviZ's ``ecdf_pit`` at its default
    envelope probability. Per variable: ``pit`` (one value per observation),
    ``points``, ``ecdf``, ``lower``, ``upper``, ``level``, the ``mean`` and
    ``variance`` of the values (1/2 and 1/12 for a calibrated model) and
    ``outside`` (the ECDF leaves the band somewhere).

    References
    ----------
    Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
    discrete uniformity and its applications in goodness-of-fit evaluation
    and multiple sample comparison. Statistics and Computing 32(32).
    Gabry, J., Simpson, D., Vehtari, A., Betancourt, M. and Gelman, A.
    (2019). Visualization in Bayesian workflow. JRSS A 182(2), 389-402.
    """
    from arviz_base import rcParams
    from arviz_stats import loo_pit

    idata = fit.idata
    if "posterior_predictive" not in idata.children or "log_likelihood" not in idata.children:
        return {}
    # A multivariate outcome (a multinomial row) has one log-likelihood term
    # per row but several values: it has no scalar PIT, so it is left out.
    names = [n for n in idata["log_likelihood"].data_vars
             if n in idata["posterior_predictive"].data_vars and n in idata["observed_data"].data_vars
             and idata["observed_data"][n].shape == idata["log_likelihood"][n].shape[2:]]
    if not names:
        return {}
    import xarray as xr

    level = float(rcParams["stats.envelope_prob"])
    weights = {name: psis_weights(idata, name) for name in names}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        values = loo_pit(idata, var_names=names,
                         log_weights=xr.Dataset({n: w for n, (w, _) in weights.items()}),
                         pareto_k=xr.Dataset({n: k for n, (_, k) in weights.items()}))
    out = {}
    for name in names:
        pit = np.asarray(values[name], dtype=float).ravel()
        pit = pit[np.isfinite(pit)]
        if pit.size >= 2:
            out[name] = pit_ecdf(pit, level)
    return out


def pit_ecdf(pit: np.ndarray, level: float) -> dict:
    """PIT values with ArviZ's ECDF and simultaneous band at ``level`` (see :func:`loo_pit_numbers`)."""
    from arviz_stats.ecdf_utils import ecdf_pit

    pit = np.asarray(pit, dtype=float)
    points, ecdf, lower, upper = ecdf_pit(pit, level, LOO_PIT_SIMULATIONS,
                                          rng=np.random.default_rng(LOO_PIT_SEED))
    return {"pit": pit, "points": points, "ecdf": ecdf, "lower": lower, "upper": upper,
            "level": level, "mean": float(pit.mean()), "variance": float(pit.var()),
            "outside": bool(np.any(ecdf < lower) or np.any(ecdf > upper))}


@check
def loo_pit(context: Context) -> list[Finding]:
    """LOO-PIT of every observed variable, kept for the report's fit section."""
    context.extras["loo_pit"] = loo_pit_numbers(context.fit)
    observed = context.fit.idata["observed_data"].data_vars if "observed_data" in context.fit.idata.children else {}
    context.extras["loo_pit_skipped"] = [n for n in observed if n not in context.extras["loo_pit"]]
    return []
