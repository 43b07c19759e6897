"""The computation assumption: sampler health from ArviZ, and a diagnosis that
says where in parameter space the trouble sits."""

from __future__ import annotations

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr

import workbench.checks.computation as computation
from conftest import FUNNEL
from workbench import engine
from workbench.checks import Context, registered
from workbench.recipe import make_design
from workbench.verdicts import decide
from recipes.threshold_geometry import RECIPE as THRESHOLD_GEOMETRY

SETTINGS = engine.Settings(draws=500, tune=500)
# The non-centred eight schools at a target acceptance of 0.9, as a careful
# modeler samples it: over seeds 1-10, 0 or 1 divergent draws and `holds` in
# every fit. The centred form samples with the margin measured in conftest.py.
SCHOOLS_SETTINGS = engine.Settings(draws=1000, tune=1000, target_accept=0.9)
SEED = 2

# Eight schools (Rubin 1981; Gelman et al., Bayesian Data Analysis 3rd ed.,
# Table 5.2): estimated coaching effects and their standard errors, from memory.
SCHOOL_EFFECTS = np.array([28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0])
SCHOOL_SES = np.array([15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0])


def eight_schools(centred: bool):
    import pymc as pm

    with pm.Model(coords={"school": np.arange(8)}) as model:
        mu = pm.Normal("mu", 0.0, 5.0)
        tau = pm.HalfCauchy("tau", 5.0)
        if centred:
            theta = pm.Normal("theta", mu, tau, dims="school")
        else:
            z = pm.Normal("z", 0.0, 1.0, dims="school")
            theta = pm.Deterministic("theta", mu + tau * z, dims="school")
        pm.Normal("y", theta, SCHOOL_SES, observed=SCHOOL_EFFECTS, dims="school")
    return model


def computation_findings(fit):
    """Run the registered computation checks the way the harness does."""
    checks = [fn for group, fn in registered() if group == "computation"]
    assert checks, "no computation check registered"
    context = Context(design=None, data=None, fit=fit)
    return [finding for fn in checks for finding in fn(context)]


def computation_verdict(fit):
    verdicts = decide([], computation_findings(fit))
    return next(v for v in verdicts if v.key == "computation")


def sentences(verdict) -> str:
    """The evidence as the report prints it: each measurement, then its judgement."""
    return " ".join(f"{f.detail} {j.sentence}" for f, j in verdict.evidence)


def by_kind(fit, kind):
    return next(f for f in computation_findings(fit) if f.kind == kind)


def hand_fit(posterior: dict[str, np.ndarray], diverging=None, seed=0) -> engine.Fit:
    """A fit built by hand: no model, posterior arrays shaped (chain, draw, ...)."""
    rng = np.random.default_rng(seed)
    first = next(iter(posterior.values()))
    shape = first.shape[:2]
    stats = {
        "diverging": (("chain", "draw"), np.zeros(shape, bool) if diverging is None else diverging),
        "maxdepth_reached": (("chain", "draw"), np.zeros(shape, bool)),
        # Independent normal energies: E-BFMI near 2, a healthy sampler.
        "energy": (("chain", "draw"), rng.normal(0.0, 1.0, shape)),
    }
    data_vars = {
        name: (("chain", "draw") + tuple(f"{name}_dim_{i}" for i in range(v.ndim - 2)), v)
        for name, v in posterior.items()
    }
    idata = xr.DataTree.from_dict(
        {"posterior": xr.Dataset(data_vars), "sample_stats": xr.Dataset(stats)}
    )
    return engine.Fit(idata, model=None, sampler=None, seconds=0.0)


# --- eight schools: the funnel of a centred hierarchy ---------------------------


@pytest.fixture(scope="module")
def centred_fit():
    return engine.fit(eight_schools(centred=True), seed=SEED, settings=FUNNEL)


@pytest.fixture(scope="module")
def non_centred_fit():
    return engine.fit(eight_schools(centred=False), seed=SEED, settings=SCHOOLS_SETTINGS)


def test_centred_scale_is_read_from_the_model_graph():
    # Betancourt and Girolami (2015): theta ~ Normal(mu, tau) is the centred form.
    model = eight_schools(centred=True)
    posterior = xr.Dataset({"theta": (("chain", "draw", "school"), np.zeros((1, 1, 8)))})
    found = computation.centred_scales(model, posterior)
    assert [(f["scale"], f["child"], f["location"]) for f in found] == [("tau", "theta", "mu")]


