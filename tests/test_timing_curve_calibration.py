"""timing-curve on its demo layout: the PyMC model and the NumPy simulator tell one story.

Guards the question raised by the demo's simulation-based calibration (shape
and eventual ranks far from uniform): the model's cell probabilities and
log-likelihood at fixed parameters, and the simulator's cell frequencies, are
checked against scipy.stats on the exact layout the calibration uses. (The
miscalibration comes from the sampler, not from these: replicates whose
events all fall before the first inspection leave most chains in a minor
mode with shape near 0 and eventual near 1.)
"""

import numpy as np
import pytest
from pymc.model.transform.conditioning import remove_value_transforms
from pymc.pytensorf import compile as compile_graph
from scipy import stats

from recipes.timing_curve import RECIPE
from workbench import cohorts
from workbench.recipe import make_design

FREE = ("scale", "shape", "eventual")
# (scale relative to age_ref, shape, eventual): the demo truth, a curve finished
# before the first inspection, one still rising at the last, a small share.
POINTS = [(9.0 / 7.0, 2.4, 0.82), (0.1, 1.86, 0.72), (5.0, 1.5, 0.95), (2.0, 4.0, 0.2)]


@pytest.fixture(scope="module")
def demo_layout():
    design = make_design(RECIPE, {"family": "weibull", "eventual": "estimate"}, {})
    table = RECIPE.demo(np.random.default_rng(1)).table
    data = design.validate(table)
    model = design.build(data)
    plain = remove_value_transforms(model)
    values = [plain.rvs_to_values[plain[name]] for name in FREE]
    p = plain.replace_rvs_by_values([plain["y"].owner.inputs[-1], plain["cumulative"]])
    cells = compile_graph(values, p, on_unused_input="ignore")
    counts = plain["counts"]
    given = counts.type()
    loglik = compile_graph(values + [given], plain.logp(vars=plain.observed_RVs, sum=True),
                           givens=[(counts, given)], on_unused_input="ignore")
    return design, data, cells, lambda *v: loglik(*v[:-1], np.asarray(v[-1], dtype=given.dtype))


def scipy_cumulative(data, scale, shape, eventual):
    # Reference: scipy.stats.weibull_min CDF (c = shape, scale) at age / age_ref, times eventual.
    return eventual * stats.weibull_min(shape, scale=scale).cdf(data["age"] / data.extra["age_ref"])


@pytest.mark.parametrize("scale,shape,eventual", POINTS)
def test_model_cumulative_and_cells_equal_scipy(demo_layout, scale, shape, eventual):
    _, data, cells, _ = demo_layout
    p, cumulative = cells(scale, shape, eventual)
    expected = scipy_cumulative(data, scale, shape, eventual)
    np.testing.assert_allclose(cumulative, expected, atol=1e-12)
    np.testing.assert_allclose(p, cohorts.cell_probabilities(data, expected[:, None]), atol=1e-12)


@pytest.mark.parametrize("scale,shape,eventual", POINTS)
def test_model_loglik_equals_scipy_multinomial(demo_layout, scale, shape, eventual):
    design, data, _, loglik = demo_layout
    counts = cohorts.cell_counts(design.simulate(np.random.default_rng(3), data,
                                                 dict(scale=scale, shape=shape, eventual=eventual)))
    # Reference: scipy.stats.multinomial over each cohort's interval-censored cells.
    p = cohorts.cell_probabilities(data, scipy_cumulative(data, scale, shape, eventual)[:, None])
    expected = stats.multinomial.logpmf(counts, data.extra["cohort_exposed"], p).sum()
    assert loglik(scale, shape, eventual, counts) == pytest.approx(expected, abs=1e-6)


@pytest.mark.parametrize("scale,shape,eventual", POINTS)
def test_simulated_cell_frequencies_match_scipy_cells(demo_layout, scale, shape, eventual):
    design, data, _, _ = demo_layout
    rng = np.random.default_rng(7)
    reps = 400
    total = sum(cohorts.cell_counts(design.simulate(rng, data, dict(scale=scale, shape=shape,
                                                                    eventual=eventual)))
                for _ in range(reps))
    p = cohorts.cell_probabilities(data, scipy_cumulative(data, scale, shape, eventual)[:, None])
    n = data.extra["cohort_exposed"][:, None] * reps
    mask = cohorts.real_cells(data) & (p * n > 5)
    # Pearson chi-square per cohort (cells of one cohort sum to its exposed units).
    chi2 = (((total - n * p) ** 2 / (n * p)) * mask).sum()
    df = int(mask.sum()) - len(data.labels["cohort"])
    assert stats.chi2(df).sf(chi2) > 0.001


def test_simulator_reads_the_prior_draw_as_the_model_does(demo_layout):
    # The calibration hands the simulator every output of one prior draw
    # (free variables and deterministics such as scale_group, share).
    design, data, cells, _ = demo_layout
    draw = {"scale": 0.7, "shape": 1.3, "eventual": 0.6, "scale_group": np.array([0.7]),
            "share": np.array([0.6])}
    a = cohorts.cell_counts(design.simulate(np.random.default_rng(5), data, draw))
    b = cohorts.cell_counts(design.simulate(np.random.default_rng(5), data,
                                            {k: draw[k] for k in FREE}))
    np.testing.assert_array_equal(a, b)


# --- calibration of a covariate's effect -------------------------------------------------------


def test_calibration_ranks_a_covariate_effect_by_its_name_and_finds_it_uniform(tmp_path):
    # An invented unit table: 80 units followed 3 to 9 time units, with a dose.
    import json

    import pandas as pd

    from workbench.cli import main
    from workbench.rules.calibration import DOUBTFUL_FAMILY_ALPHA

    rng = np.random.default_rng(4)
    n = 80
    event_time, follow = 5.0 * rng.weibull(1.5, n), rng.uniform(3.0, 9.0, n)
    table = pd.DataFrame({"time": np.round(np.minimum(event_time, follow), 3),
                          "event": (event_time <= follow).astype(int),
                          "dose": np.round(rng.normal(2.0, 0.5, n), 2)})
    path = tmp_path / "units.csv"
    table.to_csv(path, index=False)
    out = tmp_path / "sbc"
    code = main(["calibrate", "timing-curve", "--data", str(path), "--set", "covariates=dose",
                 "--set", "eventual=all", "--sims", "10", "--workers", "1", "--seed", "3", "--out", str(out),
                 "--history", str(tmp_path / "history.sqlite"), "--quiet",
                 "--draws", "150", "--tune", "200", "--chains", "2"])
    assert code == 0
    result = json.loads((out / "calibration.json").read_text())["calibration"]
    # The effect is named by the model's covariate coordinate, as in the parameter table.
    assert "time_effect[dose]" in result["parameters"] and "time_effect[0]" not in result["parameters"]
    assert result["completed"] >= 8
    # Data from the model's own simulator: no quantity's ranks reach the rule's
    # doubtful level, split over the quantities tested (measured, seed 3: 10 of
    # 10 replicates, lowest p 0.09 for scale and 0.33 for time_effect[dose],
    # against 0.0025).
    tests = len(result["parameters"])
    assert all(p["p_value"] > DOUBTFUL_FAMILY_ALPHA / tests for p in result["parameters"].values())
