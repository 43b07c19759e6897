"""Rules for a recipe assumption's own evidence: its targeted predictive
statistic (``ppc``) and its relaxation fit (``relaxation``).

References
----------
Stone, M. (1977). An asymptotic equivalence of choice of model by
cross-validation and Akaike's criterion. JRSS B 39(1), 44-47 (from memory).
Sivula, T., Magnusson, M., Matamoros, A. A. and Vehtari, A. (2022).
Uncertainty in Bayesian leave-one-out cross-validation based model comparison.
arXiv:2008.10296.
Kass, R. E. and Raftery, A. E. (1995). Bayes factors. JASA 90(430), 773-795
(section 3.2: a Bayes factor above 3 is positive evidence, above 20 strong).
"""

from __future__ import annotations

import math

from workbench.findings import COMPUTATION, PRIORS, Finding
from workbench.kfold import MIN_LOO_UNITS
from workbench.rules.computation import RHAT_BROKEN
from workbench.verdicts import BROKEN, DOUBTFUL, Judgement, Verdict, rule, settle
from workbench.wording import p_equals

# Posterior predictive p-values are conservative (concentrated near 0.5 when
# the model holds; Gelman et al. 2013, BDA3 sec. 6.3), so these cut-offs are
# stricter than a frequentist test's: several assumptions are checked per run
# and the rate of false "broken" verdicts over all of them must stay low.
PPC_BROKEN_P = 0.002
PPC_DOUBTFUL_P = 0.02

# A relaxation argues that an assumption fails when most posterior mass of the
# expansion parameter sits beyond its negligible distance from the null ...
SHARE_BEYOND_BROKEN = 0.95
SHARE_BEYOND_DOUBTFUL = 0.8
# ... and the expanded model predicts held-out rows better by more than twice
# the standard error of the difference (Vehtari et al. 2017 read differences
# below about 2 SE as noise); a floor of 2 elpd units keeps tiny SEs honest.
ELPD_SE_MULTIPLE = 2.0
ELPD_FLOOR = 2.0
# A gain this large is clear whatever its SE. The expansion is nested and adds
# one parameter, and leave-one-out is asymptotically equivalent to AIC (Stone
# 1977), so on data that satisfy the assumption the gain behaves like
# (chi-square_1 - 2) / 2: above 4 with a chance of about 0.2% (chi-square_1
# > 10), half that for a parameter bounded at its null. The SE is least
# reliable exactly when the two models predict alike (Sivula et al. 2022),
# and 4 is also where they stop calling a difference small.
NESTED_GAIN_BROKEN = 4.0
# With fewer than MIN_LOO_UNITS units (the elpd difference then comes from
# exact refits) the SE of a sum of a handful of terms means nothing (Sivula
# et al. 2022): the gain alone must pass NESTED_GAIN_BROKEN to be clear, and
# ELPD_FLOOR to count as a lean.

# Where no elpd difference can be trusted, the parameter is judged alone: the
# posterior odds of lying beyond the negligible distance over the prior odds
# (a Bayes factor for "beyond" against "within") must show that the data, not
# the prior, put the mass there. A prior like beta(1,30) already holds 86% of
# its mass beyond 0.005, so a share alone would flag every small table.
ODDS_RATIO_BROKEN = 20.0  # strong evidence (Kass and Raftery 1995)
ODDS_RATIO_DOUBTFUL = 3.0  # positive evidence (Kass and Raftery 1995)


@rule("ppc")
def targeted_statistic(f: Finding) -> Judgement:
    p = f.p_value
    if p is None or math.isnan(p):
        return Judgement(0, "The statistic could not be computed on these draws.")
    strength = -math.log10(max(p, 1e-6))
    if p < PPC_BROKEN_P:
        return Judgement(2, f"Replicated data almost never look like this ({p_equals(p)}).",
                         strength=strength)
    if p < PPC_DOUBTFUL_P:
        return Judgement(1, f"Replicated data rarely look like this ({p_equals(p)}).",
                         strength=strength)
    return Judgement(0, f"Typical of data replicated from the fit ({p_equals(p)}).")


