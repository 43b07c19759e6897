"""timing-curve: validation, the story in NumPy and PyMC, and a fit against Kaplan-Meier."""

import warnings

import matplotlib
import numpy as np
import pandas as pd
import pymc as pm
import pytest
from scipy import stats

from recipes.timing_curve import RECIPE
from workbench import cohorts, curves, engine, registry
from workbench.errors import DataError, OptionError
from workbench.recipe import DemoScenario, make_design

SETTINGS = engine.Settings(draws=300, tune=300, prior_draws=200, chains=2)
# These graphs are evaluated a few times only: compiling them to C would cost more
# than running them in Python.
QUICK = "FAST_COMPILE"


def small_table():
    return pd.DataFrame({
        "cohort": ["A", "A", "B", "A"],
        "age": [2.0, 5.0, 3.0, 9.0],
        "exposed": [200, 200, 150, 200],
        "events": [30, 90, 40, 120],
    })


def validated(table, **options):
    design = make_design(RECIPE, {"family": "weibull", **options}, {})
    return design, RECIPE.validate(table, design.options)


def finite_logp(model) -> bool:
    return bool(np.isfinite(model.compile_logp(mode=QUICK)(model.initial_point())))


# --- bad input: one clear line each ------------------------------------------------------------


def one_line_error(kind, table, **options):
    with pytest.raises(kind) as caught:
        validated(table, **options)
    message = str(caught.value)
    assert "\n" not in message
    return message


def test_events_above_exposed_name_the_row():
    table = small_table()
    table.loc[1, "events"] = 212
    assert one_line_error(DataError, table) == "column 'events' row 2 (line 3): 212 > exposed 200"


def test_events_falling_with_age_are_refused():
    table = small_table()
    table.loc[3, "events"] = 80  # age 9 below the 90 seen at age 5
    message = one_line_error(DataError, table)
    assert "column 'events' row 4 (line 5): 80 < 90" in message and "row 2 (line 3)" in message


def test_negative_age_is_refused():
    table = small_table()
    table.loc[2, "age"] = -1
    assert "column 'age' row 3 (line 4): expected an age >= 0; found -1" in one_line_error(DataError, table)


def test_two_exposed_values_in_one_cohort_are_refused():
    table = small_table()
    table.loc[3, "exposed"] = 210
    assert "column 'exposed' row 4 (line 5): 210 differs from 200" in one_line_error(DataError, table)


def test_one_cohort_seen_twice_at_one_age_is_refused():
    table = small_table()
    table.loc[3, "age"] = 5.0
    assert "already has age 5" in one_line_error(DataError, table)


def test_missing_column_suggests_a_close_name():
    table = small_table().rename(columns={"events": "event"})
    assert "needs column 'events'; did you mean 'event'?" in one_line_error(DataError, table)


def test_unknown_family_is_an_option_error():
    assert "option 'family'" in one_line_error(OptionError, small_table(), family="gompertz")


def test_partial_pooling_without_groups_is_refused():
    assert "needs a 'group' column" in one_line_error(DataError, small_table(), pooling="partial")


def test_a_cohort_in_two_groups_is_refused():
    table = small_table().assign(group=["x", "y", "x", "x"])
    assert "column 'group' row 2 (line 3)" in one_line_error(DataError, table)


# --- layout -------------------------------------------------------------------------------------


def test_repeated_looks_become_increments_and_the_still_open():
    _, data = validated(small_table())
    counts = RECIPE.observed(data)["counts"]
    # Cohort A at ages 2, 5, 9: 30, 60, 30 new events, 80 without; B at age 3: 40, padding, 110.
    np.testing.assert_array_equal(counts, [[30, 60, 30, 80], [40, 0, 0, 110]])


# --- the story: PyMC equals NumPy equals the simulator --------------------------------------------


def scipy_cumulative(age, scale, shape, eventual):
    # Reference: scipy.stats.gamma CDF (shape a, scale) times the eventual share.
    return eventual * stats.gamma.cdf(age, shape, scale=scale)


