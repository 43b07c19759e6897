"""Detection and false-alarm rates of the diagnosis on planted faults.

For a recipe with a demo scenario, simulate tables from the recipe's own
simulator (a) satisfying every assumption and (b) violating exactly one
assumption at a time, at the strength its relaxation declares as
``planted``; run the full check on each and count verdicts. Shared by
``benchmarks/diagnosis_rates.py`` (many seeds) and the tests (a few).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from workbench import engine, harness
from workbench.recipe import make_design

CLEAN = "(clean)"


@dataclass
class Tally:
    """Verdict counts for one scenario (clean, or one planted fault)."""

    scenario: str
    runs: int = 0
    right_broken: int = 0  # the planted assumption marked broken
    right_flagged: int = 0  # the planted assumption marked broken or doubtful
    other_broken: int = 0  # any other assumption marked broken
    failures: list[str] = field(default_factory=list)

    def row(self) -> dict:
        return {
            "scenario": self.scenario,
            "runs": self.runs,
            "detected": self.right_broken / self.runs if self.runs and self.scenario != CLEAN else None,
            "other_broken": self.other_broken / self.runs if self.runs else None,
        }


@dataclass(frozen=True)
class Planted:
    """What one scenario plants: parameter values, and options the design is fitted under."""

    params: dict = field(default_factory=dict)
    options: dict = field(default_factory=dict)


def scenarios(recipe, options=None) -> dict[str, Planted]:
    """The clean scenario plus one planted fault per relaxable assumption that a design with
    ``options`` makes (default: the recipe's defaults, so no covariates and no covariate_form)."""
    out = {CLEAN: Planted()}
    for assumption in recipe.assumptions:
        if not assumption.made_under(options or {}):
            continue
        relaxation = assumption.relaxation
        if relaxation is not None and relaxation.planted is not None and assumption.key not in out:
            out[assumption.key] = Planted({relaxation.parameter: relaxation.planted},
                                          dict(relaxation.planted_options or {}))
    return out


def _truth_layout(recipe, seed: int, options: dict):
    demo = recipe.demo(np.random.default_rng([seed, 0]))
    design = make_design(recipe, {**demo.options, **options}, {})
    base = design.validate(demo.table)
    return design, base, demo.truth


def run_scenario(recipe, scenario: str, planted: Planted, seeds, settings: engine.Settings,
                 say=lambda _: None) -> Tally:
    """Check one scenario over ``seeds``; relaxations run in-process to reuse compiled models."""
    tally = Tally(scenario)
    design, base, truth = _truth_layout(recipe, 0, planted.options)
    for seed in seeds:
        rng = np.random.default_rng([seed, 1])
        data = design.simulate(rng, base, {**truth, **planted.params})
        info = harness.DataInfo(f"simulated:{recipe.name}:{scenario}:{seed}", "", data.rows)
        try:
            run = harness.run_check(design, data, info, seed=seed, settings=settings, workers=1)
        except Exception as err:  # a failed fit is a result to count, not a reason to stop
            tally.failures.append(f"seed {seed}: {type(err).__name__}: {err}")
            continue
        verdicts = {v.key: v.verdict for v in run.verdicts}
        tally.runs += 1
        if scenario != CLEAN and verdicts.get(scenario) == "broken":
            tally.right_broken += 1
        if scenario != CLEAN and verdicts.get(scenario) in ("broken", "doubtful"):
            tally.right_flagged += 1
        if any(v == "broken" for k, v in verdicts.items() if k != scenario):
            tally.other_broken += 1
        say(f"{recipe.name} {scenario} seed {seed}: "
            + ", ".join(f"{k}={v}" for k, v in verdicts.items() if v != "holds"))
    return tally
