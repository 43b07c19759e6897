"""Automatic assumptions of a model file, read from its likelihoods and its table.

A model file without hand-written assumptions still states some: each
observed variable has a likelihood, and each likelihood family makes claims a
table can contradict. For every observed variable ``VAR`` and every label
column the model leaves unused, this module derives

``dispersion:VAR``
    Poisson or binomial counts vary no more than the likelihood allows.
    Statistic: Pearson dispersion, the mean of (y - E y)^2 / Var y.
    Relaxation: Poisson to negative binomial, binomial to beta-binomial,
    with ``d`` the extra variance at the average mean (Var = E(1 + d) for a
    row at the average count or trial number; null 0).
``excess_zeros:VAR``
    Poisson or negative-binomial counts have no more zeros than the
    likelihood gives. Statistic: share of zeros. Relaxation: the zero-inflated
    likelihood with structural zero share ``pi`` (null 0).
``tails:VAR``
    Normal errors have normal tails. Statistic: kurtosis of the standardized
    residuals. Relaxation: Student-t errors on ``1/nu`` (null 0).
``constant_scale:VAR``
    A location-scale likelihood's scale is the same in every row. Statistic:
    slope of |standardized residual| on the standardized fitted location.
    Relaxation: log scale linear in the fitted location (centred, in units of
    the observed sd of the outcome; null slope 0).
``same_across:COLUMN``
    Rows do not differ by a label column the model ignores. Statistic:
    variance across the column's levels of the mean standardized residual.
    Relaxation: a non-centred offset per level on the linear predictor's
    scale (log mean for counts, logit for binomial, the location in units of
    the scale for location-scale likelihoods; null sd 0).

Each relaxation is a transformation of the user's own model graph
(PyMC's function-graph form of a model): the observed variable's node is
replaced by the expanded likelihood, built from the very expressions the
user wrote for its parameters. What cannot be derived (a likelihood with no
known expansion, binary outcomes, a location that is the same in every row)
is kept with the reason, so the report lists it as ``unchecked``.

The derived assumptions are plain data (:class:`Spec`), so a design crosses
process boundaries without its functions.

References
----------
Gelman, A., Vehtari, A., Simpson, D. et al. (2020). Bayesian workflow.
arXiv:2011.01808, sec. 6.3 (continuous model expansion).
McCullagh, P. and Nelder, J. A. (1989). Generalized Linear Models, 2nd ed.,
sec. 4.5 (Pearson dispersion) and 6.2 (extra-binomial variation).
Lambert, D. (1992). Zero-inflated Poisson regression. Technometrics 34, 1-14.
Lange, K. L., Little, R. J. A. and Taylor, J. M. G. (1989). Robust
statistical modeling using the t distribution. JASA 84, 881-896.
Papaspiliopoulos, O., Roberts, G. O. and Sköld, M. (2007). A general
framework for the parametrization of hierarchical models. Statistical
Science 22, 59-73 (non-centred offsets).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from functools import partial
from typing import Callable

import numpy as np
import pandas as pd

from workbench.recipe import Assumption, Relaxation, Statistic

DISPERSION, EXCESS_ZEROS, TAILS, CONSTANT_SCALE, SAME_ACROSS = (
    "dispersion", "excess_zeros", "tails", "constant_scale", "same_across")

# Likelihood families by the name of their random-variable operation, and
# which automatic assumptions each states.
COUNT_FAMILIES = {"poisson": (DISPERSION, EXCESS_ZEROS), "binomial": (DISPERSION,),
                  "negative_binomial": (EXCESS_ZEROS,)}
LOCATION_SCALE = {"normal": (TAILS, CONSTANT_SCALE), "t": (CONSTANT_SCALE,),
                  "laplace": (CONSTANT_SCALE,), "logistic": (CONSTANT_SCALE,)}
KNOWN = {**COUNT_FAMILIES, **LOCATION_SCALE}
FAMILY_WORDS = {"poisson": "Poisson", "binomial": "binomial", "negative_binomial": "negative binomial",
                "normal": "normal", "t": "Student-t", "laplace": "Laplace", "logistic": "logistic"}
KNOWN_WORDS = "Poisson, binomial, negative binomial, normal, Student-t, Laplace or logistic"

# A label column informs "same across its levels" only with several levels
# and replication within each: with two levels the spread of level offsets
# rests on one difference (Gelman 2006: few groups inform a group-level scale
# little), and a level seen once cannot be told from row noise.
MIN_LEVELS = 3
MIN_ROWS_PER_LEVEL = 2

# Priors of the expansion parameters, each on a dimensionless scale.
# Extra variance d at the average mean: half-normal(2) puts 2/3 of its mass
# below doubling the variance and still allows counts several times as
# variable (common practice for weakly informative scale priors).
DISPERSION_PRIOR_SD = 2.0
# Share of structural zeros: beta(1, 9) has mean 0.1 and allows a third of
# the rows with 4% probability.
ZERO_PRIOR = (1.0, 9.0)
# 1/nu: beta(1, 2) has mean 1/3, so nu of 1 to 100 are all plausible a priori.
INVERSE_NU_PRIOR = (1.0, 2.0)
# Log-scale slope per standard deviation of the fitted location: normal(0, 1)
# allows the scale to change several-fold across the range of the fit.
SCALE_SLOPE_PRIOR_SD = 1.0
# Level offsets' sd on the linear predictor's scale: half-normal(1) (Gelman
# 2006's weakly informative half-normal for a group-level scale).
OFFSET_PRIOR_SD = 1.0

# How far from the null an expansion parameter must be to matter:
# 10% extra variance at the average mean; 2% structural zeros; nu above 10
# (a t with 10 degrees of freedom has a 0.99 quantile within 5% of the
# normal's); a scale changing by 10% per sd of the outcome along the fit; level
# offsets of sd 0.1 on the linear predictor (10% on a rate or a location in
# tenths of the scale).
NEGLIGIBLE = {DISPERSION: 0.1, EXCESS_ZEROS: 0.02, TAILS: 0.1, CONSTANT_SCALE: 0.1, SAME_ACROSS: 0.1}

# Keeps the limiting likelihoods finite at the null: a negative binomial
# whose shape reaches 1e6 times the mean is a Poisson to six digits, and its
# log-density stays accurate (gammaln of the shape keeps many digits); the
# same for a Student-t whose nu reaches 1e6.
LIMIT_GUARD = 1e-6

STATEMENTS = {
    DISPERSION: "The counts of {var} vary no more than its {family} likelihood allows.",
    EXCESS_ZEROS: "The counts of {var} have no more zeros than its {family} likelihood gives.",
    TAILS: "The errors of {var} have normal tails: no more extreme values than a normal gives.",
    CONSTANT_SCALE: "The scale of {var} is the same whatever its fitted value.",
    SAME_ACROSS: "The outcomes do not differ by {column}, which the model does not use.",
}
ADVICE = {
    DISPERSION: ("Let {var} vary more than {family} (a negative binomial or beta-binomial "
                 "likelihood, or a term for what differs between rows)."),
    EXCESS_ZEROS: ("Add a process that makes zeros (a zero-inflated likelihood), or find what "
                   "makes some rows certain to be zero."),
    TAILS: "Use heavier-tailed errors for {var} (Student-t), or find the rows that stand out.",
    CONSTANT_SCALE: "Let the scale of {var} depend on its fitted value (or model it on another scale).",
    SAME_ACROSS: "Add an effect of {column} (a varying intercept per level) to the model.",
}
MEANINGS = {
    DISPERSION: "extra variance of {var} at the average mean, beyond {family}",
    EXCESS_ZEROS: "share of structural zeros of {var}",
    TAILS: "1/nu of Student-t errors for {var}",
    CONSTANT_SCALE: "slope of the log scale of {var} on its fitted location, in sds of {var}",
    SAME_ACROSS: "sd of offsets per level of {column} on the linear predictor",
}
STEMS = {DISPERSION: "extra_dispersion", EXCESS_ZEROS: "zero_share", TAILS: "inverse_nu",
         CONSTANT_SCALE: "scale_slope", SAME_ACROSS: "offset_sd"}


@dataclass(frozen=True)
class Spec:
    """One automatic assumption as plain data.

    ``variables`` are the observed variables it concerns (one, except for
    ``same_across``), ``families`` their likelihood families, ``parameter``
    the expansion parameter's name, ``column`` the label column of
    ``same_across`` and ``levels`` its levels in code order. A non-empty
    ``reason`` says why it could not be checked.
    """

    key: str
    kind: str
    variables: tuple[str, ...]
    families: tuple[str, ...]
    parameter: str = ""
    column: str = ""
    levels: tuple[str, ...] = ()
    reason: str = ""

    def words(self) -> dict:
        return {"var": ", ".join(self.variables), "column": self.column,
                "family": " and ".join(dict.fromkeys(FAMILY_WORDS.get(f, f) for f in self.families))}


# --- reading the model -----------------------------------------------------------------


def family_of(rv) -> str:
    """The likelihood family of an observed variable ('' for one with no known name)."""
    from pytensor.tensor.random.op import RandomVariable

    op = getattr(rv.owner, "op", None)
    if isinstance(op, RandomVariable):
        return str(getattr(op, "name", "") or "")
    return ""


def _family_text(rv) -> str:
    op = getattr(rv.owner, "op", None)
    name = family_of(rv) or type(op).__name__.removesuffix("RV")
    return FAMILY_WORDS.get(name, name)


def _parameters(rv) -> list:
    return list(rv.owner.op.dist_params(rv.owner))


def _fresh_name(stem: str, taken: set[str]) -> str:
    name = stem
    while name in taken:
        name += "_"
    taken.add(name)
    return name


def derive(model, frame: pd.DataFrame, build: Callable[[pd.DataFrame], object],
           declared: set[str] = frozenset()) -> tuple[Spec, ...]:
    """The automatic assumptions of a model built on ``frame``.

    Parameters
    ----------
    model : pymc.Model
        ``build(frame)``, already built.
    frame : pandas.DataFrame
        The table.
    build : callable
        The model file's ``build_model`` (rebuilt on altered tables to learn
        which columns the model reads).
    declared : set of str
        Keys the user declares in ``ASSUMPTIONS``: those replace the
        automatic ones and are not derived.

    Returns
    -------
    tuple of Spec
        In the order: per observed variable its likelihood's assumptions,
        then one per unused label column.
    """
    taken = set(model.named_vars)
    specs: list[Spec] = []
    fitted = FittedValues(build)
    for rv in model.observed_RVs:
        family, var = family_of(rv), rv.name
        if family not in KNOWN:
            discrete = rv.dtype.startswith(("int", "uint"))
            kinds = (DISPERSION, EXCESS_ZEROS) if discrete else (TAILS, CONSTANT_SCALE)
            why = (f"the likelihood of {var} ({_family_text(rv)}) has no automatic expansion; "
                   f"they exist for {KNOWN_WORDS} likelihoods")
            specs += [Spec(f"{k}:{var}", k, (var,), (family,), reason=why) for k in kinds]
            continue
        for kind in KNOWN[family]:
            reason = _not_applicable(kind, family, rv, model, frame, fitted)
            parameter = "" if reason else _fresh_name(f"{STEMS[kind]}_{var}", taken)
            specs.append(Spec(f"{kind}:{var}", kind, (var,), (family,), parameter, reason=reason))
    specs += _label_columns(model, frame, build, taken)
    specs = [s for s in specs if s.key not in declared]
    return tuple(_built_or_reason(s, model, frame) for s in specs)


def _not_applicable(kind, family, rv, model, frame, fitted) -> str:
    """Why ``kind`` cannot be checked for this variable ('' when it can)."""
    if kind == DISPERSION and family == "binomial":
        try:
            trials = np.asarray(_parameters(rv)[0].eval())
        except Exception:  # trials that depend on parameters: no fixed n to read
            return f"the trials of {rv.name} are not fixed numbers"
        if trials.size and np.max(trials) <= 1:
            return (f"{rv.name} is binary (one trial per row): a single trial carries no "
                    f"variation beyond the binomial")
    if kind in (TAILS, CONSTANT_SCALE) and not _estimated(_parameters(rv)[-1], model):
        # A scale given by the table is a known measurement error (a meta-analysis's
        # standard errors): its shape and size are the data provider's, not the model's.
        return f"the scale of {rv.name} is given by the data (a known error), not estimated"
    if kind == CONSTANT_SCALE:
        location = fitted.prior_location(frame, rv.name, model)
        if location is None or np.ndim(location) == 0 or np.size(location) < 3 \
                or np.ptp(location) <= 1e-12 * max(1.0, float(np.max(np.abs(location)))):
            return f"the fitted location of {rv.name} is the same in every row"
    return ""


def _estimated(expression, model) -> bool:
    """Whether ``expression`` depends on a free variable of ``model``."""
    from pytensor.graph.traversal import ancestors

    free = set(model.free_RVs)
    return any(var in free for var in ancestors([expression]))


def _label_columns(model, frame: pd.DataFrame, build, taken: set[str]) -> list[Spec]:
    """``same_across`` for each text column the model does not read."""
    from pymc.backends.arviz import find_observations

    observed = find_observations(model)
    eligible = [rv for rv in model.observed_RVs if family_of(rv) in KNOWN
                and np.asarray(observed[rv.name]).shape == (len(frame),)]
    specs = []
    baseline = None
    for column in frame.columns:
        values = frame[column]
        if not _is_label(values) or values.isna().any():
            continue
        counts = values.astype(str).value_counts()
        if counts.size < 2 or counts.size == len(frame):
            continue  # one level, or one row per level (an identifier): nothing to compare
        if baseline is None:
            baseline = _fingerprint(model)
        if not _unused(frame, column, build, baseline):
            continue
        name = str(column)
        key = f"{SAME_ACROSS}:{name}"
        variables = tuple(rv.name for rv in eligible) or tuple(rv.name for rv in model.observed_RVs)
        families = tuple(family_of(model[v]) for v in variables)
        levels = tuple(sorted(counts.index))
        reason = ""
        if counts.size < MIN_LEVELS:
            reason = f"{name} has {counts.size} levels; at least {MIN_LEVELS} are needed"
        elif counts.min() < MIN_ROWS_PER_LEVEL:
            reason = (f"level '{counts.idxmin()}' of {name} has {counts.min()} row; at least "
                      f"{MIN_ROWS_PER_LEVEL} per level are needed")
        elif not eligible:
            reason = (f"no observed variable has one value per row of the table with a "
                      f"{KNOWN_WORDS} likelihood")
        parameter = "" if reason else _fresh_name(f"{name}_{STEMS[SAME_ACROSS]}", taken)
        specs.append(Spec(key, SAME_ACROSS, variables, families, parameter, name, levels, reason))
    return specs


def _is_label(values: pd.Series) -> bool:
    return (values.dtype == object or isinstance(values.dtype, pd.CategoricalDtype)
            or pd.api.types.is_string_dtype(values) or pd.api.types.is_bool_dtype(values))


def _fingerprint(model) -> str:
    """What a model's graph holds from its table: constants, data, coordinates."""
    from workbench.harness import _layout

    digest = hashlib.sha256(repr(_layout(model)).encode())
    for var in sorted(model.data_vars, key=lambda v: v.name):
        value = np.asarray(var.get_value())
        digest.update(value.tobytes() if value.dtype != object else repr(value.tolist()).encode())
    digest.update(repr(sorted((k, tuple(map(str, v or ()))) for k, v in model.coords.items())).encode())
    return digest.hexdigest()


