"""Discrepancy statistics on plain arrays (workbench.statistics)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from workbench.statistics import residual_trend_score, standardised


def test_trend_score_is_the_least_squares_t_statistic():
    # Reference: scipy.stats.linregress, slope over its standard error.
    rng = np.random.default_rng(3)
    x = rng.uniform(0, 10, 40)
    mean = np.full(40, 20.0)
    y = mean + rng.normal(0, 4, 40) + 0.3 * x
    r = standardised(y, mean, mean)
    fit = stats.linregress(x, r)
    assert residual_trend_score(y[None], mean[None], mean[None], x)[0] == pytest.approx(fit.slope / fit.stderr)


def test_trend_score_does_not_grow_with_extra_variation():
    rng = np.random.default_rng(4)
    x = np.arange(30.0)
    mean = np.full(30, 50.0)
    noise = rng.normal(0, 1, 30)
    plain = residual_trend_score((mean + 2 * noise)[None], mean[None], mean[None], x)[0]
    wider = residual_trend_score((mean + 6 * noise)[None], mean[None], mean[None], x)[0]
    assert wider == pytest.approx(plain)
