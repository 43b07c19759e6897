"""timing-curve covariates: validation, and effects against reference fits and known truths."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, special

from recipes.timing_curve import RECIPE
from workbench import engine, estimates
from workbench.cli import main
from workbench.recipe import make_design

from conftest import FAST

# A posterior mean and a maximum-likelihood estimate of the same effect on the
# same data differ by a fraction of the posterior sd under weak priors
# (Bernstein-von Mises); 2 sd leaves room for Monte Carlo error and the prior.
AGREE_SD = 2.0
# A true value within 3 posterior sd: a miss is a 0.3% event under a
# calibrated posterior, so one seed can assert it for every effect at once.
RECOVER_SD = 3.0


def _fit(table: pd.DataFrame, **options):
    design = make_design(RECIPE, options, {})
    data = RECIPE.validate(table, design.options)
    fit = engine.fit(design.build(data), seed=5, settings=FAST, prior=False, predictive=False)
    return fit, fit.draws()


# --- bad input: one line, exit 2 --------------------------------------------------------------

UNITS = "time,event,dose,site\n3,1,1.5,north\n5,0,2.0,south\n4,1,x,north\n7,1,3.5,south\n"
COHORTS = ("cohort,age,exposed,events,soil\nA,2,50,10,clay\nA,5,50,20,loam\n"
           "B,2,40,5,loam\nB,5,40,9,loam\n")


@pytest.mark.parametrize("text, covariates, expected", [
    (UNITS, "dose,depth", "needs column 'depth'"),
    (UNITS, "dose", "column 'dose' row 3 (line 4): expected a finite number; found 'x'"),
    (UNITS.replace("south", "north"), "site",
     "column 'site': expected a label covariate with at least two levels; found only 'north'"),
    (COHORTS, "soil", "column 'soil' row 2 (line 3): 'loam' differs from 'clay' given for cohort 'A' "
                      "in row 1 (line 2); expected one soil per cohort"),
])
def test_bad_covariates_exit_2_with_one_line(capsys, tmp_path, text, covariates, expected):
    path = tmp_path / "table.csv"
    path.write_text(text)
    code = main(["check", "timing-curve", "--data", str(path), "--set", f"covariates={covariates}",
                 "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and expected in err and err.count("\n") == 1


def test_label_reference_is_the_first_level_in_sorted_order():
    table = pd.read_csv(__import__("io").StringIO(UNITS.replace(",x,", ",2.5,")))
    data = RECIPE.validate(table, RECIPE.read_options({"covariates": "site,dose"}))
    design = data.extra["covariates"]
    assert design.effects == ("site=south", "dose") and design.references == {"site": "north"}
    # A number is standardised: mean 0, sd 1 in the model's design matrix.
    assert np.isclose(design.matrix[:, 1].mean(), 0.0) and np.isclose(design.matrix[:, 1].std(), 1.0)


# --- (a) time effects against a Weibull AFT fit -------------------------------------------------


def test_time_effects_agree_with_a_weibull_aft_fit_on_the_rossi_recidivism_data():
    # Rossi et al. (1980) recidivism data as shipped with lifelines
    # (lifelines.datasets.load_rossi: 432 released prisoners followed 52 weeks);
    # reference: lifelines.WeibullAFTFitter, whose lambda_ coefficients are
    # log time ratios of the same accelerated failure time model.
    from lifelines import WeibullAFTFitter
    from lifelines.datasets import load_rossi

    rossi = load_rossi()[["week", "arrest", "fin", "age", "prio"]]
    reference = WeibullAFTFitter().fit(rossi, duration_col="week", event_col="arrest")
    table = rossi.rename(columns={"week": "time", "arrest": "event"})
    # Every unit may be arrested eventually: the plain Weibull AFT model.
    # Measured (seed 5, FAST): posterior means within 0.02-0.2 sd of the
    # reference's fin 0.250, age 0.048, prio -0.070; shape 1.357 against 1.400 (0.36 sd).
    _, draws = _fit(table, eventual="all", covariates="fin,age,prio")
    log_ratio = np.log(draws["time_ratio"])
    for j, name in enumerate(("fin", "age", "prio")):
        expected = reference.params_.loc[("lambda_", name)]
        assert abs(log_ratio[:, j].mean() - expected) < AGREE_SD * log_ratio[:, j].std(), name
    shape = np.exp(reference.params_.loc[("rho_", "Intercept")])
    assert abs(draws["shape"].mean() - shape) < AGREE_SD * draws["shape"].std()


# --- (b) and (d): the eventual share's effects, and recovery from the simulator --------------------

# Documented true values of the simulated table (invented: a numeric dose and a
# two-level site): time ratio and odds ratio per unit of dose and for site b.
TRUE_TIME_RATIO = {"dose": 0.8, "site=b": 1.3}
TRUE_ODDS_RATIO = {"dose": 2.0, "site=b": 0.5}
TRUE_CURVE = {"scale": 10.0, "shape": 1.8, "eventual": 0.6}


@pytest.fixture(scope="module")
def simulated():
    """600 units simulated by the recipe from TRUE_*, and the fit of them."""
    rng = np.random.default_rng(31)
    n = 600
    frame = pd.DataFrame({"time": rng.uniform(25.0, 40.0, n), "event": 0,
                          "dose": rng.normal(2.0, 1.0, n), "site": rng.choice(["a", "b"], n)})
    frame.loc[0, "event"] = 1  # a valid skeleton; every outcome is drawn afresh
    options = RECIPE.read_options({"covariates": "dose,site"})
    data = RECIPE.validate(frame, options)
    design = data.extra["covariates"]
    per_unit = dict(zip(design.effects, design.per_unit))
    truth = {
        "scale": TRUE_CURVE["scale"] / data.extra["age_ref"], "shape": TRUE_CURVE["shape"],
        "eventual": TRUE_CURVE["eventual"],
        "time_effect": np.array([np.log(TRUE_TIME_RATIO[e]) * per_unit[e] for e in design.effects]),
        "share_effect": np.array([np.log(TRUE_ODDS_RATIO[e]) * per_unit[e] for e in design.effects]),
    }
    sim = RECIPE.simulate(rng, data, truth, options)
    table = frame.assign(time=sim["time"], event=sim["code"])
    fit, draws = _fit(table, covariates="dose,site")
    return table, draws, fit


def _cure_mle(table: pd.DataFrame) -> np.ndarray:
    """Maximum-likelihood logistic-Weibull mixture cure model (Farewell 1982), written here.

    Returns the log odds ratios of dose and site b; the eventual share is
    sigmoid(a0 + a'x), a unit that has the event has a Weibull time with log
    scale b0 + b'x and shape exp(c).
    """
    x = np.column_stack([table["dose"], table["site"] == "b"]).astype(float)
    t, d = table["time"].to_numpy(), table["event"].to_numpy().astype(bool)

    def nll(theta):
        a0, a, b0, b, c = theta[0], theta[1:3], theta[3], theta[4:6], theta[6]
        k = np.exp(c)
        log_p = -np.logaddexp(0.0, -(a0 + x @ a))
        log_q = -np.logaddexp(0.0, a0 + x @ a)
        z = k * (np.log(t) - (b0 + x @ b))
        log_f = np.log(k) - np.log(t) + z - np.exp(z)
        return -(np.where(d, log_p + log_f, np.logaddexp(log_q, log_p - np.exp(z)))).sum()

    start = np.array([0.0, 0.0, 0.0, np.log(np.median(t)), 0.0, 0.0, 0.0])
    result = optimize.minimize(nll, start, method="BFGS")
    assert result.success or result.status == 2  # 2: precision loss at the optimum
    return result.x[1:3]


def test_share_effects_agree_with_a_maximum_likelihood_cure_fit(simulated):
    table, draws, _ = simulated
    # Measured: log odds ratios 0.839 and -0.635 against the MLE's 0.845 and
    # -0.655 (within 0.11 posterior sd).
    expected = _cure_mle(table)
    log_odds = np.log(draws["odds_ratio"])
    assert np.all(np.abs(log_odds.mean(axis=0) - expected) < AGREE_SD * log_odds.std(axis=0))


def test_simulated_effects_are_recovered(simulated):
    _, draws, _ = simulated
    # Measured: every effect within 1.5 posterior sd of its true value.
    for name, truth in (("time_ratio", TRUE_TIME_RATIO), ("odds_ratio", TRUE_ODDS_RATIO)):
        log_ratio = np.log(draws[name])
        expected = np.log(list(truth.values()))
        assert np.all(np.abs(log_ratio.mean(axis=0) - expected) < RECOVER_SD * log_ratio.std(axis=0)), name


def test_ratios_are_reported_per_unit_of_each_covariate(simulated):
    _, draws, fit = simulated
    table = estimates.parameters(fit.idata)
    # The interpretable effects sit beside the model's own parameters.
    assert {"time_ratio[dose]", "time_ratio[site=b]", "odds_ratio[dose]", "odds_ratio[site=b]",
            "scale", "shape", "eventual"} <= set(table)
    # Per unit of dose, not per sd: time_effect is per sd, the ratio divides it out.
    sd = simulated[0]["dose"].std(ddof=0)
    assert np.allclose(np.log(draws["time_ratio"][:, 0]), draws["time_effect"][:, 0] / sd)


def test_cohort_covariates_are_recovered_from_counts():
    # 12 cohorts of 120 units seen at 6 ages, a numeric and a label covariate
    # constant within each cohort, simulated by the recipe from documented
    # true ratios (invented: a bench temperature and a soil). Measured over
    # seeds 2-6: every effect within 1.6 posterior sd of its true value.
    rng = np.random.default_rng(2)
    frame = pd.DataFrame([{"cohort": f"t{c:02d}", "age": a, "exposed": 120, "events": 0,
                           "temp": 10.0 + 3.0 * (c % 4), "soil": ("clay", "loam")[c // 6]}
                          for c in range(12) for a in (3, 6, 9, 12, 18, 30)])
    options = RECIPE.read_options({"covariates": "temp,soil"})
    data = RECIPE.validate(frame, options)
    per_unit = data.extra["covariates"].per_unit
    time_ratio, odds_ratio = np.array([0.95, 1.35]), np.array([1.1, 0.45])
    truth = {"scale": 1.0, "shape": 2.0, "eventual": 0.7,
             "time_effect": np.log(time_ratio) * per_unit, "share_effect": np.log(odds_ratio) * per_unit}
    sim = RECIPE.simulate(rng, data, truth, options)
    table = frame.assign(events=pd.Series(sim["events"], index=[r[0] for r in sim.source_rows]))
    _, draws = _fit(table, covariates="temp,soil")
    for name, true in (("time_ratio", time_ratio), ("odds_ratio", odds_ratio)):
        log_ratio = np.log(draws[name])
        assert np.all(np.abs(log_ratio.mean(axis=0) - np.log(true)) < RECOVER_SD * log_ratio.std(axis=0)), name


def test_the_shipped_flowering_table_is_what_its_script_writes(tmp_path):
    # The README's covariate example ships its table and says the script
    # writes it again byte for byte: the true values in the script are the
    # ones behind the shipped data.
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    out = tmp_path / "again.csv"
    subprocess.run([sys.executable, str(root / "scripts" / "flowering_table.py"), str(out)], check=True,
                   cwd=root)
    assert out.read_bytes() == (root / "examples" / "lavender_flowering.csv").read_bytes()