def test_non_centred_form_has_no_centred_scale():
    model = eight_schools(centred=False)
    posterior = xr.Dataset({"z": (("chain", "draw", "school"), np.zeros((1, 1, 8)))})
    assert computation.centred_scales(model, posterior) == []


def test_centred_eight_schools_divergences_sit_at_small_tau(centred_fit):
    # Centred eight schools diverges at the neck of the funnel, small tau
    # (Betancourt and Girolami 2015; Betancourt 2017, sec. 5).
    assert int(centred_fit.idata["sample_stats"]["diverging"].sum()) > 0
    verdict = computation_verdict(centred_fit)
    assert verdict.verdict in {"doubtful", "broken"}
    assert "small values of tau" in sentences(verdict)
    funnel = by_kind(centred_fit, "funnel")
    assert funnel.numbers["scale"] == "tau" and funnel.numbers["direction"] == "small"


def test_centred_eight_schools_advice_is_the_non_centred_form(centred_fit):
    advice = computation_verdict(centred_fit).advice
    assert "non-centred form" in advice
    assert "theta = mu + tau * theta_z" in advice


def test_non_centred_eight_schools_holds(non_centred_fit):
    verdict = computation_verdict(non_centred_fit)
    assert verdict.verdict == "holds", sentences(verdict)


# --- summary numbers are ArviZ's ----------------------------------------------------


def test_summary_numbers_equal_arviz(centred_fit):
    # Reference library: ArviZ's rank-normalised split R-hat, bulk/tail ESS
    # (Vehtari et al. 2021) and E-BFMI (Betancourt 2016) on the same DataTree.
    idata = centred_fit.idata
    free = ["mu", "tau", "theta"]
    summary = computation.computation_summary(idata)
    rhat = az.rhat(idata, var_names=free).to_dataset()
    bulk = az.ess(idata, var_names=free, method="bulk").to_dataset()
    tail = az.ess(idata, var_names=free, method="tail").to_dataset()
    stacked = lambda ds: np.concatenate([np.ravel(ds[v].values) for v in free])  # noqa: E731
    assert summary["max_rhat"] == pytest.approx(stacked(rhat).max(), rel=1e-12)
    assert summary["min_ess_bulk"] == pytest.approx(stacked(bulk).min(), rel=1e-12)
    assert summary["min_ess_tail"] == pytest.approx(stacked(tail).min(), rel=1e-12)
    bfmi = az.bfmi(idata)["energy"].values
    assert summary["min_bfmi"] == pytest.approx(bfmi.min(), rel=1e-12)
    stats = idata["sample_stats"]
    assert summary["divergences"] == int(stats["diverging"].values.sum())
    assert summary["treedepth_hits"] == int(stats["maxdepth_reached"].values.sum())


def test_summary_has_exactly_the_summary_json_keys(non_centred_fit):
    summary = computation.computation_summary(non_centred_fit.idata)
    assert set(summary) == {"divergences", "max_rhat", "min_ess_bulk", "min_ess_tail",
                            "min_bfmi", "treedepth_hits"}
    assert isinstance(summary["divergences"], int) and isinstance(summary["treedepth_hits"], int)


def test_summary_skips_deterministics(non_centred_fit):
    # theta = mu + tau * z is a deterministic: R-hat is taken over mu, tau, z.
    idata = non_centred_fit.idata
    rhat = az.rhat(idata, var_names=["mu", "tau", "z"]).to_dataset()
    expected = max(float(rhat[v].max()) for v in ("mu", "tau", "z"))
    assert computation.computation_summary(idata)["max_rhat"] == pytest.approx(expected)


# --- chains that disagree ------------------------------------------------------------


def test_stuck_chains_are_named_with_where_they_sit():
    # Two pairs of chains, each tight, far apart: a bimodal posterior or stuck chains.
    rng = np.random.default_rng(1)
    centre = np.array([-3.0, 3.0, -3.0, 3.0])[:, None]
    fit = hand_fit({"mu": centre + rng.normal(0.0, 0.3, (4, 400))})
    verdict = computation_verdict(fit)
    assert verdict.verdict == "broken"
    text = sentences(verdict)
    assert "Chains disagree on mu" in text
    assert "chains 0 and 2 near -3" in text and "chains 1 and 3 near 3" in text
    assert "separate modes" in text


