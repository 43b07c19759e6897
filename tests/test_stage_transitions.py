"""stage-transitions: validation, the chain in NumPy and PyMC, and absorption shares."""

import warnings

import matplotlib
import numpy as np
import pandas as pd
import pymc as pm
import pytest

from recipes.stage_transitions import DEMO_TRUTH, RECIPE, absorption_shares, cohort_states
from workbench import engine, registry
from workbench.errors import DataError, OptionError
from workbench.recipe import DemoScenario, make_design

SETTINGS = engine.Settings(draws=300, tune=300, prior_draws=200, chains=2)
# These graphs are evaluated a few times only: compiling them to C would cost more
# than running them in Python.
QUICK = "FAST_COMPILE"
STAGES = "new,active,done,dropped"
TRUE_P = np.array([
    [0.50, 0.35, 0.00, 0.15],
    [0.00, 0.60, 0.30, 0.10],
    [0.00, 0.00, 1.00, 0.00],
    [0.00, 0.00, 0.00, 1.00],
])


def small_table():
    return pd.DataFrame({
        "cohort": ["A", "A", "A", "B", "B"],
        "period": [0, 1, 2, 1, 2],
        "new": [100, 50, 20, 80, 40],
        "active": [0, 35, 45, 0, 28],
        "done": [0, 0, 15, 0, 0],
        "dropped": [0, 15, 20, 0, 12],
    })


def validated(table, **options):
    design = make_design(RECIPE, {"stages": STAGES, "absorbing": "done,dropped", **options}, {})
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


def test_a_changing_total_is_refused():
    table = small_table()
    table.loc[1, "new"] = 45
    assert "row 2 (line 3): stages sum to 95 but to 100 in row 1 (line 2)" in one_line_error(DataError, table)


def test_a_gap_in_periods_is_refused():
    table = small_table()
    table.loc[2, "period"] = 4
    assert "jumps from period 1 in row 2 (line 3) to 4" in one_line_error(DataError, table)


def test_a_repeated_period_is_refused():
    table = small_table()
    table.loc[4, "period"] = 1
    assert "already has period 1" in one_line_error(DataError, table)


def test_an_end_stage_that_loses_units_is_refused():
    table = small_table()
    table.loc[2, ["dropped", "active"]] = [10, 55]
    assert "column 'dropped' row 3 (line 4): 10 < 15" in one_line_error(DataError, table)


def test_an_end_stage_outside_the_stages_is_an_option_error():
    assert "option 'absorbing'" in one_line_error(OptionError, small_table(), absorbing="done,lost")


def test_every_stage_an_end_stage_is_an_option_error():
    assert "at least one stage that is not an end stage" in one_line_error(
        OptionError, small_table(), absorbing=STAGES)


def test_a_listed_move_out_of_an_end_stage_is_an_option_error():
    message = one_line_error(OptionError, small_table(), moves="new>active,done>new")
    assert "leaves the end stage 'done'" in message


def test_a_listed_move_with_an_unknown_stage_is_an_option_error():
    assert "found 'paused' in new>paused" in one_line_error(OptionError, small_table(), moves="new>paused")


def test_listed_moves_are_the_only_moves_besides_staying():
    _, data = validated(small_table(), moves="new>active,active>done,active>dropped")
    expected = np.eye(4, dtype=bool)
    expected[0, 1] = expected[1, 2] = expected[1, 3] = True
    np.testing.assert_array_equal(data.extra["allowed"], expected)


def test_a_fractional_period_is_refused():
    table = small_table()
    table["period"] = table["period"].astype(float)
    table.loc[0, "period"] = 0.5
    assert "column 'period' row 1 (line 2): expected a whole number" in one_line_error(DataError, table)


def test_a_table_without_any_move_is_refused():
    table = small_table().iloc[[0, 3]]
    assert "at least one cohort seen in two consecutive periods" in one_line_error(DataError, table)


# --- the chain: PyMC equals NumPy equals the simulator -------------------------------------------


