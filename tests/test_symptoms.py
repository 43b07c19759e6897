"""The verdict step names the cause and calls the alarms it explains symptoms.

Synthetic findings, no fits: each test builds the evidence a run would have
and checks the verdicts after the settle pass (workbench.rules.model_fit).
"""

from __future__ import annotations

from workbench import verdicts
from workbench.findings import PRIORS, Finding

DECLARED = [("no_missing_exit", "Every way a unit leaves is a modelled stage.", "Add the exit."),
            ("time_homogeneity", "Transition probabilities do not drift.", "Split into eras.")]


def relaxation(key, parameter, gain):
    return Finding(key, "relaxation", f"relaxation:{parameter}", 0.1, None, "expanded",
                   {"parameter": parameter, "null": 0.0, "negligible": 0.01, "share_beyond": 1.0,
                    "interval": [0.05, 0.2], "elpd_diff": gain, "elpd_se": 2.0})


def prior_tail(label, share_below):
    return Finding(PRIORS, "prior_tail", f"prior_tail:{label}", -8.0, None, "median",
                   {"parameter": label, "share_below": share_below, "prior_draws": 500})


def tail_under(cause, beyond):
    return Finding(PRIORS, "prior_tail_under_relaxation", "prior_tail|dormant", float(len(beyond)), None,
                   "relaxed", {"relaxation_of": cause, "beyond_prior": beyond})


def by_key(findings):
    return {v.key: v for v in verdicts.decide(DECLARED, findings)}


def test_a_prior_conflict_that_the_cause_relaxation_removes_is_a_symptom():
    judged = by_key([relaxation("no_missing_exit", "dormant", 40.0), prior_tail("move_logit[1]", 0.0),
                     tail_under("no_missing_exit", [])])
    assert judged["no_missing_exit"].verdict == "broken"
    assert judged[PRIORS].verdict == "doubtful"
    assert judged[PRIORS].advice.startswith("Revisit after addressing 'no_missing_exit'")


def test_a_prior_conflict_that_remains_under_the_relaxation_stays_broken():
    judged = by_key([relaxation("no_missing_exit", "dormant", 40.0), prior_tail("move_logit[1]", 0.0),
                     tail_under("no_missing_exit", ["move_logit[1]"])])
    assert judged[PRIORS].verdict == "broken"
    assert "move_logit" in judged[PRIORS].advice


def test_a_prior_conflict_without_a_broken_relaxation_stays_broken():
    weak = relaxation("no_missing_exit", "dormant", 0.5)
    weak.numbers["share_beyond"] = 0.1
    judged = by_key([weak, prior_tail("move_logit[1]", 0.0), tail_under("no_missing_exit", [])])
    assert judged[PRIORS].verdict == "broken"


def test_prior_predictive_coverage_failure_is_not_explained_away():
    coverage = Finding(PRIORS, "prior_coverage", "prior_coverage:y:mean", 40.0, 0.0001, "observed mean",
                       {"share_below": 1.0, "low": 0.0, "high": 10.0})
    judged = by_key([relaxation("no_missing_exit", "dormant", 40.0), coverage, prior_tail("move_logit[1]", 0.0),
                     tail_under("no_missing_exit", [])])
    assert judged[PRIORS].verdict == "broken"


def test_the_assumption_whose_relaxation_gains_most_is_the_cause_and_comes_first():
    ppc_under = Finding("time_homogeneity", "ppc_under_relaxation", "ppc:period_trend|dormant", 0.0, 0.4,
                        "under", {"relaxation_of": "no_missing_exit"})
    judged = verdicts.decide(DECLARED, [relaxation("no_missing_exit", "dormant", 40.0),
                                        relaxation("time_homogeneity", "stay_drift", 12.0), ppc_under])
    assert [v.key for v in judged][:1] == ["no_missing_exit"]
    assert {v.key: v.verdict for v in judged}["time_homogeneity"] == "doubtful"


def statistic_only(p_under_cause: float) -> dict:
    """Verdicts when time_homogeneity has only its statistic (p = 0.0005) and the cause is no_missing_exit."""
    statistic = Finding("time_homogeneity", "ppc", "ppc:period_trend", 3.0, 0.0005, "trend", {})
    under = Finding("time_homogeneity", "ppc_under_relaxation", "ppc:period_trend|dormant", 0.1,
                    p_under_cause, "under", {"relaxation_of": "no_missing_exit"})
    return by_key([relaxation("no_missing_exit", "dormant", 40.0), statistic, under])