def test_model_cell_probabilities_follow_the_story():
    design, data = validated(small_table(), family="gamma")
    ref = data.extra["age_ref"]
    model = pm.do(design.build(data), {"scale": 0.8, "shape": 1.7, "eventual": 0.6})
    p = pm.draw(model["y"].owner.inputs[-1], mode=QUICK)
    c = {a: scipy_cumulative(a / ref, 0.8, 1.7, 0.6) for a in (2.0, 3.0, 5.0, 9.0)}
    expected = np.array([
        [c[2.0], c[5.0] - c[2.0], c[9.0] - c[5.0], 1 - c[9.0]],
        [c[3.0], 0.0, 0.0, 1 - c[3.0]],
    ])
    np.testing.assert_allclose(p, expected, atol=1e-8)


def test_simulated_cell_frequencies_match_the_probabilities():
    design, data = validated(small_table(), family="gamma")
    params = {"scale": 0.8, "shape": 1.7, "eventual": 0.6}
    rng = np.random.default_rng(5)
    reps = 400
    total = sum(RECIPE.observed(design.simulate(rng, data, params))["counts"] for _ in range(reps))
    cumulative = cohorts.cumulative_incidence("gamma", cohorts.relative_age(data), 0.8, 1.7, [0.6])
    p = cohorts.cell_probabilities(data, cumulative)
    n = data.extra["cohort_exposed"][:, None] * reps
    se = np.sqrt(n * p * (1 - p))
    # Four binomial standard errors: a false alarm about once in 16,000 cells.
    assert np.all(np.abs(total - n * p) <= 4 * se + 1)


# --- targeted statistics move when their assumption fails -----------------------------------------


def many_cohorts(rng, n_cohorts=30):
    rows = []
    for c in range(n_cohorts):
        for age in (2, 4, 8, 16):
            rows.append({"cohort": f"c{c}", "age": age, "exposed": 300, "events": 0})
    return pd.DataFrame(rows)


def statistic(key):
    return next(a.statistic for a in RECIPE.assumptions if a.key == key)


def truth_draws(data, params, family="weibull"):
    """The true curve as a single 'posterior draw'."""
    cumulative = cohorts.cumulative_incidence(family, cohorts.relative_age(data), params["scale"],
                                              params["shape"], [params.get("eventual", 1.0)])
    return {"cumulative": cumulative[None, :, 0]}


@pytest.mark.parametrize("key,fault,direction", [
    ("eventual_fraction", {"never": 0.2}, -1),
    ("cohort_homogeneity", {"cohort_sd": 0.4}, +1),
    ("independent_units", {"overdispersion": 0.05}, +1),
])
def test_statistic_moves_when_a_fault_is_planted(key, fault, direction):
    design, data = validated(many_cohorts(np.random.default_rng(0)), eventual="all")
    params = {"scale": 1.0, "shape": 1.5}
    draws = truth_draws(data, params)
    stat = statistic(key)

    def value(extra, seed):
        sim = design.simulate(np.random.default_rng(seed), data, {**params, **extra})
        return float(stat.compute(sim, {"y": RECIPE.observed(sim)["counts"][None]}, draws)[0])

    clean = np.mean([value({}, s) for s in range(5)])
    faulty = np.mean([value(fault, s) for s in range(5)])
    assert direction * (faulty - clean) > 0.5 * max(abs(clean), 1.0)


# --- fit on cohort aggregates against Kaplan-Meier on the individual units ------------------------

TRUE = {"scale_days": 8.0, "shape": 1.8, "eventual": 0.75}
LOOKS = np.array([2, 4, 6, 9, 12, 16, 20, 25, 30])


