"""Verdict rules for the computation findings (see :mod:`workbench.checks.computation`).

What is doubtful and what is broken
-----------------------------------
Broken means the draws cannot be trusted to describe the posterior: divergences
that crowd one region (the sampler cannot enter it, so the draws are biased
away from it), divergences in more than 1% of draws, a funnel neck or a
probability edge where divergences pile up, chains that sit in separate places,
R-hat above 1.1, or an ESS so small that its own estimate is unreliable.
Doubtful means the draws are probably usable but a look is warranted: a few
divergences with no pattern or at the small end of a centred scale, R-hat between 1.01 and 1.1 with overlapping
chains, ESS below 100 per chain, low E-BFMI, tree depth saturation (an
efficiency warning, never by itself a bias), or a near-flat ridge. How little
a parameter contracted from its prior is reported but never alarms: weakly
informed parameters (group effects under partial pooling, hyper-parameters)
are not a sampling fault.

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Bürkner, P.-C. (2021).
Rank-normalization, folding, and localization: an improved R-hat for
assessing convergence of MCMC. Bayesian Analysis 16(2), 667-718.
Betancourt, M. (2016). Diagnosing suboptimal cotangent disintegrations in
Hamiltonian Monte Carlo. arXiv:1604.00695.
Betancourt, M. (2017). A conceptual introduction to Hamiltonian Monte Carlo.
arXiv:1701.02434.
"""

from __future__ import annotations

from workbench.findings import Finding
from workbench.verdicts import Judgement, rule

# Vehtari et al. (2021), sec. 4: use the draws only when R-hat < 1.01.
RHAT_DOUBTFUL = 1.01
# The older rule of thumb (Gelman et al., Bayesian Data Analysis 3rd ed.,
# sec. 11.5, from memory): past 1.1 the chains plainly describe different
# distributions.
RHAT_BROKEN = 1.1
# Vehtari et al. (2021), sec. 4: bulk and tail ESS of at least 100 per chain
# (400 for 4 chains) before R-hat and Monte Carlo errors can be trusted.
ESS_PER_CHAIN = 100
# Common practice: below 100 draws' worth in total even the ESS estimate is
# unreliable and a tail quantile rests on a handful of independent draws.
ESS_BROKEN = 100
# Betancourt (2016): E-BFMI below 0.3 means momentum resampling cannot cover
# the energy distribution, so the sampler explores the tails poorly.
BFMI_LOW = 0.3
# Common practice: past 1% of draws divergences bias estimates whatever their
# pattern (any divergence is worth a look; Betancourt 2017, sec. 5.3).
DIVERGENCE_SHARE_BROKEN = 0.01
# Common practice: one or two divergences in thousands of draws, too few to
# locate, are usually a numerical accident of one trajectory; they are
# reported but do not raise the verdict (a healthy model trips this now and
# then, a false alarm the report cannot afford).
ISOLATED_SHARE = 0.001
# Divergences crowd a region of a parameter when, on average, they sit in its
# outer fifth among the non-divergent draws (a size that matters) ...
LOCATED_QUANTILE = 0.2
# ... and a random subset of draws would sit that far out with two-sided
# probability under 0.003 (Mann-Whitney z; a guard for scanning tens of
# parameters at once).
LOCATED_Z = 3.0
# At a centred scale the model graph fixes the question in advance (do the
# divergences sit at its small values?), so a one-sided 1% test suffices for
# a funnel that is doubtful; a located one (LOCATED_Z) is broken.
FUNNEL_Z = 2.33
# |posterior correlation| above this on the sampler's scale is a near-flat
# ridge: the data inform one combination of the pair, not each member.
RIDGE_CORRELATION = 0.95
# Posterior sd at least this share of prior sd: the data say little about the
# parameter beyond its prior (contraction under 0.2; Schad et al. 2021).
BARELY_CONTRACTS = 0.9


def _located(place: dict) -> bool:
    q = place.get("quantile")
    if q is None or abs(place.get("z", 0.0)) < LOCATED_Z:
        return False
    return q <= LOCATED_QUANTILE or q >= 1 - LOCATED_QUANTILE