def _unused(frame: pd.DataFrame, column, build, baseline: str) -> bool:
    """The model built with ``column`` set to one label is the same model: it ignores the column."""
    altered = frame.copy()
    altered[column] = str(frame[column].astype(str).iloc[0])
    try:
        return _fingerprint(build(altered)) == baseline
    except Exception:  # a model that fails without the column's levels reads it
        return False


def _built_or_reason(spec: Spec, model, frame: pd.DataFrame) -> Spec:
    """The spec, or the spec with the reason its relaxed model cannot be built or started."""
    from workbench.modelfile import check_initial_point

    if spec.reason:
        return spec
    try:
        relaxed = relaxed_model(spec, model, frame)
        check_initial_point(spec.key, relaxed, "relaxed model")
    except Exception as err:  # a graph shape the transformation does not handle
        text = " ".join(str(err).split())[:160]
        return Spec(spec.key, spec.kind, spec.variables, spec.families, "", spec.column,
                    spec.levels, f"its relaxed model could not be built from this model ({text})")
    return spec


# --- relaxations as transformations of the model graph ------------------------------------


def relaxed_model(spec: Spec, model, frame: pd.DataFrame):
    """``model`` with the likelihoods of ``spec.variables`` expanded by its parameter.

    The model is converted to PyMC's function-graph form, each observed
    variable's node is replaced by the expanded likelihood (whose parameters
    are the user's own expressions), the new free parameters are added as
    model variables, and the graph is converted back. Custom initial values
    are carried over.
    """
    import pytensor.tensor as pt
    from pymc.model.fgraph import ModelObservedRV, model_from_fgraph, model_observed_rv
    from pymc.pytensorf import toposort_replace

    from workbench.revisions import model_graph, model_with_initial

    graph, _, initial = model_graph(model)
    nodes = {node.op.name: node for node in graph.toposort() if isinstance(node.op, ModelObservedRV)}
    swaps = []
    shared = _new_parameters(spec)
    for var in spec.variables:
        node = nodes[var]
        rv, value = node.inputs
        expanded = _expanded_likelihood(spec, rv, value, shared, frame, pt)
        swaps.append((node.outputs[0], model_observed_rv(expanded, value, var, *node.op.dims)))
    toposort_replace(graph, swaps)
    return model_with_initial(model_from_fgraph(graph, mutate_fgraph=True), initial)


