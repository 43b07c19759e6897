"""stage-transitions covariates: bad columns, the likelihood against a multinomial logit fit,
recovery from the simulator in both layouts, and one check from the command line."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import special

from recipes.stage_transitions import RECIPE, move_labels
from workbench import engine, estimates
from workbench.cli import main
from workbench.recipe import make_design

# Two chains of 300 draws: the effects here are informed by thousands of moves.
SETTINGS = engine.Settings(draws=300, tune=300, chains=2)
# A posterior mean and a maximum-likelihood estimate of the same effect on the
# same data differ by a fraction of the posterior sd under weak priors
# (Bernstein-von Mises); 2 sd leaves room for Monte Carlo error and the prior.
AGREE_SD = 2.0
# A true value within 3 posterior sd: a miss is a 0.3% event under a
# calibrated posterior, so one seed can assert it for every effect at once.
RECOVER_SD = 3.0
STAGES = ("new", "active", "done", "dropped")
# Every listed move has a positive probability in the true chains below (a
# move of probability zero has no finite log-odds to recover).
MOVES = "new>active,new>dropped,active>done,active>dropped"
OPTIONS = {"stages": ",".join(STAGES), "absorbing": "done,dropped", "moves": MOVES}


def _design(**options):
    return make_design(RECIPE, {**OPTIONS, **options}, {})


def _on_model_scale(data, odds_ratio: dict) -> np.ndarray:
    """True odds ratios per unit of each covariate ({move: {effect: ratio}}) as ``move_effect``."""
    design = data.extra["covariates"]
    per_unit = dict(zip(design.effects, design.per_unit))
    return np.array([[np.log(odds_ratio[m][e]) * per_unit[e] for e in design.effects]
                     for m in move_labels(data)])


# --- bad input: one line, exit 2 --------------------------------------------------------------

COUNTS = ("cohort,period,new,active,done,dropped,temp,feed\n"
          "A,0,50,0,0,0,14.5,algae\nA,1,30,12,0,8,14.5,algae\n"
          "B,0,40,0,0,0,18.0,paste\nB,1,22,10,0,8,18.0,paste\n")
MOVED = ("cohort,period,from,new,active,done,dropped,temp\n"
         "A,0,new,30,12,0,8,14.5\nA,1,active,0,6,4,2,14.5\n"
         "B,0,new,22,10,0,8,18.0\nB,1,active,0,5,3,2,16.0\n")


@pytest.mark.parametrize("text, covariates, expected", [
    (COUNTS, "temp,depth", "needs column 'depth'"),
    (COUNTS, "active", "option 'covariates': expected columns other than the layout's own "
                       "(cohort, period, new, active, done, dropped, group); found 'active'"),
    (MOVED, "from", "option 'covariates': expected columns other than the layout's own "
                    "(cohort, period, from, new, active, done, dropped, group); found 'from'"),
    (COUNTS.replace("A,1,30,12,0,8,14.5,algae", "A,1,30,12,0,8,14.5,paste"), "feed",
     "column 'feed' row 2 (line 3): 'paste' differs from 'algae' given for cohort 'A' in row 1 "
     "(line 2); expected one feed per cohort"),
    (MOVED, "temp", "column 'temp' row 4 (line 5): '16.0' differs from '18.0' given for cohort 'B' in "
                    "row 3 (line 4); expected one temp per cohort"),
    (COUNTS.replace("A,1,30,12,0,8,14.5", "A,1,30,12,0,8,"), "temp",
     "column 'temp' row 2 (line 3): expected a finite number; found an empty cell"),
    (COUNTS.replace("B,0,40,0,0,0,18.0,paste", "B,0,40,0,0,0,18.0,"), "feed",
     "column 'feed' row 3 (line 4): expected a label; found an empty cell"),
])
def test_bad_covariates_exit_2_with_one_line(capsys, tmp_path, text, covariates, expected):
    path = tmp_path / "table.csv"
    path.write_text(text)
    sets = [a for k, v in OPTIONS.items() for a in ("--set", f"{k}={v}")]
    code = main(["check", "stage-transitions", "--data", str(path), *sets, "--set", f"covariates={covariates}",
                 "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and expected in err and err.count("\n") == 1, err


# --- transition counts: the likelihood is a multinomial logit per source stage ------------------

# Documented true values (invented: batches of oyster larvae reared in tanks
# of a water temperature, on one of two feeds; each week a larva may settle as
# spat (here: new > active), die, or, once settled, be planted out or die).
# The reference unit (mean temperature, feed algae) moves as TRUE_TRANSITION.
TRUE_TRANSITION = np.array([
    [0.60, 0.30, 0.00, 0.10],
    [0.00, 0.65, 0.25, 0.10],
    [0.00, 0.00, 1.00, 0.00],
    [0.00, 0.00, 0.00, 1.00],
])
# Odds ratios against staying, per degree and for feed=paste (against algae).
TRUE_ODDS_RATIO = {"new>active": {"temp": 1.15, "feed=paste": 0.6},
                   "new>dropped": {"temp": 0.9, "feed=paste": 1.5},
                   "active>done": {"temp": 1.1, "feed=paste": 1.0},
                   "active>dropped": {"temp": 1.0, "feed=paste": 1.8}}


def _batches(rng, n: int, periods: int) -> pd.DataFrame:
    """Covariates of ``n`` batches: a temperature and a feed, one value each."""
    return pd.DataFrame({"cohort": [f"b{c:02d}" for c in range(n)],
                         "temp": np.round(rng.uniform(14.0, 22.0, n), 1),
                         "feed": np.where(np.arange(n) % 2 == 0, "algae", "paste"), "periods": periods})


def _as_table(skeleton: pd.DataFrame, sim) -> pd.DataFrame:
    """``skeleton`` with the stage counts of the simulated dataset ``sim`` (rows in table order)."""
    index = [r[0] for r in sim.source_rows]
    return skeleton.assign(**{s: pd.Series(sim[s], index=index) for s in STAGES})


def _simulated(rng, skeleton: pd.DataFrame) -> pd.DataFrame:
    """The recipe's simulator run on ``skeleton`` from the true values above: the new table."""
    design = _design(covariates="temp,feed")
    data = RECIPE.validate(skeleton, design.options)
    truth = {"transition": TRUE_TRANSITION, "move_effect": _on_model_scale(data, TRUE_ODDS_RATIO)}
    return _as_table(skeleton, design.simulate(rng, data, truth))


