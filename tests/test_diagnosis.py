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
