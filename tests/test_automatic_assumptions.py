"""A model file with no ASSUMPTIONS gets assumptions read from its likelihoods and table.

The four everyday models of tests/model_files run through ``workbench.check``
with default settings but small draws, each on a table with one planted fault
and on its clean twin (tests/shared_runs.py simulates both from the
documented true values in each file). Measured for these tables at seed 3
with 4 chains of 400 draws: every planted fault broken with an elpd gain of
at least 24 against the rule's 4, every other assumption at most doubtful
(the closest: the heavy-tailed table's constant_scale and priors, doubtful as
symptoms or by power-scaling), every clean twin with nothing broken or doubtful.
"""

from __future__ import annotations

import pickle
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.stats
import statsmodels.api as sm
from statsmodels.discrete.discrete_model import NegativeBinomial

from shared_runs import AUTOMATIC_SEED, automatic_check
from workbench import automatic, modelfile

FILES = Path(__file__).parent / "model_files"

# (model file, planted fault, the key that must be broken)
FAULTS = [
    ("bird_sightings", "overdispersed", "dispersion:sightings"),
    ("reaction_times", "heavy_tails", "tails:rt_ms"),
    ("reaction_times", "growing_noise", "constant_scale:rt_ms"),
    ("kiln_firing", "site_effects", "same_across:site"),
]
CLEAN = ["bird_sightings", "reaction_times", "kiln_firing"]


def verdicts(result) -> dict[str, str]:
    return {a["key"]: a["verdict"] for a in result.summary["assumptions"]}


@pytest.mark.parametrize("stem, fault, key", FAULTS)
def test_planted_fault_breaks_its_automatic_assumption_and_nothing_else(stem, fault, key):
    found = verdicts(automatic_check(stem, fault))
    assert found[key] == "broken"
    others = {k: v for k, v in found.items() if k != key and v == "broken"}
    assert others == {}


@pytest.mark.parametrize("stem", CLEAN)
def test_clean_twin_has_nothing_broken(stem):
    found = verdicts(automatic_check(stem))
    assert "broken" not in found.values(), found
    # Each likelihood's automatic assumptions were checked, not skipped.
    expected = {"bird_sightings": {"dispersion:sightings", "excess_zeros:sightings"},
                "reaction_times": {"tails:rt_ms", "constant_scale:rt_ms"},
                "kiln_firing": {"dispersion:survived", "same_across:site"}}[stem]
    assert {k for k, v in found.items() if v != "unchecked"} >= expected


def test_predictions_is_a_symptom_of_the_overdispersion():
    doc = automatic_check("bird_sightings", "overdispersed").summary
    predictions = next(a for a in doc["assumptions"] if a["key"] == "predictions")
    assert predictions["verdict"] == "doubtful"
    assert "Revisit after addressing 'dispersion:sightings'" in predictions["advice"]


def test_identifier_columns_get_no_same_across():
    # transect and trial are one row per level: identifiers, not groupings.
    for stem in ("bird_sightings", "reaction_times"):
        keys = verdicts(automatic_check(stem))
        assert not any(k.startswith("same_across:") for k in keys)


# --- external checks ------------------------------------------------------------------


