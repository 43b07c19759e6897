"""The diagnosis names the broken assumption: planted faults, prior conflict.

A small, fast version of benchmarks/diagnosis_rates.py (which runs many seeds):
for every recipe, one clean table and one table per planted fault, simulated
by the recipe's own simulator, must mark the planted assumption broken (or at
least flag it) without marking any other assumption broken.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import shared_runs
from recipes.threshold_geometry import RECIPE
from workbench import harness, rates, registry
from workbench.recipe import make_design

RECIPES = {name: recipe for name, recipe in registry.load().recipes.items() if recipe.demo is not None}
CASES = [(name, scenario) for name, recipe in sorted(RECIPES.items()) for scenario in rates.scenarios(recipe)]
# Faults the rates benchmark detects as broken in fewer than 20 of 20 runs at
# the default settings (README): at this test's small draws and single seed
# they are asked for a flag, not a break. threshold-geometry's planted
# overdispersion was broken in 19 of 20.
FLAGGED_ONLY = {("threshold-geometry", "independent_attempts")}


@pytest.mark.slow
@pytest.mark.parametrize("name,scenario", CASES)
def test_planted_fault_is_named_and_nothing_else_is_broken(name, scenario, fast_settings):
    recipe = RECIPES[name]
    tally = rates.run_scenario(recipe, scenario, rates.scenarios(recipe)[scenario], seeds=[101],
                               settings=fast_settings)
    assert tally.runs == 1, tally.failures
    assert tally.other_broken == 0
    if scenario == rates.CLEAN:
        return
    if (name, scenario) in FLAGGED_ONLY:
        assert tally.right_flagged == 1
    else:
        assert tally.right_broken == 1


@pytest.mark.slow
def test_report_on_a_planted_fault_lists_the_planted_assumption_first():
    run, _, _ = shared_runs.planted_extra_failure()  # extra failure 0.05 on the demo layout
    assert run.verdicts[0].key == "angle_only" and run.verdicts[0].verdict == "broken"
    assert "failure" in run.verdicts[0].advice


@pytest.mark.slow
def test_prior_that_excludes_the_truth_breaks_the_priors_assumption(fast_settings):
    # Truth spread 0.03 rad; the prior puts nearly all its mass near 0.0009 rad.
    design = make_design(RECIPE, {"clearance": "0.25"}, {"spread": "lognormal(-7,0.1)"})
    distance = np.array([1.0, 2, 3, 4, 6, 8, 10, 12])
    base = design.validate(pd.DataFrame({"distance": distance, "attempts": 200, "successes": 0}))
    data = design.simulate(np.random.default_rng(8), base, {"spread": 0.03})
    run = harness.run_check(design, data, harness.DataInfo("sim", "", data.rows), seed=4,
                            settings=fast_settings, relax=False)
    verdict = next(v for v in run.verdicts if v.key == "priors")
    assert verdict.verdict == "broken"
    assert "spread" in verdict.advice or any("spread" in f.detail for f, _ in verdict.evidence)


# --- attribution off the demo layouts ---------------------------------------------------------


def drifting_eventual_share(seed: int):
    """Twelve cohorts of 150 seen at up to nine looks (later cohorts younger), whose eventual
    share drifts by 2 on the log-odds scale from the first cohort to the last (about 0.55 to 0.88
    around 0.75): the timing is shared, the share is not."""
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
    from diagnosis_rates import simulate
    from recipes.timing_curve import RECIPE as TIMING

    looks = np.array([2, 4, 6, 8, 11, 14, 18, 24, 30])
    rows = [{"cohort": f"c{c + 1:02d}", "age": age, "exposed": 150, "events": 0}
            for c in range(12) for age in looks[:max(3, 9 - c // 2)]]
    design = make_design(TIMING, {"family": "weibull", "eventual": "estimate"}, {})
    base = design.validate(pd.DataFrame(rows))
    truth = {"scale": 9.0 / base.extra["age_ref"], "shape": 2.2, "eventual": 0.75}
    return design, simulate(design, base, truth, {"eventual_drift": 2.0}, np.random.default_rng(seed))


@pytest.mark.slow
def test_an_eventual_share_drifting_over_cohorts_is_a_cohort_fault_not_a_curve_or_plateau_fault(fast_settings):
    # Measured at these settings on seeds 1 and 2: curve_shape, eventual_fraction and
    # independent_units alarmed by their statistics in both (p <= 0.003), all explained by
    # the cohorts' eventual shares; before that relaxation existed they stayed broken.
    design, data = drifting_eventual_share(seed=2)
    run = harness.run_check(design, data, harness.DataInfo("sim", "", data.rows), seed=2,
                            settings=fast_settings, workers=1)
    judged = {v.key: v for v in run.verdicts}
    assert judged["cohort_homogeneity"].verdict == "broken"
    assert run.verdicts[0].key == "cohort_homogeneity"
    for key in ("curve_shape", "eventual_fraction", "independent_units", "priors"):
        assert judged[key].verdict != "broken", key
    assert judged["curve_shape"].symptom_of == "cohort_homogeneity"


@pytest.mark.slow
@pytest.mark.parametrize("planted,broken", [({"spread_slope": 0.5}, "shared_spread"),
                                            ({"overdispersion": 0.03}, "independent_attempts")])
def test_a_likelihood_fault_off_the_demo_layout_does_not_break_the_priors(planted, broken, fast_settings):
    # Eleven distances of 250 attempts from 1 to 15 at clearance 0.25 (not the demo's layout):
    # the observed sd of successes lies outside the prior predictive, and the fitted model
    # misses it too, so the likelihood owns the miss (workbench/rules/priors.py).
    design = make_design(RECIPE, {"clearance": "0.25"}, {})
    distance = np.array([1.0, 1.5, 2, 3, 4, 5, 6, 8, 10, 12, 15])
    base = design.validate(pd.DataFrame({"distance": distance, "attempts": 250, "successes": 0}))
    data = design.simulate(np.random.default_rng(3), base, {"spread": 0.03, **planted})
    run = harness.run_check(design, data, harness.DataInfo("sim", "", data.rows), seed=3,
                            settings=fast_settings, workers=1)
    judged = {v.key: v.verdict for v in run.verdicts}
    assert judged[broken] == "broken"
    assert judged["priors"] != "broken"
