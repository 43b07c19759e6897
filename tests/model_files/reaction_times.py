"""Reaction times against memory load: a straight line with normal errors.

Story (invented). In a memory experiment a participant holds ``load`` digits
(1 to 8) in mind and presses a key when a tone sounds; the reaction time in
milliseconds grows linearly with the load, rt = a + b * load, and each trial
adds a normal error of sd ``sigma``.

Columns: ``trial`` (an identifier), ``load`` (digits held), ``rt_ms``.
``scenario_table`` simulates a table from TRUE_VALUES: clean; with
heavy-tailed errors (``heavy_tails``: Student-t with HEAVY_NU degrees of
freedom and the same scale, lapses of attention); or with an error sd that
grows with the load (``growing_noise``: sd sigma * exp(GROWTH * standardized
load), fatigue).
"""

import numpy as np
import pandas as pd
import pymc as pm

# True values of the simulated scenario (invented).
TRUE_VALUES = {"a": 420.0, "b": 35.0, "sigma": 40.0}
HEAVY_NU = 2.0
# Log sd slope per sd of load: the error sd grows about 4-fold from load 1 to 8.
GROWTH = 0.6
TRIALS = 100


def build_model(data: pd.DataFrame) -> pm.Model:
    # Load centred on 4.5 digits, so that a and b are nearly uncorrelated.
    load = data["load"].to_numpy(float) - 4.5
    with pm.Model() as model:
        # Reaction times of a few hundred ms, slowing by tens of ms per digit.
        a = pm.Normal("a", 550.0, 150.0)
        b = pm.Normal("b", 0.0, 50.0)
        sigma = pm.HalfNormal("sigma", 100.0)
        pm.Normal("rt_ms", a + b * load, sigma, observed=data["rt_ms"].to_numpy(float))
    return model


def scenario_table(seed: int, fault: str = "") -> pd.DataFrame:
    """Trials at loads 1 to 8; ``fault`` '', 'heavy_tails' or 'growing_noise'."""
    rng = np.random.default_rng(seed)
    load = rng.integers(1, 9, TRIALS).astype(float)
    mean = TRUE_VALUES["a"] + TRUE_VALUES["b"] * load
    sigma = np.full(TRIALS, TRUE_VALUES["sigma"])
    if fault == "growing_noise":
        sigma = sigma * np.exp(GROWTH * (load - load.mean()) / load.std())
    if fault == "heavy_tails":
        error = sigma * rng.standard_t(HEAVY_NU, TRIALS)
    else:
        error = sigma * rng.standard_normal(TRIALS)
    return pd.DataFrame({"trial": np.arange(1, TRIALS + 1).astype(str), "load": load,
                         "rt_ms": np.round(mean + error, 1)})