def _free(name: str, dist, transform):
    """A new free model variable in function-graph form."""
    from pymc.model.fgraph import model_free_rv
    from pymc.util import get_transformed_name

    value = dist.type()
    value.name = get_transformed_name(name, transform) if transform is not None else name
    return model_free_rv(dist, value, transform, name)


def _new_parameters(spec: Spec) -> dict:
    """The expansion parameter (and, for level offsets, the standardized offsets)."""
    import pymc as pm
    from pymc.distributions import transforms

    if spec.kind == DISPERSION:
        return {"d": _free(spec.parameter, pm.HalfNormal.dist(DISPERSION_PRIOR_SD), transforms.log)}
    if spec.kind == EXCESS_ZEROS:
        return {"pi": _free(spec.parameter, pm.Beta.dist(*ZERO_PRIOR), transforms.logodds)}
    if spec.kind == TAILS:
        return {"inv_nu": _free(spec.parameter, pm.Beta.dist(*INVERSE_NU_PRIOR), transforms.logodds)}
    if spec.kind == CONSTANT_SCALE:
        return {"slope": _free(spec.parameter, pm.Normal.dist(0.0, SCALE_SLOPE_PRIOR_SD), None)}
    sd = _free(spec.parameter, pm.HalfNormal.dist(OFFSET_PRIOR_SD), transforms.log)
    z = _free(f"{spec.parameter}_z", pm.Normal.dist(0.0, 1.0, shape=(len(spec.levels),)), None)
    return {"sd": sd, "z": z}


