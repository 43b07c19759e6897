"""competing-risks: validation, the story in NumPy and PyMC, and a fit against Aalen-Johansen."""

import warnings

import matplotlib
import numpy as np
import pandas as pd
import pymc as pm
import pytest
from scipy import stats

from recipes.competing_risks import RECIPE
from workbench import cohorts, curves, engine, registry
from workbench.errors import DataError, OptionError
from workbench.recipe import DemoScenario, make_design

SETTINGS = engine.Settings(draws=300, tune=300, prior_draws=200, chains=2)
# These graphs are evaluated a few times only: compiling them to C would cost more
# than running them in Python.
QUICK = "FAST_COMPILE"


def small_table():
    return pd.DataFrame({
        "cohort": ["A", "A", "B"],
        "age": [2.0, 6.0, 4.0],
        "exposed": [200, 200, 150],
        "fixed": [40, 100, 50],
        "scrapped": [10, 30, 20],
    })


def validated(table, **options):
    design = make_design(RECIPE, {"outcomes": "fixed,scrapped", "family": "weibull", **options}, {})
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


def test_outcomes_above_exposed_name_the_row():
    table = small_table()
    table.loc[2, "scrapped"] = 120
    assert one_line_error(DataError, table) == "row 3 (line 4): outcomes fixed + scrapped sum to 170 > exposed 150"


def test_a_falling_outcome_count_is_refused():
    table = small_table()
    table.loc[1, "scrapped"] = 5
    assert "column 'scrapped' row 2 (line 3): 5 < 10" in one_line_error(DataError, table)


def test_a_single_outcome_is_an_option_error():
    assert "option 'outcomes'" in one_line_error(OptionError, small_table(), outcomes="fixed")


def test_an_outcome_column_missing_from_the_table_is_refused():
    assert "needs column 'lost'" in one_line_error(DataError, small_table(), outcomes="fixed,lost")


def test_unknown_resolve_choice_is_an_option_error():
    assert "option 'resolve'" in one_line_error(OptionError, small_table(), resolve="some")


# --- the story: PyMC equals scipy equals the simulator ---------------------------------------------


def test_model_cell_probabilities_follow_the_mixture_story():
    design, data = validated(small_table(), family="lognormal")
    ref = data.extra["age_ref"]
    share = np.array([0.55, 0.45])
    scale, shape = np.array([0.7, 1.6]), np.array([1.2, 2.0])
    logit = np.log(share[1:] / share[0])
    model = pm.do(design.build(data), {"share_logit": logit, "scale": scale, "shape": shape})
    p = pm.draw(model["y"].owner.inputs[-1], mode=QUICK)

    def c(age):
        # Reference: scipy.stats.lognorm CDF with s = 1 / shape (Larson-Dinse mixture).
        return share * stats.lognorm.cdf(age / ref, 1 / shape, scale=scale)

    a2, a6, a4 = c(2.0), c(6.0), c(4.0)
    expected = np.array([
        [*a2, *(a6 - a2), 1 - a6.sum()],
        [*a4, 0.0, 0.0, 1 - a4.sum()],
    ])
    np.testing.assert_allclose(p, expected, atol=1e-8)


def test_simulated_cell_frequencies_match_the_probabilities():
    design, data = validated(small_table(), family="lognormal")
    params = {"share": [0.55, 0.45], "scale": [0.7, 1.6], "shape": [1.2, 2.0]}
    rng = np.random.default_rng(8)
    reps = 400
    total = sum(RECIPE.observed(design.simulate(rng, data, params))["counts"] for _ in range(reps))
    cumulative = cohorts.cumulative_incidence("lognormal", cohorts.relative_age(data), params["scale"],
                                              params["shape"], params["share"])
    p = cohorts.cell_probabilities(data, cumulative)
    n = data.extra["cohort_exposed"][:, None] * reps
    # Four binomial standard errors per cell.
    assert np.all(np.abs(total - n * p) <= 4 * np.sqrt(n * p * (1 - p)) + 1)


def test_open_share_under_resolve_estimate_completes_the_shares():
    design, data = validated(small_table(), resolve="estimate")
    model = design.build(data)
    share, open_share = pm.draw([model["share"], model["open_share"]], draws=200, random_seed=2,
                                mode=QUICK)
    np.testing.assert_allclose(share.sum(axis=1) + open_share, 1.0, atol=1e-12)
    assert np.all(open_share > 0)


def test_unresolved_relaxation_applies_only_when_all_must_resolve():
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.key == "all_resolve")
    assert relaxation.applies_to({"resolve": "all"}) and not relaxation.applies_to({"resolve": "estimate"})


@pytest.mark.parametrize("parameter", ["unresolved", "curve_power", "cohort_sd", "overdispersion"])
def test_each_relaxed_model_adds_its_parameter(parameter):
    design, data = validated(small_table())
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.relaxation.parameter == parameter)
    model = design.build(data, relaxation)
    assert parameter in model.named_vars and finite_logp(model)