def test_an_alarm_without_a_relaxation_is_a_symptom_when_the_cause_relaxation_removes_it():
    # E.g. eventual_fraction under eventual=estimate: no expansion applies, only its statistic.
    judged = statistic_only(p_under_cause=0.6)
    assert judged["no_missing_exit"].verdict == "broken"
    assert judged["time_homogeneity"].verdict == "doubtful"
    assert judged["time_homogeneity"].advice.startswith("Revisit after addressing 'no_missing_exit'")


def test_an_alarm_without_a_relaxation_that_remains_under_the_cause_stays_broken():
    assert statistic_only(p_under_cause=0.001)["time_homogeneity"].verdict == "broken"


def test_the_headline_counts_the_failures_and_names_the_cause_and_its_symptoms():
    ppc_under = Finding("time_homogeneity", "ppc_under_relaxation", "ppc:period_trend|dormant", 0.0, 0.4,
                        "under", {"relaxation_of": "no_missing_exit"})
    judged = verdicts.decide(DECLARED, [relaxation("no_missing_exit", "dormant", 40.0),
                                        relaxation("time_homogeneity", "stay_drift", 12.0), ppc_under])
    line = verdicts.headline(judged)
    assert line.startswith("Of 5 assumptions, 1 is broken and 1 doubtful.")
    assert "Likely cause: no_missing_exit" in line
    assert "time_homogeneity follows from it" in line
    assert "Next step: Add the exit." in line


def test_the_headline_of_a_run_with_nothing_wrong_names_what_was_not_checked():
    quiet = relaxation("no_missing_exit", "dormant", -0.5)
    quiet.numbers["share_beyond"] = 0.0
    line = verdicts.headline(verdicts.decide(DECLARED, [quiet]))
    assert line.startswith("Nothing is broken or doubtful: 1 of 5 assumptions hold.")
    assert "Not checked: priors, computation, implementation, time_homogeneity." in line


def stuck_chains():
    """Base-model sampling with two chain groups apart: computation broken."""
    return Finding("computation", "rhat", "computation:rhat", 1.55, None, "Largest split R-hat 1.55",
                   {"parameter": "spread", "chain_means": [0.031, 0.026, 0.026, 0.026],
                    "chain_sds": [0.001] * 4, "groups": [[1, 2, 3], [0]],
                    "group_means": [0.026, 0.031], "ess_bulk": 7.0, "draws": 1600, "chains": 4})


def sampling_under(cause, rhat, divergences=0):
    return Finding("computation", "computation_under_relaxation", "sampling|dormant", rhat, None,
                   "relaxed", {"relaxation_of": cause, "max_rhat": rhat, "divergences": divergences})


def test_stuck_chains_that_the_cause_relaxation_frees_are_a_symptom_despite_monte_carlo_noise():
    # The relaxed model's R-hat of 1.012 from 4 chains of 400 draws is noise, not trouble.
    judged = by_key([relaxation("no_missing_exit", "dormant", 40.0), stuck_chains(),
                     sampling_under("no_missing_exit", 1.012)])
    assert judged["computation"].verdict == "doubtful"
    assert judged["computation"].advice.startswith("Revisit after addressing 'no_missing_exit'")


def test_stuck_chains_that_stay_stuck_under_the_relaxation_stay_broken():
    judged = by_key([relaxation("no_missing_exit", "dormant", 40.0), stuck_chains(),
                     sampling_under("no_missing_exit", 1.3)])
    assert judged["computation"].verdict == "broken"


def test_a_relaxed_model_that_diverges_does_not_excuse_the_sampler():
    judged = by_key([relaxation("no_missing_exit", "dormant", 40.0), stuck_chains(),
                     sampling_under("no_missing_exit", 1.001, divergences=12)])
    assert judged["computation"].verdict == "broken"


def test_milder_advice_of_the_same_assumption_is_kept_after_the_worst(monkeypatch):
    # Chains that disagree (broken) beside a funnel (doubtful): both next steps reach the
    # report, the broken line's first, then the assumption's own advice, then the milder one.
    from workbench.verdicts import Judgement

    monkeypatch.setitem(verdicts._RULES, "stuck", lambda f: Judgement(2, "", "Run longer chains.", 5.0))
    monkeypatch.setitem(verdicts._RULES, "neck", lambda f: Judgement(1, "", "Use the non-centred form."))
    findings = [Finding("time_homogeneity", kind, kind, 1.0, None, kind, {}) for kind in ("neck", "stuck")]
    judged = by_key(findings)["time_homogeneity"]
    assert judged.verdict == "broken"
    assert judged.advice == "Run longer chains. Split into eras. Use the non-centred form."


