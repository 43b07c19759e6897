"""Cumulative distribution functions of event times, in NumPy and PyTensor.

Every family has a ``scale`` (a time, > 0) and a ``shape`` (> 0). Three of the
four are location-scale families of log time, written through the same
standardised log time ``z = shape * log(t / scale)``:

=============  ==========================================  =========================
family         F(t)                                        scipy.stats equivalent
=============  ==========================================  =========================
weibull        1 - exp(-exp(z))                            weibull_min(shape, scale=scale)
loglogistic    1 / (1 + exp(-z))                           fisk(shape, scale=scale)
lognormal      Phi(z)                                      lognorm(1 / shape, scale=scale)
gamma          P(shape, t / scale) (regularised gamma)     gamma(shape, scale=scale)
=============  ==========================================  =========================

So ``scale`` is the median for loglogistic and lognormal, the 63rd percentile
for weibull, and the gamma scale (mean / shape) for gamma; a larger ``shape``
always means event times bunched more tightly. ``t = 0`` gives F = 0.

References
----------
Kalbfleisch, J. D. and Prentice, R. L. (2002). The Statistical Analysis of
Failure Time Data, 2nd ed., Wiley, section 2.2 (the parametric families).
"""

from __future__ import annotations

import numpy as np
from scipy import special

FAMILIES = ("weibull", "loglogistic", "lognormal", "gamma")

# Times are floored here before taking logs so that t = 0 gives F = 0 with
# finite gradients; far below any age a table records in any unit.
TINY_TIME = 1e-12


def _z(t, scale, shape, log, maximum):
    return shape * (log(maximum(t, TINY_TIME)) - log(scale))


def cdf(family: str, t, scale, shape) -> np.ndarray:
    """Share of event times at or below ``t`` (NumPy, broadcasting).

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    t, scale, shape : array_like
        Times (>= 0) and the family's parameters (> 0); broadcast together.

    Returns
    -------
    numpy.ndarray
        F(t) in [0, 1].
    """
    t, scale, shape = (np.asarray(a, dtype=float) for a in (t, scale, shape))
    if family == "gamma":
        return special.gammainc(shape, np.maximum(t, 0.0) / scale)
    z = _z(t, scale, shape, np.log, np.maximum)
    if family == "weibull":
        f = -np.expm1(-np.exp(z))
    elif family == "loglogistic":
        f = special.expit(z)
    elif family == "lognormal":
        f = special.ndtr(z)
    else:
        raise ValueError(f"unknown family {family!r}; expected one of {', '.join(FAMILIES)}")
    return np.where(t > 0, f, 0.0)


def cdf_tensor(family: str, t, scale, shape):
    """The same F(t) as :func:`cdf` as a PyTensor expression (for PyMC models).

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    t, scale, shape : tensor_like
        Times (>= 0) and parameters (> 0); broadcast together.

    Returns
    -------
    pytensor.tensor.TensorVariable
        F(t) in [0, 1].
    """
    import pytensor.tensor as pt
    from pytensor.graph.basic import Variable

    # Plain numbers become float64 constants (PyTensor would otherwise narrow them).
    t, scale, shape = (a if isinstance(a, Variable) else pt.constant(np.asarray(a, dtype=float))
                       for a in (t, scale, shape))
    if family == "gamma":
        return pt.gammainc(shape, pt.maximum(t, 0.0) / scale)
    z = _z(t, scale, shape, pt.log, pt.maximum)
    if family == "weibull":
        f = -pt.expm1(-pt.exp(z))
    elif family == "loglogistic":
        f = pt.sigmoid(z)
    elif family == "lognormal":
        f = 0.5 * pt.erfc(-z / np.sqrt(2.0))
    else:
        raise ValueError(f"unknown family {family!r}; expected one of {', '.join(FAMILIES)}")
    return pt.switch(t > 0, f, 0.0)


