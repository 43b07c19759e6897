"""The unit layout of timing-curve and competing-risks: one row per unit, censored, late entry.

External checks use lifelines (Davidson-Pilon 2019, the reference library
for parametric survival fitters) on datasets it ships: ``load_rossi`` (Rossi,
Berk and Lenihan 1980, recidivism of 432 released prisoners followed 52
weeks) and ``load_waltons`` (lifespans of fruit flies in two groups). The
parametrisations, from the installed package's docstrings:
WeibullFitter S(t) = exp(-(t / lambda_) ** rho_) is our weibull with scale
lambda_ and shape rho_; LogNormalFitter S(t) = 1 - Phi((log t - mu_) / sigma_)
is our lognormal with scale exp(mu_) and shape 1 / sigma_;
LogLogisticFitter S(t) = 1 / (1 + (t / alpha_) ** beta_) is our loglogistic
with scale alpha_ and shape beta_.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from workbench import engine, units
from workbench.recipe import make_design

lifelines = pytest.importorskip("lifelines")


def _design(recipe_name: str, **options):
    from workbench import registry

    return make_design(registry.load().get(recipe_name), options, {})


def _unit_log_likelihood(design, table: pd.DataFrame, values: dict) -> float:
    """Sum over units of the model's log-likelihood at the given parameter values."""
    import pymc as pm

    data = design.validate(table)
    model = design.build(data)
    point = model.initial_point()
    for name, value in values.items():
        point[f"{name}_log__"] = np.log(np.asarray(value, dtype=float))
    terms = model.compile_fn(model.logp(vars=[model["y"]], sum=False)[0], inputs=model.value_vars,
                             on_unused_input="ignore", mode="FAST_COMPILE")(point)
    assert np.shape(terms) == (data.rows,)  # one term per unit: PSIS-LOO runs over units
    del pm
    return float(np.sum(terms))


def _rossi() -> pd.DataFrame:
    from lifelines.datasets import load_rossi

    rossi = load_rossi()
    return pd.DataFrame({"time": rossi["week"].astype(float), "event": rossi["arrest"]})


def _waltons(entry: bool) -> pd.DataFrame:
    from lifelines.datasets import load_waltons

    flies = load_waltons()
    table = pd.DataFrame({"time": flies["T"].astype(float), "event": flies["E"]})
    if entry:
        # Every other fly came under observation at 40% of its time (invented
        # delayed entry, to check the truncation term against lifelines' own).
        table["entry"] = np.where(np.arange(len(table)) % 2 == 0, 0.4 * table["time"], 0.0)
    return table


def _lifelines_values(family: str, fitted, age_ref: float) -> dict:
    if family == "weibull":
        scale, shape = fitted.lambda_, fitted.rho_
    elif family == "lognormal":
        scale, shape = np.exp(fitted.mu_), 1.0 / fitted.sigma_
    else:
        scale, shape = fitted.alpha_, fitted.beta_
    return {"scale": scale / age_ref, "shape": shape}


FITTERS = {"weibull": "WeibullFitter", "lognormal": "LogNormalFitter", "loglogistic": "LogLogisticFitter"}


@pytest.mark.parametrize("family,table", [
    ("weibull", "rossi"), ("lognormal", "waltons"), ("loglogistic", "waltons"),
    ("weibull", "waltons+entry"), ("lognormal", "waltons+entry"),
])
def test_unit_likelihood_equals_lifelines_at_its_maximum(family, table):
    # lifelines' parametric fitters (WeibullFitter, LogNormalFitter,
    # LogLogisticFitter) on its shipped rossi and waltons datasets: at
    # lifelines' maximum likelihood estimates our censored (and truncated)
    # likelihood equals lifelines' log_likelihood_.
    frame = _rossi() if table == "rossi" else _waltons(entry="entry" in table)
    fitter = getattr(lifelines, FITTERS[family])()
    fitter.fit(frame["time"], frame["event"], entry=frame.get("entry"))
    design = _design("timing-curve", family=family, eventual="all")
    age_ref = design.validate(frame).extra["age_ref"]
    ours = _unit_log_likelihood(design, frame, _lifelines_values(family, fitter, age_ref))
    assert ours == pytest.approx(fitter.log_likelihood_, rel=1e-7, abs=1e-6)