# --- a prior predictive miss that the likelihood owns ---------------------------------------


def coverage(p, posterior_p, prior_sd_ratio):
    return Finding(PRIORS, "prior_coverage", "prior_coverage:y:sd", 40.0, p, "observed sd",
                   {"share_below": 1.0, "low": 0.0, "high": 10.0, "posterior_p": posterior_p,
                    "prior_sd_ratio": prior_sd_ratio})


def test_a_statistic_the_fitted_model_misses_too_is_not_blamed_on_the_priors():
    # Overdispersed counts: neither the prior nor the posterior predictive makes their sd.
    judged = by_key([coverage(0.0005, 0.001, prior_sd_ratio=0.1)])
    assert judged[PRIORS].verdict == "holds"
    assert "likelihood" in " ".join(j.sentence for _, j in judged[PRIORS].evidence)


def test_a_statistic_the_fitted_model_makes_is_a_prior_data_conflict():
    assert by_key([coverage(0.0005, 0.4, prior_sd_ratio=0.1)])[PRIORS].verdict == "broken"


def test_a_prior_that_holds_the_fit_away_from_the_data_is_still_blamed():
    # The posterior barely moved from its prior: the prior may be what the fit cannot leave.
    assert by_key([coverage(0.0005, 0.001, prior_sd_ratio=0.97)])[PRIORS].verdict == "broken"


# --- a cascade of alarms resolved to its causes ---------------------------------------------

COHORT_DECLARED = [("curve_shape", "The timing follows the chosen family.", "Try another family."),
                   ("eventual_fraction", "The eventual share is as modelled.", "Estimate it."),
                   ("cohort_homogeneity", "Every cohort follows the same timing.", "Add a cohort effect."),
                   ("independent_units", "Units of a cohort behave independently.", "Overdisperse.")]


def statistic(key, name, p):
    return Finding(key, "ppc", f"ppc:{name}", 1.0, p, name, {})


def under(key, name, cause, parameter, p):
    return Finding(key, "ppc_under_relaxation", f"ppc:{name}|{parameter}", 1.0, p, "under",
                   {"relaxation_of": cause})


def catch_all(key, gain):
    finding = relaxation(key, "overdispersion", gain)
    finding.numbers["absorbs_misfit"] = True
    return finding


def cohort_cascade(p_curve_under, p_plateau_under):
    """A cohort fault whose relaxation gains least, beside a curve and a plateau alarm."""
    return by_key_in(COHORT_DECLARED, [
        statistic("cohort_homogeneity", "cohort_spread", 0.0001), relaxation("cohort_homogeneity", "cohort_sd", 30.0),
        statistic("curve_shape", "late_trend", 0.0005), relaxation("curve_shape", "curve_power", 45.0),
        statistic("eventual_fraction", "plateau_level", 0.001),
        under("curve_shape", "late_trend", "cohort_homogeneity", "cohort_sd", p_curve_under),
        under("eventual_fraction", "plateau_level", "cohort_homogeneity", "cohort_sd", p_plateau_under),
        # The curve's relaxation leaves the cohorts apart and the plateau short.
        under("cohort_homogeneity", "cohort_spread", "curve_shape", "curve_power", 0.0001),
        under("eventual_fraction", "plateau_level", "curve_shape", "curve_power", 0.001),
    ])


def by_key_in(declared, findings):
    return {v.key: v for v in verdicts.decide(declared, findings)}


def test_alarms_that_one_relaxation_explains_are_its_symptoms_even_when_they_gain_more():
    # Under the cohort relaxation the late trend and the plateau look ordinary; under the
    # curve's relaxation the cohorts still differ: the cohorts are the cause.
    judged = cohort_cascade(p_curve_under=0.3, p_plateau_under=0.5)
    assert judged["cohort_homogeneity"].verdict == "broken"
    assert judged["curve_shape"].verdict == "doubtful"
    assert judged["curve_shape"].symptom_of == "cohort_homogeneity"
    assert judged["eventual_fraction"].symptom_of == "cohort_homogeneity"
    assert "symptom_of" in judged["curve_shape"].to_dict()