@pytest.fixture(scope="module")
def individual_units():
    """Event times of 3,000 units in 12 cohorts, each followed up to its current age."""
    rng = np.random.default_rng(2024)
    rows, units = [], []
    for c in range(12):
        current = 30 - 2 * c
        n = 250
        ever = rng.random(n) < TRUE["eventual"]
        times = np.where(ever, TRUE["scale_days"] * rng.weibull(TRUE["shape"], n), np.inf)
        for age in np.append(LOOKS[LOOKS < current], current):
            rows.append({"cohort": f"c{c}", "age": age, "exposed": n, "events": int((times <= age).sum())})
        units.append(pd.DataFrame({"duration": np.minimum(times, current), "event": times <= current}))
    return pd.DataFrame(rows), pd.concat(units, ignore_index=True)


@pytest.fixture(scope="module")
def fitted(individual_units):
    table, _ = individual_units
    design, data = validated(table, eventual="estimate")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = engine.fit(design.build(data), seed=3, settings=SETTINGS)
    return design, data, fit


def test_fitted_share_matches_kaplan_meier_on_the_units(individual_units, fitted):
    # Reference: lifelines.KaplanMeierFitter (Kaplan and Meier 1958) on the individual
    # event times; the recipe sees only the cohort counts at the looks.
    from lifelines import KaplanMeierFitter

    _, units = individual_units
    design, data, fit = fitted
    ages = np.array([3.0, 6.0, 10.0, 15.0, 20.0, 25.0])
    km = KaplanMeierFitter().fit(units["duration"], units["event"])
    km_share = 1.0 - km.survival_function_at_times(ages).to_numpy()
    post = fit.draws(["scale_group", "shape", "share"])
    f = curves.cdf("weibull", ages[None, :] / data.extra["age_ref"], post["scale_group"][:, :1],
                   post["shape"][:, None])
    fitted_share = (post["share"] * f).mean(axis=0)
    assert np.max(np.abs(fitted_share - km_share)) < 0.03


def test_derived_median_age_recovers_the_true_median(fitted):
    design, data, fit = fitted
    median = RECIPE.derived(data, design.options, fit.draws())["median age"]
    true = TRUE["scale_days"] * np.log(2) ** (1 / TRUE["shape"])  # Weibull median
    assert np.percentile(median, 1) < true < np.percentile(median, 99)


def test_derived_eventual_share_is_the_posterior_share(fitted):
    design, data, fit = fitted
    draws = fit.draws()
    np.testing.assert_array_equal(RECIPE.derived(data, design.options, draws)["eventual share"],
                                  draws["share"][:, 0])


def test_figure_is_a_matplotlib_figure(fitted):
    design, data, fit = fitted
    fig = RECIPE.figure(data, design.options, fit.draws(), fit.draws(group="posterior_predictive"))
    assert isinstance(fig, matplotlib.figure.Figure) and len(fig.axes) == 1


# --- relaxations, demo, registry ------------------------------------------------------------------


def test_never_relaxation_applies_only_when_every_unit_must_have_the_event():
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.key == "eventual_fraction")
    assert relaxation.applies_to({"eventual": "all"}) and not relaxation.applies_to({"eventual": "estimate"})


@pytest.mark.parametrize("parameter", ["never", "curve_power", "cohort_sd", "overdispersion"])
def test_each_relaxed_model_adds_its_parameter(parameter):
    design, data = validated(small_table(), eventual="all")
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.relaxation.parameter == parameter)
    model = design.build(data, relaxation)
    assert parameter in model.named_vars and finite_logp(model)


def test_demo_table_validates_and_its_truth_names_parameters():
    scenario = RECIPE.demo(np.random.default_rng(1))
    assert isinstance(scenario, DemoScenario)
    design = make_design(RECIPE, scenario.options, {})
    data = RECIPE.validate(scenario.table, design.options)
    declared = {p.name for p in RECIPE.parameters}
    assert {"scale", "shape", "eventual"} <= set(scenario.truth) and data.rows == len(scenario.table)
    assert {"scale", "shape", "eventual"} <= declared


def test_registry_lists_the_recipe():
    assert registry.load().get("timing-curve").name == "timing-curve"