@rule("relaxation")
def expansion(f: Finding) -> Judgement:
    n = f.numbers
    if n.get("elpd_method") == "parameter":
        return _parameter_alone(n)
    share, diff, se = n["share_beyond"], n["elpd_diff"], n["elpd_se"]
    if n.get("units", MIN_LOO_UNITS) < MIN_LOO_UNITS:
        better, leans = diff > NESTED_GAIN_BROKEN, diff > ELPD_FLOOR
    else:
        better = diff > max(ELPD_SE_MULTIPLE * se, ELPD_FLOOR) or diff > NESTED_GAIN_BROKEN
        leans = better or diff > se
    strength = max(diff, 0.0) / max(se, 1.0)
    name = n["parameter"]
    if share >= SHARE_BEYOND_BROKEN and better:
        return Judgement(
            2, f"The data pull {name} away from its null and the expanded model predicts "
               f"held-out rows clearly better.", strength=strength + 3.0)
    if share >= SHARE_BEYOND_DOUBTFUL and leans:
        return Judgement(1, f"The data lean towards a non-null {name}; the gain in prediction "
                            f"is modest.", strength=strength)
    return Judgement(0, f"The expanded model does not need {name} away from its null.")


def _parameter_alone(n: dict) -> Judgement:
    share, ratio, name = n["share_beyond"], n["odds_ratio"], n["parameter"]
    strength = math.log10(max(ratio, 1.0))
    if share >= SHARE_BEYOND_BROKEN and ratio >= ODDS_RATIO_BROKEN:
        return Judgement(2, f"The data, not its prior, pull {name} away from its null.",
                         strength=strength + 3.0)
    if share >= SHARE_BEYOND_DOUBTFUL and ratio >= ODDS_RATIO_DOUBTFUL:
        return Judgement(1, f"The data lean towards a non-null {name}, more than its prior does.",
                         strength=strength)
    return Judgement(0, f"The data do not pull {name} from its null beyond what its prior "
                        f"allows.")


# Broken sampling of the base model is a symptom of the cause when the
# cause's relaxed model samples with no divergence and an R-hat short of
# broken (1.1): the base model's trouble (chains in separate modes, say) is
# gone, and what is left would at most be doubtful on its own. Asking for
# 1.01 instead would hang the verdict on Monte Carlo noise: with 4 chains of
# 400 draws a clean relaxed fit gave 1.012 on a planted-fault table whose
# base model had R-hat 1.55.
RELAXED_RHAT_OK = RHAT_BROKEN


@rule("ppc_under_relaxation")
def statistic_under_relaxation(f: Finding) -> Judgement:
    # Read by the side-effect pass below; on its own it argues for nothing.
    return Judgement(0, "")


@rule("computation_under_relaxation")
def sampling_under_relaxation(f: Finding) -> Judgement:
    # Read by the side-effect pass below; on its own it argues for nothing.
    return Judgement(0, "")


@rule("prior_tail_under_relaxation")
def prior_tail_under_relaxation(f: Finding) -> Judgement:
    # Read by the side-effect pass below; on its own it argues for nothing.
    return Judgement(0, "")


def _relaxation_gain(verdict: Verdict) -> float | None:
    # A relaxation judged by its parameter alone has no gain it can be ranked by.
    gains = [f.numbers["elpd_diff"] for f, _ in verdict.evidence
             if f.kind == "relaxation" and f.numbers.get("elpd_diff") is not None]
    return max(gains) if gains else None


def _absorbs_misfit(verdict: Verdict) -> bool:
    return any(f.numbers.get("absorbs_misfit") for f, _ in verdict.evidence if f.kind == "relaxation")


def _cause_rank(verdict: Verdict, reach: dict[str, int] | None = None) -> tuple[bool, int, bool, float]:
    """Order of candidate causes: structural relaxations before the catch-all, then by reach, then by gain.

    A relaxation that adds extra variation (beta-binomial, Dirichlet-multinomial)
    absorbs any structural misfit once counts are large, so it gains from a
    drift or a wrong curve shape about as much as from real overdispersion,
    and often more than the structural relaxation that describes the fault.
    Its gain is therefore no evidence against a structural cause: a structural
    relaxation outranks it whatever the gains, and the catch-all is the cause
    only when its alarm remains under the best structural relaxation. A
    relaxation judged by its parameter alone (no trustworthy gain) ranks
    after those with a gain of its own kind.

    ``reach`` counts, per candidate, the other alarms raised by a statistic
    that its relaxed model makes ordinary. Of two causes that explain each
    other, the one that also accounts for more of the remaining alarms is
    the simpler account of the data and ranks first, whatever their gains
    (a relaxation that needs a second cause beside it explains less).
    """
    gain = _relaxation_gain(verdict)
    return (not _absorbs_misfit(verdict), (reach or {}).get(verdict.key, 0), gain is not None, gain or 0.0)


