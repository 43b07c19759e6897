"""Bird sightings per transect: a Poisson count whose log mean rises with hedgerow.

Story (invented). Volunteers walk 1 km transects across farmland and count
yellowhammers. A transect with more hedgerow holds more birds: the expected
count is exp(a + b * hedge), with ``hedge`` the km of hedgerow within 100 m of
the route. Each count is Poisson around that mean.

Columns: ``transect`` (an identifier), ``hedge`` (km), ``sightings``.
``scenario_table`` simulates a table from TRUE_VALUES: clean (Poisson counts)
or with birds that flock, so that counts vary more than Poisson
(``overdispersed``: negative binomial with shape FLOCKING).
"""

import numpy as np
import pandas as pd
import pymc as pm

# True values of the simulated scenario (invented).
TRUE_VALUES = {"a": 1.2, "b": 0.6}  # a on the uncentred hedge scale
# Negative-binomial shape of the flocking scenario: variance mu + mu^2 / 2.
FLOCKING = 2.0
TRANSECTS = 80


def build_model(data: pd.DataFrame) -> pm.Model:
    # Hedgerow centred on 1.5 km, so that a and b are nearly uncorrelated.
    hedge = data["hedge"].to_numpy(float) - 1.5
    with pm.Model() as model:
        # A transect with 1.5 km of hedgerow holds a few birds (exp(2) ~ 7).
        a = pm.Normal("a", 2.0, 1.0)
        b = pm.Normal("b", 0.0, 1.0)
        pm.Poisson("sightings", pm.math.exp(a + b * hedge),
                   observed=data["sightings"].to_numpy("int64"))
    return model


def scenario_table(seed: int, fault: str = "") -> pd.DataFrame:
    """Transects with hedgerow from 0 to 3 km; ``fault`` '' (clean) or 'overdispersed'."""
    rng = np.random.default_rng(seed)
    hedge = np.round(rng.uniform(0.0, 3.0, TRANSECTS), 2)
    mu = np.exp(TRUE_VALUES["a"] + TRUE_VALUES["b"] * hedge)
    if fault == "overdispersed":
        counts = rng.negative_binomial(FLOCKING, FLOCKING / (FLOCKING + mu))
    else:
        counts = rng.poisson(mu)
    return pd.DataFrame({"transect": [f"T{i:03d}" for i in range(TRANSECTS)], "hedge": hedge,
                         "sightings": counts})
