"""Shared fixtures: small sampling settings keep the suite within minutes."""

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
