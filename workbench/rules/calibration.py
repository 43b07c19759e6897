"""Rules for simulation-based calibration findings (assumption ``implementation``)."""

from __future__ import annotations

import math

from workbench.findings import Finding
from workbench.verdicts import Judgement, rule
from workbench.wording import p_equals

# The uniformity test's level is exact (its null is simulated), so with a
# Bonferroni split over the m quantities ranked in one run a correct model
# is called broken in at most 0.1% of runs and doubtful in at most 1%: rare
# enough that the run-wide false-alarm rate stays low whatever the recipe.
BROKEN_FAMILY_ALPHA = 0.001
DOUBTFUL_FAMILY_ALPHA = 0.01
# When more than a tenth of the fits fail, the ranks describe a selected
# subset of prior draws (selection alone can bend them; Talts et al. 2018),
# so the calibration is weaker evidence either way.
FAILURE_SHARE_DOUBTFUL = 0.10

SHAPES = {
    "too_narrow": "ranks pile up at both ends: the fitted posterior of {q} is narrower than "
                  "the story allows (the model claims more certainty than it should)",
    "too_wide": "ranks crowd the middle: the fitted posterior of {q} is wider than the story "
                "allows",
    "true_above": "the generating values sit above most posterior draws: the model "
                  "underestimates {q}",
    "true_below": "the generating values sit below most posterior draws: the model "
                  "overestimates {q}",
}
ADVICE = {
    "too_narrow": "Compare the model with the simulator line by line for {q}: look for a "
                  "variance coded where a standard deviation is meant (or the reverse), data "
                  "counted twice, or a likelihood sharper than the story. If they agree, look at "
                  "the replicates ranked 0 or L: chains trapped in a minor mode (data that say "
                  "little about a parameter, e.g. every event before the first look) give the "
                  "same picture; start chains nearer the data or use a more informative prior.",
    "too_wide": "Compare the model with the simulator line by line for {q}: look for a "
                "standard deviation coded where a variance is meant, data left out of the "
                "likelihood, or a likelihood flatter than the story.",
    "true_above": "Compare the model with the simulator for {q}: look for a scale or unit "
                  "mismatch, a log versus natural scale, or a sign that differs.",
    "true_below": "Compare the model with the simulator for {q}: look for a scale or unit "
                  "mismatch, a log versus natural scale, or a sign that differs.",
}
LIKELIHOOD_ADVICE = ("The log-likelihood of the simulated data ranks oddly: compare the model's "
                     "outcome distribution, its link and how each covariate enters with the "
                     "simulator.")
SAMPLER_ADVICE = ("The outcomes came from the model itself, so the sampler does not recover the "
                  "model's own draws: look at the computation (divergences, step size) and "
                  "consider a reparametrisation.")
SAMPLER_NOTE = " The outcomes came from the model's own prior predictive, so this checks the " \
               "sampler, not the model code."


@rule("calibration")
def calibration_ranks(f: Finding) -> Judgement:
    n = f.numbers
    p = f.p_value
    name = n["quantity"]
    base = name.split("[")[0]
    note = SAMPLER_NOTE if n.get("simulator") == "model" else ""
    if p is None or math.isnan(p):
        return Judgement(0, f"Too few replicates to test the ranks of {name}.{note}")
    tests = max(int(n.get("tests", 1)), 1)
    strength = -math.log10(max(p, 1e-300))
    shape = SHAPES[n["direction"]].format(q=name)
    if n.get("simulator") == "model":
        advice = SAMPLER_ADVICE
    elif base == "log_likelihood":
        advice = LIKELIHOOD_ADVICE
    else:
        advice = ADVICE[n["direction"]].format(q=base)
    if n.get("approximate_likelihood") and p < DOUBTFUL_FAMILY_ALPHA / tests:
        # A documented approximation of the likelihood, not a coding error.
        return Judgement(0, f"The ranks of {name} depart from uniform ({p_equals(p)}), as expected: "
                            f"{n['approximate_likelihood']}.")
    if p < BROKEN_FAMILY_ALPHA / tests:
        sentence = f"The ranks of {name} are far from uniform ({p_equals(p)}): {shape}.{note}"
        return Judgement(2, sentence, advice, strength=strength + 3.0)
    if p < DOUBTFUL_FAMILY_ALPHA / tests:
        sentence = f"The ranks of {name} lean away from uniform ({p_equals(p)}): {shape}.{note}"
        return Judgement(1, sentence, advice, strength=strength)
    return Judgement(0, f"The ranks of {name} look uniform ({p_equals(p)}).{note}")


@rule("calibration_failures")
def calibration_failures(f: Finding) -> Judgement:
    n = f.numbers
    share = f.value if f.value is not None else 1.0
    if n["finished"] == 0 or share > FAILURE_SHARE_DOUBTFUL:
        diverged = n.get("reasons", {}).get("diverged", 0)
        steps = (" Most of them diverged: rerun with smaller steps (--target-accept 0.95) before "
                 "reading the ranks." if diverged * 2 > n["failed"] else "")
        other = n["failed"] - diverged
        return Judgement(
            1, f"{share:.0%} of the calibration fits were left out ({diverged} diverged, {other} "
               f"failed otherwise), so the ranks describe only the prior draws the sampler could "
               f"fit. A fit that diverged is left out because its draws need not follow the "
               f"posterior (Betancourt 2017); past {FAILURE_SHARE_DOUBTFUL:.0%} left out, the "
               f"selection alone can bend the ranks (Talts et al. 2018).",
            "Look at the failed replicates' generating values: fits that fail in one region "
            "of the prior point to a region the model (or the prior) handles badly." + steps,
            strength=share)
    if n["failed"]:
        diverged = n.get("diverged", n.get("reasons", {}).get("diverged", 0))
        return Judgement(0, f"{n['failed']} of {n['finished']} fits were left out ({diverged} "
                            f"diverged); at most {FAILURE_SHARE_DOUBTFUL:.0%}, too few to weaken "
                            f"the calibration.")
    return Judgement(0, "Every calibration fit ran without divergences.")
