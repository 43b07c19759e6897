"""Parameter estimates of the main fit, one entry per scalar element.

Which variables
---------------
The free parameters (the variables of the ``log_prior`` group, or every
posterior variable when that group is missing) and the deterministics that
are not indexed by the data: a deterministic with a dimension of the
observed or constant data, or the table's ``row``, describes the data rather
than the model (one probability per row, an expected count per step) and is
left out. An element whose draws are all equal (a fixed entry of a
transition matrix) says nothing and is left out; one whose draws repeat an
earlier element's exactly (the scale of the only group, equal to the common
scale) is shown once.

An element is named by its coordinate values, ``scale[lost]`` or
``transition[applied, trained]``; a dimension without coordinates counts
from 0.

Every number comes from ArviZ's summary: mean, sd, the central 90% interval
(equal-tailed), rank-normalised split R-hat and bulk and tail ESS.

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Bürkner, P.-C. (2021).
Rank-normalization, folding, and localization: an improved R-hat for
assessing convergence of MCMC. Bayesian Analysis 16(2), 667-718.
"""

from __future__ import annotations

import itertools
import warnings
from typing import Any, Mapping

import numpy as np
import xarray as xr

SAMPLE_DIMS = ("chain", "draw")
# The dimension recipes give to quantities with one value per table row.
ROW_DIM = "row"
# The interval shown with every estimate: central 90%, as for derived quantities.
INTERVAL_PROB = 0.9
# What a parameter entry holds, in the order the report shows it.
FIELDS = ("mean", "sd", "low", "high", "rhat", "ess_bulk", "ess_tail")
# ArviZ's summary rows behind each field (eti: equal-tailed interval).
_ROWS = {"mean": "mean", "sd": "sd", "low": "eti90_lb", "high": "eti90_ub",
         "rhat": "r_hat", "ess_bulk": "ess_bulk", "ess_tail": "ess_tail"}


def parameter_names(idata: xr.DataTree) -> list[str]:
    """Posterior variables that describe the model rather than the data (see the module)."""
    posterior = idata["posterior"].to_dataset()
    free = (set(idata["log_prior"].data_vars) if "log_prior" in idata.children else set(posterior.data_vars))
    data_dims = {ROW_DIM}
    for group in ("observed_data", "constant_data"):
        if group in idata.children:
            for var in idata[group].to_dataset().data_vars.values():
                data_dims.update(var.dims)
    names = []
    for name, var in posterior.data_vars.items():
        own = set(var.dims) - set(SAMPLE_DIMS)
        if name in free or not own & data_dims:
            names.append(name)
    return names


def parameters(idata: xr.DataTree) -> dict[str, dict[str, float]]:
    """``{label: {mean, sd, low, high, rhat, ess_bulk, ess_tail}}`` of the posterior.

    Parameters
    ----------
    idata : xarray.DataTree
        A fit with a ``posterior`` group (``log_prior`` and ``observed_data``
        decide which variables enter; see the module).

    Returns
    -------
    dict
        One entry per scalar element that varies across draws, variables in
        posterior order and elements in row-major order of their dimensions.
    """
    import arviz as az

    names = parameter_names(idata)
    if not names:
        return {}
    posterior = idata["posterior"].to_dataset()[names]
    with warnings.catch_warnings():
        # Elements that cannot vary have no R-hat; they are left out below.
        warnings.simplefilter("ignore", RuntimeWarning)
        table = az.summary(posterior, kind="all", fmt="xarray", ci_prob=INTERVAL_PROB,
                           ci_kind="eti", round_to="none")
    out: dict[str, dict[str, float]] = {}
    seen: set[bytes] = set()
    for name in names:
        var = posterior[name]
        dims = [d for d in var.dims if d not in SAMPLE_DIMS]
        flat = np.ascontiguousarray(var.values.reshape(var.shape[0] * var.shape[1], -1), dtype=float)
        for k, index in enumerate(itertools.product(*(range(var.sizes[d]) for d in dims))):
            draws = flat[:, k].tobytes()
            if np.all(flat[:, k] == flat[0, k]) or draws in seen:
                continue
            seen.add(draws)
            at = dict(zip(dims, index))
            row = table[name].isel(at)
            out[_label(name, var, at)] = {field: float(row.sel(summary=_ROWS[field]))
                                          for field in FIELDS}
    return out


def _label(name: str, var: xr.DataArray, at: dict[str, int]) -> str:
    if not at:
        return name
    parts = [str(var[d].values[i]) if d in var.coords else str(i) for d, i in at.items()]
    return f"{name}[{', '.join(parts)}]"


def element_labels(var: xr.DataArray) -> list[str]:
    """The label of every element of a posterior variable, in row-major order."""
    dims = [d for d in var.dims if d not in SAMPLE_DIMS]
    coords = {d: var[d].values for d in dims if d in var.coords}
    return labels_by_coords(var.name, dims, coords, tuple(var.sizes[d] for d in dims))


def labels_by_coords(name: str, dims, coords, shape: tuple[int, ...]) -> list[str]:
    """Row-major labels of the elements of ``name`` with ``shape``, read from a model's coordinates.

    ``dims`` are the variable's dimension names (None or too few: positions
    stand in), ``coords`` the model's coordinate values per dimension: e.g.
    ``move_effect[larva>spat, temp_c]`` rather than ``move_effect[0]``.
    """
    if not shape:
        return [name]
    dims = list(dims or ())
    names = []
    for index in itertools.product(*(range(n) for n in shape)):
        parts = []
        for axis, i in enumerate(index):
            values = coords.get(dims[axis]) if axis < len(dims) and dims[axis] else None
            parts.append(str(values[i]) if values is not None and len(values) == shape[axis] else str(i))
        names.append(f"{name}[{', '.join(parts)}]")
    return names


def beside_truth(idata: xr.DataTree, estimates: Mapping[str, dict],
                 truth: Mapping[str, Any]) -> dict[str, float]:
    """The true value of each estimate whose variable ``truth`` names, by label.

    A true value is a number or a (nested) list with one number per element
    of the posterior variable of that name, in row-major order of its
    dimensions; values of other shapes, and of elements left out of
    ``estimates``, are dropped.
    """
    posterior = idata["posterior"].to_dataset()
    out: dict[str, float] = {}
    for name, value in truth.items():
        if name not in posterior.data_vars or not _numeric(value):
            continue
        labels = element_labels(posterior[name])
        values = np.ravel(np.asarray(value, dtype=float))
        if len(labels) != values.size:
            continue
        out.update((label, float(v)) for label, v in zip(labels, values) if label in estimates)
    return out


def _numeric(value) -> bool:
    try:
        np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        return False
    return True
