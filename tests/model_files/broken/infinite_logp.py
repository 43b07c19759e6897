"""A model file that observes signed effects with a half-normal: negative values are impossible."""

import pymc as pm


def build_model(data):
    with pm.Model() as model:
        scale = pm.HalfNormal("scale", 10.0)
        pm.HalfNormal("y", scale, observed=data["y"].to_numpy(float))
    return model