def test_slowly_mixing_chains_are_not_called_modes():
    # Stationary AR(1) chains with coefficient 0.95 cover the same Normal(0, 1)
    # but each holds about 10 independent draws' worth of it.
    rng, rho = np.random.default_rng(2), 0.95
    draws = np.zeros((4, 400))
    draws[:, 0] = rng.normal(0.0, 1.0, 4)
    for t in range(1, 400):
        draws[:, t] = rho * draws[:, t - 1] + rng.normal(0.0, np.sqrt(1 - rho**2), 4)
    fit = hand_fit({"mu": draws})
    rhat = by_kind(fit, "rhat")
    assert rhat.value > 1.01 and len(rhat.numbers["groups"]) == 1
    text = sentences(computation_verdict(fit))
    assert "mix slowly" in text and "separate modes" not in text


# --- probabilities pushed to an edge ----------------------------------------------------


def test_divergences_at_a_probability_edge_advise_a_bounded_form():
    # Divergent draws all carry p near 1 while the others spread over (0.4, 0.9).
    rng = np.random.default_rng(3)
    p = rng.uniform(0.4, 0.9, (4, 300))
    diverging = np.zeros((4, 300), bool)
    diverging[:, :10] = True
    p[diverging] = 1.0 - rng.uniform(1e-5, 1e-3, diverging.sum())
    verdict = computation_verdict(hand_fit({"p": p}, diverging=diverging))
    assert verdict.verdict == "broken"
    assert "push p to 1" in sentences(verdict)
    assert "bounded formulation" in verdict.advice


def test_a_small_positive_scale_is_not_taken_for_a_probability():
    import pymc as pm

    # spread ~ HalfNormal(0.05): every draw lies in [0, 1], yet it is a scale.
    with pm.Model() as model:
        pm.HalfNormal("spread", 0.05)
        pm.Beta("share", 2.0, 2.0)
    rng = np.random.default_rng(6)
    posterior = {"spread": rng.uniform(0.01, 0.1, (4, 300)), "share": rng.beta(2, 2, (4, 300))}
    fit = hand_fit(posterior)
    fit.model = model
    fit.idata["prior"] = xr.DataTree(xr.Dataset({
        "spread": (("chain", "draw"), np.abs(rng.normal(0.0, 0.05, (1, 500)))),
        "share": (("chain", "draw"), rng.beta(2, 2, (1, 500))),
    }))
    assert computation.probabilities(fit.idata, model) == ["share"]


# --- near-flat ridge ----------------------------------------------------------------------


@pytest.fixture(scope="module")
def ridge_fit():
    import pymc as pm

    # Only a + b enters the likelihood: a textbook non-identified pair
    # (common practice; e.g. Gelman et al., Bayesian Workflow 2020, sec. 5).
    y = np.random.default_rng(4).normal(1.0, 1.0, 20)
    with pm.Model() as model:
        a = pm.Normal("a", 0.0, 10.0)
        b = pm.Normal("b", 0.0, 10.0)
        pm.Normal("y", a + b, 1.0, observed=y)
    return engine.fit(model, seed=SEED, settings=SETTINGS)


def test_ridge_names_both_parameters(ridge_fit):
    verdict = computation_verdict(ridge_fit)
    ridge = next(j for f, j in verdict.evidence if f.kind == "ridge")
    assert ridge.level >= 1
    assert "ridge" in ridge.sentence
    assert "sum of a and b" in ridge.sentence or "sum of b and a" in ridge.sentence


# --- a healthy simple model ----------------------------------------------------------------


@pytest.fixture(scope="module")
def threshold_geometry_fit():
    # Data simulated from the recipe's own story with spread 0.02 rad.
    design = make_design(THRESHOLD_GEOMETRY, {"clearance": "0.05"}, {})
    table = pd.DataFrame({
        "distance": np.linspace(0.5, 6.0, 12),
        "attempts": np.full(12, 150),
        "successes": np.zeros(12, dtype=int),
    })
    data = THRESHOLD_GEOMETRY.validate(table, design.options)
    data = design.simulate(np.random.default_rng(5), data, {"spread": 0.02})
    return engine.fit(design.build(data), seed=SEED, settings=SETTINGS)


def test_healthy_threshold_geometry_holds(threshold_geometry_fit):
    verdict = computation_verdict(threshold_geometry_fit)
    assert verdict.verdict == "holds", sentences(verdict)
