"""Event-time CDF families against the reference library scipy.stats."""

import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
from scipy import stats

from workbench import curves

TIMES = np.array([0.0, 0.01, 0.3, 1.0, 2.5, 7.0, 40.0])
PARAMS = [(1.0, 0.7), (3.5, 2.2), (0.4, 5.0)]


def scipy_reference(family, scale, shape):
    """The documented mapping of each family onto scipy.stats (scipy's parameterisation)."""
    if family == "weibull":
        return stats.weibull_min(shape, scale=scale)
    if family == "loglogistic":
        return stats.fisk(shape, scale=scale)
    if family == "lognormal":
        return stats.lognorm(1.0 / shape, scale=scale)
    return stats.gamma(shape, scale=scale)


@pytest.mark.parametrize("family", curves.FAMILIES)
@pytest.mark.parametrize("scale,shape", PARAMS)
def test_numpy_cdf_equals_scipy(family, scale, shape):
    # Reference: scipy.stats weibull_min, fisk, lognorm and gamma CDFs.
    expected = scipy_reference(family, scale, shape).cdf(TIMES)
    np.testing.assert_allclose(curves.cdf(family, TIMES, scale, shape), expected, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("family", curves.FAMILIES)
@pytest.mark.parametrize("scale,shape", PARAMS)
def test_pytensor_cdf_equals_numpy(family, scale, shape):
    t = pt.dvector("t")
    fn = pytensor.function([t], curves.cdf_tensor(family, t, scale, shape))
    np.testing.assert_allclose(fn(TIMES), curves.cdf(family, TIMES, scale, shape), rtol=1e-9, atol=1e-14)


@pytest.mark.parametrize("family", curves.FAMILIES)
def test_pytensor_cdf_has_finite_gradients_at_age_zero(family):
    scale, shape = pt.dscalar("scale"), pt.dscalar("shape")
    total = curves.cdf_tensor(family, pt.constant(TIMES), scale, shape).sum()
    grads = pytensor.function([scale, shape], pytensor.grad(total, [scale, shape]))(2.0, 1.5)
    assert np.all(np.isfinite(grads))


@pytest.mark.parametrize("family", curves.FAMILIES)
def test_quantile_equals_scipy_ppf(family):
    # Reference: scipy.stats ppf of the same distributions.
    q = np.array([0.05, 0.5, 0.9])
    expected = scipy_reference(family, 2.0, 1.7).ppf(q)
    np.testing.assert_allclose(curves.quantile(family, q, 2.0, 1.7), expected, rtol=1e-8)


@pytest.mark.parametrize("family", curves.FAMILIES)
def test_drawn_times_follow_the_scipy_distribution(family):
    # Kolmogorov-Smirnov test against scipy's CDF; a fixed seed keeps it deterministic.
    rng = np.random.default_rng(11)
    times = curves.draw_times(rng, family, 2.0, 1.7, 4000)
    assert stats.kstest(times, scipy_reference(family, 2.0, 1.7).cdf).pvalue > 0.01


def test_unknown_family_is_refused():
    with pytest.raises(ValueError, match="unknown family"):
        curves.cdf("gompertz", TIMES, 1.0, 1.0)