def _expanded_likelihood(spec: Spec, rv, value, new: dict, frame, pt):
    """The expanded distribution of one observed variable (unregistered, like ``.dist``)."""
    import pymc as pm

    family = family_of(rv)
    params = _parameters(rv)
    shape = tuple(value.shape)
    if spec.kind == DISPERSION and family == "poisson":
        (mu,) = params
        alpha = pt.mean(mu) / (new["d"] + LIMIT_GUARD)
        return pm.NegativeBinomial.dist(mu=mu, alpha=alpha, shape=shape)
    if spec.kind == DISPERSION and family == "binomial":
        n, p = params
        nbar = pt.maximum(pt.mean(pt.cast(n, "float64")), 1.0 + 1e-9)
        rho = 1.0 - pt.exp(-(new["d"] + LIMIT_GUARD) / (nbar - 1.0))  # intra-row correlation
        concentration = 1.0 / rho - 1.0
        return pm.BetaBinomial.dist(alpha=p * concentration, beta=(1.0 - p) * concentration, n=n,
                                    shape=shape)
    if spec.kind == EXCESS_ZEROS and family == "poisson":
        (mu,) = params
        return pm.ZeroInflatedPoisson.dist(psi=1.0 - new["pi"], mu=mu, shape=shape)
    if spec.kind == EXCESS_ZEROS and family == "negative_binomial":
        n, p = params
        return pm.ZeroInflatedNegativeBinomial.dist(psi=1.0 - new["pi"], n=n, p=p, shape=shape)
    if spec.kind == TAILS:
        mu, sigma = params
        return pm.StudentT.dist(nu=1.0 / (new["inv_nu"] + LIMIT_GUARD), mu=mu, sigma=sigma,
                                shape=shape)
    if spec.kind == CONSTANT_SCALE:
        *head, location, scale = params
        # The fitted location in units of the outcome's observed sd (read from the
        # observed container, so a refit on new outcomes needs no recompile). Not
        # in units of its own sd: that would keep z at full size as the slopes of
        # the location shrink, and let a spread that grows with z stand in for
        # the trend (a second mode with a flat location).
        observed = pt.cast(value, "float64")
        spread = pt.sqrt(pt.mean((observed - pt.mean(observed)) ** 2)) + 1e-12
        z = (location - pt.mean(location)) / spread
        scale = scale * pt.exp(new["slope"] * z)
        return _location_scale(family, head, location, scale, shape)
    if spec.kind == SAME_ACROSS:
        codes = level_codes(spec, frame)
        offset = new["sd"] * new["z"][codes]
        if family == "poisson":
            return pm.Poisson.dist(mu=params[0] * pt.exp(offset), shape=shape)
        if family == "negative_binomial":
            n, p = params
            return pm.NegativeBinomial.dist(n=n, mu=n * (1.0 - p) / p * pt.exp(offset), shape=shape)
        if family == "binomial":
            n, p = params
            return pm.Binomial.dist(n=n, logit_p=pt.log(p) - pt.log1p(-p) + offset, shape=shape)
        *head, location, scale = params
        return _location_scale(family, head, location + offset * scale, scale, shape)
    raise ValueError(f"no expansion of a {family} likelihood for {spec.kind}")


