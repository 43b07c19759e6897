"""A model file whose ASSUMPTIONS holds a plain dict instead of an Assumption."""

import pymc as pm

ASSUMPTIONS = [{"key": "normal", "statement": "Effects are normal."}]


def build_model(data):
    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 10.0)
        pm.Normal("y", mu, data["sigma"].to_numpy(float), observed=data["y"].to_numpy(float))
    return model
