"""Computation: did the sampler explore the posterior faithfully?

Sampler health comes from ArviZ (divergences and tree depth counted from
``sample_stats``, E-BFMI, rank-normalised split R-hat, bulk and tail ESS);
this module adds the *location* of each problem, in terms of the model's own
parameters, so that the verdict can say what to change.

Which variables
---------------
R-hat, ESS, correlations and divergence locations are computed over the
*free parameters*: the variables the sampler moves (``model.free_RVs``; from a
DataTree alone, the variables of the ``log_prior`` group, which holds exactly
one entry per free parameter). Deterministics are left out: they are
functions of the free parameters, they are often indexed by data rows (one
probability per row would flood every list) and clipped ones are constant in
places, where R-hat is undefined. The one exception is the boundary scan,
which looks at every posterior variable bounded in (0, 1), deterministics
included, because a probability pushed to an edge is usually a deterministic.

Locations are measured on the *unconstrained* scale the sampler works on
(log for positive parameters, logit for probabilities), using the model's
value transforms; without a model, or for a transform whose bounds are
themselves parameters, the posterior scale is used as it is.

Finding kinds (all with ``assumption="computation"``)
------------------------------------------------------
divergences   count of divergent transitions; the parameters whose divergent
              draws sit furthest from the non-divergent ones (quantile of the
              divergent median within the non-divergent draws, standardised
              mean difference), strongest first.
funnel        a scale parameter that is the sd of a vector of other free
              parameters (a centred hierarchy, read from the model graph) and
              where the divergent draws sit along it.
boundary      (0, 1)-bounded variables whose divergent draws lie at an edge.
rhat          the worst split R-hat, the per-chain means and spreads of that
              parameter, and which chains sit together (chains whose central
              90% intervals overlap form one group).
ess           smallest bulk and tail ESS and their parameters.
bfmi          E-BFMI per chain and the parameter most correlated with the
              energy.
treedepth     draws that hit the maximum tree depth, the step size, the most
              correlated pair and the range of posterior scales.
ridge         the most correlated parameter pairs with how much each member
              contracted from its prior.
contraction   the parameters whose posterior sd is the largest share of their
              prior sd (needs the ``prior`` group).

A check reports numbers only; :mod:`workbench.rules.computation` judges them.

References
----------
Betancourt, M. (2016). Diagnosing suboptimal cotangent disintegrations in
Hamiltonian Monte Carlo. arXiv:1604.00695.
Betancourt, M. (2017). A conceptual introduction to Hamiltonian Monte Carlo.
arXiv:1701.02434 (divergences and the funnel).
Betancourt, M. and Girolami, M. (2015). Hamiltonian Monte Carlo for
hierarchical models. In Current Trends in Bayesian Methodology with
Applications, CRC Press (centred and non-centred forms).
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Bürkner, P.-C. (2021).
Rank-normalization, folding, and localization: an improved R-hat for
assessing convergence of MCMC. Bayesian Analysis 16(2), 667-718.
Schad, D. J., Betancourt, M. and Vasishth, S. (2021). Toward a principled
Bayesian workflow in cognitive science. Psychological Methods 26(1), 103-126
(posterior contraction).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

from workbench.checks import Context, check
from workbench.findings import COMPUTATION, Finding

SAMPLE_DIMS = ("chain", "draw")
# How many located parameters or pairs a finding carries: enough to name the
# culprit and its companions, few enough to read in one sentence.
TOP = 3
# Below this many divergent draws a median says nothing about where they sit.
MIN_DIVERGENT_TO_LOCATE = 5
# The funnel of a centred scale is one hypothesis fixed in advance by the
# model graph (divergences at small values of that scale), not a scan over
# every parameter: three divergent draws at its low end already tell.
MIN_DIVERGENT_FOR_FUNNEL = 3
# "At an edge" for a (0, 1) variable: within 1% of 0 or 1 (logit beyond +-4.6).
EDGE = 0.01
# Chains whose central 90% intervals overlap are said to sit together.
CHAIN_INTERVAL = (0.05, 0.95)
# A pairwise correlation matrix grows with the square of the element count;
# past this many elements only scalar parameters and the first elements enter.
MAX_PAIR_ELEMENTS = 300
# Location-scale families whose last distribution parameter is the scale.
SCALE_FAMILIES = {"normal", "t", "studentt", "laplace", "cauchy", "lognormal", "logistic"}
# How a transform's unconstrained scale is named in a sentence.
SCALE_NAMES = {"LogTransform": "log", "LogOddsTransform": "logit", "Interval": "interval-logit",
               "IntervalTransform": "interval-logit"}


# --- summary numbers (what summary.json carries) -------------------------------


def computation_summary(idata: xr.DataTree, model=None) -> dict:
    """Sampler health in the numbers of ``summary.json``.

    Parameters
    ----------
    idata : xarray.DataTree
        A fit with ``posterior`` and ``sample_stats`` groups. R-hat and ESS
        are taken over the free parameters: those of ``model`` when given,
        else the variables of the ``log_prior`` group when it is present,
        else every posterior variable.
    model : pymc.Model, optional
        The fitted model.

    Returns
    -------
    dict
        ``divergences`` (int), ``max_rhat``, ``min_ess_bulk``,
        ``min_ess_tail``, ``min_bfmi`` (floats; NaN when undefined) and
        ``treedepth_hits`` (int).

    References
    ----------
    Vehtari et al. (2021), Bayesian Analysis 16(2) (R-hat, bulk and tail ESS);
    Betancourt (2016), arXiv:1604.00695 (E-BFMI).
    """
    import arviz as az

    posterior = _free_posterior(idata, model)
    stats = idata["sample_stats"].to_dataset() if "sample_stats" in idata.children else xr.Dataset()
    return {
        "divergences": _count(stats, "diverging"),
        "max_rhat": _extreme(az.rhat(posterior), np.nanmax),
        "min_ess_bulk": _extreme(az.ess(posterior, method="bulk"), np.nanmin),
        "min_ess_tail": _extreme(az.ess(posterior, method="tail"), np.nanmin),
        "min_bfmi": _min_bfmi(idata),
        "treedepth_hits": _count(stats, "maxdepth_reached", "reached_max_treedepth"),
    }


def _count(stats: xr.Dataset, *names: str) -> int:
    for name in names:
        if name in stats:
            return int(np.asarray(stats[name].values, dtype=bool).sum())
    return 0


def _extreme(result: xr.Dataset, reduce) -> float:
    values = np.concatenate([np.ravel(da.values) for da in result.data_vars.values()] or [[]])
    values = values[np.isfinite(values)]
    return float(reduce(values)) if values.size else float("nan")


def _min_bfmi(idata: xr.DataTree) -> float:
    if "sample_stats" not in idata.children or "energy" not in idata["sample_stats"].data_vars:
        return float("nan")
    return float(np.nanmin(_bfmi_per_chain(idata)))


def _bfmi_per_chain(idata: xr.DataTree) -> np.ndarray:
    import arviz as az

    return np.atleast_1d(np.asarray(az.bfmi(idata["sample_stats"].to_dataset())["energy"].values))


def _free_names(idata: xr.DataTree, model) -> list[str]:
    posterior = idata["posterior"].data_vars
    if model is not None:
        names = [rv.name for rv in model.free_RVs if rv.name in posterior]
    elif "log_prior" in idata.children:
        names = [n for n in posterior if n in idata["log_prior"].data_vars]
    else:
        names = []
    return names or list(posterior)


def _free_posterior(idata: xr.DataTree, model) -> xr.Dataset:
    return idata["posterior"].to_dataset()[_free_names(idata, model)]


# --- unconstrained draws, element by element ----------------------------------


@dataclass
class Elements:
    """Scalar elements of some variables, draws on the unconstrained scale.

    ``values`` has shape (chain, draw, K); ``labels[k]`` names element k
    (``theta[3]``), ``variable[k]`` its variable and ``scale[k]`` the scale
    it is measured on (``log``, ``logit`` or empty for the natural scale).
    """

    values: np.ndarray
    labels: list[str]
    variable: list[str]
    scale: list[str]

    def flat(self) -> np.ndarray:
        return self.values.reshape(-1, self.values.shape[-1])

    def named(self, k: int) -> str:
        """``log tau``: the element with the scale it was measured on."""
        return f"{self.scale[k]} {self.labels[k]}".strip()


def unconstrained(ds: xr.Dataset, model) -> tuple[xr.Dataset, dict[str, str]]:
    """The variables of ``ds`` on the model's unconstrained scale.

    Parameters
    ----------
    ds : xarray.Dataset
        Draws of free parameters with ``chain`` and ``draw`` dimensions.
    model : pymc.Model or None
        Supplies each parameter's value transform; None keeps every value.

    Returns
    -------
    (xarray.Dataset, dict)
        The transformed draws (through ArviZ's ``get_unconstrained_samples``)
        and the scale name (``log``, ``logit``, ...) of each transformed
        variable. Variables without a transform, or whose transform bounds
        are themselves parameters, keep their values.
    """
    import arviz as az

    if model is None:
        return ds, {}
    funcs, scales = {}, {}
    for rv in model.free_RVs:
        if rv.name not in ds.data_vars:
            continue
        forward = _forward(model, rv)
        if forward is not None:
            funcs[rv.name] = forward
            name = type(model.rvs_to_transforms[rv]).__name__
            scales[rv.name] = SCALE_NAMES.get(name, "unconstrained")
    tree = xr.DataTree.from_dict({"posterior": ds})
    out = az.get_unconstrained_samples(tree, transform_funcs=funcs, return_dataset=True)
    return out, scales


def _forward(model, rv):
    """A DataArray -> DataArray function for the value transform of ``rv``."""
    import pytensor
    import pytensor.tensor as pt
    from pytensor.graph.traversal import ancestors
    from pytensor.tensor.random.op import RandomVariable

    transform = model.rvs_to_transforms.get(rv)
    if transform is None:
        return None
    x = pt.tensor(dtype=rv.dtype, shape=(None,) * (rv.ndim + 1))
    try:
        out = transform.forward(x, *rv.owner.inputs)
    except Exception:  # a transform we cannot apply to a batch: keep the posterior scale
        return None
    # Bounds that are themselves parameters would need every draw's bounds.
    if any(v.owner is not None and isinstance(v.owner.op, RandomVariable) for v in ancestors([out])):
        return None
    fn = pytensor.function([x], out)

    def apply(da: xr.DataArray) -> xr.DataArray:
        values = da.values
        flat = fn(values.reshape((-1,) + values.shape[2:]).astype(rv.dtype))
        flat = np.asarray(flat).reshape(values.shape[:2] + np.shape(flat)[1:])
        if flat.shape == values.shape:
            return da.copy(data=flat)
        dims = list(SAMPLE_DIMS) + [f"{da.name}_unconstrained_dim_{i}" for i in range(flat.ndim - 2)]
        return xr.DataArray(flat, dims=dims, coords={d: da[d] for d in SAMPLE_DIMS}, name=da.name)

    return apply


def elements(ds: xr.Dataset, scales: dict[str, str] | None = None) -> Elements:
    """Flatten every variable of ``ds`` into scalar elements with readable labels.

    Parameters
    ----------
    ds : xarray.Dataset
        Variables with ``chain`` and ``draw`` dimensions (any others are
        flattened, labelled by their coordinate values).
    scales : dict, optional
        Scale name per variable, as returned by :func:`unconstrained`.

    Returns
    -------
    Elements
    """
    scales = scales or {}
    blocks, labels, variable, scale = [], [], [], []
    for name, da in ds.data_vars.items():
        da = da.transpose(*SAMPLE_DIMS, ...)
        other = [d for d in da.dims if d not in SAMPLE_DIMS]
        values = np.asarray(da.values, dtype=float)
        blocks.append(values.reshape(values.shape[:2] + (-1,)))
        if not other:
            labels.append(name)
        else:
            grids = np.meshgrid(*[da[d].values for d in other], indexing="ij")
            for index in zip(*[g.ravel() for g in grids]):
                labels.append(f"{name}[{','.join(str(i) for i in index)}]")
        count = blocks[-1].shape[-1]
        variable += [name] * count
        scale += [scales.get(name, "")] * count
    values = np.concatenate(blocks, axis=-1) if blocks else np.zeros((0, 0, 0))
    return Elements(values, labels, variable, scale)


# --- the check ----------------------------------------------------------------


@check
def sampler_health(context: Context) -> list[Finding]:
    """Sampler health and where its problems sit in parameter space.

    Reads only ``context.fit`` (its DataTree and, when present, its PyMC
    model). Returns one finding per diagnostic; see the module docstring for
    the kinds.

    References
    ----------
    Vehtari et al. (2021), Bayesian Analysis 16(2); Betancourt (2016),
    arXiv:1604.00695; Betancourt (2017), arXiv:1701.02434.
    """
    fit = context.fit
    if fit is None or "posterior" not in fit.idata.children:
        return []
    idata, model = fit.idata, getattr(fit, "model", None)
    free, draws, findings = _located_divergences(fit)
    revised = {r["scale"]: r for r in getattr(context, "revisions", ())}
    for f in findings:
        if f.kind == "funnel" and f.numbers["scale"] in revised:
            # The revision the funnel's advice names, already fitted: the rule says how it went.
            f.numbers["revision"] = revised[f.numbers["scale"]]
    stats = idata["sample_stats"].to_dataset() if "sample_stats" in idata.children else xr.Dataset()
    findings.append(_rhat_finding(free))
    findings.append(_ess_finding(free))
    if "energy" in stats:
        findings.append(_bfmi_finding(idata, draws))
    if "maxdepth_reached" in stats or "reached_max_treedepth" in stats:
        findings.append(_treedepth_finding(stats, draws))
    prior = _prior_elements(idata, model, list(free.data_vars))
    if draws.values.shape[-1] > 1:
        findings.append(_ridge_finding(draws, prior))
    if prior is not None:
        findings.append(_contraction_finding(draws, prior))
    return findings


def _located_divergences(fit) -> tuple[xr.Dataset, Elements, list[Finding]]:
    """Free posterior, its unconstrained elements, and the divergence findings of ``fit``."""
    idata, model = fit.idata, getattr(fit, "model", None)
    free = _free_posterior(idata, model)
    uncon, scales = unconstrained(free, model)
    draws = elements(uncon, scales)
    stats = idata["sample_stats"].to_dataset() if "sample_stats" in idata.children else xr.Dataset()
    if "diverging" not in stats:
        return free, draws, []
    diverging = np.asarray(stats["diverging"].transpose(*SAMPLE_DIMS).values, dtype=bool)
    return free, draws, _divergence_findings(idata, model, draws, diverging)


def funnel_of(fit) -> Finding | None:
    """The ``funnel`` finding of a fit (None without a centred scale or divergences).

    The same finding :func:`sampler_health` reports, without the other
    diagnostics: the harness asks it first, to decide whether the revision
    the funnel's advice names is worth fitting.
    """
    if fit is None or "posterior" not in fit.idata.children or "sample_stats" not in fit.idata.children:
        return None
    stats = fit.idata["sample_stats"]
    # Most fits stop here, before any draw is transformed: too few divergences, or no centred scale.
    if "diverging" not in stats or int(np.asarray(stats["diverging"].values, bool).sum()) < \
            MIN_DIVERGENT_FOR_FUNNEL:
        return None
    if not centred_scales(getattr(fit, "model", None), fit.idata["posterior"].to_dataset()):
        return None
    return next((f for f in _located_divergences(fit)[2] if f.kind == "funnel"), None)


def _finding(kind: str, value, detail: str, **numbers) -> Finding:
    return Finding(
        assumption=COMPUTATION, kind=kind, check=f"computation:{kind}",
        value=None if value is None else float(value), detail=detail, numbers=numbers,
    )


# --- divergences: where they sit -----------------------------------------------


def locate(values: np.ndarray, divergent: np.ndarray) -> list[dict]:
    """Where the divergent draws sit, element by element, most extreme first.

    Parameters
    ----------
    values : numpy.ndarray
        Draws x elements, on the scale the sampler works on.
    divergent : numpy.ndarray of bool
        One flag per draw.

    Returns
    -------
    list of dict
        One entry per element (``element`` is its column), ordered by
        ``|z|``, with:

        ``quantile``
            the mean percentile of the divergent draws among the
            non-divergent ones (the Mann-Whitney U statistic over the product
            of the group sizes): 0.5 when divergences are spread like the
            rest, near 0 when they crowd the low end;
        ``z``
            its normal-approximation score under "divergent draws are a
            random subset" (ignores autocorrelation, so it overstates a
            little);
        ``smd``
            the standardised mean difference, divergent minus non-divergent,
            in non-divergent sds;
        ``direction``
            ``small`` or ``large``.

    References
    ----------
    Betancourt (2017), arXiv:1701.02434, sec. 5 (divergences cluster where
    the curvature is too high for the step size); Mann, H. B. and Whitney,
    D. R. (1947). Annals of Mathematical Statistics 18(1), 50-60.
    """
    div, ok = values[divergent], values[~divergent]
    n_div, n_ok = len(div), len(ok)
    if n_div == 0 or n_ok == 0:
        return []
    quantile = np.empty(values.shape[1])
    for k in range(values.shape[1]):
        reference = np.sort(ok[:, k])
        below = np.searchsorted(reference, div[:, k], side="left")
        upto = np.searchsorted(reference, div[:, k], side="right")
        quantile[k] = (0.5 * (below + upto)).mean() / n_ok
    z = (quantile - 0.5) / np.sqrt((n_ok + n_div + 1) / (12.0 * n_ok * n_div))
    sd = ok.std(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        smd = np.where(sd > 0, (div.mean(axis=0) - ok.mean(axis=0)) / sd, 0.0)
    order = np.lexsort((-np.abs(smd), -np.abs(z)))
    return [
        {"element": int(k), "quantile": float(quantile[k]), "z": float(z[k]), "smd": float(smd[k]),
         "direction": "small" if quantile[k] < 0.5 else "large"}
        for k in order
    ]


def _divergence_findings(idata, model, draws: Elements, diverging: np.ndarray) -> list[Finding]:
    """The ``divergences`` finding and, when they can be located, ``funnel`` and ``boundary``."""
    count, total = int(diverging.sum()), int(diverging.size)
    per_chain = diverging.sum(axis=1).astype(int).tolist()
    mask = diverging.ravel()
    located = []
    if count >= MIN_DIVERGENT_FOR_FUNNEL and draws.values.shape[-1]:
        located = locate(draws.flat(), mask)
    top = [_place(draws, row) for row in located[:TOP]] if count >= MIN_DIVERGENT_TO_LOCATE else []
    scales = centred_scales(model, idata["posterior"].to_dataset())
    findings = [
        _finding(
            "divergences", count,
            f"{count} of {total} post-warm-up draws ended in a divergent transition.",
            count=count, draws=total, share=count / total if total else 0.0,
            per_chain=per_chain, located=top, locatable=count >= MIN_DIVERGENT_TO_LOCATE,
            centred_scales=sorted({item["scale"] for item in scales}),
        )
    ]
    if count < MIN_DIVERGENT_FOR_FUNNEL:
        return findings
    by_element = {row["element"]: row for row in located}
    funnel = _funnel_finding(scales, draws, by_element)
    if funnel is not None:
        findings.append(funnel)
    if count < MIN_DIVERGENT_TO_LOCATE:
        return findings
    edge = _boundary_finding(idata, model, mask)
    if edge is not None:
        findings.append(edge)
    return findings


def _place(draws: Elements, row: dict) -> dict:
    k = row["element"]
    return {"parameter": draws.labels[k], "variable": draws.variable[k], "scale": draws.scale[k],
            "quantile": row["quantile"], "z": row["z"], "smd": row["smd"],
            "direction": row["direction"]}


def centred_scales(model, posterior: xr.Dataset) -> list[dict]:
    """Free parameters that set the scale of a vector of other free parameters.

    Reads the model graph: a free random variable of a location-scale family
    (Normal, Student-t, Laplace, Cauchy, Logistic, LogNormal) with more than
    one element, whose scale argument depends directly on another free
    parameter. That is the centred form of a hierarchy, whose posterior has a
    funnel at small scales.

    Parameters
    ----------
    model : pymc.Model or None
        The fitted model (None finds nothing).
    posterior : xarray.Dataset
        Posterior draws, read for the number of elements of each child.

    Returns
    -------
    list of dict
        ``scale`` (the parent's name), ``child`` and ``location`` (the
        child's location parameter when it is a free parameter itself, else
        an empty string), one entry per parent-child link.

    References
    ----------
    Betancourt and Girolami (2015); Papaspiliopoulos, Roberts and Sköld (2007).
    A general framework for the parametrization of hierarchical models.
    Statistical Science 22(1), 59-73.
    """
    from pytensor.graph.traversal import ancestors

    if model is None:
        return []
    free = list(model.free_RVs)
    found = []
    for child in free:
        op = child.owner.op
        if getattr(op, "name", "") not in SCALE_FAMILIES or child.name not in posterior:
            continue
        if int(np.prod(posterior[child.name].shape[2:], dtype=int)) < 2:
            continue
        params = op.dist_params(child.owner)
        loc, scale = params[0] if len(params) == 2 else params[-2], params[-1]
        parents = [rv for rv in ancestors([scale], blockers=free) if rv in free and rv is not child]
        for parent in parents:
            found.append({"scale": parent.name, "child": child.name,
                          "location": _direct_parent(loc, free)})
    return found


def _direct_parent(var, free) -> str:
    """The free parameter ``var`` is (up to broadcasting), else ''."""
    seen = var
    while seen.owner is not None and seen not in free and type(seen.owner.op).__name__ in {
        "DimShuffle", "ExpandDims", "Alloc", "SpecifyShape"
    }:
        seen = seen.owner.inputs[0]
    return seen.name if seen in free else ""


def _funnel_finding(candidates: list[dict], draws: Elements, by_element: dict) -> Finding | None:
    best = None
    for item in candidates:
        for k, var in enumerate(draws.variable):
            if var != item["scale"] or k not in by_element:
                continue
            row = by_element[k]
            if best is None or abs(row["z"]) > abs(best[1]["z"]):
                best = (item, row, k)
    if best is None:
        return None
    item, row, k = best
    children = sorted({c["child"] for c in candidates if c["scale"] == item["scale"]})
    return _finding(
        "funnel", row["quantile"],
        f"{item['scale']} is the scale of {', '.join(children)} (centred form); divergent "
        f"draws of {draws.named(k)} sit on average at quantile {row['quantile']:.2f} "
        f"of the non-divergent draws (z = {row['z']:.1f}).",
        scale=item["scale"], parameter=draws.labels[k], measured_on=draws.scale[k],
        children=children, child=item["child"], location=item["location"],
        quantile=row["quantile"], z=row["z"], smd=row["smd"], direction=row["direction"],
    )


def probabilities(idata: xr.DataTree, model) -> list[str]:
    """Posterior variables that live on the unit interval.

    Parameters
    ----------
    idata : xarray.DataTree
        Read for the ``posterior`` and, when present, ``prior`` draws.
    model : pymc.Model or None
        A free parameter counts when its value transform is the log-odds
        (Beta and the like) or an interval whose draws fill (0, 1);
        deterministics, and every variable when there is no model, count when
        all their prior and posterior draws lie in [0, 1] and straddle 0.5 (so
        that a small positive scale is not taken for a probability).

    Returns
    -------
    list of str
    """
    free = {rv.name: rv for rv in model.free_RVs} if model is not None else {}
    names = []
    for name, da in idata["posterior"].data_vars.items():
        if da.dtype.kind != "f":
            continue
        transform = type(model.rvs_to_transforms.get(free[name])).__name__ if name in free else ""
        if transform == "LogOddsTransform" or (
            transform in {"", "Interval", "IntervalTransform"} and _fills_unit_interval(idata, name)
        ):
            names.append(name)
    return names


def _fills_unit_interval(idata, name: str) -> bool:
    groups = [g for g in ("prior", "posterior") if g in idata.children and name in idata[g].data_vars]
    for group in groups:
        values = np.asarray(idata[group][name].values, dtype=float)
        if values.size == 0 or np.nanmin(values) < 0 or np.nanmax(values) > 1:
            return False
    reference = np.asarray(idata[groups[0]][name].values, dtype=float)
    return bool(np.nanmin(reference) < 0.5 < np.nanmax(reference))


def _boundary_finding(idata, model, mask: np.ndarray) -> Finding | None:
    posterior = idata["posterior"].to_dataset()
    names = probabilities(idata, model)
    if not names:
        return None
    bounded = elements(posterior[names])
    values = bounded.flat()
    moving = values.std(axis=0) > 0  # constant (clipped) elements say nothing
    if not moving.any():
        return None
    keep = np.flatnonzero(moving)
    with np.errstate(divide="ignore"):
        logit = np.log(values[:, keep]) - np.log1p(-values[:, keep])
    rows = locate(logit, mask)
    edged = []
    for row in rows:
        k = keep[row["element"]]
        median = float(np.median(values[mask, k]))
        if median < EDGE or median > 1 - EDGE:
            edged.append({"parameter": bounded.labels[k], "variable": bounded.variable[k],
                          "median": median, "quantile": row["quantile"], "z": row["z"],
                          "smd": row["smd"],
                          "edge": 0 if median < EDGE else 1})
    if not edged:
        return None
    first = edged[0]
    return _finding(
        "boundary", first["quantile"],
        f"The median divergent draw of {first['parameter']} is {first['median']:.3g}; divergent "
        f"draws sit on average at quantile {first['quantile']:.2f} of the others (logit scale).",
        located=edged[:TOP], count=len(edged),
    )


# --- chains that disagree -----------------------------------------------------


def _rhat_finding(free: xr.Dataset) -> Finding:
    """Worst split R-hat with where each chain sits on that parameter.

    Chain means are on the posterior's own scale, where a modeler reads them.
    """
    import arviz as az

    draws = elements(free)
    rhat = elements(az.rhat(free).expand_dims(SAMPLE_DIMS)).values[0, 0]
    ess = elements(az.ess(free, method="bulk").expand_dims(SAMPLE_DIMS)).values[0, 0]
    if not np.isfinite(rhat).any():
        return _finding("rhat", None, "R-hat is undefined (constant draws).", parameter="")
    k = int(np.nanargmax(rhat))
    chains = draws.values[:, :, k]
    means, sds = chains.mean(axis=1), chains.std(axis=1)
    groups = chain_groups(chains)
    return _finding(
        "rhat", rhat[k],
        f"Largest split R-hat {rhat[k]:.3f} for {draws.labels[k]}.",
        parameter=draws.labels[k],
        chain_means=means.tolist(), chain_sds=sds.tolist(), groups=groups,
        group_means=[float(means[g].mean()) for g in groups],
        ess_bulk=float(ess[k]), draws=int(chains.size), chains=int(chains.shape[0]),
    )


def chain_groups(chains: np.ndarray) -> list[list[int]]:
    """Chains that sit together: linked when their central 90% intervals overlap.

    Parameters
    ----------
    chains : numpy.ndarray
        Draws of one scalar, shaped (chain, draw).

    Returns
    -------
    list of list of int
        Groups of chain indices, ordered by their mean; more than one group
        means some chains never visit where the others are.
    """
    low, high = np.quantile(chains, CHAIN_INTERVAL, axis=1)
    order = np.argsort(chains.mean(axis=1))
    groups, reach = [], -np.inf
    for c in order:
        if groups and low[c] <= reach:
            groups[-1].append(int(c))
        else:
            groups.append([int(c)])
            reach = -np.inf
        reach = max(reach, high[c])
    return [sorted(g) for g in groups]


def _ess_finding(free: xr.Dataset) -> Finding:
    """Smallest bulk and tail ESS over the free parameters."""
    import arviz as az

    bulk = elements(az.ess(free, method="bulk").expand_dims(SAMPLE_DIMS))
    tail = elements(az.ess(free, method="tail").expand_dims(SAMPLE_DIMS))
    b, t = bulk.values[0, 0], tail.values[0, 0]
    if not (np.isfinite(b).any() and np.isfinite(t).any()):
        return _finding("ess", None, "ESS is undefined (constant draws).")
    kb, kt = int(np.nanargmin(b)), int(np.nanargmin(t))
    chains = int(free.sizes["chain"])
    return _finding(
        "ess", min(b[kb], t[kt]),
        f"Smallest bulk ESS {b[kb]:.0f} ({bulk.labels[kb]}), smallest tail ESS {t[kt]:.0f} "
        f"({tail.labels[kt]}) from {chains} chains of {free.sizes['draw']} draws.",
        bulk=float(b[kb]), bulk_parameter=bulk.labels[kb],
        tail=float(t[kt]), tail_parameter=tail.labels[kt],
        chains=chains, draws=chains * int(free.sizes["draw"]),
    )


# --- energy and tree depth ------------------------------------------------------


def _bfmi_finding(idata, draws: Elements) -> Finding:
    """E-BFMI per chain and the parameter whose value moves most with the energy."""
    per_chain = _bfmi_per_chain(idata)
    energy = np.asarray(idata["sample_stats"]["energy"].transpose(*SAMPLE_DIMS).values, float).ravel()
    partner, r = _most_correlated(draws, energy)
    return _finding(
        "bfmi", float(np.nanmin(per_chain)),
        f"E-BFMI per chain: {', '.join(f'{v:.2f}' for v in per_chain)}.",
        per_chain=per_chain.tolist(), energy_parameter=partner, energy_correlation=r,
    )


def _most_correlated(draws: Elements, target: np.ndarray) -> tuple[str, float]:
    values = draws.flat()
    if values.shape[-1] == 0 or np.std(target) == 0:
        return "", 0.0
    sd = values.std(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = ((values - values.mean(axis=0)) * (target - target.mean())[:, None]).mean(axis=0)
        r = np.where(sd > 0, r / (sd * target.std()), 0.0)
    k = int(np.argmax(np.abs(r)))
    return draws.named(k), float(r[k])


def _treedepth_finding(stats: xr.Dataset, draws: Elements) -> Finding:
    """Share of draws that hit the maximum tree depth, with the usual suspects."""
    name = "maxdepth_reached" if "maxdepth_reached" in stats else "reached_max_treedepth"
    hits = np.asarray(stats[name].values, dtype=bool)
    depth = int(np.max(stats["depth"].values)) if "depth" in stats else None
    step = float(np.median(stats["step_size"].values)) if "step_size" in stats else None
    pairs = correlated_pairs(draws)
    sd = draws.flat().std(axis=0)
    sd = sd[sd > 0]
    return _finding(
        "treedepth", int(hits.sum()),
        f"{int(hits.sum())} of {hits.size} draws hit the maximum tree depth.",
        hits=int(hits.sum()), draws=int(hits.size), share=float(hits.mean()),
        max_depth=depth, step_size=step, strongest_pair=pairs[0] if pairs else None,
        scale_ratio=float(sd.max() / sd.min()) if sd.size else 1.0,
    )


# --- ridges and contraction ---------------------------------------------------------


def correlated_pairs(draws: Elements) -> list[dict]:
    """The most correlated pairs of elements (unconstrained scale), strongest first.

    Parameters
    ----------
    draws : Elements
        Unconstrained draws; constant elements are skipped and at most
        ``MAX_PAIR_ELEMENTS`` enter the correlation matrix.

    Returns
    -------
    list of dict
        Up to ``TOP`` pairs with their labels and Pearson correlation.
    """
    values = draws.flat()
    keep = np.flatnonzero(values.std(axis=0) > 0)[:MAX_PAIR_ELEMENTS]
    if keep.size < 2:
        return []
    r = np.corrcoef(values[:, keep], rowvar=False)
    upper = np.triu_indices(keep.size, 1)
    strength = np.abs(r[upper])
    pairs = []
    for i in np.argsort(-strength)[:TOP]:
        a, b = keep[upper[0][i]], keep[upper[1][i]]
        pairs.append({"a": draws.labels[a], "b": draws.labels[b], "a_named": draws.named(a),
                      "b_named": draws.named(b), "a_index": int(a), "b_index": int(b),
                      "correlation": float(r[upper[0][i], upper[1][i]])})
    return pairs


def _prior_elements(idata, model, names: list[str]) -> Elements | None:
    if "prior" not in idata.children:
        return None
    prior = idata["prior"].to_dataset()
    if not all(n in prior.data_vars for n in names):
        return None
    uncon, scales = unconstrained(prior[names], model)
    return elements(uncon, scales)


def _sd_ratio(draws: Elements, prior: Elements | None) -> np.ndarray | None:
    if prior is None or prior.values.shape[-1] != draws.values.shape[-1]:
        return None
    with np.errstate(invalid="ignore", divide="ignore"):
        return draws.flat().std(axis=0) / prior.flat().std(axis=0)


def _ridge_finding(draws: Elements, prior: Elements | None) -> Finding:
    """The most correlated parameter pairs and how much each member contracted."""
    pairs = correlated_pairs(draws)
    ratio = _sd_ratio(draws, prior)
    for pair in pairs:
        for side in ("a", "b"):
            k = pair.pop(f"{side}_index")
            pair[f"{side}_sd_ratio"] = None if ratio is None else float(ratio[k])
    if not pairs:
        return _finding("ridge", 0.0, "No pair of parameters varies.", pairs=[])
    top = pairs[0]
    return _finding(
        "ridge", abs(top["correlation"]),
        f"Strongest posterior correlation {top['correlation']:+.3f} between {top['a_named']} "
        f"and {top['b_named']}.",
        pairs=pairs,
    )


def _contraction_finding(draws: Elements, prior: Elements) -> Finding:
    """Posterior sd as a share of prior sd (unconstrained scale), largest first.

    References
    ----------
    Schad, Betancourt and Vasishth (2021), Psychological Methods 26(1):
    contraction = 1 - posterior variance / prior variance.
    """
    ratio = _sd_ratio(draws, prior)
    if ratio is None or not np.isfinite(ratio).any():
        return _finding("contraction", None, "Prior and posterior draws do not match up.", least=[])
    order = np.argsort(-np.nan_to_num(ratio, nan=-1.0))[:TOP]
    least = [{"parameter": draws.named(k), "sd_ratio": float(ratio[k])} for k in order]
    return _finding(
        "contraction", least[0]["sd_ratio"],
        "Largest posterior/prior sd ratios (unconstrained scale): "
        + ", ".join(f"{p['parameter']} {p['sd_ratio']:.2f}" for p in least) + ".",
        least=least,
    )
