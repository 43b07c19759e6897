"""Discrepancy statistics shared by recipes, on plain NumPy arrays.

Each function takes outcomes ``y`` and their model mean and variance with a
leading axis of S draws (shape ``(S, n)``) and returns one value per draw, so
the same code scores observed data (broadcast) and replicated data. Used as
realised discrepancies for posterior predictive p-values.

References
----------
Gelman, A., Meng, X.-L. and Stern, H. (1996). Posterior predictive assessment
of model fitness via realized discrepancies. Statistica Sinica 6, 733-807.
"""

from __future__ import annotations

import numpy as np

# Standardised residuals are clipped here so one row whose model probability
# is pinned near 0 or 1 cannot decide a trend by itself (common practice for
# robust residual summaries).
RESIDUAL_CLIP = 10.0
# Variance floor for standardising counts whose model variance is near zero.
VARIANCE_FLOOR = 0.25


def standardised(y, mean, var) -> np.ndarray:
    y, mean, var = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, mean, var)))
    r = (y - mean) / np.sqrt(np.maximum(var, VARIANCE_FLOOR))
    return np.clip(r, -RESIDUAL_CLIP, RESIDUAL_CLIP)


def _trend(y, mean, var, x):
    """Standardised residuals, standardised ``x`` (None when constant) and the least-squares slope."""
    r = standardised(y, mean, var)
    x = np.asarray(x, dtype=float)
    xs = x - x.mean()
    scale = np.sqrt((xs**2).mean())
    if scale == 0:
        return r, None, np.zeros(r.shape[:-1])
    xs = xs / scale
    return r, xs, (r * xs).mean(axis=-1)


def residual_trend(y, mean, var, x) -> np.ndarray:
    """Least-squares slope of standardised residuals on standardised ``x``."""
    return _trend(y, mean, var, x)[2]


def residual_trend_score(y, mean, var, x) -> np.ndarray:
    """The slope of :func:`residual_trend` over its standard error from the residuals' own scatter.

    Scale-free: variation beyond the model's (units that move together, say)
    widens the scatter of the residuals as much as the noise in their slope,
    so by itself it does not look like a trend; a real trend still does.
    """
    r, xs, slope = _trend(y, mean, var, x)
    n = r.shape[-1]
    if xs is None or n < 3:
        return np.zeros(r.shape[:-1])
    rest = r - r.mean(axis=-1, keepdims=True) - slope[..., None] * xs
    se = np.sqrt((rest**2).sum(axis=-1) / (n - 2) / n)
    return slope / np.maximum(se, 1e-12)


def nearest_shortfall(y, mean, var, x, share: float = 0.25) -> np.ndarray:
    """Standardised sum of residuals over the rows with the smallest ``x``."""
    x = np.asarray(x, dtype=float)
    k = max(1, int(np.ceil(share * x.size)))
    rows = np.argsort(x, kind="stable")[:k]
    y, mean, var = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, mean, var)))
    diff = (y[..., rows] - mean[..., rows]).sum(axis=-1)
    return diff / np.sqrt(np.maximum(var[..., rows].sum(axis=-1), VARIANCE_FLOOR))


def pearson_dispersion(y, mean, var) -> np.ndarray:
    """Mean squared standardised residual: near 1 under the model's variance."""
    y, mean, var = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, mean, var)))
    return ((y - mean) ** 2 / np.maximum(var, VARIANCE_FLOOR)).mean(axis=-1)


def predictive_p_value(observed: np.ndarray, replicated: np.ndarray, sides: str = "two") -> float:
    """Posterior predictive p-value of a discrepancy, ties counted half.

    ``observed`` and ``replicated`` hold T(y, theta_s) and T(y_rep_s, theta_s)
    for the same draws s. ``sides='greater'`` is Pr(T_rep >= T_obs): small when
    the observed value is unusually large. ``'two'`` doubles the smaller tail.
    """
    observed = np.asarray(observed, dtype=float)
    replicated = np.asarray(replicated, dtype=float)
    ok = np.isfinite(observed) & np.isfinite(replicated)
    if not ok.any():
        return float("nan")
    o, r = observed[ok], replicated[ok]
    greater = np.mean(r > o) + 0.5 * np.mean(r == o)
    less = np.mean(r < o) + 0.5 * np.mean(r == o)
    if sides == "greater":
        return float(greater)
    if sides == "less":
        return float(less)
    return float(min(1.0, 2.0 * min(greater, less)))
