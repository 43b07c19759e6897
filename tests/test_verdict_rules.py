"""How a relaxation fit becomes a verdict (workbench.rules.model_fit).

Synthetic findings, no fits: each test gives the numbers a relaxation fit
would report and checks the judgement.
"""

from __future__ import annotations

import pytest
from scipy import stats

from workbench import verdicts
from workbench.findings import Finding
from workbench.rules import model_fit


def judged(share_beyond, gain, se):
    finding = Finding("curve_shape", "relaxation", "relaxation:curve_power", 0.8, None, "expanded",
                      {"parameter": "curve_power", "null": 0.0, "negligible": 0.1,
                       "share_beyond": share_beyond, "interval": [0.4, 1.2], "elpd_diff": gain,
                       "elpd_se": se})
    return verdicts.judge(finding)


def test_a_gain_above_twice_its_se_breaks_the_assumption():
    assert judged(1.0, 6.0, 2.5).level == 2


def test_a_nested_gain_above_four_breaks_the_assumption_whatever_its_se():
    assert judged(1.0, model_fit.NESTED_GAIN_BROKEN + 0.5, 4.0).level == 2


def test_a_gain_below_four_and_below_twice_its_se_is_only_doubtful():
    assert judged(1.0, 3.5, 2.5).level == 1


def test_a_large_gain_with_mass_near_the_null_does_not_break():
    assert judged(0.9, 8.0, 2.0).level == 1


def test_no_gain_holds():
    assert judged(0.5, -0.8, 0.4).level == 0


def test_the_null_chance_of_a_nested_gain_above_the_threshold_is_small():
    # A one-parameter nested expansion gains about (chi2_1 - 2) / 2 on data that
    # satisfy the assumption (Stone 1977: LOO ~ AIC); reference tail from scipy.stats.chi2.
    chance = stats.chi2(1).sf(2 * model_fit.NESTED_GAIN_BROKEN + 2)
    assert chance == pytest.approx(0.0016, abs=0.0002)


def funnel(z, quantile):
    return Finding("computation", "funnel", "computation:funnel", quantile, None, "centred",
                   {"scale": "tau", "child": "theta", "children": ["theta"], "location": "mu",
                    "parameter": "tau", "quantile": quantile, "z": z, "direction": "small"})


def test_divergences_far_out_at_small_values_of_a_centred_scale_break_computation():
    judgement = verdicts.judge(funnel(-3.5, 0.05))
    assert judgement.level == 2 and "non-centred form" in judgement.advice


def test_a_few_divergences_at_the_neck_of_a_centred_scale_make_computation_doubtful():
    # One hypothesis fixed by the model graph: a one-sided 1% test (z <= -2.33).
    judgement = verdicts.judge(funnel(-2.5, 0.08))
    assert judgement.level == 1 and "non-centred form" in judgement.advice


def test_divergences_that_do_not_crowd_the_neck_say_nothing_about_a_funnel():
    assert verdicts.judge(funnel(-2.0, 0.15)).level == 0
    assert verdicts.judge(funnel(-2.6, 0.3)).level == 0


def revised(after_verdict: str, shift: float, agree: bool) -> dict:
    return {"change": "theta = mu + tau * theta_z with theta_z ~ Normal(0, 1)",
            "before": {"divergences": 40, "min_ess_bulk": 250.0, "min_ess_tail": 150.0, "max_rhat": 1.04,
                       "verdict": "broken"},
            "after": {"divergences": 0, "min_ess_bulk": 3900.0, "min_ess_tail": 3800.0, "max_rhat": 1.002,
                      "verdict": after_verdict},
            "agreement": {"threshold": 0.25, "z": 3.0, "agree": agree,
                          "largest": {"parameter": "tau", "shift": shift, "noise": 0.02}},
            "fixed": after_verdict != "broken",
            "remaining": {"sentence": "" if after_verdict == "holds" else "Divergences remain.",
                          "advice": ""}}


def with_revision(record):
    f = funnel(-3.5, 0.05)
    f.numbers["revision"] = record
    return verdicts.judge(f)


def test_a_revision_that_ran_clean_and_agrees_is_advised_for_adoption():
    judgement = with_revision(revised("holds", 0.1, True))
    assert judgement.level == 2  # the model as written still has its funnel
    assert judgement.advice.startswith("Refitted with theta = mu + tau * theta_z")
    assert "divergences from 40 to 0" in judgement.advice and "adopt it" in judgement.advice


def test_a_revision_whose_estimates_moved_says_the_centred_fit_was_biased():
    assert "biased" in with_revision(revised("holds", 0.6, False)).advice


def test_a_revision_still_broken_says_it_does_not_fix_it():
    advice = with_revision(revised("broken", 0.1, True)).advice
    assert "does not fix it" in advice and "Divergences remain." in advice


def failures(reasons: dict):
    failed = sum(reasons.values())
    return Finding("implementation", "calibration_failures", "calibration:failures", failed / 200, None,
                   "failed", {"failed": failed, "finished": 200, "sims": 200, "reasons": reasons,
                              "low_ess": 0, "simulator": "recipe"})


def test_calibration_fits_that_mostly_diverged_are_told_to_take_smaller_steps():
    judgement = verdicts.judge(failures({"diverged": 24, "fit failed": 4}))
    assert judgement.level == 1 and "--target-accept 0.95" in judgement.advice


def test_calibration_fits_that_failed_otherwise_are_not_told_to_take_smaller_steps():
    judgement = verdicts.judge(failures({"fit failed": 24}))
    assert judgement.level == 1 and "--target-accept" not in judgement.advice


def judged_alone(share_beyond, prior_share, draws=1600):
    from workbench.checks.relaxation import odds_ratio

    finding = Finding("cohort_homogeneity", "relaxation", "relaxation:cohort_sd", 0.2, None, "expanded",
                      {"parameter": "cohort_sd", "null": 0.0, "negligible": 0.05,
                       "share_beyond": share_beyond, "interval": [0.01, 0.6], "elpd_diff": None,
                       "elpd_se": None, "elpd_method": "parameter", "prior_share_beyond": prior_share,
                       "odds_ratio": odds_ratio(share_beyond, prior_share, draws)})
    return verdicts.judge(finding)


def test_a_parameter_judged_alone_that_stays_where_its_prior_put_it_holds():
    # halfnormal(0.3) puts 87% of its mass beyond 0.05: a posterior share of 90%
    # from a table that says little is the prior speaking, not the data.
    assert judged_alone(0.90, 0.87).level == 0


def test_a_parameter_judged_alone_pushed_far_from_its_prior_breaks():
    assert judged_alone(0.999, 0.87).level == 2


def test_a_parameter_judged_alone_and_moved_moderately_is_doubtful():
    assert judged_alone(0.97, 0.80).level == 1


def test_with_few_units_the_se_of_the_refit_gain_does_not_decide():
    # Three cohorts: a gain of 3 with a tiny SE is a sum of three terms, not a
    # clear gain (Sivula et al. 2022); below the nested threshold it only leans.
    finding = Finding("curve_shape", "relaxation", "relaxation:curve_power", 0.8, None, "expanded",
                      {"parameter": "curve_power", "null": 0.0, "negligible": 0.1,
                       "share_beyond": 1.0, "interval": [0.4, 1.2], "elpd_diff": 3.0,
                       "elpd_se": 0.2, "elpd_method": "k-fold", "units": 3})
    assert verdicts.judge(finding).level == 1
    finding.numbers["elpd_diff"] = model_fit.NESTED_GAIN_BROKEN + 0.5
    assert verdicts.judge(finding).level == 2
