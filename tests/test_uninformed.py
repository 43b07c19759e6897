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