def _reach(verdicts: list[Verdict], candidates: list[Verdict]) -> dict[str, int]:
    """Per candidate cause, how many other statistic-raised alarms its relaxed model explains."""
    alarms = [v for v in verdicts if v.verdict == BROKEN and v.key not in (COMPUTATION, PRIORS)
              and _statistic_alarmed(v)]
    return {c.key: sum(v is not c and _explains(c, v) for v in alarms) for c in candidates}


def _relaxed(verdict: Verdict) -> bool:
    """Whether the verdict rests on a relaxed fit (judged by its gain or by its parameter alone)."""
    return any(f.kind == "relaxation" for f, _ in verdict.evidence)


# A catch-all widens every predictive distribution, so a statistic's p-value
# rises under it whether or not the structure is right. Against a structural
# assumption whose own relaxation predicts held-out data clearly better, its
# explanation counts only when the statistic lands in the bulk of its
# replicates (the central 80%), not merely outside the rare tail below
# PPC_DOUBTFUL_P. Planted overdispersion on the timing-curve demo layout
# leaves the cohort statistic at p = 0.36 under the catch-all; two fly
# genotypes that differ in timing (lifelines' waltons, by cohort) leave it
# at p = 0.025.
CATCH_ALL_TYPICAL_P = 0.1


def _needed(cause: Verdict) -> set[str]:
    """The parameters of ``cause``'s relaxations that the data pull from their null."""
    return {f.numbers.get("parameter") for f, j in cause.evidence if f.kind == "relaxation" and j.level > 0}


def _p_under(verdict: Verdict, cause: Verdict) -> float | None:
    """How ordinary ``verdict``'s statistics look under ``cause``'s relaxed models (None: not scored).

    Per relaxed model of the cause the smallest p-value of the verdict's
    statistics; over the cause's relaxed models (an assumption may have
    several expansions) the largest: one expansion that explains the alarm
    is enough. Only expansions the data need count: one whose parameter
    stays at its null is the base model again, and its replicates explain
    nothing.
    """
    needed = _needed(cause)
    per_model: dict[str, float] = {}
    for f, _ in verdict.evidence:
        if f.kind == "ppc_under_relaxation" and f.numbers.get("relaxation_of") == cause.key \
                and f.p_value is not None:
            model = f.check.rpartition("|")[2]
            if model in needed:
                per_model[model] = min(per_model.get(model, 1.0), f.p_value)
    return max(per_model.values()) if per_model else None


def _clear_gain(verdict: Verdict) -> bool:
    """Whether one of ``verdict``'s relaxations predicts held-out data clearly better."""
    return any(f.kind == "relaxation" and j.level == 2 and f.numbers.get("elpd_method") != "parameter"
               for f, j in verdict.evidence)


def _explains(cause: Verdict, verdict: Verdict) -> bool:
    """Whether ``verdict``'s statistic looks ordinary on replicates of ``cause``'s relaxed model."""
    p = _p_under(verdict, cause)
    if p is None:
        return False
    widened = _absorbs_misfit(cause) and not _absorbs_misfit(verdict) and _clear_gain(verdict)
    return p >= (CATCH_ALL_TYPICAL_P if widened else PPC_DOUBTFUL_P)


def _statistic_alarmed(verdict: Verdict) -> bool:
    return any(j.level > 0 for f, j in verdict.evidence if f.kind == "ppc")


