"""Shared fixtures: small sampling settings keep the suite within minutes.

How a test of a sampler-dependent outcome is written
----------------------------------------------------
Divergence counts, R-hat, located regions and borderline verdicts move with
floating point: the same seed on another machine (other BLAS kernels, CPU
features) follows another trajectory. A test that asserts such an outcome

1. is measured over several seeds (at least 5, better 10) with the draws it
   uses, through the same path it runs (``engine.fit`` or ``workbench
   check``; they derive seeds differently);
2. samples with margin: the smallest outcome over those seeds sits well past
   the rule's threshold (e.g. :data:`FUNNEL`: 15 divergences or more against
   the rule's 3), or the assertion is one the rule makes robustly (a fault
   "flagged" rather than "broken" where the rates benchmark shows less than
   20 of 20);
3. says in a comment what was measured, with the numbers.

Measured for the suite (4 chains of 400 draws unless said): the planted
faults and clean tables of tests/test_diagnosis.py at seeds 101-104 (one
extra cause at seed 104, stuck base chains freed by the cause's relaxation,
fixed in the symptom rule); the audit plans of tests/shared_runs.py at seeds
1-8 (healthy: 0 divergences and every gate passed in all 8; centred funnel:
4-35 divergences and the divergence gate failed in all 8); eight schools
below.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from workbench.engine import Settings

# Enough draws for stable verdicts on small models, few enough for CI on 2 cores.
FAST = Settings(draws=400, tune=400, chains=4, prior_draws=300)

# The centred eight-schools funnel, located on any machine: divergence counts
# move with floating point (BLAS kernels, CPU features), so a test that needs
# them samples with margin. Measured over seeds 1-10 at 8 chains of 1000 draws
# and the default target 0.8: 15 to 93 divergent draws through engine.fit and
# 25 to 356 through `workbench check`, every fit located at small tau and
# `broken`, against the funnel rule's 3 draws. At 4 chains of 1000 draws and
# 0.9 the same seeds gave as few as 3, and 4 chains of 400 draws gave 1 on one
# machine.
FUNNEL = Settings(draws=1000, tune=1000, chains=8, target_accept=0.8)


@pytest.fixture(scope="session")
def fast_settings() -> Settings:
    return FAST


def throwing_table(rng: np.random.Generator, spread: float = 0.03, clearance: float = 0.25) -> pd.DataFrame:
    """An invented table from the threshold-geometry simulator (for tests only)."""
    from recipes.threshold_geometry import RECIPE

    distance = np.array([1.0, 1.5, 2, 3, 4, 5, 6, 8, 10, 12, 15])
    attempts = np.full(distance.size, 250)
    base = RECIPE.validate(pd.DataFrame({"distance": distance, "attempts": attempts,
                                         "successes": 0}), {})
    sim = RECIPE.simulate(rng, base, {"spread": spread}, {"clearance": clearance})
    return pd.DataFrame({"distance": distance, "attempts": attempts, "successes": sim["successes"]})


@pytest.fixture(scope="session")
def throwing_csv(tmp_path_factory) -> str:
    path = tmp_path_factory.mktemp("data") / "throws.csv"
    throwing_table(np.random.default_rng(7)).to_csv(path, index=False)
    return str(path)
