"""The revision the funnel advice names: the non-centred form as a model transformation.

The fitted revisions of whole runs are checked where those runs already
happen: the centred eight-schools model file in tests/test_model_files.py,
the centred threshold-geometry audit in tests/test_audit.py.
"""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pandas as pd
import pymc as pm
import pytest

from workbench import executor, modelfile, revisions
from workbench.recipe import make_design
from workbench.revisions import NonCentring, RevisedDesign, RevisionError, non_centre

FILES = Path(__file__).parent / "model_files"
# Eight schools (Rubin 1981; Gelman et al., Bayesian Data Analysis 3rd ed.,
# Table 5.2): estimated coaching effects and their standard errors, from memory.
SCHOOLS = pd.DataFrame({
    "school": list("ABCDEFGH"),
    "y": [28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0],
    "sigma": [15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0],
})
REVISION = NonCentring("tau", ("theta",), "graph")


def centred_model(family: str = "normal"):
    """Eight schools in the centred form, with a child of the given family."""
    coords = {"school": SCHOOLS["school"].tolist()}
    with pm.Model(coords=coords) as model:
        mu = pm.Normal("mu", 0.0, 5.0)
        tau = pm.HalfCauchy("tau", 5.0)
        if family == "normal":
            theta = pm.Normal("theta", mu, tau, dims="school")
        elif family == "t":
            theta = pm.StudentT("theta", nu=4.0, mu=mu, sigma=tau, dims="school")
        else:
            theta = pm.LogNormal("theta", mu, tau, dims="school")
        pm.Normal("y", theta, SCHOOLS["sigma"].to_numpy(float), observed=SCHOOLS["y"].to_numpy(float),
                  dims="school")
    return model


def test_the_non_centred_form_keeps_names_dims_data_and_the_other_variables():
    centred = centred_model()
    revised = non_centre(centred, ["theta"])
    assert sorted(rv.name for rv in revised.free_RVs) == ["mu", "tau", "theta_z"]
    assert [d.name for d in revised.deterministics] == ["theta"]
    assert revised.named_vars_to_dims["theta"] == ("school",)
    assert revised.named_vars_to_dims["theta_z"] == ("school",)
    assert [rv.name for rv in revised.observed_RVs] == ["y"]
    assert revised.coords == centred.coords
    # The original model is left as it was.
    assert sorted(rv.name for rv in centred.free_RVs) == ["mu", "tau", "theta"]


@pytest.mark.parametrize("family", ["normal", "t", "lognormal"])
def test_the_non_centred_log_density_is_the_centred_one_with_the_jacobian(family):
    # Change of variables (common practice): with theta = mu + tau * z (or its
    # exp), and theta's sampler value u = theta (or log theta), du/dz = tau per
    # school, so log p(mu, tau, z) = log p(mu, tau, u(z)) + J * log(tau).
    centred = centred_model(family)
    revised = non_centre(centred, ["theta"])
    logp_centred = centred.compile_logp(jacobian=True)
    logp_revised = revised.compile_logp(jacobian=True)
    value = "theta_log__" if family == "lognormal" else "theta"
    rng = np.random.default_rng(3)
    for _ in range(5):
        mu, log_tau = rng.normal(0.0, 2.0), rng.normal(1.0, 1.0)
        z = rng.normal(size=len(SCHOOLS))
        point = {"mu": mu, "tau_log__": log_tau, "theta_z": z}
        centred_point = {"mu": mu, "tau_log__": log_tau, value: mu + np.exp(log_tau) * z}
        assert logp_revised(point) == pytest.approx(
            logp_centred(centred_point) + len(SCHOOLS) * log_tau, rel=1e-9)


def test_the_standard_name_never_takes_an_existing_name():
    with pm.Model() as model:
        scale = pm.HalfNormal("scale", 1.0)
        pm.Normal("theta_z", 0.0, 1.0)
        pm.Normal("theta", 0.0, scale, shape=3)
    revised = non_centre(model, ["theta"])
    assert sorted(rv.name for rv in revised.free_RVs) == ["scale", "theta_z", "theta_z_"]


def test_a_variable_without_a_standard_form_is_refused_in_one_line():
    with pm.Model() as model:
        rate = pm.HalfNormal("rate", 1.0)
        pm.Exponential("wait", rate, shape=3)
    with pytest.raises(RevisionError, match="'wait'.*location-scale"):
        non_centre(model, ["wait"])
    with pytest.raises(RevisionError, match="'absent'"):
        non_centre(model, ["absent"])


def test_a_model_file_design_is_revised_on_its_own_data_containers():
    design = modelfile.design_from_file(FILES / "eight_schools_centred.py")
    data = design.validate(SCHOOLS)
    revised = RevisedDesign(design, REVISION)
    model = revised.build(data)
    assert [v.name for v in model.data_vars] == ["y_observed"]
    assert "theta_z" in {rv.name for rv in model.free_RVs}
    assert revised.key() != design.key() and "theta non-centred" in revised.label()


def test_a_recipe_is_revised_by_its_own_non_centred_option():
    from recipes.threshold_geometry import RECIPE

    design = make_design(RECIPE, {"clearance": "0.25", "pooling": "partial", "centred": "true"}, {})
    revised = revisions.revised_design(design, NonCentring("spread_sd", ("log_spread_group",), "option"))
    assert revised.options["centred"] is False and design.options["centred"] is True
    assert revised.key() != design.key()


def _built_in_helper(design, data) -> tuple[list[str], float]:
    model = design.build(data)
    point = model.initial_point()
    return sorted(rv.name for rv in model.free_RVs), float(model.compile_logp()(point))


def test_a_revised_design_travels_to_a_spawned_worker_as_plain_data():
    design = modelfile.design_from_file(FILES / "eight_schools_centred.py")
    data = design.validate(SCHOOLS)
    revised = RevisedDesign(design, REVISION)
    assert pickle.loads(pickle.dumps(revised)).key() == revised.key()
    here = _built_in_helper(revised, data)
    with executor.process_pool(1) as pool, executor.user_script_hidden():
        there = pool.submit(_built_in_helper, revised, data).result()
    assert there[0] == here[0] == ["mu", "tau", "theta_z"]
    assert there[1] == pytest.approx(here[1])


def test_custom_initial_values_are_kept_except_the_rewritten_childs():
    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 5.0, initval=1.5)
        tau = pm.HalfNormal("tau", 5.0)
        pm.Normal("theta", mu, tau, shape=3, initval=np.zeros(3))
    revised = non_centre(model, ["theta"])
    assert revised.initial_point()["mu"] == pytest.approx(1.5)
    assert model.rvs_to_initial_values[model["mu"]] is not None  # the original keeps its own
