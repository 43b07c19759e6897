"""Revisions: the change the computation advice names, made and fitted.

When the ``computation`` check finds the funnel of a centred hierarchical
scale, its advice is the non-centred form. This module makes that change and
refits, so the report can say whether it worked:

- a **model file** is revised by a transformation of its model graph: each
  centred child ``theta ~ Normal(mu, tau)`` becomes the deterministic
  ``theta = mu + tau * theta_z`` (same name, same dims) with a new free
  parameter ``theta_z ~ Normal(0, 1)`` (:func:`non_centre`); Student-t,
  Laplace, Cauchy and logistic children keep their family in the standard
  form, a log-normal child becomes ``exp(mu + tau * theta_z)``;
- a **built-in recipe** with a ``centred`` option is refitted with
  ``centred=false``, its own non-centred form.

The revised design compiles once, samples with the run's settings and is
judged by the same computation rules as the original fit. Both fits describe
the same posterior (the change of variables is exact), so the estimates of
the parameters they share should agree; where they do not, the draws of the
fit that diverged were biased.

A revised design travels to worker processes as plain data: the original
design (a file path, or a recipe and its options) and the revision (names).

References
----------
Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general
framework for the parametrization of hierarchical models. Statistical
Science 22(1), 59-73.
Betancourt, M. and Girolami, M. (2015). Hamiltonian Monte Carlo for
hierarchical models. In Current Trends in Bayesian Methodology with
Applications, CRC Press (centred and non-centred forms).
Gelman, A. et al. (2013). Bayesian Data Analysis, 3rd ed., sec. 5.5 (eight
schools).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from workbench.errors import WorkbenchError
from workbench.findings import COMPUTATION

# Two fits agree on a parameter when their posterior means differ by less
# than this share of the revised fit's posterior sd. A quarter of an sd moves
# a central 90% interval (3.3 sd wide) by under 8% of its width, less than
# changes a conclusion read from it; and it is 3.5 times the Monte Carlo
# noise of the difference of two means each from 400 effective draws
# (sd * sqrt(2 / 400) = 0.07 sd), so agreeing fits are not called apart by
# sampling noise alone (common practice; the 400 is the ESS the audit asks).
AGREEMENT_SD = 0.25
# ... and by more than this many Monte Carlo sds of the difference (each mean's
# MCSE is sd / sqrt(bulk ESS); Vehtari et al. 2021): a fit caught in a funnel
# may have 20 effective draws, whose mean alone wanders by a quarter of an sd.
# Three sds: two-sided probability 0.003, a guard for comparing every element.
AGREEMENT_Z = 3.0
# The sampler numbers a revision is shown by, before and after.
SHOWN = ("divergences", "min_ess_bulk", "min_ess_tail", "max_rhat")
# Location-scale families that have a standard form: the RandomVariable's
# name -> (its name in a sentence, whether the child is exp(location + scale * z)).
STANDARD_FORMS = {
    "normal": ("Normal(0, 1)", False),
    "t": ("Student-t(same degrees of freedom, 0, 1)", False),
    "laplace": ("Laplace(0, 1)", False),
    "cauchy": ("Cauchy(0, 1)", False),
    "logistic": ("Logistic(0, 1)", False),
    "lognormal": ("Normal(0, 1)", True),
}
# How a recipe's centred form is switched off.
CENTRED_OPTION = "centred"


class RevisionError(WorkbenchError):
    """A model cannot be revised as asked (a variable that is not a centred child)."""


@dataclass(frozen=True)
class NonCentring:
    """Write the children of one centred scale in the non-centred form.

    ``how`` is ``graph`` (transform the model graph: model files) or
    ``option`` (the recipe's ``centred=false``). ``change`` says it in a
    sentence; ``standard`` names each child's new standardised parameter.
    """

    scale: str
    children: tuple[str, ...]
    how: str
    change: str = ""
    standard: tuple[str, ...] = ()


# --- the graph transformation ---------------------------------------------------------


def standard_name(model, child: str) -> str:
    """``theta_z``, with ``_`` added until no variable of ``model`` has the name."""
    name = f"{child}_z"
    while name in model.named_vars:
        name += "_"
    return name


def non_centre(model, children, scale: str | None = None):
    """The model with each centred child rewritten in the non-centred form.

    Parameters
    ----------
    model : pymc.Model
        The model as the user wrote it (outcomes in data containers or not).
    children : sequence of str
        Free variables ``theta ~ Family(location, scale, ...)`` of a family in
        :data:`STANDARD_FORMS`.
    scale : str, optional
        Only used to word errors.

    Returns
    -------
    pymc.Model
        A new model: each child is a deterministic with its old name and dims,
        ``location + scale * z`` (``exp`` of it for a log-normal child), and
        ``z`` (:func:`standard_name`) is a free parameter of the family's
        standard form with the child's dims. Every other variable, data
        container, coordinate and initial value is kept.

    Raises
    ------
    RevisionError
        A child that is not a free variable of a family with a standard form.
    """
    import pytensor
    import pytensor.tensor as pt
    from pymc.model.fgraph import model_deterministic, model_free_rv, model_from_fgraph
    from pymc.pytensorf import toposort_replace
    from pytensor.tensor.type_other import NoneTypeT

    free = {rv.name: rv for rv in model.free_RVs}
    for child in children:
        if child not in free or family(free[child]) not in STANDARD_FORMS:
            raise RevisionError(
                f"cannot write '{child}' in the non-centred form"
                + (f" of scale '{scale}'" if scale else "")
                + f"; expected a free variable of a location-scale family "
                  f"({', '.join(sorted(STANDARD_FORMS))})")
    names = {child: standard_name(model, child) for child in children}
    graph, memo, initial = model_graph(model)
    swaps = []
    for child in children:
        node = memo[free[child]].owner  # the ModelFreeRV wrapping the child
        rv = node.inputs[0]
        op = rv.owner.op
        params = list(op.dist_params(rv.owner))
        size = op.size_param(rv.owner)
        if isinstance(size.type, NoneTypeT):
            size = pt.broadcast_shape(*params, arrays_are_shapes=False)
        _, exponentiate = STANDARD_FORMS[family(rv)]
        location, spread = params[-2], params[-1]
        zero, one = pt.zeros((), dtype=rv.dtype), pt.ones((), dtype=rv.dtype)
        standard_op = pt.random.normal if exponentiate else op
        standard = params[:-2] + [zero, one] if not exponentiate else [zero, one]
        rng = pytensor.shared(np.random.default_rng(), name=f"{names[child]}_rng")
        z = standard_op.make_node(rng, size, *standard).outputs[1]
        value = z.type()
        value.name = names[child]
        z_var = model_free_rv(z, value, None, names[child], *node.op.dims)
        expression = location + spread * z_var
        if exponentiate:
            expression = pt.exp(expression)
        swaps.append((node.outputs[0], model_deterministic(expression, child, *node.op.dims)))
    toposort_replace(graph, swaps)
    return model_with_initial(model_from_fgraph(graph, mutate_fgraph=True), initial, skip=names)


def model_graph(model):
    """PyMC's function-graph form of ``model``: (graph, memo, custom initial values by variable).

    The function-graph form refuses custom initial values, so they are left
    out here and set again by :func:`model_with_initial` on the rebuilt model.
    """
    from pymc.model.fgraph import fgraph_from_model

    initial = dict(model.rvs_to_initial_values)
    model.rvs_to_initial_values = {rv: None for rv in initial}
    try:
        graph, memo = fgraph_from_model(model)
    finally:
        model.rvs_to_initial_values = initial
    return graph, memo, initial


def model_with_initial(rebuilt, initial: dict, skip=()):
    """``rebuilt`` with the custom initial values of its original, by name (except ``skip``)."""
    for rv, value in initial.items():
        if value is not None and rv.name not in skip:
            rebuilt.set_initval(rebuilt[rv.name], value)
    return rebuilt


def family(rv) -> str:
    """The name of a random variable's distribution (``normal``, ``t``, ...)."""
    return getattr(getattr(rv.owner, "op", None), "name", "") if rv.owner is not None else ""


# --- designs ---------------------------------------------------------------------------


class RevisedDesign:
    """A design whose model is revised by a graph transformation.

    Answers the harness as the original design does; only :meth:`build`,
    :meth:`label` and :meth:`key` differ. Pickles as (design, revision), so
    it reaches a worker process as plain data.
    """

    def __init__(self, base, revision: NonCentring):
        self.base = base
        self.revision = revision

    def __reduce__(self):
        return (RevisedDesign, (self.base, self.revision))

    def __getattr__(self, name: str) -> Any:
        if name in {"base", "revision"}:  # not yet set (during unpickling): no recursion
            raise AttributeError(name)
        return getattr(self.base, name)

    def build(self, data, relaxation=None):
        """The original design's model for ``data``, with the revision made."""
        return non_centre(self.base.build(data, relaxation), self.revision.children,
                          self.revision.scale)

    def label(self) -> str:
        return f"{self.base.label()} ({', '.join(self.revision.children)} non-centred)"

    def key(self) -> str:
        return f"{self.base.key()}+non-centred:{','.join(self.revision.children)}"


def revised_design(design, revision: NonCentring):
    """The design with the revision made (a recipe's option, or a graph transformation)."""
    if revision.how == "option":
        return dataclasses.replace(design, options={**design.options, CENTRED_OPTION: False})
    return RevisedDesign(design, revision)


def propose(design, fit) -> NonCentring | None:
    """The revision the funnel advice names, when the computation check finds a funnel.

    Parameters
    ----------
    design
        The design of the run (a model file, or a recipe bound to options).
    fit : workbench.engine.Fit
        Its main fit.

    Returns
    -------
    NonCentring or None
        None when no funnel is found (the funnel rule judges it a hold, or
        there is no centred scale), and for a recipe without a ``centred``
        option switched on.
    """
    from workbench.checks.computation import funnel_of
    from workbench.verdicts import judge

    funnel = funnel_of(fit)
    if funnel is None or judge(funnel).level == 0:
        return None
    scale, children = funnel.numbers["scale"], tuple(funnel.numbers["children"])
    location = funnel.numbers.get("location") or "its location"
    if getattr(design, "is_model_file", False):
        model = fit.model
        free = {rv.name: rv for rv in model.free_RVs}
        if any(c not in free or family(free[c]) not in STANDARD_FORMS for c in children):
            return None
        standard = tuple(standard_name(model, c) for c in children)
        change = "; ".join(_formula(c, z, location, scale, family(free[c]))
                           for c, z in zip(children, standard))
        return NonCentring(scale, children, "graph", change, standard)
    options = {o.name for o in getattr(getattr(design, "recipe", None), "options", ())}
    if CENTRED_OPTION in options and design.options.get(CENTRED_OPTION):
        change = (f"{', '.join(children)} in the recipe's non-centred form "
                  f"({CENTRED_OPTION}=false, offsets ~ Normal(0, 1) scaled by {scale})")
        return NonCentring(scale, children, "option", change)
    return None


def _formula(child: str, z: str, location: str, scale: str, name: str) -> str:
    words, exponentiate = STANDARD_FORMS[name]
    inner = f"{location} + {scale} * {z}"
    return f"{child} = {f'exp({inner})' if exponentiate else inner} with {z} ~ {words}"


# --- fitting and comparing -------------------------------------------------------------


def revise(design, data, main, seed: int, settings, fitter: Callable | None = None,
           say: Callable[[str], None] = lambda _: None) -> list[dict]:
    """Fit the revision the funnel advice names, if any; one record per revision.

    Parameters
    ----------
    design, data
        The run's design and validated data.
    main : workbench.engine.Fit
        The run's main fit.
    seed : int
        Seed of the revised fit.
    settings : workbench.engine.Settings
        The run's sampling settings (the same for a fair before and after).
    fitter : callable, optional
        Stands in for :func:`workbench.harness.fit_design` (a fit cache).

    Returns
    -------
    list of dict
        Empty when no funnel is found. Otherwise one record:
        ``assumption``, ``change`` (a sentence), ``scale``, ``children``,
        ``design`` (the revised design's label), ``before`` and ``after``
        (the numbers of :data:`SHOWN`; ``after`` also holds the revised fit's
        computation ``verdict`` and ``seconds``), ``agreement``
        (:func:`agreement`), ``fixed`` (the revised fit's computation holds
        or is only doubtful: its draws can be used) and ``remaining`` (the
        revised fit's lead evidence and advice when it is not clean).
    """
    from workbench import checks, verdicts
    from workbench.checks.computation import computation_summary, sampler_health
    from workbench.harness import fit_design

    revision = propose(design, main)
    if revision is None:
        return []
    revised = revised_design(design, revision)
    say(f"refitting with {', '.join(revision.children)} non-centred")
    fit = (fitter or fit_design)(revised, data, seed, settings, prior=False, predictive=False,
                                 label=revised.label(), say=say)
    # The revised fit is judged by the same rules as the original one.
    judged = verdicts.decide([], sampler_health(checks.Context(revised, data, fit)))
    after_verdict = next(v for v in judged if v.key == COMPUTATION)
    before = computation_summary(main.idata, main.model)
    after = computation_summary(fit.idata, fit.model)
    return [{
        "assumption": COMPUTATION,
        "change": revision.change,
        "scale": revision.scale,
        "children": list(revision.children),
        "design": revised.label(),
        "before": {k: before[k] for k in SHOWN},
        "after": {**{k: after[k] for k in SHOWN}, "verdict": after_verdict.verdict,
                  "seconds": round(float(fit.seconds), 2)},
        "agreement": agreement(main, fit),
        # Trustworthy draws, perhaps worth a look: a doubtful revised fit has no funnel left.
        "fixed": after_verdict.verdict in (verdicts.HOLDS, verdicts.DOUBTFUL),
        "remaining": _remaining(after_verdict),
    }]


def _remaining(verdict) -> dict:
    """The revised fit's own lead sentence and advice, when its computation is not clean."""
    decided = verdict.decided_by
    if decided is None:
        return {"sentence": "", "advice": ""}
    sentence = next(j.sentence for f, j in verdict.evidence if f is decided)
    return {"sentence": f"{decided.detail} {sentence}".strip(), "advice": verdict.advice}


def agreement(before, after) -> dict:
    """Whether two fits of the same posterior agree, parameter by parameter.

    Compares every scalar element of the variables that are free in either
    model and present in both posteriors (``mu``, ``tau`` and ``theta`` of
    eight schools in both forms): the difference of posterior means over the
    revised fit's posterior sd (the ``shift``), and the Monte Carlo sd of
    that difference on the same scale (``noise``). An element differs when
    its shift reaches :data:`AGREEMENT_SD` and exceeds :data:`AGREEMENT_Z`
    times its noise.

    Parameters
    ----------
    before, after : workbench.engine.Fit
        The original fit and the revised one (the reference).

    Returns
    -------
    dict
        ``threshold`` (:data:`AGREEMENT_SD`), ``agree`` (no element
        differs), ``largest`` (the element that moved most, among those
        that differ when any does, with its shift and noise) and ``parameters``: per element, the means, sds and bulk
        ESS of both fits, the ``shift`` and its ``noise``.

    References
    ----------
    Vehtari et al. (2021), Bayesian Analysis 16(2), sec. 3 (Monte Carlo
    standard error of a mean from the bulk ESS).
    """
    import arviz as az

    from workbench.checks.computation import elements

    a_post, b_post = after.idata["posterior"].to_dataset(), before.idata["posterior"].to_dataset()
    free = {rv.name for fit in (before, after) if fit.model is not None for rv in fit.model.free_RVs}
    names = [n for n in b_post.data_vars if n in a_post.data_vars and n in free
             and a_post[n].dims == b_post[n].dims]
    parameters, largest, differ = {}, {"parameter": "", "shift": 0.0, "noise": 0.0}, False
    if names:
        a, b = elements(a_post[names]), elements(b_post[names])
        a_ess, b_ess = (elements(az.ess(post[names], method="bulk").expand_dims(("chain", "draw")))
                        .values[0, 0] for post in (a_post, b_post))
        a_flat, b_flat = a.flat(), b.flat()
        for k, label in enumerate(a.labels):
            a_mean, a_sd = float(a_flat[:, k].mean()), float(a_flat[:, k].std())
            b_mean, b_sd = float(b_flat[:, k].mean()), float(b_flat[:, k].std())
            if not a_sd > 0:
                continue
            shift = abs(a_mean - b_mean) / a_sd
            noise = float(np.hypot(a_sd / np.sqrt(a_ess[k]), b_sd / np.sqrt(b_ess[k]))) / a_sd
            parameters[label] = {"before_mean": b_mean, "before_sd": b_sd,
                                 "before_ess_bulk": float(b_ess[k]), "after_mean": a_mean,
                                 "after_sd": a_sd, "after_ess_bulk": float(a_ess[k]),
                                 "shift": shift, "noise": noise}
            moved = shift >= AGREEMENT_SD and shift > AGREEMENT_Z * noise
            # The element named is the one that moved most among those that differ.
            if (moved, shift) > (differ, largest["shift"]) or not largest["parameter"]:
                largest = {"parameter": label, "shift": shift, "noise": noise}
            differ = differ or moved
    return {"threshold": AGREEMENT_SD, "z": AGREEMENT_Z, "agree": not differ, "largest": largest,
            "parameters": parameters}