# --- where the chains start ----------------------------------------------------------------------


def early_layout():
    """The demo layout with every event before the first look (a flat observed curve)."""
    design = make_design(RECIPE, {"family": "weibull", "eventual": "estimate"}, {})
    base = design.validate(RECIPE.demo(np.random.default_rng(1)).table)
    return design, base


def chain_shapes(fit) -> np.ndarray:
    return fit.idata["posterior"]["shape"].median("draw").values


def test_chains_of_a_flat_early_curve_stay_out_of_the_flat_curve_mode():
    # With the chains started at the prior's centre, most chains of such a table
    # settled at shape ~0.03 (a curve flat at 1 - 1/e), a mode ~50 log-density units
    # below the one the data support (measured on the demo layout).
    from workbench.harness import fit_design

    design, base = early_layout()
    settings = engine.Settings(draws=200, tune=300, chains=4, prior_draws=100)
    ordinary = design.simulate(np.random.default_rng(2), base, {"scale": 1.0, "shape": 2.4, "eventual": 0.8})
    early = design.simulate(np.random.default_rng(0), base, {"scale": 0.05, "shape": 1.35, "eventual": 0.7})
    last = early.extra["last_row"][early["cohort"]]
    assert np.all(early["events"] == early["events"][last])  # nothing new after the first look
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit_design(design, ordinary, 1, settings, prior=False)
        # The same compiled model refitted: the chains start at the new data's ages.
        refit = fit_design(design, early, 1, settings, prior=False)
    assert np.all(chain_shapes(refit) > 0.5)


def test_a_prior_override_that_excludes_the_data_start_keeps_its_own_start():
    design, base = early_layout()
    design = make_design(RECIPE, design.options, {"scale": "uniform(0.5,2)"})
    early = design.simulate(np.random.default_rng(0), base, {"scale": 0.05, "shape": 1.35, "eventual": 0.7})
    model = design.build(early)
    assert finite_logp(model)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = engine.fit(model, seed=1, settings=SETTINGS, prior=False)
    assert fit.idata["posterior"]["scale"].min() >= 0.5


def test_a_model_compiled_for_one_table_does_not_serve_another_of_the_same_shape(monkeypatch):
    # Tray sizes enter the model as constants: a second table with the same trays and
    # looks but other sizes needs its own compiled model.
    from workbench import harness

    design = make_design(RECIPE, {"family": "weibull", "eventual": "estimate"}, {})
    first = design.validate(RECIPE.demo(np.random.default_rng(1)).table)
    second = design.validate(RECIPE.demo(np.random.default_rng(2)).table)
    assert first.rows == second.rows and not np.array_equal(first["exposed"], second["exposed"])
    settings = engine.Settings(draws=100, tune=200, chains=2, prior_draws=50)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        monkeypatch.setattr(harness, "_COMPILED", {})
        alone = harness.fit_design(design, second, 3, settings, prior=False).draws(["eventual"])
        monkeypatch.setattr(harness, "_COMPILED", {})
        harness.fit_design(design, first, 3, settings, prior=False)
        after = harness.fit_design(design, second, 3, settings, prior=False).draws(["eventual"])
    np.testing.assert_array_equal(after["eventual"], alone["eventual"])


def test_the_cohort_share_relaxation_gives_each_cohort_its_own_eventual_share():
    design, data = validated(small_table(), eventual="estimate")
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.relaxation
                      and a.relaxation.parameter == "cohort_share_sd")
    assert a_key(relaxation) == "cohort_homogeneity"
    assert relaxation.applies_to({"eventual": "estimate"}) and not relaxation.applies_to({"eventual": "all"})
    model = design.build(data, relaxation)
    assert {"cohort_share_sd", "cohort_share_z"} <= set(model.named_vars) and finite_logp(model)


def a_key(relaxation):
    return next(a.key for a in RECIPE.assumptions if a.relaxation is relaxation)