def _at_the_neck(place: dict) -> bool:
    """Divergences at the small end of a centred scale, by the one-sided test."""
    return place.get("z", 0.0) <= -FUNNEL_Z and place.get("quantile", 1.0) <= LOCATED_QUANTILE


def _natural(place: dict) -> str:
    """'small values of tau (log scale)': the region in the modeler's terms."""
    scale = f" ({place['scale']} scale)" if place.get("scale") else ""
    return f"{place['direction']} values of {place['parameter']}{scale}"


def _percentile(q: float) -> str:
    value = round(100 * q)
    suffix = "th" if 10 <= value % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(value % 10, "th")
    return f"{value}{suffix} percentile"


def _chains(group: list[int]) -> str:
    names = [str(c) for c in group]
    if len(names) == 1:
        return f"chain {names[0]}"
    return f"chains {', '.join(names[:-1])} and {names[-1]}"


@rule("divergences")
def divergences(f: Finding) -> Judgement:
    n = f.numbers
    count, share = int(n["count"]), n["share"]
    if count == 0:
        return Judgement(0, "Nothing to locate.")
    located = [p for p in n.get("located", []) if _located(p)]
    if located:
        top = located[0]
        others = ", ".join(p["parameter"] for p in located[1:])
        sentence = (
            f"They concentrate at {_natural(top)}: on average they sit at the "
            f"{_percentile(top['quantile'])} of the other draws"
            + (f" (also unusual: {others})" if others else "") + "."
        )
        if top["variable"] in n.get("centred_scales", []):
            advice = ""  # the funnel line carries the advice
        else:
            advice = (
                f"Look at {_natural(top)}: the posterior curves too sharply there for the step "
                f"size. Reparameterise that parameter (rescale it, non-centre it or bound it "
                f"away from that region) or, if the region is implausible, give it a prior "
                f"that says so."
            )
        return Judgement(2, sentence, advice, strength=1.0 + share)
    if not n.get("locatable") and share <= ISOLATED_SHARE:
        return Judgement(
            0,
            "Isolated and too few to locate; if that recurs with another seed, raise the target "
            "acceptance.",
        )
    where = "Too few to locate" if not n.get("locatable") else (
        "Spread through the posterior with no region standing out"
    )
    level = 2 if share > DIVERGENCE_SHARE_BROKEN else 1
    advice = (
        "Refit with a higher target acceptance (--target-accept 0.95, or target_accept under "
        "[sampling] in a plan); if divergences remain, plot the divergent draws against the "
        "scale parameters to find where they sit."
    )
    return Judgement(level, f"{where} ({100 * share:.2g}% of draws).", advice, strength=share)


@rule("funnel")
def funnel(f: Finding) -> Judgement:
    n = f.numbers
    scale, child = n["scale"], n["child"]
    located = _located(n)
    if not located and not _at_the_neck(n):
        return Judgement(0, f"Divergences do not crowd either end of {scale}.")
    location = n.get("location") or "its mean"
    sentence = (
        f"The funnel of a centred hierarchy: divergences crowd {n['direction']} values of "
        f"{scale}, the neck where the sampler cannot follow {', '.join(n['children'])}"
        + ("." if located else "; still few, so the draws may be only a little biased.")
    )
    advice = (
        f"Write {child} in the non-centred form: {child} = {location} + {scale} * {child}_z "
        f"with {child}_z ~ Normal(0, 1)."
    )
    if n.get("revision"):
        advice = revision_outcome(n["revision"])
    return Judgement(2 if located else 1, sentence, advice, strength=2.0 if located else 1.0)