def test_two_causes_that_each_stand_under_the_others_relaxation_are_both_named():
    judged = cohort_cascade(p_curve_under=0.0005, p_plateau_under=0.5)
    assert judged["cohort_homogeneity"].verdict == judged["curve_shape"].verdict == "broken"
    assert judged["curve_shape"].confirmed_with == ["cohort_homogeneity"]
    assert judged["cohort_homogeneity"].confirmed_with == ["curve_shape"]
    line = verdicts.headline(list(judged.values()))
    assert "Two broken assumptions, each confirmed under the other's relaxation" in line
    assert "curve_shape (" in line and "cohort_homogeneity (" in line


def drift_beside_overdispersion(p_dispersion_under_drift):
    """A drift over periods (gain 1187) beside the catch-all overdispersion (gain 1579)."""
    return by_key_in(DRIFT_DECLARED, [
        statistic("time_homogeneity", "period_trend", 0.0001), relaxation("time_homogeneity", "stay_drift", 1187.0),
        statistic("independent_units", "dispersion", 0.0001), catch_all("independent_units", 1579.0),
        # Extra variation absorbs the drift: replicates of the overdispersed model are wide enough.
        under("time_homogeneity", "period_trend", "independent_units", "overdispersion", 0.3),
        under("independent_units", "dispersion", "time_homogeneity", "stay_drift", p_dispersion_under_drift),
    ])


DRIFT_DECLARED = DECLARED + [("independent_units", "Units move independently.", "Model a batch effect.")]


def test_a_structural_cause_outranks_the_overdispersion_that_absorbs_it():
    judged = drift_beside_overdispersion(p_dispersion_under_drift=0.4)
    assert judged["time_homogeneity"].verdict == "broken"
    assert judged["independent_units"].verdict == "doubtful"
    assert judged["independent_units"].advice.startswith("Revisit after addressing 'time_homogeneity'")


def test_overdispersion_that_remains_under_the_structural_relaxation_is_the_cause():
    judged = drift_beside_overdispersion(p_dispersion_under_drift=0.0001)
    assert judged["independent_units"].verdict == "broken"
    assert judged["time_homogeneity"].verdict == "doubtful"
    assert judged["time_homogeneity"].symptom_of == "independent_units"


def parameter_only(key, parameter, absorbs_misfit=False):
    # A relaxation whose PSIS-LOO could not decide and that was not refitted:
    # judged by its parameter against its prior (odds far past the broken 20).
    return Finding(key, "relaxation", f"relaxation:{parameter}", 0.3, None, "expanded",
                   {"parameter": parameter, "null": 0.0, "negligible": 0.01, "share_beyond": 1.0,
                    "prior_share_beyond": 0.85, "odds_ratio": 500.0, "elpd_method": "parameter",
                    "elpd_diff": None, "elpd_se": None, "absorbs_misfit": absorbs_misfit})


def test_a_catch_all_judged_by_its_parameter_alone_is_a_symptom_of_the_structural_cause():
    # Both relaxations judged by their parameter alone (as when refits were
    # not affordable): the structural one whose relaxed model makes the
    # dispersion ordinary is the cause; the catch-all is its symptom.
    declared = [("cohort_homogeneity", "Cohorts follow the same timing.", "Add a cohort effect."),
                ("independent_units", "Units behave independently.", "Model the shared influence.")]
    findings = [
        Finding("cohort_homogeneity", "ppc", "ppc:cohort_spread", 3.0, 0.0, "spread", {"sides": "greater"}),
        parameter_only("cohort_homogeneity", "cohort_sd"),
        Finding("cohort_homogeneity", "ppc_under_relaxation", "ppc:cohort_spread|overdispersion", 2.0, 0.02,
                "under", {"relaxation_of": "independent_units"}),
        Finding("independent_units", "ppc", "ppc:dispersion", 3.0, 0.0, "dispersion", {"sides": "greater"}),
        parameter_only("independent_units", "overdispersion", absorbs_misfit=True),
        Finding("independent_units", "ppc_under_relaxation", "ppc:dispersion|cohort_sd", 1.1, 0.22,
                "under", {"relaxation_of": "cohort_homogeneity"}),
    ]
    judged = {v.key: v for v in verdicts.decide(declared, findings)}
    assert judged["cohort_homogeneity"].verdict == "broken"
    assert judged["independent_units"].verdict == "doubtful"
    assert judged["independent_units"].symptom_of == "cohort_homogeneity"


