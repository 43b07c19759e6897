"""A model file that reads a column the table does not have (line 9)."""

import pymc as pm


def build_model(data):
    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 10.0)
        pm.Normal("y", mu, data["standard_error"], observed=data["y"])
    return model