def revision_outcome(record: dict) -> str:
    """What the fitted non-centred form showed, as advice (see :mod:`workbench.revisions`).

    The revised fit was judged by these same rules (``after.verdict``, and
    its own lead evidence in ``remaining``); its estimates agree with the
    original fit's when no posterior mean moved by ``agreement.threshold``
    posterior sds or more.
    """
    before, after, agreement = record["before"], record["after"], record["agreement"]
    largest = agreement["largest"]
    moved = (f"{largest['parameter']} moved by {largest['shift']:.2f} posterior sd"
             if largest["parameter"] else "no shared parameter to compare")
    numbers = (
        f"divergences from {before['divergences']} to {after['divergences']}, smallest bulk "
        f"ESS from {before['min_ess_bulk']:.0f} to {after['min_ess_bulk']:.0f}, largest R-hat "
        f"from {before['max_rhat']:.3f} to {after['max_rhat']:.3f}"
    )
    text = f"Refitted with {record['change']}: {numbers}."
    if not record["fixed"]:
        return (f"{text} The revised fit's computation is still broken, so the non-centred form "
                f"alone does not fix it ({record['remaining']['sentence']}). With few data per "
                f"group the scale's posterior may reach zero: give it a prior that keeps it "
                f"away from implausibly small values.")
    if agreement["agree"]:
        text += (f" The estimates agree (largest change: {moved}; within "
                 f"{agreement['threshold']} sd or their Monte Carlo error): the non-centred form "
                 f"fixes the funnel; adopt it.")
    else:
        text += (f" The estimates change ({moved}): the funnel biased the centred fit; adopt the "
                 f"non-centred form and read its estimates, not these.")
    if after["verdict"] != "holds":
        text += (f" The revised fit is {after['verdict']} on its own: "
                 f"{record['remaining']['sentence']} {record['remaining']['advice']}")
    return text


@rule("boundary")
def boundary(f: Finding) -> Judgement:
    pushed = [p for p in f.numbers["located"] if _located(p)]
    if not pushed:
        return Judgement(0, "No more crowded at the edge than the other draws.")
    names = ", ".join(p["parameter"] for p in pushed)
    sentence = (
        f"Divergences push {names} to {pushed[0]['edge']}: the sampler meets a probability "
        f"pinned to its edge."
    )
    advice = (
        "Give the probability a bounded formulation that never reaches 0 or 1: build it on the "
        "logit or probit scale from unbounded parameters with sensible priors, rather than "
        "clipping it or letting a parameter drive it to the edge."
    )
    return Judgement(2, sentence, advice, strength=1.5)


@rule("rhat")
def rhat(f: Finding) -> Judgement:
    n = f.numbers
    if f.value is None:
        return Judgement(0, "Nothing to compare.")
    value, parameter = f.value, n["parameter"]
    if value <= RHAT_DOUBTFUL:
        return Judgement(0, f"Chains agree (R-hat at most {RHAT_DOUBTFUL}).")
    groups, means = n["groups"], n["group_means"]
    if len(groups) > 1:
        where = ", ".join(f"{_chains(g)} near {m:.3g}" for g, m in zip(groups, means))
        sentence = (
            f"Chains disagree on {parameter}: {where}, with no overlap between these groups: "
            f"the posterior has separate modes or some chains are stuck."
        )
        advice = (
            f"Find what separates the modes of {parameter}: a symmetry (labels, signs or "
            f"order of components) calls for an ordering constraint or a prior that breaks it; "
            f"a mode the data rule out calls for a more informative prior. Do not pool chains "
            f"that sit in different modes."
        )
        return Judgement(2, sentence, advice, strength=value)
    sentence = (
        f"Chains disagree on {parameter} though they overlap: they mix slowly (bulk ESS "
        f"{n['ess_bulk']:.0f} of {n['draws']} draws)."
    )
    return Judgement(
        2 if value > RHAT_BROKEN else 1, sentence, _slow_advice(parameter), strength=value - 1.0
    )


@rule("ess")
def ess(f: Finding) -> Judgement:
    n = f.numbers
    if f.value is None:
        return Judgement(0, "Nothing to count.")
    needed = ESS_PER_CHAIN * n["chains"]
    if f.value >= needed:
        return Judgement(0, f"Enough effective draws (at least {needed}).")
    level = 2 if f.value < ESS_BROKEN else 1
    sentence = (
        f"Too few effective draws: below {needed} ({ESS_PER_CHAIN} per chain), means and "
        f"intervals carry Monte Carlo error."
    )
    slow = n["bulk_parameter"] if n["bulk"] <= n["tail"] else n["tail_parameter"]
    return Judgement(level, sentence, _slow_advice(slow), strength=1.0 - f.value / needed)