def test_unresolved_plateau_statistic_falls_when_units_never_end():
    rows = [{"cohort": f"c{c}", "age": a, "exposed": 300, "fixed": 0, "scrapped": 0}
            for c in range(20) for a in (1, 3, 9)]
    design, data = validated(pd.DataFrame(rows))
    params = {"share": [0.6, 0.4], "scale": [0.5, 1.0], "shape": [1.5, 1.5]}
    cumulative = cohorts.cumulative_incidence("weibull", cohorts.relative_age(data), params["scale"],
                                              params["shape"], params["share"])
    stat = next(a.statistic for a in RECIPE.assumptions if a.key == "all_resolve")

    def value(extra):
        sim = design.simulate(np.random.default_rng(4), data, {**params, **extra})
        return float(stat.compute(sim, {"y": RECIPE.observed(sim)["counts"][None]},
                                  {"cumulative": cumulative[None]})[0])

    assert value({"unresolved": 0.15}) < value({}) - 3.0


# --- fit on cohort aggregates against Aalen-Johansen on the individual units ------------------------

OUTCOMES = ("fixed", "scrapped")
TRUE = {"share": [0.65, 0.35], "scale_days": [5.0, 12.0], "shape": [1.6, 1.2]}
LOOKS = np.array([1, 3, 5, 8, 12, 18, 25, 35])


@pytest.fixture(scope="module")
def individual_units():
    """3,000 devices in 12 weekly cohorts: each ends fixed or scrapped, followed to its current age."""
    rng = np.random.default_rng(77)
    rows, units = [], []
    for c in range(12):
        current = 38 - 3 * c
        n = 250
        outcome = rng.choice(2, size=n, p=TRUE["share"])
        scale = np.array(TRUE["scale_days"])[outcome]
        times = scale * rng.weibull(np.array(TRUE["shape"])[outcome])
        for age in np.append(LOOKS[LOOKS < current], current):
            row = {"cohort": f"w{c}", "age": age, "exposed": n}
            row.update({name: int(((outcome == k) & (times <= age)).sum()) for k, name in enumerate(OUTCOMES)})
            rows.append(row)
        seen = times <= current
        units.append(pd.DataFrame({"duration": np.minimum(times, current),
                                   "event": np.where(seen, outcome + 1, 0)}))
    return pd.DataFrame(rows), pd.concat(units, ignore_index=True)


@pytest.fixture(scope="module")
def fitted(individual_units):
    table, _ = individual_units
    design, data = validated(table)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = engine.fit(design.build(data), seed=5, settings=SETTINGS)
    return design, data, fit


def test_fitted_incidence_matches_aalen_johansen_on_the_units(individual_units, fitted):
    # Reference: lifelines.AalenJohansenFitter (Aalen and Johansen 1978) per outcome on
    # the individual end times; the recipe sees only cohort counts at the looks.
    from lifelines import AalenJohansenFitter

    _, units = individual_units
    design, data, fit = fitted
    ages = np.array([2.0, 5.0, 10.0, 15.0, 20.0, 30.0])
    post = fit.draws(["scale_group", "shape", "share"])
    for k in range(len(OUTCOMES)):
        aj = AalenJohansenFitter(calculate_variance=False, seed=0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            aj.fit(units["duration"], units["event"], event_of_interest=k + 1)
        curve = aj.cumulative_density_.iloc[:, 0]
        reference = curve.to_numpy()[np.searchsorted(curve.index.to_numpy(), ages, side="right") - 1]
        f = curves.cdf("weibull", ages[None, :] / data.extra["age_ref"], post["scale_group"][:, 0, k:k + 1],
                       post["shape"][:, k:k + 1])
        incidence = (post["share"][:, k:k + 1] * f).mean(axis=0)
        assert np.max(np.abs(incidence - reference)) < 0.03, OUTCOMES[k]


def test_every_draw_has_shares_summing_to_one_and_counts_to_the_exposed(fitted):
    design, data, fit = fitted
    np.testing.assert_allclose(fit.draws(["share"])["share"].sum(axis=1), 1.0, atol=1e-9)
    replicated = fit.draws(group="posterior_predictive")["y"]
    np.testing.assert_array_equal(replicated.sum(axis=-1),
                                  np.broadcast_to(data.extra["cohort_exposed"], replicated.shape[:-1]))


def test_derived_shares_at_maturity_are_the_posterior_shares(fitted):
    design, data, fit = fitted
    draws = fit.draws()
    derived = RECIPE.derived(data, design.options, draws)
    np.testing.assert_array_equal(derived["share fixed"], draws["share"][:, 0])
    np.testing.assert_array_equal(derived["share scrapped"], draws["share"][:, 1])
    assert abs(np.median(derived["share fixed"]) - TRUE["share"][0]) < 0.03


def test_figure_is_a_matplotlib_figure(fitted):
    design, data, fit = fitted
    fig = RECIPE.figure(data, design.options, fit.draws(), fit.draws(group="posterior_predictive"))
    assert isinstance(fig, matplotlib.figure.Figure)


# --- demo and registry ---------------------------------------------------------------------------------


def test_demo_table_validates_and_its_shares_sum_to_one():
    scenario = RECIPE.demo(np.random.default_rng(1))
    assert isinstance(scenario, DemoScenario)
    design = make_design(RECIPE, scenario.options, {})
    data = RECIPE.validate(scenario.table, design.options)
    assert data.rows == len(scenario.table) and abs(sum(scenario.truth["share"]) - 1) < 1e-12


def test_registry_lists_the_recipe():
    assert registry.load().get("competing-risks").name == "competing-risks"
