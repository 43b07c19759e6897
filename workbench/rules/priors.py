"""Rules for the ``priors`` assumption."""

from __future__ import annotations

from workbench.findings import Finding
from workbench.verdicts import Judgement, rule
from workbench.rules.computation import BARELY_CONTRACTS
from workbench.wording import p_equals

# An observed summary outside the central 99.8% of its prior predictive
# distribution means the priors give data like these almost no mass; outside
# the central 98% is worth a second look (common practice for prior
# predictive checks; Gabry et al. 2019, Visualization in Bayesian workflow).
COVERAGE_BROKEN_P = 0.002
COVERAGE_DOUBTFUL_P = 0.02
# A statistic the fitted model's posterior predictive also puts outside its
# central 98% is missed by the likelihood: the priors are not to blame for it
# (a genuine conflict still shows as a posterior beyond its prior draws).
LIKELIHOOD_MISS_P = COVERAGE_DOUBTFUL_P
# ... but only when the data, not the priors, set every parameter: a prior so
# tight that some posterior sd stays above 0.9 of its prior sd can itself
# hold the fitted model away from the data (Schad et al. 2021 call such a
# parameter barely informed; the same bound serves the computation rules).
# Power-scaling sensitivity above 0.05 counts as sensitive (the default
# threshold of Kallioinen et al. 2024); sensitivity to both prior and
# likelihood is their signature of prior-data conflict.
PSENSE_THRESHOLD = 0.05
# Sensitivity this far above the threshold on both sides is a strong conflict.
PSENSE_STRONG = 4 * PSENSE_THRESHOLD

ADVICE = ("Widen or move the prior of {name} after checking its units and scale against "
          "what the data say; try it with --prior {name}=DIST(ARGS).")
MODEL_FILE_ADVICE = ("Widen or move the prior of {name} after checking its units and scale "
                     "against what the data say; change it in build_model of the model file.")


@rule("prior_coverage")
def coverage(f: Finding) -> Judgement:
    p = f.p_value
    fitted, held = f.numbers.get("posterior_p"), f.numbers.get("prior_sd_ratio")
    data_led = held is not None and held < BARELY_CONTRACTS
    if p < COVERAGE_DOUBTFUL_P and fitted is not None and fitted < LIKELIHOOD_MISS_P and data_led:
        # Evans and Moshonov (2006): a prior-data conflict is only read once the
        # sampling model fits; here the fitted model cannot make the statistic
        # either, so the miss belongs to the likelihood (the other assumptions).
        return Judgement(0, f"The fitted model misses this statistic too ({p_equals(fitted)} under "
                            f"its posterior predictive): the likelihood cannot make data like "
                            f"these whatever the priors, so it is no evidence against them.")
    if p < COVERAGE_BROKEN_P:
        return Judgement(2, "The priors give data like these almost no probability.",
                         "Compare each prior with what is known about the process; a prior "
                         "that rules out the data's scale must be widened or moved.",
                         strength=3.0)
    if p < COVERAGE_DOUBTFUL_P:
        return Judgement(1, "The observed value sits in a tail of the prior predictive.", strength=1.0)
    return Judgement(0, "Within the range the priors expect.")


# A posterior median outside the central 99% of the prior draws sits where the
# prior puts almost no mass; beyond every one of at least this many draws it
# contradicts the prior outright (common practice for prior-data conflict).
TAIL_DOUBTFUL = 0.01
TAIL_MIN_DRAWS = 200


@rule("prior_tail")
def posterior_tail(f: Finding) -> Judgement:
    n = f.numbers
    name, below = n["parameter"], n["share_below"]
    tail = min(below, 1.0 - below)
    side = "above" if below > 0.5 else "below"
    advice = (MODEL_FILE_ADVICE if n.get("in_model_file") else ADVICE).format(name=name.split("[")[0])
    if tail == 0.0 and n["prior_draws"] >= TAIL_MIN_DRAWS:
        return Judgement(2, f"The data put {name} {side} every prior draw: a prior-data conflict "
                            f"on {name}.", advice, strength=4.0)
    if tail < TAIL_DOUBTFUL:
        end = "upper" if side == "above" else "lower"
        return Judgement(1, f"The data put {name} in the far {end} tail of its prior.", advice,
                         strength=1.0)
    return Judgement(0, "Inside the bulk of its prior.")


@rule("prior_sensitivity")
def sensitivity(f: Finding) -> Judgement:
    n = f.numbers
    name, prior, likelihood = n["parameter"], n["prior"], n["likelihood"]
    base = name.split("[")[0]
    if prior >= PSENSE_THRESHOLD and likelihood >= PSENSE_THRESHOLD:
        level = 2 if min(prior, likelihood) >= PSENSE_STRONG else 1
        return Judgement(level, f"Prior-data conflict on {name}: the posterior moves when either "
                                f"the prior or the likelihood is scaled.",
                         (MODEL_FILE_ADVICE if n.get("in_model_file") else ADVICE).format(name=base),
                         strength=prior + likelihood)
    if prior >= PSENSE_THRESHOLD:
        return Judgement(1, f"{name} is driven by its prior more than by the data.",
                         f"The data say little about {name}; report its prior as an assumption "
                         f"or collect data that inform it.", strength=prior)
    return Judgement(0, f"The data, not the prior, decide where {name} lies: the two agree.")


@rule("prior_sensitivity_failed")
def sensitivity_failed(f: Finding) -> Judgement:
    return Judgement(0, "Power-scaling could not be computed; nothing is concluded from it.")
