"""Exact refits that leave units out, for when PSIS-LOO cannot be trusted.

PSIS-LOO stands in for refitting the model without each unit (a row, or a
cohort whose cells form one likelihood term). It fails when a unit carries
so much of the information that leaving it out moves the posterior far
(Pareto k above 0.7), and with a handful of units each one is such a unit:
the estimate and its standard error then rest on nothing. The remedy is to
refit (Vehtari, Gelman and Gabry 2017, sec. 2.3 and 4): with few units each
is left out in turn (exact leave-one-out), with more they are dealt into
:data:`MAX_FOLDS` folds.

Every fold refits one compiled model: :func:`fold_model` adds to the model a
``held_out`` data container (1 for a unit left out) and a potential that
takes the left-out units' log-likelihood terms back out of the log density,
so a fold only swaps that container, as calibration swaps observed data. The
held-out units' log predictive density is then read from the fold's draws.

References
----------
Vehtari, A., Gelman, A. and Gabry, J. (2017). Practical Bayesian model
evaluation using leave-one-out cross-validation and WAIC. Statistics and
Computing 27, 1413-1432 (K-fold cross-validation when PSIS fails).
Vehtari, A., Simpson, D., Gelman, A., Yao, Y. and Gabry, J. (2024). Pareto
smoothed importance sampling. JMLR 25(72) (the 0.7 limit of Pareto k).
Sivula, T., Magnusson, M., Matamoros, A. A. and Vehtari, A. (2022).
Uncertainty in Bayesian leave-one-out cross-validation based model
comparison. arXiv:2008.10296 (the SE of an elpd difference is unreliable
with few units).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from workbench import engine

# Below this many units an elpd difference is a sum of a handful of terms: its
# SE is unreliable whatever the Pareto k (Sivula et al. 2022 find the normal
# approximation poor for small n), and each unit is a large share of the data,
# which is where PSIS breaks. Ten is also the fold count below.
MIN_LOO_UNITS = 10
# With at most this many units each unit is its own fold (exact leave-one-out);
# with more they are dealt into this many folds (K = 10, Vehtari, Gelman and
# Gabry 2017, sec. 4).
MAX_FOLDS = 10
# Refits may cost at most this many times the fits the check has already made
# (the base and relaxed models): past that the verdict falls back to the
# expansion parameter alone. A judgement of how long a user waits for a check,
# not a published figure. Cost is counted in leapfrog steps (gradient
# evaluations), which a seed fixes, never in seconds: a verdict must not
# depend on how busy the machine was.
KFOLD_COST_MULTIPLE = 2.0
# ... and whatever that allows, the base model and the relaxation most pulled
# from its null are always refitted: an honest verdict on the likeliest cause
# is worth the wait (a judgement, as above).

# A refit only has to give the held-out units' log predictive density, a mean
# over draws whose Monte Carlo error is small beside the SE of an elpd
# difference; chains beyond two buy it little, and the check's fits have
# already shown whether the posterior is explored. Fold refits therefore run
# at most this many chains (a fixed number, not the core count, so that a
# seed gives the same result on any machine).
FOLD_CHAINS = 2

HELD_OUT = "held_out"


def why_not_psis(units: int, high_k: int, limit: float, unit: str = "unit") -> str:
    """Why PSIS-LOO cannot decide on these fits ('' when it can).

    ``high_k`` counts the units whose Pareto k exceeds ``limit`` in either
    fit; ``unit`` names a unit in the table's words (``cohort``).
    """
    if units < MIN_LOO_UNITS:
        return (f"only {units} {unit}{'s' if units != 1 else ''} to leave out (PSIS-LOO needs at "
                f"least {MIN_LOO_UNITS} for its difference and SE to mean anything)")
    if high_k:
        return f"Pareto k above {limit:.2f} for {high_k} of {units} {unit}s"
    return ""


def folds_for(units: int, seed: int) -> np.ndarray:
    """The fold of each unit: its own when few, else one of :data:`MAX_FOLDS` (seeded, balanced)."""
    if units <= MAX_FOLDS:
        return np.arange(units)
    order = np.random.default_rng(seed).permutation(units)
    folds = np.empty(units, dtype=int)
    folds[order] = np.arange(units) % MAX_FOLDS
    return folds


def fold_model(design, data, relaxation, name: str):
    """The design's model (relaxed when asked) with units of ``name`` that can be left out.

    Adds the ``held_out`` container (one value per log-likelihood term of the
    observed variable ``name``, 0 by default) and a potential that subtracts
    the terms of the units held out, so their data no longer inform the
    posterior while the model's graph (and its compiled form) stay the same.
    """
    import pymc as pm
    import pytensor.tensor as pt

    model = design.build(data, relaxation)
    rv = model[name]
    with model:
        terms = pm.logp(rv, model.rvs_to_values[rv])
        held = pm.Data(HELD_OUT, np.zeros(tuple(terms.shape.eval()), dtype=float))
        pm.Potential("leave_out", pt.switch(held > 0, -terms, 0.0))
    return model


@dataclass
class KFold:
    """Held-out log predictive density of every unit, from refits without its fold.

    ``fold_of`` gives each unit's fold, so that other models can be refitted
    on the same folds and their held-out densities paired unit by unit.
    """

    pointwise: np.ndarray
    folds: int
    fold_of: np.ndarray | None = None

    @property
    def elpd(self) -> float:
        return float(self.pointwise.sum())


def log_mean_density(ll: np.ndarray) -> np.ndarray:
    """Log of the mean density over draws per unit, from log-likelihood draws (S, units)."""
    from scipy.special import logsumexp

    return logsumexp(ll, axis=0) - np.log(ll.shape[0])


def held_out_elpd(design, data, relaxation, name: str, folds: np.ndarray, seed: int,
                  settings: engine.Settings, say: Callable[[str], None] = lambda _: None) -> KFold:
    """Refit one model once per fold (compiled once) and score the units it left out."""
    from dataclasses import replace

    settings = replace(settings, chains=min(settings.chains, FOLD_CHAINS))
    model = fold_model(design, data, relaxation, name)
    k = int(folds.max()) + 1
    sampler = engine.Sampler(model, fits=k, settings=settings)
    shape = tuple(model[HELD_OUT].get_value().shape)
    seeds = engine.seed_stream(seed, *[f"fold:{i}" for i in range(k)])
    pointwise = np.full(folds.size, np.nan)
    label = getattr(relaxation, "parameter", None) or "base"
    for i in range(k):
        say(f"refit {i + 1} of {k} without a fold ({label})")
        out = (folds == i).astype(float)
        fit = engine.fit(model, seeds[f"fold:{i}"], settings, sampler=sampler,
                         observed={HELD_OUT: out.reshape(shape)}, predictive=False, prior=False)
        ll = fit.idata["log_likelihood"][name].values
        ll = ll.reshape(ll.shape[0] * ll.shape[1], -1)[:, folds == i]
        pointwise[folds == i] = log_mean_density(ll)
    return KFold(pointwise, k, np.asarray(folds))


def leapfrog_steps(fit) -> float:
    """Gradient evaluations of a fit's kept draws: its cost, the same for a seed on any machine.

    Warm-up is left out: every fit of a check warms up as long, so it scales
    all costs alike.
    """
    return float(fit.idata["sample_stats"]["n_steps"].values.sum())


@dataclass
class CrossValidation:
    """What the relaxation check reads about exact refits.

    ``base`` and ``relaxed`` (by relaxation parameter) hold the refits that
    ran; ``skipped`` says, per relaxation whose PSIS-LOO could not decide and
    that was not refitted, why not.
    """

    base: KFold | None = None
    relaxed: dict[str, KFold] = field(default_factory=dict)
    skipped: dict[str, str] = field(default_factory=dict)


def refit_untrusted(design, data, main, relaxed: dict[str, Any], seed: int,
                    settings: engine.Settings, pull: dict[str, float], needed: float,
                    say: Callable[[str], None] = lambda _: None) -> CrossValidation:
    """Exact refits for the relaxations whose PSIS-LOO difference cannot decide.

    ``pull`` gives each relaxation parameter's share of posterior draws
    beyond its negligible distance from the null; below ``needed`` no elpd
    difference could change the verdict. The others are refitted, the most
    pulled from the null first (ties: the larger PSIS-LOO gain first), while
    the estimated cost stays within :data:`KFOLD_COST_MULTIPLE` times the
    fits made so far; the first is always refitted. Costs are leapfrog steps
    (:func:`leapfrog_steps`), so the choice is the same on any machine. The
    base model's refits serve them all.
    """
    from workbench.checks.loo import loo_numbers

    out = CrossValidation()
    base_loo = loo_numbers(main)
    units = len(base_loo["pareto_k"])
    name = list(main.idata["log_likelihood"].data_vars)[0]
    doubted = []
    loos = {parameter: loo_numbers(fit) for parameter, fit in relaxed.items()}

    def order(parameter):
        return (-pull.get(parameter, 0.0), -(loos[parameter]["elpd"] - base_loo["elpd"]), parameter)

    for parameter in sorted(relaxed, key=order):
        loo = loos[parameter]
        high = len(set(base_loo["bad_pareto_k"]) | set(loo["bad_pareto_k"]))
        if not why_not_psis(units, high, base_loo["k_threshold"]):
            continue
        if pull.get(parameter, 0.0) < needed:
            out.skipped[parameter] = ("its parameter stays near the null, so no elpd difference "
                                      "could change the verdict")
            continue
        doubted.append(parameter)
    if not doubted:
        return out
    folds = folds_for(units, seed)
    k = int(folds.max()) + 1
    spent = sum(leapfrog_steps(f) for f in [main, *relaxed.values()])
    budget = KFOLD_COST_MULTIPLE * spent
    per_fold = min(settings.chains, FOLD_CHAINS) / settings.chains  # a refit runs fewer chains
    cost = k * per_fold * leapfrog_steps(main)
    chosen = []
    for parameter in doubted:
        extra = k * per_fold * leapfrog_steps(relaxed[parameter])
        if not chosen or cost + extra <= budget:
            chosen.append(parameter)
            cost += extra
        else:
            out.skipped[parameter] = (f"refitting {k} folds would cost {(cost + extra) / spent:.1f} "
                                      f"times the fits made so far, over the "
                                      f"{KFOLD_COST_MULTIPLE:g} allowed")
    if not chosen:
        return out
    seeds = engine.seed_stream(seed, "base", *chosen)
    out.base = held_out_elpd(design, data, None, name, folds, seeds["base"], settings, say)
    for parameter in chosen:
        relaxation = next(a.relaxation for a in design.assumptions
                          if a.relaxation and a.relaxation.parameter == parameter)
        out.relaxed[parameter] = held_out_elpd(design, data, relaxation, name, folds, seeds[parameter],
                                               settings, say)
    return out
