"""Shared fixtures: small sampling settings keep the suite within minutes."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from workbench.engine import Settings

# Enough draws for stable verdicts on small models, few enough for CI on 2 cores.
FAST = Settings(draws=400, tune=400, chains=4, prior_draws=300)


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