def _is_symptom(verdict: Verdict, cause: Verdict, reach: dict[str, int] | None = None) -> bool:
    """Whether ``cause``'s relaxation accounts for ``verdict``'s alarm.

    The cause's relaxed model must make the verdict's statistic ordinary. An
    alarm raised by the statistic is then a symptom unless the explanation
    runs both ways and the verdict outranks the cause (mutual explanation:
    the better-ranked relaxation is the cause). An alarm raised by a
    relaxation alone (its statistic was ordinary to begin with, so the
    re-scored statistic says nothing) is a symptom only of a cause that
    outranks it. ``reach`` (see :func:`_cause_rank`) settles mutual
    explanations of two alarmed statistics; a relaxation-alone alarm
    explains no statistic of its own, so there the gains decide.
    """
    if not _explains(cause, verdict):
        return False
    if not _relaxed(verdict):
        return True
    if _statistic_alarmed(verdict):
        outranks = _cause_rank(verdict, reach) > _cause_rank(cause, reach)
        return not (outranks and _explains(verdict, cause))
    return not _cause_rank(verdict) > _cause_rank(cause)


@settle
def symptoms_of_another_failure(verdicts: list[Verdict]) -> None:
    """Resolve a cascade of alarms to its causes; demote the rest to symptoms.

    Candidate causes are the broken assumptions with a relaxed fit (judged by
    its gain or by its parameter alone), ranked by :func:`_cause_rank`
    (structural before the catch-all, then by how many other alarms each
    explains, then by LOO gain). A broken assumption
    is a symptom of a candidate when that candidate's relaxed model makes its
    targeted statistic look ordinary
    (:func:`_is_symptom`); a candidate that is itself a symptom of another
    is no cause. The causes left stand together: two broken assumptions,
    each confirmed under the other's relaxation, are both named
    (``Verdict.confirmed_with``). Broken ``computation`` is a symptom when a
    cause's relaxed model samples cleanly. A symptom becomes doubtful with
    advice to revisit it after fixing the cause. So does a broken ``priors``
    whose only conflict is a posterior beyond its prior draws that the
    cause's relaxed model removes.
    """
    candidates = [v for v in verdicts if v.verdict == BROKEN and _relaxed(v)]
    if not candidates:
        return
    reach = _reach(verdicts, candidates)
    relaxed = sorted(candidates, key=lambda v: _cause_rank(v, reach), reverse=True)
    # A candidate explained by a better-placed standing candidate is no cause.
    causes: list[Verdict] = []
    for v in relaxed:
        if not any(_is_symptom(v, c, reach) for c in causes):
            causes.append(v)
    # Late candidates may explain earlier ones (a structural cause of lower gain
    # accounts for a catch-all's alarm but not the other way round): drop those.
    causes = [c for c in causes
              if not any(_is_symptom(c, other, reach) for other in causes if other is not c)] or causes[:1]
    for v in verdicts:
        if v.verdict != BROKEN or v in causes or v.key in (COMPUTATION, PRIORS):
            continue
        cause = next((c for c in causes if _is_symptom(v, c, reach)), None)
        if cause is not None:
            _demote(v, cause, f"once that assumption is relaxed this one's statistic looks "
                              f"ordinary ({p_equals(_p_under(v, cause))})")
    # An alarm with no relaxation of its own that a demoted candidate's relaxed
    # model explains belongs to the same cascade: with another expansion that
    # makes its statistic ordinary, nothing singles this assumption out.
    demoted = [c for c in relaxed if c.symptom_of]
    for v in verdicts:
        if v.verdict != BROKEN or _relaxed(v) or v.key in (COMPUTATION, PRIORS):
            continue
        link = next((c for c in demoted if _explains(c, v)), None)
        root = next((c for c in causes if link is not None and c.key == link.symptom_of), None)
        if root is not None:
            _demote(v, root, f"its statistic looks ordinary once '{link.key}' is relaxed "
                             f"({p_equals(_p_under(v, link))}), and '{link.key}' is itself to be "
                             f"revisited after '{root.key}'")
    for v in causes:
        v.confirmed_with = [c.key for c in causes if c is not v]
    # Causes standing together are listed (and the first one's advice given)
    # in cause order: a catch-all's larger gain does not put it before a
    # structural cause.
    structural = [c.strength for c in causes if not _absorbs_misfit(c)]
    for v in causes:
        if structural and _absorbs_misfit(v):
            v.strength = min(v.strength, min(structural) - 1e-6)
    for v in verdicts:
        if v.key != COMPUTATION or v.verdict != BROKEN:
            continue
        for cause in causes:
            relaxed_fit = [f.numbers for f, _ in v.evidence if f.kind == "computation_under_relaxation"
                           and f.numbers.get("relaxation_of") == cause.key]
            if relaxed_fit and relaxed_fit[0]["max_rhat"] < RELAXED_RHAT_OK and relaxed_fit[0]["divergences"] == 0:
                _demote(v, cause, "the sampler explores the relaxed model cleanly, so its trouble here "
                                  "comes from the misfit, not from the parameterisation")
                break
    for v in verdicts:
        if v.key != PRIORS or v.verdict != BROKEN:
            continue
        # Only a conflict of posterior against prior draws is re-scored under relaxation.
        if any(j.level == 2 and f.kind != "prior_tail" for f, j in v.evidence):
            continue
        for cause in causes:
            relaxed_tail = [f.numbers for f, _ in v.evidence if f.kind == "prior_tail_under_relaxation"
                            and f.numbers.get("relaxation_of") == cause.key]
            if relaxed_tail and not relaxed_tail[0]["beyond_prior"]:
                _demote(v, cause, "under its relaxed model every parameter lies among its prior draws "
                                  "again, so the conflict comes from the misfit, not from the priors")
                break


