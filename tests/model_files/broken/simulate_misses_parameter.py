"""A model file whose simulate forgets the true value of tau."""

import pymc as pm


def build_model(data):
    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 5.0)
        tau = pm.HalfNormal("tau", 5.0)
        pm.Normal("y", mu, pm.math.sqrt(tau**2 + data["sigma"].to_numpy(float) ** 2),
                  observed=data["y"].to_numpy(float))
    return model


def simulate(rng, data):
    mu = rng.normal(0.0, 5.0)
    out = data.copy()
    out["y"] = rng.normal(mu, data["sigma"].to_numpy(float))
    return {"mu": mu}, out