def test_forward_moves_allow_staying_later_stages_and_end_stages_only():
    _, data = validated(small_table())
    allowed = data.extra["allowed"]
    assert allowed[0].all() and not allowed[1, 0] and allowed[1, 1:].all()
    np.testing.assert_array_equal(allowed[2:], np.eye(4, dtype=bool)[2:])


def test_model_expected_shares_are_the_movers_shares_times_the_matrix():
    design, data = validated(small_table())
    logits = np.array([-0.3, -5.0, -1.2, -0.7, -1.8])  # allowed moves against staying, row by row
    model = pm.do(design.build(data), {"move_logit": logits})
    expected, transition = pm.draw([model["expected"], model["transition"]], mode=QUICK)
    moving = RECIPE.observed(data)["sources"]
    np.testing.assert_allclose(transition[:2].sum(axis=1), 1.0)
    np.testing.assert_allclose(expected, moving / moving.sum(axis=1, keepdims=True) @ transition,
                               atol=1e-8)


def test_observed_destinations_leave_out_units_already_in_end_stages():
    _, data = validated(small_table())
    values = RECIPE.observed(data)
    np.testing.assert_array_equal(values["counts"].sum(axis=1), values["sources"].sum(axis=1))
    assert (values["counts"] >= 0).all() and (values["sources"][:, data.extra["absorbing"]] == 0).all()


def test_story_variance_is_the_sum_of_one_multinomial_per_source_stage():
    # Variance of a sum of independent multinomials: sum_i n_i P_ij (1 - P_ij) (common practice).
    design, data = validated(small_table())
    logits = np.array([-0.3, -5.0, -1.2, -0.7, -1.8])
    model = pm.do(design.build(data), {"move_logit": logits})
    story_var, transition = pm.draw([model["story_var"], model["transition"]], mode=QUICK)
    moving = RECIPE.observed(data)["sources"]
    np.testing.assert_allclose(story_var, moving @ (transition * (1 - transition)), atol=1e-8)


def test_simulated_means_follow_powers_of_the_matrix():
    # Mean stage counts of a Markov chain after t moves: n_0 P^t (Kemeny and Snell 1960, II).
    rows = [{"cohort": "A", "period": t, "new": 200, "active": 0, "done": 0, "dropped": 0} for t in range(5)]
    design, data = validated(pd.DataFrame(rows))
    rng = np.random.default_rng(9)
    reps = 300
    stages = STAGES.split(",")
    total = np.zeros((5, 4))
    for _ in range(reps):
        sim = design.simulate(rng, data, {"transition": TRUE_P})
        total += np.column_stack([sim[name] for name in stages])
    mean = np.array([200 * np.linalg.matrix_power(TRUE_P, t)[0] for t in range(5)])
    se = np.sqrt(200 * (mean / 200) * (1 - mean / 200) / reps)
    # Four binomial standard errors per cell.
    assert np.all(np.abs(total / reps - mean) <= 4 * se + 1e-9)


def at_true_matrix(stat, data) -> float:
    """A targeted statistic of ``data`` with the model's draws replaced by TRUE_P's moments."""
    counts = RECIPE.observed(data)
    moving = counts["sources"]
    expected = moving / np.maximum(moving.sum(axis=1, keepdims=True), 1) @ TRUE_P
    story_var = moving @ (TRUE_P * (1 - TRUE_P))
    draws = {"expected": expected[None], "story_var": story_var[None]}
    return float(stat.compute(data, {"y": counts["counts"][None]}, draws)[0])


@pytest.mark.parametrize("key,fault", [("no_missing_exit", {"dormant": 0.1}),
                                       ("independent_units", {"overdispersion": 0.1})])
def test_statistic_rises_when_a_fault_is_planted(key, fault):
    rows = [{"cohort": f"c{c}", "period": c + t, "new": 300, "active": 0, "done": 0, "dropped": 0}
            for c in range(8) for t in range(10)]
    design, data = validated(pd.DataFrame(rows))
    stat = next(a.statistic for a in RECIPE.assumptions if a.key == key)

    def value(extra, seed):
        sim = design.simulate(np.random.default_rng(seed), data, {"transition": TRUE_P, **extra})
        return at_true_matrix(stat, sim)

    clean = np.mean([value({}, s) for s in range(3)])
    faulty = np.mean([value(fault, s) for s in range(3)])
    assert faulty > clean + 1.0