@pytest.fixture(scope="module")
def moved_table() -> pd.DataFrame:
    """Transition counts of 16 batches over 4 weeks, 120 new and 60 settled larvae a row."""
    rng = np.random.default_rng(23)
    rows = []
    for _, b in _batches(rng, 16, 4).iterrows():
        for week in range(b.periods):
            for source, units in (("new", 120), ("active", 60)):
                rows.append({"cohort": b.cohort, "period": week, "from": source, "temp": b.temp, "feed": b.feed,
                             **{s: units if s == source else 0 for s in STAGES}})
    return _simulated(rng, pd.DataFrame(rows))


def _mnlogit(table: pd.DataFrame):
    """statsmodels' MNLogit fitted per source stage to the units of ``table``, one row per unit.

    The regressors are the covariates as the recipe reads them: temperature
    standardised over the table's rows (sd with ddof 0), an indicator of
    feed=paste. Returns {move: (intercept, slopes)} and the total log-likelihood.
    """
    import statsmodels.api as sm

    x = np.column_stack([(table["temp"] - table["temp"].mean()) / table["temp"].std(ddof=0),
                         table["feed"] == "paste"]).astype(float)
    estimates_, llf = {}, 0.0
    for source, targets in (("new", ("new", "active", "dropped")), ("active", ("active", "done", "dropped"))):
        rows = (table["from"] == source).to_numpy()
        counts = table.loc[rows, list(targets)].to_numpy()
        # One row per unit; outcome 0 (staying) is MNLogit's reference category.
        outcome = np.concatenate([np.repeat(np.arange(3), c) for c in counts])
        exog = sm.add_constant(np.repeat(x[rows], counts.sum(axis=1), axis=0))
        fit = sm.MNLogit(outcome, exog).fit(method="newton", maxiter=100, tol=1e-12, disp=False)
        llf += fit.llf
        for j, target in enumerate(targets[1:]):
            estimates_[f"{source}>{target}"] = (fit.params[0, j], fit.params[1:, j])
    return estimates_, llf