def _demote(verdict: Verdict, cause: Verdict, why: str) -> None:
    verdict.verdict = DOUBTFUL
    verdict.symptom_of = cause.key
    verdict.advice = f"Revisit after addressing '{cause.key}': {why}."
    verdict.strength = 0.0


# A LOO-PIT reading other than "fine" needs the ECDF to leave its simultaneous
# band, or the mean or variance of the values to lie this many standard errors
# from a uniform's (1/2 and 1/12); 3 SE keeps a calibrated model's false
# reading near 0.3% per moment.
LOO_PIT_Z = 3.0
UNIFORM_MEAN, UNIFORM_VARIANCE = 0.5, 1.0 / 12.0
# Sampling variance of a uniform sample's variance is (mu4 - sigma^4) / n,
# with mu4 = 1/80 for the uniform.
UNIFORM_VARIANCE_SPREAD = 1.0 / 80.0 - 1.0 / 144.0


def loo_pit_reading(numbers: dict, name: str = "") -> tuple[str, str]:
    """The shape of a variable's LOO-PIT values in words: (reading, sentence).

    ``reading`` is one of ``fine``, ``too narrow`` (values pile up near 0 and
    1: the predictions are more certain than the data), ``too wide`` (values
    crowd the middle: less certain) or ``shifted`` (values lean to one side:
    the predictions sit above or below the data). ``numbers`` are those of
    :func:`workbench.checks.loo.loo_pit_numbers` for one variable.

    References
    ----------
    Gabry, J., Simpson, D., Vehtari, A., Betancourt, M. and Gelman, A.
    (2019). Visualization in Bayesian workflow. JRSS A 182(2), sec. 5.
    """
    n = len(numbers["pit"])
    mean, variance = numbers["mean"], numbers["variance"]
    z_mean = (mean - UNIFORM_MEAN) / math.sqrt(UNIFORM_VARIANCE / n)
    z_var = (variance - UNIFORM_VARIANCE) / math.sqrt(UNIFORM_VARIANCE_SPREAD / n)
    band = f"{numbers['level']:.0%} simultaneous band"
    moments = f"mean {mean:.2f} against 0.5, variance {variance:.3f} against {UNIFORM_VARIANCE:.3f}"
    subject = f"{name}: " if name else ""
    if not numbers["outside"] and max(abs(z_mean), abs(z_var)) <= LOO_PIT_Z:
        return "fine", (f"{subject}fine: the LOO-PIT ECDF stays inside its {band} ({moments}).")
    where = "leaves its " + band if numbers["outside"] else "stays inside its " + band
    if abs(z_var) >= abs(z_mean):
        if z_var > 0:
            return "too narrow", (f"{subject}too narrow: LOO-PIT values pile up near 0 and 1 and the "
                                  f"ECDF {where} ({moments}); the predictions are more certain than "
                                  f"the data.")
        return "too wide", (f"{subject}too wide: LOO-PIT values crowd the middle and the ECDF {where} "
                            f"({moments}); the predictions are less certain than the data.")
    side = "below" if z_mean > 0 else "above"
    return "shifted", (f"{subject}shifted: LOO-PIT values lean towards {'1' if z_mean > 0 else '0'} and "
                       f"the ECDF {where} ({moments}); the predictions sit {side} the data.")