def test_drift_relaxed_model_adds_stay_drift():
    design, data = validated(small_table())
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.key == "time_homogeneity")
    model = design.build(data, relaxation)
    assert "stay_drift" in model.named_vars and finite_logp(model)


def test_dormant_model_at_its_null_equals_the_plain_model():
    design, data = validated(small_table())
    relaxation = next(a.relaxation for a in RECIPE.assumptions if a.key == "no_missing_exit")
    logits = np.array([-0.3, -5.0, -1.2, -0.7, -1.8])
    plain = pm.do(design.build(data), {"move_logit": logits})
    relaxed = pm.do(design.build(data, relaxation), {"move_logit": logits, "dormant": 0.0})
    np.testing.assert_allclose(pm.draw(relaxed["expected"], mode=QUICK), pm.draw(plain["expected"], mode=QUICK),
                               atol=1e-9)


# --- a fit: absorption shares ------------------------------------------------------------------------


@pytest.fixture(scope="module")
def fitted():
    scenario = RECIPE.demo(np.random.default_rng(3))
    design = make_design(RECIPE, scenario.options, {})
    data = RECIPE.validate(scenario.table, design.options)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = engine.fit(design.build(data), seed=4, settings=SETTINGS)
    return design, data, fit


def test_absorption_shares_equal_the_fundamental_matrix_formula(fitted):
    # Reference: Kemeny and Snell (1960), Finite Markov Chains, Theorem 3.3.7:
    # B = N R with the fundamental matrix N = (I - Q)^-1, computed here draw by draw.
    design, data, fit = fitted
    transition = fit.draws(["transition"])["transition"]
    derived = RECIPE.derived(data, design.options, fit.draws())
    for s, m in enumerate(transition[:50]):
        q, r = m[:2, :2], m[:2, 2:]
        b = np.linalg.inv(np.eye(2) - q) @ r
        assert derived["ends in certified from applied"][s] == pytest.approx(b[0, 0], abs=1e-10)
        assert derived["ends in left from training"][s] == pytest.approx(b[1, 1], abs=1e-10)


def test_absorption_shares_of_each_draw_sum_to_one(fitted):
    design, data, fit = fitted
    b = absorption_shares(fit.draws(["transition"])["transition"], data.extra["absorbing"])
    np.testing.assert_allclose(b.sum(axis=-1), 1.0, atol=1e-9)


def test_fit_recovers_the_true_long_run_certified_share(fitted):
    design, data, fit = fitted
    share = RECIPE.derived(data, design.options, fit.draws())["ends in certified from applied"]
    true = absorption_shares(np.array(DEMO_TRUTH["transition"]), data.extra["absorbing"])[0, 0]
    assert np.percentile(share, 1) < true < np.percentile(share, 99)


def test_figure_is_a_matplotlib_figure(fitted):
    design, data, fit = fitted
    fig = RECIPE.figure(data, design.options, fit.draws(), fit.draws(group="posterior_predictive"))
    assert isinstance(fig, matplotlib.figure.Figure)


# --- pooling, demo and registry ------------------------------------------------------------------------


@pytest.mark.parametrize("pooling,centred", [("none", "false"), ("partial", "false"), ("partial", "true")])
def test_group_designs_give_one_matrix_per_group(pooling, centred):
    table = pd.concat([small_table().assign(group="north"),
                       small_table().assign(group="south", cohort=lambda t: t["cohort"] + "2")])
    design, data = validated(table, pooling=pooling, centred=centred)
    model = design.build(data)
    matrices = pm.draw(model["transition_group"], random_seed=1, mode=QUICK)
    assert matrices.shape == (2, 4, 4)
    np.testing.assert_allclose(matrices.sum(axis=-1), 1.0)


def test_demo_table_validates_with_its_options():
    scenario = RECIPE.demo(np.random.default_rng(1))
    assert isinstance(scenario, DemoScenario)
    design = make_design(RECIPE, scenario.options, {})
    assert RECIPE.validate(scenario.table, design.options).rows == len(scenario.table)


