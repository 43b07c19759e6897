"""Lamp lifetimes: a Weibull lifetime, right-censored where a lamp was still burning.

Story (invented). A test rig switches on lamps on different days and records
the hour each lamp failed; lamps still burning when the rig closed, or taken
off for other work, are censored at the hours they had run. Lifetimes follow
a Weibull with shape ``alpha`` and scale ``beta`` (hundreds of hours). The
observed variable is ``pm.Censored`` with ``upper=hours`` for a censored lamp
and ``upper=inf`` for a lamp seen failing.

Columns: ``hours`` (hundreds of hours), ``failed`` (1 seen failing, 0 censored).
"""

import numpy as np
import pandas as pd
import pymc as pm

# The values :func:`example_table` simulates from.
TRUE_VALUES = {"alpha": 1.8, "beta": 10.0}


def build_model(data: pd.DataFrame) -> pm.Model:
    hours = data["hours"].to_numpy(float)
    upper = np.where(data["failed"].to_numpy() == 1, np.inf, hours)
    with pm.Model() as model:
        alpha = pm.LogNormal("alpha", 0.5, 0.5)
        beta = pm.LogNormal("beta", np.log(10.0), 1.0)
        pm.Censored("hours", pm.Weibull.dist(alpha=alpha, beta=beta), lower=None, upper=upper,
                    observed=hours)
    return model


def example_table(seed: int, lamps: int = 300) -> pd.DataFrame:
    """Lifetimes from TRUE_VALUES, censored at a uniform 4 to 20 hundred hours on the rig."""
    rng = np.random.default_rng(seed)
    life = TRUE_VALUES["beta"] * rng.weibull(TRUE_VALUES["alpha"], lamps)
    rig = rng.uniform(4.0, 20.0, lamps)
    return pd.DataFrame({"hours": np.minimum(life, rig), "failed": (life <= rig).astype(int)})