def _location_scale(family: str, head: list, location, scale, shape):
    import pymc as pm

    if family == "normal":
        return pm.Normal.dist(mu=location, sigma=scale, shape=shape)
    if family == "t":
        return pm.StudentT.dist(nu=head[0], mu=location, sigma=scale, shape=shape)
    if family == "laplace":
        return pm.Laplace.dist(mu=location, b=scale, shape=shape)
    return pm.Logistic.dist(mu=location, s=scale, shape=shape)


def level_codes(spec: Spec, frame: pd.DataFrame) -> np.ndarray:
    """Row -> code of the row's level of ``spec.column`` (levels unseen at derivation: 0)."""
    position = {level: i for i, level in enumerate(spec.levels)}
    return np.array([position.get(v, 0) for v in frame[spec.column].astype(str)], dtype="int64")


# --- fitted values of the user's model, per posterior draw ---------------------------------


class FittedValues:
    """The parameters of each observed variable's likelihood, per posterior draw.

    Built once per table from the user's model: each likelihood parameter
    (a mean, a probability, a location and a scale) as a function of the
    free variables, vectorized over draws and compiled without a JIT (it
    runs a handful of times per check). Draws of a relaxed fit hold every
    free variable of the user's model too, so the same function scores
    statistics under relaxed models.
    """

    # Compiled functions and results kept per process: a check reads a few
    # tables (the data, perhaps its calibration replicates) and a few fits.
    KEEP = 8

    def __init__(self, build: Callable[[pd.DataFrame], object]):
        self.build = build
        self._functions: dict = {}
        self._results: dict = {}

    def _function(self, frame: pd.DataFrame, var: str, model=None):
        key = (id(frame), var)
        if key not in self._functions or self._functions[key][0] is not frame:
            # (frame, names, function, shape of the observed values)
            self._functions[key] = (frame, *_compile_parameters(model or self.build(frame), var))
            while len(self._functions) > self.KEEP:
                self._functions.pop(next(iter(self._functions)))
        return self._functions[key][1:]

    def parameters(self, frame: pd.DataFrame, var: str, draws: dict) -> list[np.ndarray]:
        """The likelihood parameters of ``var``, one row per draw (flattened to (S, n))."""
        names, function, shape = self._function(frame, var)
        inputs = [np.asarray(draws[n]) for n in names]
        digest = hashlib.sha256(var.encode())
        for value in inputs:
            digest.update(str(value.shape).encode())
            digest.update(np.ascontiguousarray(value).tobytes())
        key = (id(frame), digest.hexdigest())
        if key not in self._results:
            s = inputs[0].shape[0] if inputs else 1
            out = function(*inputs)
            # A parameter no free variable touches (binomial trials) has no draw axis.
            self._results[key] = [np.broadcast_to(np.asarray(o, dtype=float), (s,) + shape)
                                  .reshape(s, -1) for o in out]
            while len(self._results) > self.KEEP:
                self._results.pop(next(iter(self._results)))
        return self._results[key]

    def prior_location(self, frame: pd.DataFrame, var: str, model) -> np.ndarray | None:
        """The location of ``var`` at one prior draw (to tell whether it varies by row)."""
        import pymc as pm

        try:
            names, function, _ = self._function(frame, var, model)
            free = [model[n] for n in names]
            values = list(pm.draw(free, random_seed=0)) if free else []
            out = function(*[np.asarray(v)[None] for v in values])
        except Exception:  # a model whose prior cannot be drawn: treat the location as unknown
            return None
        return np.asarray(out[-2], dtype=float).ravel()