def test_registry_lists_the_recipe():
    assert registry.load().get("stage-transitions").name == "stage-transitions"


def test_listed_moves_are_written_back_as_they_are_typed():
    # The design label and the notebook's options must parse again to the same moves.
    from workbench.recipe import make_design, option_text

    text = "applied>training,applied>left,training>certified"
    design = make_design(RECIPE, {"stages": "applied,training,certified,left", "absorbing": "certified,left",
                                  "moves": text}, {})
    assert option_text(design.options["moves"]) == text
    assert f"moves={text}" in design.label()
    assert RECIPE.read_options({**{k: option_text(v) for k, v in design.options.items()}}) == design.options


def _prior_coverage_checks(fitted) -> list[str]:
    from workbench.checks import Context
    from workbench.checks.prior import prior_predictive_coverage

    design, data, fit = fitted
    return [f.check for f in prior_predictive_coverage(Context(design, data, fit, {}, None))]


def test_prior_predictive_check_never_compares_the_spread_of_counts(fitted):
    # The one-multinomial likelihood has the story's means but a wider spread
    # (recipe docstring), so a prior predictive sd would be too wide by construction.
    assert not any(c.endswith(":sd") for c in _prior_coverage_checks(fitted))


def test_prior_predictive_check_drops_a_mean_the_counts_fix(fitted):
    # Every step's counts sum to the units moving, so every prior predictive
    # draw has the observed mean count: a statistic that cannot vary says nothing.
    _, _, fit = fitted
    means = fit.draws(group="prior_predictive")["y"].reshape(-1, fit.idata["observed_data"]["y"].size).mean(axis=1)
    assert np.ptp(means) == 0
    assert "prior_coverage:y:mean" not in _prior_coverage_checks(fitted)


# --- transition counts: the exact layout -------------------------------------------------------------


def transition_table():
    """The units of small_table() followed move by move: where each stage's units were one period later."""
    return pd.DataFrame({
        "cohort": ["A", "A", "A", "B"],
        "period": [0, 1, 1, 1],
        "from": ["new", "new", "active", "new"],
        "new": [50, 20, 0, 40],
        "active": [35, 25, 20, 28],
        "done": [0, 0, 15, 0],
        "dropped": [15, 5, 0, 12],
    })


@pytest.mark.parametrize("change, expected", [
    (lambda t: t.assign(**{"from": ["old", "new", "active", "new"]}),
     "column 'from' row 1 (line 2): expected one of new, active, done, dropped; found 'old'"),
    (lambda t: t.assign(**{"from": ["new", "new", "new", "new"]}),
     "row 3 (line 4): cohort 'A' already has period 1 from 'new' in row 2 (line 3); expected one row per cohort, "
     "period and from-stage"),
    (lambda t: pd.concat([t, pd.DataFrame([{"cohort": "B", "period": 2, "from": "done", "new": 0,
                                            "active": 0, "done": 3, "dropped": 2}])], ignore_index=True),
     "column 'dropped' row 5 (line 6): 2 unit(s) moved from 'done' to 'dropped', an end stage never loses units"),
    (lambda t: t.assign(active=[35, 25, 20, 28], new=[50, 20, 4, 40]),
     "column 'new' row 3 (line 4): 4 unit(s) moved from 'active' to 'new', a move the design does not allow "
     "(option 'moves')"),
    (lambda t: t.assign(group=["x", "y", "x", "x"]),
     "column 'group' row 2 (line 3): 'y' differs from 'x' in row 1 (line 2); expected one group per cohort"),
    (lambda t: t.assign(**{"from": ["done", "dropped", "done", "dropped"], "new": 0, "active": 0,
                           "done": [5, 0, 5, 0], "dropped": [0, 3, 0, 3]}),
     "expected at least one row with units in a stage that is not an end stage; found none"),
])
def test_bad_transition_counts_give_one_line(change, expected):
    assert one_line_error(DataError, change(transition_table())) == expected