def quantile(family: str, q, scale, shape) -> np.ndarray:
    """The time by which a share ``q`` of event times has happened (inverse of :func:`cdf`).

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    q : array_like
        Shares in (0, 1).
    scale, shape : array_like
        The family's parameters (> 0).

    Returns
    -------
    numpy.ndarray
        Times t with F(t) = q.
    """
    q, scale, shape = (np.asarray(a, dtype=float) for a in (q, scale, shape))
    if family == "gamma":
        return scale * special.gammaincinv(shape, q)
    if family == "weibull":
        z = np.log(-np.log1p(-q))
    elif family == "loglogistic":
        z = special.logit(q)
    elif family == "lognormal":
        z = special.ndtri(q)
    else:
        raise ValueError(f"unknown family {family!r}; expected one of {', '.join(FAMILIES)}")
    return scale * np.exp(z / shape)


def draw_times(rng: np.random.Generator, family: str, scale, shape, size) -> np.ndarray:
    """Event times drawn with NumPy's own generators (independent of :func:`cdf`).

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness.
    family : str
        One of :data:`FAMILIES`.
    scale, shape : array_like
        The family's parameters (> 0), broadcast to ``size``.
    size : int or tuple
        Number (shape) of times to draw.

    Returns
    -------
    numpy.ndarray
        Event times.
    """
    scale = np.broadcast_to(np.asarray(scale, dtype=float), size)
    shape = np.broadcast_to(np.asarray(shape, dtype=float), size)
    if family == "weibull":
        return scale * rng.weibull(shape, size=size)
    if family == "loglogistic":
        return scale * np.exp(rng.logistic(size=size) / shape)
    if family == "lognormal":
        return scale * np.exp(rng.normal(size=size) / shape)
    if family == "gamma":
        return rng.gamma(shape, scale, size=size)
    raise ValueError(f"unknown family {family!r}; expected one of {', '.join(FAMILIES)}")


def log_survival_tensor(family: str, t, scale, shape):
    """log(1 - F(t)) as a PyTensor expression, accurate far into the upper tail.

    Parameters
    ----------
    family : str
        One of :data:`FAMILIES`.
    t, scale, shape : tensor_like
        Times (> 0) and the family's parameters (> 0); broadcast together.

    Returns
    -------
    pytensor.tensor.TensorVariable
        log S(t) = log(1 - F(t)) (0 at t = 0).
    """
    import pytensor.tensor as pt

    if family == "gamma":
        value = pt.log(pt.maximum(pt.gammaincc(shape, pt.maximum(t, 0.0) / scale), TINY_SURVIVAL))
        return pt.switch(t > 0, value, 0.0)
    z = _z(t, scale, shape, pt.log, pt.maximum)
    if family == "weibull":
        value = -pt.exp(z)
    elif family == "loglogistic":
        value = -pt.softplus(z)
    elif family == "lognormal":
        from pymc.distributions.dist_math import normal_lccdf

        value = normal_lccdf(0.0, 1.0, z)
    else:
        raise ValueError(f"unknown family {family!r}; expected one of {', '.join(FAMILIES)}")
    return pt.switch(t > 0, value, 0.0)


def log_density_tensor(family: str, t, scale, shape):
    """log f(t), the density of event times, as a PyTensor expression (t > 0).

    Each family through its standardised log time z: f(t) = (shape / t) g(z)
    with g(z) = exp(z - exp(z)) (weibull), sigmoid(z) sigmoid(-z)
    (loglogistic) and the standard normal density (lognormal); the gamma
    density t^(shape-1) exp(-t/scale) / (Gamma(shape) scale^shape).
    """
    import pytensor.tensor as pt

    t = pt.maximum(t, TINY_TIME)
    if family == "gamma":
        return ((shape - 1.0) * pt.log(t) - t / scale - pt.gammaln(shape) - shape * pt.log(scale))
    z = _z(t, scale, shape, pt.log, pt.maximum)
    base = pt.log(shape) - pt.log(t)
    if family == "weibull":
        return base + z - pt.exp(z)
    if family == "loglogistic":
        return base - pt.softplus(z) - pt.softplus(-z)
    if family == "lognormal":
        return base - 0.5 * z**2 - 0.5 * np.log(2.0 * np.pi)
    raise ValueError(f"unknown family {family!r}; expected one of {', '.join(FAMILIES)}")


# Survival probabilities are floored here before taking logs (gamma only,
# whose upper tail has no closed form): far below any share a table resolves.
TINY_SURVIVAL = 1e-300