def _compile_parameters(model, var: str):
    """(free variable names, function of their batched draws -> the likelihood's parameters)."""
    import pytensor
    import pytensor.tensor as pt
    from pytensor.graph.replace import graph_replace, vectorize_graph

    rv = model[var]
    value = model.rvs_to_values[rv]
    outputs = [pt.broadcast_to(pt.cast(p, "float64"), value.shape) for p in _parameters(rv)]
    free = list(model.free_RVs)
    single = {v: v.type() for v in free}
    outputs = graph_replace(outputs, single, strict=False)
    batched = {single[v]: pt.tensor(dtype=v.dtype, shape=(None,) + v.type.shape) for v in free}
    outputs = vectorize_graph(outputs, batched)
    function = pytensor.function(list(batched.values()), outputs, mode="FAST_COMPILE",
                                 on_unused_input="ignore")
    shape = tuple(int(n) for n in value.shape.eval())
    return [v.name for v in free], function, shape


def _moments(family: str, params: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Mean and variance per draw and row (location and squared scale for location-scale)."""
    if family == "poisson":
        return params[0], params[0]
    if family == "binomial":
        n, p = params
        return n * p, n * p * (1.0 - p)
    if family == "negative_binomial":
        n, p = params
        mean = n * (1.0 - p) / p
        return mean, mean / p
    return params[-2], params[-1] ** 2


def _outcome(outcomes: dict, var: str) -> np.ndarray:
    y = np.asarray(outcomes[var], dtype=float)
    return y.reshape(y.shape[0], -1)


def _frame(data) -> pd.DataFrame:
    return getattr(data, "frame", data)


def pearson_dispersion(spec: Spec, fitted: FittedValues, data, outcomes, draws) -> np.ndarray:
    """Mean of (y - E y)^2 / Var y over rows, per draw (1 when the likelihood's variance fits).

    References
    ----------
    McCullagh and Nelder (1989), Generalized Linear Models, sec. 4.5.
    """
    var = spec.variables[0]
    mean, variance = _moments(spec.families[0], fitted.parameters(_frame(data), var, draws))
    y = _outcome(outcomes, var)
    return np.mean((y - mean) ** 2 / np.maximum(variance, 1e-12), axis=1)


def share_of_zeros(spec: Spec, fitted: FittedValues, data, outcomes, draws) -> np.ndarray:
    """Share of zero counts, per draw.

    References
    ----------
    Lambert (1992), Technometrics 34, 1-14.
    """
    return np.mean(_outcome(outcomes, spec.variables[0]) == 0, axis=1)


def _standardized(spec: Spec, fitted: FittedValues, data, outcomes, draws, var: str, family: str):
    params = fitted.parameters(_frame(data), var, draws)
    mean, variance = _moments(family, params)
    return (_outcome(outcomes, var) - mean) / np.sqrt(np.maximum(variance, 1e-24)), mean


def residual_kurtosis(spec: Spec, fitted: FittedValues, data, outcomes, draws) -> np.ndarray:
    """Kurtosis of the standardized residuals, mean(r^4) / mean(r^2)^2, per draw (3 for normal errors).

    References
    ----------
    Lange, Little and Taylor (1989), JASA 84, 881-896.
    """
    r, _ = _standardized(spec, fitted, data, outcomes, draws, spec.variables[0], spec.families[0])
    return np.mean(r**4, axis=1) / np.maximum(np.mean(r**2, axis=1) ** 2, 1e-24)


def scale_trend(spec: Spec, fitted: FittedValues, data, outcomes, draws) -> np.ndarray:
    """Least-squares slope of |standardized residual| on the standardized fitted location, per draw.

    References
    ----------
    Carroll, R. J. and Ruppert, D. (1988). Transformation and Weighting in
    Regression, sec. 2.7 (absolute residuals against fitted values).
    """
    r, location = _standardized(spec, fitted, data, outcomes, draws, spec.variables[0],
                                spec.families[0])
    z = location - location.mean(axis=1, keepdims=True)
    z = z / np.maximum(np.sqrt(np.mean(z**2, axis=1, keepdims=True)), 1e-12)
    return np.mean(np.abs(r) * z, axis=1)


def level_variance(spec: Spec, fitted: FittedValues, data, outcomes, draws) -> np.ndarray:
    """Variance across the levels of ``spec.column`` of the mean standardized residual, per draw.

    Summed over the variables the assumption concerns.

    References
    ----------
    Gelman, A. and Hill, J. (2007). Data Analysis Using Regression and
    Multilevel/Hierarchical Models, sec. 11.4 (residuals by group).
    """
    codes = level_codes(spec, _frame(data))
    count = np.bincount(codes, minlength=len(spec.levels)).astype(float)
    seen = count > 0
    total = 0.0
    for var, family in zip(spec.variables, spec.families):
        r, _ = _standardized(spec, fitted, data, outcomes, draws, var, family)
        sums = np.zeros((r.shape[0], len(spec.levels)))
        np.add.at(sums.T, codes, r.T)
        means = sums[:, seen] / count[seen]
        total = total + means.var(axis=1)
    return total


STATISTICS = {
    DISPERSION: ("pearson_dispersion", "Pearson dispersion of {var}", pearson_dispersion, "greater"),
    EXCESS_ZEROS: ("share_zero_counts", "share of zeros of {var}", share_of_zeros, "greater"),
    TAILS: ("residual_kurtosis", "kurtosis of the standardized residuals of {var}",
            residual_kurtosis, "greater"),
    CONSTANT_SCALE: ("scale_trend", "slope of |standardized residual| of {var} on its fitted value",
                     scale_trend, "two"),
    SAME_ACROSS: ("level_variance", "variance across levels of {column} of the mean standardized "
                  "residual", level_variance, "greater"),
}


def _because(reason: str, data) -> str:
    return reason


def relaxed_build(build: Callable, spec: Spec, frame: pd.DataFrame):
    """The user's model for ``frame``, expanded as ``spec`` says (a relaxation's builder)."""
    return relaxed_model(spec, build(frame), frame)


def assumptions(specs: tuple[Spec, ...], fitted: FittedValues) -> tuple[Assumption, ...]:
    """The harness's assumption objects for ``specs``.

    An applicable spec gets its targeted statistic and its relaxation; one
    with a reason gets neither and is reported ``unchecked`` with it.
    """
    out = []
    for spec in specs:
        words = spec.words()
        statement = STATEMENTS[spec.kind].format(**words)
        advice = ADVICE[spec.kind].format(**words)
        if spec.reason:
            out.append(Assumption(spec.key, statement, advice=advice,
                                  informed_by=partial(_because, spec.reason)))
            continue
        stem, meaning, compute, sides = STATISTICS[spec.kind]
        name = f"{stem}_{spec.column or spec.variables[0]}"
        out.append(Assumption(
            key=spec.key,
            statement=statement,
            statistic=Statistic(name, meaning.format(**words), partial(compute, spec, fitted), sides),
            relaxation=Relaxation(spec.parameter, MEANINGS[spec.kind].format(**words),
                                  partial(relaxed_build, fitted.build, spec), null=0.0,
                                  negligible=NEGLIGIBLE[spec.kind]),
            advice=advice,
        ))
    return tuple(out)