def test_the_likelihood_peaks_where_a_multinomial_logit_fit_does_with_its_value(moved_table):
    # Reference: statsmodels.discrete.discrete_model.MNLogit (maximum
    # likelihood multinomial logit, McFadden 1974) per source stage, staying
    # as the reference outcome. The recipe's likelihood of transition counts
    # is one multinomial per row; at MNLogit's estimates it must equal
    # MNLogit's log-likelihood (units one by one) plus the multinomial
    # coefficients of the rows, and its gradient must vanish there.
    import pytensor

    mle, llf = _mnlogit(moved_table)
    design = _design(covariates="temp,feed")
    data = RECIPE.validate(moved_table, design.options)
    model = design.build(data)
    labels = move_labels(data)
    point = {"move_logit": np.array([mle[m][0] for m in labels]),
             "move_effect": np.array([mle[m][1] for m in labels])}
    loglik = model.logp(vars=[model["y"]], jacobian=False)
    values = [model.rvs_to_values[model[name]] for name in point]
    f = model.compile_fn([loglik, *pytensor.grad(loglik, values)], inputs=values, on_unused_input="ignore")
    value, *grads = f(point)
    steps = moved_table[(moved_table["from"] != "done") & (moved_table["from"] != "dropped")]
    counts = steps[list(STAGES)].to_numpy()
    coefficients = (special.gammaln(counts.sum(axis=1) + 1) - special.gammaln(counts + 1).sum(axis=1)).sum()
    assert np.isclose(value, llf + coefficients, rtol=0, atol=1e-6 * abs(llf))
    # Zero gradient in every move log-odds and effect: the same maximum.
    assert max(np.abs(g).max() for g in grads) < 1e-4


def test_simulated_effects_are_recovered_from_transition_counts(moved_table):
    # Measured over simulation seeds 23-25 (fit seed 5, 2 chains of 300
    # draws): every effect within 2.0 posterior sd of its truth, and every
    # posterior mean within 0.1 sd of statsmodels' MNLogit estimate.
    design = _design(covariates="temp,feed")
    data = RECIPE.validate(moved_table, design.options)
    fit = engine.fit(design.build(data), seed=5, settings=SETTINGS, prior=False, predictive=False)
    log_odds = np.log(fit.draws()["odds_ratio"])  # (S, move, covariate)
    expected = np.log([list(TRUE_ODDS_RATIO[m].values()) for m in move_labels(data)])
    gap = np.abs(log_odds.mean(axis=0) - expected) / log_odds.std(axis=0)
    assert np.all(gap < RECOVER_SD), gap
    # Reference: statsmodels MNLogit per source stage (see _mnlogit), on the model's scale.
    mle, _ = _mnlogit(moved_table)
    effect = fit.draws()["move_effect"]
    reference = np.array([mle[m][1] for m in move_labels(data)])
    assert np.all(np.abs(effect.mean(axis=0) - reference) < AGREE_SD * effect.std(axis=0))
    # Labelled by move and covariate as typed; per degree, not per sd.
    table = estimates.parameters(fit.idata)
    assert {"odds_ratio[new>active, temp]", "odds_ratio[active>dropped, feed=paste]"} <= set(table)
    sd = moved_table["temp"].std(ddof=0)
    draws = fit.draws()
    assert np.allclose(np.log(draws["odds_ratio"][:, 0, 0]), draws["move_effect"][:, 0, 0] / sd)


def test_the_simulator_moves_each_cohort_by_the_chain_the_model_gives_it(moved_table):
    # The NumPy story (simulator, figure, absorption shares) and the PyMC
    # model shift the moves' log-odds the same way: each step's expected
    # destinations are its cohort's matrix row of the step's source stage.
    from recipes.stage_transitions import _matrices_of

    design = _design(covariates="temp,feed")
    data = RECIPE.validate(moved_table, design.options)
    model = design.build(data)
    rng = np.random.default_rng(4)
    point = {"move_logit": rng.normal(-1.0, 0.5, 4), "move_effect": rng.normal(0.0, 0.7, (4, 2))}
    values = [model.rvs_to_values[model[name]] for name in point]
    # The deterministics as functions of the parameters' values (not fresh random draws).
    outputs = model.replace_rvs_by_values([model["expected"], model["transition"]])
    expected, transition = model.compile_fn(outputs, inputs=values, on_unused_input="ignore")(point)
    per_cohort = _matrices_of(data, {"transition": transition, "move_effect": point["move_effect"]})
    step = data.extra["step"]
    story = per_cohort[data.extra["step_cohort"], data["from"][step]]
    np.testing.assert_allclose(expected, story, atol=1e-8)
    # Zero effects leave every cohort at the reference unit's chain.
    unmoved = _matrices_of(data, {"transition": transition, "move_effect": np.zeros((4, 2))})
    np.testing.assert_allclose(unmoved, np.broadcast_to(transition, unmoved.shape), atol=1e-12)


# --- stage counts: recovery through the one-multinomial likelihood --------------------------------


