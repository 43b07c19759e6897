"""Eight schools, centred form: each school's coaching effect is drawn around a common mean.

Rubin (1981); Gelman et al., Bayesian Data Analysis, 3rd ed., section 5.5.
Columns: ``school``, ``y`` (estimated effect), ``sigma`` (its standard error).
The centred form has a funnel at small ``tau`` that the sampler cannot enter.
"""

import pymc as pm


def build_model(data):
    coords = {"school": data["school"].astype(str).tolist()}
    with pm.Model(coords=coords) as model:
        mu = pm.Normal("mu", 0.0, 5.0)
        tau = pm.HalfCauchy("tau", 5.0)
        theta = pm.Normal("theta", mu, tau, dims="school")
        pm.Normal("y", theta, data["sigma"].to_numpy(float), observed=data["y"].to_numpy(float),
                  dims="school")
    return model
