"""Eight schools, non-centred form, with one assumption of its own and an independent story.

Rubin (1981); Gelman et al., Bayesian Data Analysis, 3rd ed., section 5.5.
Columns: ``school``, ``y`` (estimated effect), ``sigma`` (its standard error).
"""

import numpy as np
import pymc as pm

from workbench.recipe import Assumption, Relaxation, Statistic


def _model(data, extra_error: bool):
    coords = {"school": data["school"].astype(str).tolist()}
    sigma = data["sigma"].to_numpy(float)
    with pm.Model(coords=coords) as model:
        mu = pm.Normal("mu", 0.0, 5.0)
        tau = pm.HalfCauchy("tau", 5.0)
        z = pm.Normal("z", 0.0, 1.0, dims="school")
        theta = pm.Deterministic("theta", mu + tau * z, dims="school")
        if extra_error:
            extra_sd = pm.HalfNormal("extra_sd", 5.0)
            sigma = pm.math.sqrt(sigma**2 + extra_sd**2)
        pm.Normal("y", theta, sigma, observed=data["y"].to_numpy(float), dims="school")
    return model


def build_model(data):
    return _model(data, extra_error=False)


def build_with_extra_error(data):
    return _model(data, extra_error=True)


def squared_errors(data, outcomes, draws):
    """Mean squared standardised difference between effect and estimate (about 1)."""
    sigma = data["sigma"].to_numpy(float)
    return (((outcomes["y"] - draws["theta"]) / sigma) ** 2).mean(axis=1)


ASSUMPTIONS = [
    Assumption(
        key="known_errors",
        statement="The reported standard errors are the whole measurement error.",
        statistic=Statistic("squared_errors", "mean squared standardised error", squared_errors,
                            sides="greater"),
        relaxation=Relaxation("extra_sd", "an extra measurement error common to all schools",
                              build_with_extra_error, null=0.0, negligible=2.0),
        advice="Add a measurement error beyond the reported standard errors.",
    ),
]


def simulate(rng, data):
    """The same story in NumPy: new effects and estimates for the same standard errors."""
    mu = rng.normal(0.0, 5.0)
    tau = abs(5.0 * rng.standard_cauchy())
    z = rng.normal(0.0, 1.0, size=len(data))
    theta = mu + tau * z
    out = data.copy()
    out["y"] = rng.normal(theta, data["sigma"].to_numpy(float))
    return {"mu": mu, "tau": tau, "z": z}, out
