"""A model file with a syntax error on line 6."""

import pymc as pm


def build_model(data)
    with pm.Model() as model:
        pm.Normal("y", 0.0, 1.0, observed=data["y"])
    return model