def test_an_alarm_explained_by_a_symptom_relaxation_is_part_of_the_same_cascade():
    # Real-data shape (lifelines' waltons flies by genotype): the cohort
    # relaxation is the cause; the curve relaxation gains but is its symptom;
    # the plateau alarm, with no relaxation of its own, is ordinary only under
    # the curve relaxation. Nothing singles the plateau out: it follows too.
    declared = DECLARED + [("eventual_fraction", "The eventual share is as modelled.", "Estimate it.")]
    curve_ordinary = Finding("time_homogeneity", "ppc", "ppc:late_trend", 1.1, 0.07, "trend", {})
    curve_under_cause = Finding("time_homogeneity", "ppc_under_relaxation", "ppc:late_trend|cohort_sd", 1.0,
                                0.2, "under", {"relaxation_of": "no_missing_exit"})
    plateau = Finding("eventual_fraction", "ppc", "ppc:plateau_level", 4.0, 0.0015, "plateau", {})
    plateau_under_curve = Finding("eventual_fraction", "ppc_under_relaxation", "ppc:plateau_level|curve_power",
                                  1.0, 0.49, "under", {"relaxation_of": "time_homogeneity"})
    plateau_under_cause = Finding("eventual_fraction", "ppc_under_relaxation", "ppc:plateau_level|cohort_sd",
                                  4.2, 0.001, "under", {"relaxation_of": "no_missing_exit"})
    findings = [relaxation("no_missing_exit", "cohort_sd", 34.0), relaxation("time_homogeneity", "curve_power", 22.0),
                curve_ordinary, curve_under_cause, plateau, plateau_under_curve, plateau_under_cause]
    judged = {v.key: v for v in verdicts.decide(declared, findings)}
    assert judged["no_missing_exit"].verdict == "broken"
    assert judged["time_homogeneity"].symptom_of == "no_missing_exit"
    assert judged["eventual_fraction"].verdict == "doubtful"
    assert judged["eventual_fraction"].symptom_of == "no_missing_exit"
    assert "'time_homogeneity' is relaxed" in judged["eventual_fraction"].advice
    # Without the curve relaxation's explanation the plateau alarm stands.
    plateau_under_curve.p_value = 0.001
    judged = {v.key: v for v in verdicts.decide(declared, findings)}
    assert judged["eventual_fraction"].verdict == "broken"


def _cohort_layout_findings(p_cohort_under_catch_all: float, cohort_gain: float | None):
    """Two cohorts that differ in timing, aggregated: the catch-all gains most of all."""
    declared = [("cohort_homogeneity", "Cohorts follow the same timing.", "Add a cohort effect."),
                ("independent_units", "Units of a cohort are independent.", "Model a batch effect.")]
    cohort = relaxation("cohort_homogeneity", "cohort_sd", cohort_gain if cohort_gain is not None else 0.0)
    if cohort_gain is None:
        cohort.numbers.update(elpd_method="parameter", odds_ratio=40.0)
    catch_all = relaxation("independent_units", "overdispersion", 235.0)
    catch_all.numbers["absorbs_misfit"] = True
    findings = [cohort, catch_all,
                Finding("cohort_homogeneity", "ppc", "ppc:cohort_spread", 18.0, 0.0005, "spread", {}),
                Finding("cohort_homogeneity", "ppc_under_relaxation", "ppc:cohort_spread|overdispersion", 1.5,
                        p_cohort_under_catch_all, "under", {"relaxation_of": "independent_units"}),
                Finding("independent_units", "ppc", "ppc:dispersion", 17.0, 0.0005, "dispersion", {}),
                Finding("independent_units", "ppc_under_relaxation", "ppc:dispersion|cohort_sd", 15.0, 0.0005,
                        "under", {"relaxation_of": "cohort_homogeneity"})]
    return {v.key: v for v in verdicts.decide(declared, findings)}


def test_a_catch_all_that_leaves_a_clear_structural_alarm_in_the_tail_does_not_absorb_it():
    # Shape of lifelines' waltons flies aggregated by genotype: the cohort
    # relaxation gains clearly; under the catch-all the cohort statistic is
    # still at p = 0.025. Both stand, the structural one first.
    judged = _cohort_layout_findings(0.025, cohort_gain=110.0)
    assert judged["cohort_homogeneity"].verdict == "broken"
    assert not judged["cohort_homogeneity"].symptom_of
    assert judged["cohort_homogeneity"].confirmed_with == ["independent_units"]
    assert list(judged)[0] == "cohort_homogeneity"


