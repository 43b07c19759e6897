"""threshold-geometry: simulator and model agree; a published example is recovered."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from recipes.threshold_geometry import RECIPE, success_probability
from workbench import engine
from workbench.recipe import make_design


def _design(clearance="0.25", **priors):
    return make_design(RECIPE, {"clearance": clearance}, priors)


def _data(distance, attempts, successes=None, clearance=0.25):
    successes = np.zeros(len(distance), dtype=int) if successes is None else successes
    table = pd.DataFrame({"distance": distance, "attempts": attempts, "successes": successes})
    return RECIPE.validate(table, {"clearance": clearance})


def test_model_probabilities_equal_the_simulator_formula():
    design = _design()
    data = _data([0.1, 0.25, 0.5, 1, 2, 5, 20], [10] * 7)
    import pymc as pm

    fixed = pm.do(design.build(data), {"spread": 0.04})
    p_model = pm.draw(fixed["p"])
    p_numpy = success_probability(data["distance"], 0.25, 0.04)
    assert np.max(np.abs(p_model - p_numpy)) < 1e-10


def test_distances_within_clearance_always_succeed_but_stay_inside_the_unit_interval():
    p = success_probability(np.array([0.1, 0.25]), 0.25, 0.05)
    assert np.all(p < 1.0) and np.all(p > 1.0 - 1e-8)


def test_simulated_frequencies_match_the_probabilities_within_binomial_error():
    design = _design()
    data = _data([0.5, 1, 2, 4, 8], [4000] * 5)
    rng = np.random.default_rng(3)
    sim = design.simulate(rng, data, {"spread": 0.05})
    p = success_probability(data["distance"], 0.25, 0.05)
    # Each count against its exact binomial distribution (scipy reference):
    # two-sided tail probabilities, Bonferroni over 5 rows at 1%.
    for k, n, pi in zip(sim["successes"], data["attempts"], p):
        tail = min(stats.binom.cdf(k, n, pi), stats.binom.sf(k - 1, n, pi))
        assert 2 * tail > 0.01 / 5


def test_identical_distance_rows_are_summed():
    data = _data([2.0, 2.0, 3.0], [10, 20, 5], [4, 6, 1])
    assert data.rows == 2
    assert list(data["attempts"]) == [30, 5]
    assert data.source_rows == [[0, 1], [2]]


# Published worked example, values from memory: Berry (1995) data as analysed
# by Gelman and Nolan (2002), "A probability model for golf putting", Teaching
# Statistics 24(3). Distances in feet; clearance (4.25 - 1.68) / 2 inches.
BERRY_DISTANCE = np.arange(2, 21)
BERRY_ATTEMPTS = [1443, 694, 455, 353, 272, 256, 240, 217, 200, 237, 202, 192, 174, 167, 201, 195, 191, 147, 152]
BERRY_SUCCESSES = [1346, 577, 337, 208, 149, 136, 111, 69, 67, 75, 52, 46, 54, 28, 27, 31, 33, 20, 24]
BERRY_CLEARANCE = (4.25 - 1.68) / 2 / 12


@pytest.mark.slow
def test_published_spread_is_recovered(fast_settings):
    # Gelman and Nolan report a spread of about 0.0267 rad (1.53 degrees).
    design = make_design(RECIPE, {"clearance": str(BERRY_CLEARANCE)}, {})
    data = _data(BERRY_DISTANCE, BERRY_ATTEMPTS, BERRY_SUCCESSES, BERRY_CLEARANCE)
    fit = engine.fit(design.build(data), seed=11, settings=fast_settings)
    spread = fit.draws(["spread"])["spread"].mean()
    assert 0.0255 <= spread <= 0.0280
