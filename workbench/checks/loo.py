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


def loo_of(fit):
    """ArviZ PSIS-LOO of a fit, pointwise.

    A row whose log-likelihood is the same in every draw (a probability
    pinned at its bound) gets uniform weights and k = 0: leaving it out does
    not change the posterior weights. Exact ties in the other rows (a
    probability pinned in some draws only) are broken by noise far below any
    elpd resolution, because PSIS cannot fit a tail made of equal values.
    """
    import arviz as az
    import xarray as xr
    from arviz_stats.loo.loo_helper import _get_r_eff

    idata = fit.idata
    names = list(idata["log_likelihood"].data_vars)
    ll = idata["log_likelihood"][names[0]]
    sample_dims = ["chain", "draw"]
    n = ll.sizes["chain"] * ll.sizes["draw"]
    constant = (ll.max(sample_dims) - ll.min(sample_dims)) == 0
    # Seeded so the same fit always gives the same LOO.
    jitter = xr.DataArray(np.random.default_rng(0).normal(0, TIE_BREAK, ll.shape), dims=ll.dims, coords=ll.coords)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        log_weights, k = (ll + jitter).azstats.psislw(r_eff=_get_r_eff(idata, n), dim=sample_dims)
        log_weights = xr.where(constant, -np.log(n), log_weights).transpose(*ll.dims)
        k = xr.where(constant, 0.0, k)
        return az.loo(idata, pointwise=True, var_name=names[0], log_weights=log_weights, pareto_k=k)


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
    context.extras["loo"] = numbers
    bad = numbers["bad_pareto_k"]
    rows = ", ".join(str(i + 1) for i in bad[:10]) + (" ..." if len(bad) > 10 else "")
    detail = (
        f"PSIS-LOO elpd {numbers['elpd']:.1f} (SE {numbers['se']:.1f}), p_loo {numbers['p_loo']:.1f}; "
        + (f"{len(bad)} row(s) with Pareto k above {numbers['k_threshold']:.2f}: {rows}."
           if bad else f"every Pareto k is below {numbers['k_threshold']:.2f}.")
    )
    return [
        Finding("loo", "loo", "psis_loo", numbers["elpd"], detail=detail,
                numbers={k: v for k, v in numbers.items() if k != "pareto_k"}, figure="pareto-k")
    ]