def _module(stem: str):
    import importlib.util

    spec = importlib.util.spec_from_file_location(f"external_{stem}", FILES / f"{stem}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_negative_binomial_relaxation_agrees_with_statsmodels_maximum_likelihood():
    # Source: statsmodels.discrete.discrete_model.NegativeBinomial (NB2,
    # Var = mu + alpha mu^2), fitted by maximum likelihood on the same table.
    # The relaxation's shape is mean(mu) / d, so its alpha is d / mean(mu).
    result = automatic_check("bird_sightings", "overdispersed")
    birds = _module("bird_sightings")
    table = birds.scenario_table(AUTOMATIC_SEED, "overdispersed")
    relaxed = result.run.relaxed["extra_dispersion_sightings"].draws()
    (mu,) = automatic.FittedValues(birds.build_model).parameters(table, "sightings", relaxed)
    alpha = relaxed["extra_dispersion_sightings"] / mu.mean(axis=1)
    exog = sm.add_constant(table["hedge"].to_numpy(float) - 1.5)
    mle = NegativeBinomial(table["sightings"].to_numpy(), exog).fit(disp=0)
    assert abs(np.median(alpha) - mle.params[-1]) < 2 * np.std(alpha)


def test_student_t_relaxation_agrees_with_scipy_t_fit_on_the_residuals():
    # Source: scipy.stats.t.fit (maximum likelihood df, loc, scale) on the
    # residuals of the least-squares line (numpy.polyfit).
    result = automatic_check("reaction_times", "heavy_tails")
    table = _module("reaction_times").scenario_table(AUTOMATIC_SEED, "heavy_tails")
    load, rt = table["load"].to_numpy(float), table["rt_ms"].to_numpy(float)
    residuals = rt - np.polyval(np.polyfit(load, rt, 1), load)
    df, _, _ = scipy.stats.t.fit(residuals)
    inverse_nu = result.run.relaxed["inverse_nu_rt_ms"].draws()["inverse_nu_rt_ms"]
    assert abs(np.median(inverse_nu) - 1.0 / df) < 2 * np.std(inverse_nu)


# --- what is derived, without fitting ----------------------------------------------------


def _write(tmp_path: Path, body: str) -> Path:
    path = tmp_path / "model.py"
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return path


def _derived(tmp_path: Path, body: str, table: pd.DataFrame) -> dict[str, str]:
    design = modelfile.ModelFileDesign(_write(tmp_path, body))
    data = design.validate(table)
    uninformed = {a.key: a.uninformed(data) for a in design.assumptions}
    return {k: v for k, v in uninformed.items() if k != "predictions"}


TABLE = pd.DataFrame({"x": np.linspace(0.0, 1.0, 12), "y": np.arange(12) % 2,
                      "z": np.linspace(1.0, 3.0, 12), "shop": list("abc") * 4,
                      "pair": ["p", "q"] * 6})


def test_unknown_likelihoods_and_shapes_are_listed_with_the_reason(tmp_path):
    found = _derived(tmp_path, """
        import pymc as pm
        def build_model(data):
            with pm.Model() as model:
                a = pm.Normal("a")
                pm.Bernoulli("y", logit_p=a * data["x"].to_numpy(), observed=data["y"].to_numpy())
                pm.Gamma("z", 2.0, pm.math.exp(a), observed=data["z"].to_numpy())
            return model
        """, TABLE)
    assert "Bernoulli" in found["dispersion:y"] or "bernoulli" in found["dispersion:y"]
    assert "has no automatic expansion" in found["tails:z"]
    assert "has no automatic expansion" in found["constant_scale:z"]
    # A two-level column is named with the number of levels it lacks.
    assert "2 levels" in found["same_across:pair"]
    # shop is used by no variable, but no likelihood here can take an offset.
    assert "no observed variable" in found["same_across:shop"]


def test_binary_binomial_and_flat_location_are_unchecked(tmp_path):
    found = _derived(tmp_path, """
        import pymc as pm
        def build_model(data):
            with pm.Model() as model:
                p = pm.Beta("p", 1, 1)
                pm.Binomial("y", n=1, p=p, observed=data["y"].to_numpy())
                m = pm.Normal("m", 2, 1)
                pm.Normal("z", m, pm.HalfNormal("s", 1.0), observed=data["z"].to_numpy())
            return model
        """, TABLE)
    assert "binary" in found["dispersion:y"]
    assert "same in every row" in found["constant_scale:z"]
    assert found["tails:z"] == ""
    assert found["same_across:shop"] == ""


def test_a_column_the_model_reads_gets_no_same_across(tmp_path):
    found = _derived(tmp_path, """
        import pandas as pd
        import pymc as pm
        def build_model(data):
            codes, shops = pd.factorize(data["shop"])
            with pm.Model(coords={"shop": list(shops)}) as model:
                a = pm.Normal("a", 2, 1, dims="shop")
                pm.Normal("z", a[codes], 1.0, observed=data["z"].to_numpy())
            return model
        """, TABLE)
    assert "same_across:shop" not in found
    assert "tails:z" in found


def test_a_declared_key_replaces_the_automatic_assumption(tmp_path):
    path = _write(tmp_path, """
        import pymc as pm
        from workbench.recipe import Assumption
        ASSUMPTIONS = [Assumption("tails:z", "Errors have normal tails, as the lab's ruler gives.")]
        def build_model(data):
            with pm.Model() as model:
                a = pm.Normal("a", 2, 1)
                pm.Normal("z", a + data["x"].to_numpy(), pm.HalfNormal("s", 1.0),
                          observed=data["z"].to_numpy())
            return model
        """)
    design = modelfile.ModelFileDesign(path)
    design.validate(TABLE)
    tails = [a for a in design.assumptions if a.key == "tails:z"]
    assert len(tails) == 1 and tails[0].statement.startswith("Errors have normal tails, as")
    assert any(a.key == "constant_scale:z" and a.relaxation for a in design.assumptions)


def test_design_with_automatic_relaxations_crosses_a_process_boundary_as_plain_data():
    design = modelfile.ModelFileDesign(FILES / "kiln_firing.py")
    table = _module("kiln_firing").scenario_table(1, "site_effects")
    data = design.validate(table)
    copy = pickle.loads(pickle.dumps(design))
    assert [a.key for a in copy.assumptions] == [a.key for a in design.assumptions]
    relaxation = next(a.relaxation for a in copy.assumptions if a.key == "same_across:site")
    model = copy.build(data, relaxation)
    base = {rv.name for rv in design.build(data).free_RVs}
    # The user's parameters stay; the relaxation adds its sd and one offset per site.
    assert {rv.name for rv in model.free_RVs} == base | {"site_offset_sd", "site_offset_sd_z"}
    assert model["site_offset_sd_z"].eval().shape == (6,)
    assert np.isfinite(model.compile_logp()(model.initial_point()))


def test_a_known_measurement_error_gets_no_tail_or_scale_relaxation(tmp_path):
    # Eight schools: each estimate's standard error is given (Rubin 1981).
    found = _derived(tmp_path, """
        import pymc as pm
        def build_model(data):
            with pm.Model() as model:
                mu = pm.Normal("mu", 0, 5)
                pm.Normal("z", mu + data["x"].to_numpy(), data["z"].to_numpy() / 10,
                          observed=data["z"].to_numpy())
            return model
        """, TABLE)
    assert "given by the data" in found["tails:z"]
    assert "given by the data" in found["constant_scale:z"]
