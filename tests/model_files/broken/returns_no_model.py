"""A model file whose build_model forgets to return the model."""

import pymc as pm


def build_model(data):
    with pm.Model():
        mu = pm.Normal("mu", 0.0, 10.0)
        pm.Normal("y", mu, data["sigma"].to_numpy(float), observed=data["y"].to_numpy(float))
