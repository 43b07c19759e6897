"""Kiln firing success by temperature: a logistic regression that ignores the site.

Story (invented). A ceramics cooperative fires batches of tiles at several
workshops (``site``); a tile survives the firing with probability
invlogit(a + b * temperature), with ``temperature`` the peak temperature's
departure from the glaze's nominal (in units of 10 degrees C). The model
pools all sites: it assumes a tile's chance depends on temperature alone.

Columns: ``site`` (workshop), ``temperature``, ``tiles`` (fired), ``survived``.
``scenario_table`` simulates a table from TRUE_VALUES: clean, or with sites
whose kilns differ (``site_effects``: site offsets on the logit scale with sd
SITE_SD), which the model does not know of.
"""

import numpy as np
import pandas as pd
import pymc as pm

# True values of the simulated scenario (invented).
TRUE_VALUES = {"a": 1.0, "b": -0.5}
SITE_SD = 0.6
SITES = ("north", "quay", "mill", "chapel", "forge", "yard")
BATCHES_PER_SITE = 8
TILES = 30


def build_model(data: pd.DataFrame) -> pm.Model:
    temperature = data["temperature"].to_numpy(float)
    with pm.Model() as model:
        # Most tiles survive a firing at the nominal temperature.
        a = pm.Normal("a", 1.0, 1.5)
        b = pm.Normal("b", 0.0, 1.0)
        pm.Binomial("survived", n=data["tiles"].to_numpy("int64"),
                    p=pm.math.invlogit(a + b * temperature),
                    observed=data["survived"].to_numpy("int64"))
    return model


def scenario_table(seed: int, fault: str = "") -> pd.DataFrame:
    """Eight batches at each of six sites; ``fault`` '' or 'site_effects'."""
    rng = np.random.default_rng(seed)
    site = np.repeat(np.arange(len(SITES)), BATCHES_PER_SITE)
    temperature = np.round(rng.uniform(-2.0, 2.0, site.size), 2)
    logit = TRUE_VALUES["a"] + TRUE_VALUES["b"] * temperature
    if fault == "site_effects":
        # Offsets centred on zero, so the sites differ but the average is kept.
        offsets = rng.normal(0.0, SITE_SD, len(SITES))
        logit = logit + (offsets - offsets.mean())[site]
    p = 1.0 / (1.0 + np.exp(-logit))
    return pd.DataFrame({"site": np.array(SITES)[site], "temperature": temperature,
                         "tiles": TILES, "survived": rng.binomial(TILES, p)})
