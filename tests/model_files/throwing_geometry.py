"""The threshold-geometry story written as a model file (clearance 0.25).

An attempt from distance x succeeds when its aiming error, Normal(0, spread),
stays within arcsin(clearance / x). Columns: ``distance``, ``attempts``,
``successes``. Same prior as the built-in recipe: spread ~ LogNormal(-3, 1).
"""

import numpy as np
import pymc as pm
import pytensor.tensor as pt

CLEARANCE = 0.25


def build_model(data):
    distance = data["distance"].to_numpy(float)
    tolerance = np.arcsin(np.clip(CLEARANCE / distance, 0.0, 1.0))
    with pm.Model() as model:
        spread = pm.LogNormal("spread", -3.0, 1.0)
        p = pt.erf(tolerance / (spread * np.sqrt(2.0)))
        p = pt.switch(distance <= CLEARANCE, 1.0, p)
        p = pm.Deterministic("p", pt.clip(p, 1e-9, 1.0 - 1e-9))
        pm.Binomial("y", n=data["attempts"].to_numpy(), p=p,
                    observed=data["successes"].to_numpy())
    return model
