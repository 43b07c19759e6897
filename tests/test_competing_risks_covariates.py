"""competing-risks covariates: validation, recovery from the simulator, and a maximum-likelihood fit.

Why no cause-specific Weibull fit as the reference: in the mixture model
(Larson and Dinse 1985) the cause-specific hazard of outcome k is
``share_k(x) f_k(t | x) / S(t | x)`` with ``S = open + sum_j share_j(x) S_j(t | x)``.
That hazard is not Weibull even without covariates, and a covariate moves
it through every outcome's share and timing, so the effects of a Weibull
accelerated failure time model fitted to outcome k with the others censored
estimate another quantity than the mixture's time effects. Measured on the
table of :func:`units_fit` (seed 17): lifelines' cause-specific
``WeibullAFTFitter`` gave log time ratios 0.249 and 0.659 for fixed (true
-0.163 and 0.262), 3.7 to 23 posterior sd from the mixture's estimates, two
of them of the other sign. The reference is instead the same mixture
likelihood written out here and maximised with scipy.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize

from recipes.competing_risks import RECIPE
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
OUTCOMES = ("fixed", "scrapped")


def _fit(table: pd.DataFrame, **options):
    design = make_design(RECIPE, {"outcomes": ",".join(OUTCOMES), **options}, {})
    data = RECIPE.validate(table, design.options)
    fit = engine.fit(design.build(data), seed=5, settings=FAST, prior=False, predictive=False)
    return fit, fit.draws()


def _on_model_scale(data, ratios: dict) -> np.ndarray:
    """True ratios per unit of each covariate ({outcome: {effect: ratio}}) as model effects."""
    design = data.extra["covariates"]
    per_unit = dict(zip(design.effects, design.per_unit))
    return np.array([[np.log(ratios[o][e]) * per_unit[e] for e in design.effects] for o in ratios])


# --- bad input: one line, exit 2 --------------------------------------------------------------

UNITS = ("time,outcome,dose,site\n3,fixed,1.5,north\n5,,2.0,south\n4,scrapped,x,north\n"
         "7,fixed,3.5,south\n")
COHORTS = ("cohort,age,exposed,fixed,scrapped,bench\nA,2,50,10,3,cold\nA,5,50,20,6,warm\n"
           "B,2,40,5,2,warm\nB,5,40,9,4,warm\n")


@pytest.mark.parametrize("text, covariates, expected", [
    (UNITS, "dose,depth", "needs column 'depth'"),
    (UNITS, "dose", "column 'dose' row 3 (line 4): expected a finite number; found 'x'"),
    (UNITS.replace("south", "north"), "site",
     "column 'site': expected a label covariate with at least two levels; found only 'north'"),
    (UNITS, "outcome", "option 'covariates': expected columns other than the layout's own"),
    (COHORTS, "bench", "column 'bench' row 2 (line 3): 'warm' differs from 'cold' given for cohort 'A' "
                       "in row 1 (line 2); expected one bench per cohort"),
    (COHORTS, "scrapped", "option 'covariates': expected columns other than the layout's own"),
])
def test_bad_covariates_exit_2_with_one_line(capsys, tmp_path, text, covariates, expected):
    path = tmp_path / "table.csv"
    path.write_text(text)
    code = main(["check", "competing-risks", "--data", str(path), "--set", "outcomes=fixed,scrapped",
                 "--set", f"covariates={covariates}", "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and expected in err and err.count("\n") == 1


# --- one row per unit: recovery and the mixture likelihood maximised ------------------------------

# Documented true values (invented: appliances sent for repair end fixed or
# scrapped, and some are never collected from the workshop: resolve=estimate;
# a numeric age of the appliance in years and a two-level workshop). Time
# ratios per year of age and for workshop b, per outcome; odds ratios of each
# outcome against staying open for good.
TRUE_TIME_RATIO = {"fixed": {"age_years": 0.85, "shop=b": 1.3},
                   "scrapped": {"age_years": 1.1, "shop=b": 0.8}}
TRUE_ODDS_RATIO = {"fixed": {"age_years": 0.8, "shop=b": 0.5},
                   "scrapped": {"age_years": 1.4, "shop=b": 1.6}}
# The reference unit (mean age, workshop a): scales in days, shapes, shares.
TRUE_CURVE = {"scale": [8.0, 15.0], "shape": [1.6, 1.2], "share": [0.55, 0.25]}


@pytest.fixture(scope="module")
def units_fit():
    """700 units simulated by the recipe from TRUE_*, and their fit (resolve=estimate)."""
    rng = np.random.default_rng(17)
    n = 700
    frame = pd.DataFrame({"time": rng.uniform(40.0, 60.0, n), "outcome": "",
                          "age_years": rng.uniform(1.0, 9.0, n), "shop": rng.choice(["a", "b"], n)})
    frame.loc[0, "outcome"] = "fixed"  # a valid skeleton; every outcome is drawn afresh
    options = RECIPE.read_options({"outcomes": "fixed,scrapped", "resolve": "estimate",
                                   "covariates": "age_years,shop"})
    data = RECIPE.validate(frame, options)
    truth = {"scale": np.array(TRUE_CURVE["scale"]) / data.extra["age_ref"], "shape": TRUE_CURVE["shape"],
             "share": TRUE_CURVE["share"],
             "time_effect": _on_model_scale(data, TRUE_TIME_RATIO),
             "share_effect": _on_model_scale(data, TRUE_ODDS_RATIO)}
    sim = RECIPE.simulate(rng, data, truth, options)
    table = frame.assign(time=sim["time"],
                         outcome=[OUTCOMES[c - 1] if c > 0 else "" for c in sim["code"]])
    fit, draws = _fit(table, resolve="estimate", covariates="age_years,shop")
    return table, draws, fit


def _mixture_mle(table: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """Maximum-likelihood Weibull mixture of two outcomes and an open share, written here.

    Larson and Dinse (1985) with logistic shares: a unit ends in outcome k
    with probability softmax(a0_k + a_k'x, 0) (the 0: staying open for good)
    and then at a Weibull time with log scale b0_k + b_k'x and shape exp(c_k);
    right-censored units contribute open + sum_k share_k S_k(t). Returns the
    log time ratios and log odds ratios (outcomes, covariates), per unit.
    """
    x = np.column_stack([table["age_years"], table["shop"] == "b"]).astype(float)
    t = table["time"].to_numpy()
    code = np.select([table["outcome"] == o for o in OUTCOMES], [1, 2], 0)

    def nll(theta):
        a0, a, b0, b, c = theta[0:2], theta[2:6].reshape(2, 2), theta[6:8], theta[8:12].reshape(2, 2), theta[12:14]
        eta = np.column_stack([a0 + x @ a.T, np.zeros(len(t))])
        log_share = eta - np.logaddexp.reduce(eta, axis=1, keepdims=True)
        k = np.exp(c)
        z = k * (np.log(t)[:, None] - (b0 + x @ b.T))
        log_f = np.log(k) - np.log(t)[:, None] + z - np.exp(z)
        censored = np.logaddexp.reduce(np.column_stack([log_share[:, :2] - np.exp(z), log_share[:, 2]]), axis=1)
        ll = np.where(code == 1, log_share[:, 0] + log_f[:, 0],
                      np.where(code == 2, log_share[:, 1] + log_f[:, 1], censored))
        return -ll.sum()

    start = np.zeros(14)
    start[6:8] = np.log(np.median(t))
    result = optimize.minimize(nll, start, method="BFGS", options={"maxiter": 5000})
    assert result.success or result.status == 2  # 2: precision loss at the optimum
    theta = result.x
    return theta[8:12].reshape(2, 2), theta[2:6].reshape(2, 2)


def test_effects_agree_with_the_mixture_likelihood_maximised(units_fit):
    # Measured over simulation seeds 17-19 (seed 5, FAST): posterior means
    # within 0.01-0.17 posterior sd of the maximum-likelihood estimates.
    table, draws, _ = units_fit
    time_mle, odds_mle = _mixture_mle(table)
    for name, expected in (("time_ratio", time_mle), ("odds_ratio", odds_mle)):
        log_ratio = np.log(draws[name])  # (S, outcome, covariate)
        gap = np.abs(log_ratio.mean(axis=0) - expected) / log_ratio.std(axis=0)
        assert np.all(gap < AGREE_SD), (name, gap)


def test_simulated_effects_are_recovered_from_units(units_fit):
    # Measured over simulation seeds 17-19: every effect within 1.56 posterior sd of its true value.
    _, draws, _ = units_fit
    for name, truth in (("time_ratio", TRUE_TIME_RATIO), ("odds_ratio", TRUE_ODDS_RATIO)):
        log_ratio = np.log(draws[name])
        expected = np.log([list(truth[o].values()) for o in OUTCOMES])
        gap = np.abs(log_ratio.mean(axis=0) - expected) / log_ratio.std(axis=0)
        assert np.all(gap < RECOVER_SD), (name, gap)
    share = draws["share"]
    assert np.all(np.abs(share.mean(axis=0) - TRUE_CURVE["share"]) < RECOVER_SD * share.std(axis=0))


def test_ratios_are_labelled_by_outcome_and_covariate(units_fit):
    table, draws, fit = units_fit
    labels = set(estimates.parameters(fit.idata))
    expected = {f"{ratio}[{o}, {e}]" for ratio in ("time_ratio", "odds_ratio") for o in OUTCOMES
                for e in ("age_years", "shop=b")}
    assert expected <= labels
    # Per year of age, not per sd: time_effect is per sd, the ratio divides it out.
    sd = table["age_years"].std(ddof=0)
    assert np.allclose(np.log(draws["time_ratio"][:, 1, 0]), draws["time_effect"][:, 1, 0] / sd)


# --- cohort counts: recovery, shares against the first outcome ------------------------------------


def test_cohort_covariates_are_recovered_from_counts():
    # 16 cohorts of 150 units seen at 6 ages, every unit ends (resolve=all), a
    # numeric and a label covariate constant within each cohort, simulated by
    # the recipe from documented true ratios (invented: batches of seedlings
    # transplanted at a temperature into one of two soils end rooted or
    # wilted). Odds ratios are of wilted against rooted (the first outcome).
    # Measured over seeds 4-6 (seed 5, FAST): every effect within 2.1
    # posterior sd of its true value (seed 4: within 0.95 sd).
    rng = np.random.default_rng(4)
    frame = pd.DataFrame([{"cohort": f"t{c:02d}", "age": a, "exposed": 150, "rooted": 0, "wilted": 0,
                           "temp": 10.0 + 3.0 * (c % 4), "soil": ("clay", "loam")[c // 8]}
                          for c in range(16) for a in (3, 6, 9, 12, 18, 30)])
    options = RECIPE.read_options({"outcomes": "rooted,wilted", "covariates": "temp,soil"})
    data = RECIPE.validate(frame, options)
    time_ratio = {"rooted": {"temp": 0.95, "soil=loam": 1.3}, "wilted": {"temp": 1.05, "soil=loam": 0.8}}
    odds_ratio = {"wilted": {"temp": 1.15, "soil=loam": 0.5}}
    truth = {"scale": [0.8, 1.2], "shape": [2.0, 1.4], "share": [0.65, 0.35],
             "time_effect": _on_model_scale(data, time_ratio),
             "share_effect": _on_model_scale(data, odds_ratio)}
    sim = RECIPE.simulate(rng, data, truth, options)
    index = [r[0] for r in sim.source_rows]
    table = frame.assign(rooted=pd.Series(sim["rooted"], index=index),
                         wilted=pd.Series(sim["wilted"], index=index))
    design = make_design(RECIPE, {"outcomes": "rooted,wilted", "covariates": "temp,soil"}, {})
    fit = engine.fit(design.build(RECIPE.validate(table, design.options)), seed=5, settings=FAST,
                     prior=False, predictive=False)
    draws = fit.draws()
    for name, true in (("time_ratio", time_ratio), ("odds_ratio", odds_ratio)):
        log_ratio = np.log(draws[name])
        expected = np.log([list(true[o].values()) for o in true])
        gap = np.abs(log_ratio.mean(axis=0) - expected) / log_ratio.std(axis=0)
        assert np.all(gap < RECOVER_SD), (name, gap)
    assert {"odds_ratio[wilted, temp]", "time_ratio[rooted, soil=loam]"} <= set(estimates.parameters(fit.idata))


def test_prior_draws_simulate_tables_the_recipe_reads_again():
    # What calibration does with each replicate: a prior draw of every
    # variable goes to the simulator, whose table validates and scores.
    import pymc as pm

    rng = np.random.default_rng(8)
    n = 120
    frame = pd.DataFrame({"time": rng.uniform(1.0, 3.0, n), "outcome": "fixed",
                          "dose": rng.normal(0.0, 2.0, n), "site": rng.choice(["a", "b", "c"], n)})
    for resolve in ("all", "estimate"):
        design = make_design(RECIPE, {"outcomes": "fixed,scrapped", "resolve": resolve,
                                      "covariates": "dose,site"}, {})
        data = RECIPE.validate(frame, design.options)
        model = design.build(data)
        names = [v.name for v in model.free_RVs] + ["share"]
        draws = pm.draw([model[name] for name in names], draws=5, random_seed=3)
        for s in range(5):
            params = {name: draws[j][s] for j, name in enumerate(names)}
            sim = design.simulate(rng, data, params)
            assert sim["code"].min() >= 0 and sim["code"].max() <= 2
        # The replicated table scores under the model.
        with model:
            pm.set_data({"units": RECIPE.observed(sim)["units"]})
        assert np.isfinite(model.compile_logp()(model.initial_point()))
