"""The two ways of handing a model to nutpie give the same draws, and the rule picks one."""

import numpy as np
import pymc as pm
import pytest

from workbench import compiling, engine

SETTINGS = engine.Settings(draws=150, tune=150, chains=2, prior_draws=50)


def _model(counts):
    # A small Poisson regression with a data container, the shape of most user models.
    x = np.linspace(-1.0, 1.0, len(counts))
    with pm.Model(coords={"row": np.arange(len(counts))}) as model:
        y = pm.Data("y", counts, dims="row")
        a = pm.Normal("a", 0.0, 2.0)
        b = pm.Normal("b", 0.0, 1.0)
        rate = pm.Deterministic("rate", pm.math.exp(a + b * x), dims="row")
        pm.Poisson("obs", rate, observed=y, dims="row")
    return model


@pytest.fixture(scope="module")
def counts():
    rng = np.random.default_rng(3)
    return rng.poisson(np.exp(1.0 + 0.5 * np.linspace(-1, 1, 40)))


def _draws(compiled, seed=11):
    import nutpie

    trace = nutpie.sample(compiled, draws=100, tune=100, chains=2, cores=1, seed=seed,
                          progress_bar=False)
    return {name: trace.posterior[name].values for name in ("a", "b", "rate")}


def test_light_and_native_paths_give_the_same_draws(counts):
    model = _model(counts)
    light, per_call = compiling.light(model)
    native = compiling.native(model)
    assert light.path == "light" and native.path == "native"
    assert light.data_names == native.data_names == {"y"}
    assert 0 < per_call() < 0.01
    ours, theirs = _draws(light.model), _draws(native.model)
    for name in ours:
        # Same log-density, same start and seed: the same chains, to rounding.
        np.testing.assert_allclose(ours[name], theirs[name], rtol=1e-6, atol=1e-9)


def test_new_data_reach_the_light_path(counts):
    model = _model(counts)
    light, _ = compiling.light(model)
    native = compiling.native(model)
    doubled = {"y": counts * 2}
    ours = _draws(light.model.with_data(**doubled))
    theirs = _draws(native.model.with_data(**doubled))
    np.testing.assert_allclose(ours["a"], theirs["a"], rtol=1e-6, atol=1e-9)
    # And the data did change the fit: log 2 more on the intercept.
    assert ours["a"].mean() == pytest.approx(_draws(light.model)["a"].mean() + np.log(2), abs=0.1)


def test_native_pays_only_for_many_or_slow_fits():
    # One fit of a cheap model: the wrappers' compile outweighs the saving.
    assert not compiling.native_pays(5e-6, fits=1, draws_per_chain=2000, chains=4, cores=2)
    # A calibration's hundreds of refits, or a log-density of a millisecond, pay.
    assert compiling.native_pays(5e-6, fits=500, draws_per_chain=600, chains=2, cores=1)
    assert compiling.native_pays(1e-3, fits=1, draws_per_chain=2000, chains=4, cores=2)


def test_a_fit_through_the_default_sampler_is_complete(counts):
    fit = engine.fit(_model(counts), seed=5, settings=SETTINGS)
    assert fit.sampler.path == "light"
    for group in ("posterior", "sample_stats", "log_likelihood", "posterior_predictive", "prior"):
        assert group in fit.idata.children
    assert fit.idata.posterior["rate"].shape == (2, 150, 40)
    # A calibration's sampler is built for many refits: nutpie's native wrappers.
    assert engine.Sampler(_model(counts), fits=None).path == "native"


def test_log_likelihood_of_a_refit_on_new_data_is_pymcs(counts):
    # The sampler compiles the pointwise log-likelihood once and reuses it for
    # every refit; each refit's values must equal PyMC's own computation on
    # the data that refit saw (pm.compute_log_likelihood, the reference).
    model = _model(counts)
    sampler = engine.Sampler(model, fits=2, settings=SETTINGS)
    for seed, table in ((1, counts), (2, counts[::-1] + 3)):
        fit = engine.fit(model, seed, SETTINGS, sampler=sampler, observed={"y": table},
                         predictive=False, prior=False)
        with model:
            pm.set_data({"y": table})
            reference = pm.compute_log_likelihood(fit.idata.copy(), extend_inferencedata=False,
                                                  progressbar=False)
        np.testing.assert_allclose(fit.idata["log_likelihood"]["obs"].values, reference["obs"].values,
                                   rtol=1e-12)
        assert fit.idata["log_likelihood"]["obs"].dims == reference["obs"].dims