def _slow_advice(parameter: str) -> str:
    # One wording for R-hat and ESS, so the verdict says it once for one parameter.
    return (
        f"Run longer chains, or remove what slows {parameter} down (strongly correlated "
        f"parameters, a funnel or heavy tails; see the other computation lines)."
    )


@rule("bfmi")
def bfmi(f: Finding) -> Judgement:
    n = f.numbers
    low = [c for c, v in enumerate(n["per_chain"]) if v < BFMI_LOW]
    if not low:
        return Judgement(0, f"At least {BFMI_LOW} in every chain.")
    partner = n.get("energy_parameter")
    moves = (
        f"; the energy moves most with {partner} (r = {n['energy_correlation']:+.2f})"
        if partner else ""
    )
    sentence = (
        f"Below {BFMI_LOW} in {_chains(low)}: the sampler explores the tails of the energy "
        f"poorly{moves}."
    )
    advice = (
        "The usual causes are heavy-tailed posteriors or a funnel in a scale parameter"
        + (f" ({partner})" if partner else "")
        + ": non-centre the hierarchy it scales, or give the scale a lighter-tailed prior."
    )
    return Judgement(1, sentence, advice, strength=BFMI_LOW - f.value)


@rule("treedepth")
def treedepth(f: Finding) -> Judgement:
    n = f.numbers
    if n["hits"] == 0:
        return Judgement(0, "No saturation.")
    depth = f" (depth {n['max_depth']})" if n.get("max_depth") is not None else ""
    step = f", at step size {n['step_size']:.2g}" if n.get("step_size") is not None else ""
    sentence = (
        f"Saturation in {100 * n['share']:.2g}% of draws{depth}{step}: trajectories are cut "
        f"short, which costs speed, not validity."
    )
    causes = []
    pair = n.get("strongest_pair")
    if pair:
        causes.append(
            f"strongly correlated parameters ({pair['a']} and {pair['b']}: "
            f"r = {pair['correlation']:+.2f})"
        )
    causes.append(f"poorly scaled parameters (posterior sds span a factor {n['scale_ratio']:.3g})")
    causes.append("a tiny step size forced by a sharply curved region (see divergences)")
    advice = (
        "Usual causes: " + "; ".join(causes)
        + ". Reparameterise the correlated pair or rescale parameters to order one."
    )
    return Judgement(1, sentence, advice, strength=n["share"])


@rule("ridge")
def ridge(f: Finding) -> Judgement:
    pairs = [p for p in f.numbers["pairs"] if abs(p["correlation"]) > RIDGE_CORRELATION]
    if not pairs:
        return Judgement(0, f"No near-flat ridge (|correlation| at most {RIDGE_CORRELATION}).")
    top = pairs[0]
    a, b, r = top["a"], top["b"], top["correlation"]
    combination = "sum" if r < 0 else "difference"
    kept = ""
    if top.get("a_sd_ratio") is not None and top.get("b_sd_ratio") is not None:
        kept = (
            f"; {a} keeps {top['a_sd_ratio']:.2f} and {b} {top['b_sd_ratio']:.2f} of their "
            f"prior sd"
        )
    others = ", ".join(f"{p['a']} and {p['b']}" for p in pairs[1:])
    sentence = (
        f"Near-flat ridge: the data pin down the {combination} of {a} and {b} but cannot "
        f"separate them{kept}" + (f"; also {others}" if others else "") + "."
    )
    advice = (
        f"Reparameterise {a} and {b} by their {combination} and one other combination, fix "
        f"one of them, or give one an informative prior or data that separate them."
    )
    return Judgement(1, sentence, advice, strength=abs(r))


@rule("contraction")
def contraction(f: Finding) -> Judgement:
    least = f.numbers.get("least", [])
    barely = [p for p in least if p["sd_ratio"] >= BARELY_CONTRACTS]
    if not least:
        return Judgement(0, "Nothing to compare.")
    if not barely:
        return Judgement(0, "Every parameter contracts from its prior.")
    names = ", ".join(f"{p['parameter']} ({p['sd_ratio']:.2f})" for p in barely)
    return Judgement(
        0,
        f"The data say little beyond the prior about {names}; their estimates echo the prior "
        f"(not a sampling fault).",
    )