def test_a_catch_all_that_makes_a_structural_alarm_typical_absorbs_it():
    # Planted overdispersion on the timing-curve demo layout: p = 0.36 under the catch-all.
    judged = _cohort_layout_findings(0.36, cohort_gain=110.0)
    assert judged["cohort_homogeneity"].symptom_of == "independent_units"
    # Without a clear held-out gain of its own, a merely ordinary statistic suffices.
    assert _cohort_layout_findings(0.025, cohort_gain=None)["cohort_homogeneity"].symptom_of == "independent_units"


def test_a_relaxation_the_data_do_not_need_explains_nothing():
    # The cause has two expansions; the one its data need leaves the other
    # assumption's statistic rare, the one they do not need (the base model
    # again) leaves it ordinary. The other assumption's relaxation gain stands.
    unneeded = relaxation("no_missing_exit", "cohort_share_sd", 0.0)
    unneeded.numbers["share_beyond"] = 0.5
    findings = [relaxation("no_missing_exit", "dormant", 40.0), unneeded,
                relaxation("time_homogeneity", "stay_drift", 12.0),
                Finding("time_homogeneity", "ppc", "ppc:period_trend", 0.5, 0.2, "trend", {}),
                Finding("time_homogeneity", "ppc_under_relaxation", "ppc:period_trend|dormant", 0.5, 0.001,
                        "under", {"relaxation_of": "no_missing_exit"}),
                Finding("time_homogeneity", "ppc_under_relaxation", "ppc:period_trend|cohort_share_sd", 0.5, 0.16,
                        "under", {"relaxation_of": "no_missing_exit"})]
    judged = by_key(findings)
    assert judged["time_homogeneity"].verdict == "broken"
    assert not judged["time_homogeneity"].symptom_of


def test_of_two_causes_that_explain_each_other_the_one_that_explains_every_alarm_wins():
    # Shape of a randomized threshold-geometry layout (12 distances, planted
    # extra failure 0.027): the spread slope gains by exact refits, the extra
    # failure is judged by its parameter alone, and each makes the other's
    # statistic ordinary; only the extra failure also explains the dispersion
    # alarm. One cause for every alarm beats one that needs a second beside it.
    declared = [("shared_spread", "One spread at every distance.", "Let the spread grow."),
                ("angle_only", "Only the aiming error fails an attempt.", "Add an extra failure."),
                ("independent_attempts", "Attempts are independent.", "Add a row effect.")]
    extra = relaxation("angle_only", "extra_failure", 0.0)
    extra.numbers.update(elpd_method="parameter", odds_ratio=60.0, share_beyond=0.998)
    catch_all = relaxation("independent_attempts", "overdispersion", 0.0)
    catch_all.numbers.update(elpd_method="parameter", odds_ratio=4.0, share_beyond=0.85, absorbs_misfit=True)

    def stat(key, name, p):
        return Finding(key, "ppc", f"ppc:{name}", 1.0, p, name, {})

    def under(key, name, model, of, p):
        return Finding(key, "ppc_under_relaxation", f"ppc:{name}|{model}", 1.0, p, "under", {"relaxation_of": of})

    findings = [relaxation("shared_spread", "spread_slope", 21.0), extra, catch_all,
                stat("shared_spread", "residual_trend", 0.0),
                under("shared_spread", "residual_trend", "extra_failure", "angle_only", 0.75),
                under("shared_spread", "residual_trend", "overdispersion", "independent_attempts", 0.0),
                stat("angle_only", "nearest_shortfall", 0.0),
                under("angle_only", "nearest_shortfall", "spread_slope", "shared_spread", 0.46),
                under("angle_only", "nearest_shortfall", "overdispersion", "independent_attempts", 0.0075),
                stat("independent_attempts", "dispersion", 0.0),
                under("independent_attempts", "dispersion", "spread_slope", "shared_spread", 0.0005),
                under("independent_attempts", "dispersion", "extra_failure", "angle_only", 0.72)]
    judged = {v.key: v for v in verdicts.decide(declared, findings)}
    assert judged["angle_only"].verdict == "broken" and not judged["angle_only"].symptom_of
    assert judged["shared_spread"].symptom_of == "angle_only"
    assert judged["independent_attempts"].symptom_of == "angle_only"
