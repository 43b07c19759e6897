"""A model file whose builder has another name."""

import pymc as pm


def make_model(data):
    with pm.Model() as model:
        pm.Normal("y", 0.0, 1.0, observed=data["y"])
    return model