def test_simulated_effects_are_recovered_from_stage_counts():
    # 24 batches of 150 larvae counted weekly for 6 weeks, simulated by the
    # recipe from TRUE_TRANSITION and TRUE_ODDS_RATIO. The likelihood of
    # stage counts has the story's means and a wider spread (module
    # docstring), so the effects must still be recovered, with wider intervals.
    # Measured over simulation seeds 29-31 (fit seed 5, 2 chains of 300
    # draws): every effect within 2.3 posterior sd of its truth, every move
    # probability of the reference unit within 2.3 sd.
    rng = np.random.default_rng(29)
    rows = [{"cohort": b.cohort, "period": week, "temp": b.temp, "feed": b.feed, "new": 150, "active": 0,
             "done": 0, "dropped": 0}
            for _, b in _batches(rng, 24, 7).iterrows() for week in range(b.periods)]
    table = _simulated(rng, pd.DataFrame(rows))
    design = _design(covariates="temp,feed")
    data = RECIPE.validate(table, design.options)
    fit = engine.fit(design.build(data), seed=5, settings=SETTINGS, prior=False, predictive=False)
    log_odds = np.log(fit.draws()["odds_ratio"])
    expected = np.log([list(TRUE_ODDS_RATIO[m].values()) for m in move_labels(data)])
    gap = np.abs(log_odds.mean(axis=0) - expected) / log_odds.std(axis=0)
    assert np.all(gap < RECOVER_SD), gap
    transition = fit.draws()["transition"]
    assert np.all(np.abs(transition.mean(axis=0) - TRUE_TRANSITION)
                  <= RECOVER_SD * transition.std(axis=0) + 1e-9)


def test_prior_draws_simulate_tables_the_recipe_reads_again():
    # What calibration does with each replicate: a prior draw of every
    # variable goes to the simulator, whose table validates and scores.
    import pymc as pm

    rng = np.random.default_rng(8)
    skeleton = pd.DataFrame([{"cohort": f"b{c}", "period": w, "new": 40, "active": 0, "done": 0, "dropped": 0,
                              "temp": 15.0 + c, "feed": ("algae", "paste", "flake")[c % 3],
                              "group": ("east", "west", "north")[c % 3]}
                             for c in range(6) for w in range(3)])
    for pooling in ("complete", "partial"):
        design = _design(covariates="temp,feed", pooling=pooling)
        data = RECIPE.validate(skeleton, design.options)
        model = design.build(data)
        names = [v.name for v in model.free_RVs] + ["transition", "transition_group"]
        draws = pm.draw([model[name] for name in names], draws=5, random_seed=3)
        for s in range(5):
            sim = design.simulate(rng, data, {name: draws[j][s] for j, name in enumerate(names)})
            again = RECIPE.validate(_as_table(skeleton, sim), design.options)
            assert again.rows == data.rows
        with model:
            pm.set_data(RECIPE.observed(sim))
        assert np.isfinite(model.compile_logp()(model.initial_point()))


# --- one check from the command line, the default path ------------------------------------------


@pytest.mark.slow
def test_a_check_with_covariates_runs_and_reports_odds_ratios(moved_table, tmp_path):
    # Default workers: the relaxed models (each built with the covariates) go
    # to a helper process; tiny draws, since the numbers are not under test.
    path = tmp_path / "larvae.csv"
    moved_table[moved_table["cohort"] < "b08"].to_csv(path, index=False)
    sets = [a for k, v in OPTIONS.items() for a in ("--set", f"{k}={v}")]
    out = tmp_path / "run"
    code = main(["check", "stage-transitions", "--data", str(path), *sets, "--set", "covariates=temp,feed",
                 "--out", str(out), "--seed", "2", "--draws", "100", "--tune", "100", "--chains", "2",
                 "--history", str(tmp_path / "history.sqlite"), "--quiet"])
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["design"]["covariates"] == ["temp", "feed"]
    relaxed = {e["check"] for a in summary["assumptions"] for e in a["evidence"] if "relax" in e["check"]}
    assert relaxed, "no relaxed model's evidence reached the summary"
    assert {"odds_ratio[new>dropped, temp]", "move_effect[active>done, feed=paste]"} <= set(summary["parameters"])
    assert "odds_ratio[new&gt;dropped, temp]" in (out / "report.html").read_text()


def test_the_shipped_hatchery_table_is_what_its_script_writes(tmp_path):
    # The README's stage-transitions covariate example ships its table and says
    # the script writes it again byte for byte: the true values in the script
    # are the ones behind the shipped data.
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    out = tmp_path / "again.csv"
    subprocess.run([sys.executable, str(root / "scripts" / "hatchery_table.py"), str(out)], check=True, cwd=root)
    assert out.read_bytes() == (root / "examples" / "oyster_hatchery.csv").read_bytes()
