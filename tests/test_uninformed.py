"""An assumption the table cannot inform is `unchecked` with the reason, never judged.

One cohort cannot differ from other cohorts, one step between periods cannot
drift, two distances show no trend: their statistics and relaxations would
only echo noise (or the prior), so the verdict says what the table lacks.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from workbench import engine, harness, registry, verdicts
from workbench.findings import Finding
from workbench.recipe import make_design

TINY = engine.Settings(draws=100, tune=100, chains=2, prior_draws=100)


def timing_design():
    return make_design(registry.load().get("timing-curve"), {"family": "weibull"}, {})


def one_cohort_table():
    ages = [2.0, 4, 6, 9, 12, 16, 20]
    return pd.DataFrame({"cohort": "lot01", "age": ages, "exposed": 200,
                         "events": [10, 40, 80, 120, 150, 165, 170]})


def test_one_cohort_cannot_inform_cohort_homogeneity():
    design = timing_design()
    data = design.validate(one_cohort_table())
    homogeneity = next(a for a in design.assumptions if a.key == "cohort_homogeneity")
    assert "one cohort" in homogeneity.uninformed(data)
    assert all(not a.uninformed(data) for a in design.assumptions if a.key != "cohort_homogeneity")


def test_two_cohorts_inform_cohort_homogeneity():
    table = pd.concat([one_cohort_table(), one_cohort_table().assign(cohort="lot02")])
    design = timing_design()
    homogeneity = next(a for a in design.assumptions if a.key == "cohort_homogeneity")
    assert homogeneity.uninformed(design.validate(table)) == ""


def test_an_uninformed_assumption_is_unchecked_whatever_its_findings():
    alarm = Finding("cohort_homogeneity", "ppc", "ppc:cohort_spread", 9.0, 1e-6, "spread", {})
    judged = {v.key: v for v in verdicts.decide(
        [("cohort_homogeneity", "Every cohort follows the same timing.", "")], [alarm],
        {"cohort_homogeneity": "the table holds one cohort"})}
    assert judged["cohort_homogeneity"].verdict == "unchecked"
    assert judged["cohort_homogeneity"].advice == "Not checked: the table holds one cohort."
    assert judged["cohort_homogeneity"].evidence == []


def test_two_distances_cannot_show_a_spread_trend():
    recipe = registry.load().get("threshold-geometry")
    design = make_design(recipe, {"clearance": "0.2"}, {})
    data = design.validate(pd.DataFrame({"distance": [1.0, 2.0], "attempts": 100,
                                         "successes": [90, 60]}))
    shared = next(a for a in design.assumptions if a.key == "shared_spread")
    assert "fewer than three distances" in shared.uninformed(data)


@pytest.mark.slow
def test_a_check_of_one_cohort_fits_no_cohort_relaxation_and_says_why():
    design = timing_design()
    data = design.validate(one_cohort_table())
    run = harness.run_check(design, data, harness.DataInfo("one cohort", "", data.rows), seed=1,
                            settings=TINY, workers=1)
    homogeneity = next(v for v in run.verdicts if v.key == "cohort_homogeneity")
    assert homogeneity.verdict == "unchecked" and "one cohort" in homogeneity.advice
    assert "cohort_sd" not in run.relaxed
    assert not any(f.assumption == "cohort_homogeneity" for f in run.findings)


# --- every assumption a table cannot inform says so, recipe by recipe --------------------------


def uninformed_keys(recipe_name, options, table):
    design = make_design(registry.load().get(recipe_name), options, {})
    data = design.validate(table)
    return {a.key: a.uninformed(data) for a in design.assumptions if a.uninformed(data)}


def test_threshold_geometry_at_one_distance_informs_none_of_its_assumptions():
    one_row = pd.DataFrame({"distance": [3.0], "attempts": [200], "successes": [120]})
    found = uninformed_keys("threshold-geometry", {"clearance": "0.2"}, one_row)
    assert set(found) == {"shared_spread", "angle_only", "independent_attempts"}
    assert "one distance" in found["angle_only"] and "one row" in found["independent_attempts"]
    two_groups = pd.DataFrame({"group": ["a", "b"], "distance": [3.0, 3.0], "attempts": 200,
                               "successes": [120, 110]})
    assert set(uninformed_keys("threshold-geometry", {"clearance": "0.2"}, two_groups)) == \
        {"shared_spread", "angle_only"}


def cohort_table(exposed=200, ages=(2.0, 4, 6, 9, 12, 16, 20), cohorts=("lot01", "lot02")):
    share = np.linspace(0.05, 0.8, len(ages))
    return pd.DataFrame([{"cohort": c, "age": a, "exposed": exposed, "events": int(exposed * s)}
                         for c in cohorts for a, s in zip(ages, share)])


def test_timing_curve_of_single_units_cannot_show_units_varying_together():
    found = uninformed_keys("timing-curve", {}, cohort_table(exposed=1, cohorts=[f"u{i}" for i in range(30)]))
    assert set(found) == {"independent_units"} and "one unit" in found["independent_units"]
    assert uninformed_keys("timing-curve", {}, cohort_table()) == {}


def test_timing_curve_seen_at_as_many_ages_as_its_curve_has_parameters_cannot_test_the_curve():
    three = cohort_table(ages=(3.0, 8, 20))
    found = uninformed_keys("timing-curve", {"eventual": "estimate"}, three)
    assert set(found) == {"curve_shape", "eventual_fraction"}
    assert "3 age(s)" in found["curve_shape"]
    # Under eventual=all the curve has a scale and a shape only: three ages leave one to test.
    assert uninformed_keys("timing-curve", {"eventual": "all"}, three) == {}


def test_competing_risks_gaps_follow_the_same_rules():
    def table(**kw):
        t = cohort_table(**kw)
        return t.assign(lost=(t["events"] // 4), events=t["events"] - t["events"] // 4)

    options = {"outcomes": "events,lost"}
    found = uninformed_keys("competing-risks", options, table(exposed=1, cohorts=[f"u{i}" for i in range(30)]))
    assert set(found) == {"independent_units"}
    found = uninformed_keys("competing-risks", options, table(ages=(3.0, 8, 20)))
    assert set(found) == {"curve_shape", "all_resolve"}
    assert uninformed_keys("competing-risks", options, table()) == {}


STAGE_OPTIONS = {"stages": "new,active,done,dropped", "absorbing": "done,dropped"}


def test_stage_transitions_over_one_step_cannot_show_drift_or_silent_units():
    one_step = pd.DataFrame({"cohort": ["A", "A"], "period": [0, 1], "new": [100, 50],
                             "active": [0, 35], "done": [0, 0], "dropped": [0, 15]})
    found = uninformed_keys("stage-transitions", STAGE_OPTIONS, one_step)
    assert set(found) == {"time_homogeneity", "no_missing_exit"}
    assert "fell silent" in found["no_missing_exit"]
    two_steps = pd.concat([one_step, pd.DataFrame({"cohort": ["A"], "period": [2], "new": [20],
                                                   "active": [45], "done": [15], "dropped": [20]})])
    assert uninformed_keys("stage-transitions", STAGE_OPTIONS, two_steps) == {}


def test_stage_transitions_of_lone_units_cannot_show_units_moving_together():
    lone = pd.DataFrame({"cohort": ["A", "A", "A", "B", "B", "B"], "period": [0, 1, 2] * 2,
                         "new": [1, 0, 0, 1, 1, 0], "active": [0, 1, 0, 0, 0, 1],
                         "done": [0, 0, 1, 0, 0, 0], "dropped": [0, 0, 0, 0, 0, 0]})
    found = uninformed_keys("stage-transitions", STAGE_OPTIONS, lone)
    assert set(found) == {"independent_units"} and "more than one unit" in found["independent_units"]
