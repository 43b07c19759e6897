"""LOO-PIT of every observed variable: ArviZ's values and band, a reading, a figure."""

from __future__ import annotations

import numpy as np
import pytest

from recipes.threshold_geometry import RECIPE
from workbench import harness, writers
from workbench.checks.loo import LOO_PIT_SEED, LOO_PIT_SIMULATIONS, loo_pit_numbers, pit_ecdf, psis_weights
from workbench.recipe import make_design
from workbench.report.html import render
from workbench.rules.model_fit import loo_pit_reading
from conftest import throwing_table

LEVEL = 0.99


@pytest.fixture(scope="module")
def run(fast_settings):
    design = make_design(RECIPE, {"clearance": "0.25"}, {})
    data = design.validate(throwing_table(np.random.default_rng(7)))
    return harness.run_check(design, data, harness.DataInfo("sim", "", data.rows), seed=3,
                             settings=fast_settings, relax=False)


def test_values_are_arviz_loo_pit_on_the_fits_psis_weights(run):
    # Reference: arviz_stats.loo_pit (Vehtari et al. 2017), which randomises
    # within ties for discrete outcomes; here the successes are counts.
    import xarray as xr
    from arviz_stats import loo_pit

    log_weights, k = psis_weights(run.fit.idata, "y")
    expected = loo_pit(run.fit.idata, var_names=["y"], log_weights=xr.Dataset({"y": log_weights}),
                       pareto_k=xr.Dataset({"y": k}))["y"].values.ravel()
    ours = loo_pit_numbers(run.fit)["y"]["pit"]
    np.testing.assert_allclose(ours, expected)
    assert len(set(np.round(ours, 12))) == ours.size  # randomised: no two rows tie


def test_band_is_arviz_simultaneous_band_at_its_default_envelope(run):
    from arviz_base import rcParams
    from arviz_stats.ecdf_utils import ecdf_pit

    numbers = run.extras["loo_pit"]["y"]
    assert numbers["level"] == rcParams["stats.envelope_prob"]
    points, ecdf, lower, upper = ecdf_pit(numbers["pit"], numbers["level"], LOO_PIT_SIMULATIONS,
                                          rng=np.random.default_rng(LOO_PIT_SEED))
    np.testing.assert_allclose(numbers["lower"], lower)
    np.testing.assert_allclose(numbers["upper"], upper)
    np.testing.assert_allclose(numbers["ecdf"], ecdf)


def test_uniform_values_read_fine():
    pit = (np.arange(200) + 0.5) / 200
    assert loo_pit_reading(pit_ecdf(pit, LEVEL))[0] == "fine"


def test_values_piling_at_both_ends_read_too_narrow():
    rng = np.random.default_rng(1)
    pit = rng.beta(0.4, 0.4, 200)
    assert loo_pit_reading(pit_ecdf(pit, LEVEL))[0] == "too narrow"


def test_values_crowding_the_middle_read_too_wide():
    rng = np.random.default_rng(2)
    pit = rng.beta(4, 4, 200)
    assert loo_pit_reading(pit_ecdf(pit, LEVEL))[0] == "too wide"


def test_values_leaning_to_one_side_read_shifted_with_the_side():
    rng = np.random.default_rng(3)
    reading, sentence = loo_pit_reading(pit_ecdf(rng.beta(3, 1.2, 200), LEVEL))
    assert reading == "shifted" and "below the data" in sentence


def test_fit_section_shows_each_observed_variables_loo_pit_with_its_reading(run):
    page = render(run, writers.summary(run))
    fit = page[page.index('<section id="fit"'):page.index('<section id="sampler"')]
    assert 'alt="successes: LOO-PIT ECDF minus the uniform CDF' in fit
    reading = loo_pit_reading(run.extras["loo_pit"]["y"], "successes")[1]
    assert f'<p class="reading" data-figure="loo-pit-y"><strong>LOO-PIT reading.</strong> {reading}</p>' in fit


def test_an_outcome_without_one_value_per_loo_term_is_named_as_skipped(run):
    # The throwing table has one count per row: nothing is skipped there.
    assert run.extras["loo_pit_skipped"] == []
    page = render(run, writers.summary(run))
    assert "No LOO-PIT for" not in page


def test_summary_carries_each_variables_loo_pit_reading(run):
    entry = writers.summary(run)["loo_pit"]["y"]
    numbers = run.extras["loo_pit"]["y"]
    assert entry["reading"] == loo_pit_reading(numbers, "successes")[0]
    assert entry["label"] == "successes" and entry["values"] == run.data.rows
    assert entry["mean"] == pytest.approx(float(np.mean(numbers["pit"])))
    assert entry["variance"] == pytest.approx(float(np.var(numbers["pit"])))
    assert entry["outside_band"] is numbers["outside"] and entry["band_level"] == LEVEL