def test_transition_counts_give_the_cohort_states_of_the_stage_counts():
    _, moves = validated(transition_table())
    _, stages = validated(small_table())
    cohort, age, states = cohort_states(moves)
    expected = {(c, a): tuple(n) for c, a, n in zip(stages["cohort"], stages["age"],
                                                    np.column_stack([stages[s] for s in STAGES.split(",")]))}
    assert {(c, a): tuple(n) for c, a, n in zip(cohort, age, states)} == expected


def test_transition_counts_likelihood_is_one_multinomial_per_row():
    # Reference: scipy.stats.multinomial.logpmf of each row's destinations over row 'from' of the matrix.
    from scipy import stats

    design, data = validated(transition_table())
    logits = np.array([-0.3, -5.0, -1.2, -0.7, -1.8])
    model = pm.do(design.build(data), {"move_logit": logits})
    transition = pm.draw(model["transition"], mode=QUICK)
    loglik = model.compile_logp(vars=model.observed_RVs, mode=QUICK)({})
    table = transition_table()
    stage = {name: i for i, name in enumerate(STAGES.split(","))}
    expected = sum(stats.multinomial(row[STAGES.split(",")].sum(), transition[stage[row["from"]]]).logpmf(
        row[STAGES.split(",")].to_numpy(int)) for _, row in table.iterrows())
    # Impossible moves keep a probability of EPS = 1e-9 in the model (workbench.cohorts).
    assert loglik == pytest.approx(expected, abs=1e-6)
    assert not RECIPE.approximate_likelihood(data)


def transition_layout(seed=5):
    """Eight cohorts of 300 followed for ten periods as transition counts, each unit moved by TRUE_P.

    Written out here, apart from the recipe's simulator: every period, the units of each
    transient stage make one multinomial draw over row TRUE_P[stage].
    """
    rng = np.random.default_rng(seed)
    names = STAGES.split(",")
    rows = []
    for c in range(8):
        n = np.array([300, 0, 0, 0])
        for t in range(10):
            after = n * np.array([0, 0, 1, 1])  # end stages keep their units
            for i in (0, 1):
                moved = rng.multinomial(n[i], TRUE_P[i])
                rows.append({"cohort": f"c{c}", "period": c + t, "from": names[i], **dict(zip(names, moved))})
                after = after + moved
            n = after
    return pd.DataFrame(rows)


def test_simulated_transition_counts_keep_each_rows_units():
    design, data = validated(transition_layout())
    sim = design.simulate(np.random.default_rng(2), data, {"transition": TRUE_P})
    np.testing.assert_array_equal(RECIPE.observed(sim)["sources"], RECIPE.observed(data)["sources"])


def test_dispersion_of_transition_counts_from_the_story_is_about_one():
    design, data = validated(transition_layout())
    stat = next(a.statistic for a in RECIPE.assumptions if a.key == "independent_units")
    values = []
    for seed in range(5):
        sim = design.simulate(np.random.default_rng(seed), data, {"transition": TRUE_P})
        values.append(at_true_matrix(stat, sim))
    assert 0.8 < np.mean(values) < 1.2


@pytest.mark.slow
def test_a_check_of_transition_counts_recovers_the_matrix_and_runs_every_check(fast_settings):
    from workbench import harness

    # The moves TRUE_P makes (forward moves would also allow new > done, which never happens).
    design, data = validated(transition_layout(), moves="new>active,new>dropped,active>done,active>dropped")
    run = harness.run_check(design, data, harness.DataInfo("moves", "", data.rows), seed=3,
                            settings=fast_settings, workers=1)
    transition = run.fit.draws(["transition"])["transition"]
    lo, hi = np.percentile(transition, [0.5, 99.5], axis=0)
    moves = data.extra["allowed"] & ~np.eye(4, dtype=bool)
    assert np.all((lo[moves] <= TRUE_P[moves]) & (TRUE_P[moves] <= hi[moves]))
    assert not any(v.verdict == "broken" for v in run.verdicts), [(v.key, v.verdict) for v in run.verdicts]
    fig = RECIPE.figure(data, design.options, run.fit.draws(), {})
    assert isinstance(fig, matplotlib.figure.Figure)
