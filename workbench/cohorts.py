"""Cohorts followed over age: cumulative counts of one or more outcomes.

Shared machinery of the ``timing-curve`` (one outcome) and
``competing-risks`` (several outcomes) recipes. A cohort of ``exposed`` units
is seen at one or more ages; at each age the table gives, per outcome, how
many units have had that outcome by then. With cumulative incidence
``C_k(t) = share_k * F_k(t) ** power`` of outcome k (the mixture model of
Larson and Dinse 1985; one outcome with ``share = eventual`` is a cure-type
timing curve), a cohort seen at ages ``a_1 < ... < a_m`` splits its units into
cells: those with outcome k between ``a_{j-1}`` and ``a_j`` (``a_0 = 0``) and
those still open at ``a_m``. The cell counts are one multinomial draw, so
repeated looks at a cohort are interval-censored observations, never
independent binomials.

Layout of the likelihood: one multinomial per cohort over ``M * K + 1``
cells (M = most ages of any cohort, K outcomes); cell ``j * K + k`` holds the
increment of outcome k at the cohort's j-th age and the last cell the units
still open. Cohorts seen at fewer than M ages have empty padding cells with
probability ``EPS``.

References
----------
Larson, M. G. and Dinse, G. E. (1985). A mixture model for the regression
analysis of competing risks data. Applied Statistics 34(3), 201-211.
Turnbull, B. W. (1976). The empirical distribution function with arbitrarily
grouped, censored and truncated data. JRSS B 38(3), 290-295 (interval
censoring as multinomial cells).
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pandas as pd

from workbench import covariates, curves, engine, tables, units
from workbench.errors import DataError
from workbench.recipe import (Assumption, Column, Dataset, Option, Parameter, Relaxation, Statistic,
                              choose_pooling, flag)
from workbench.statistics import nearest_shortfall, pearson_dispersion, residual_trend, standardised

# Keeps every cell probability strictly inside (0, 1) so the likelihood never
# sees log(0); far below any rate a count table can resolve.
EPS = 1e-9
# Refuse layouts whose padded cell matrix would be larger than this: the
# likelihood is evaluated over every cell at every gradient step. Common
# practice for interactive sampling on a laptop, not a published figure.
MAX_CELLS = 200_000


FAMILY = Option(
    "family",
    "the event-time family: weibull, loglogistic, lognormal or gamma",
    default="weibull",
    choices=curves.FAMILIES,
)
POOLING = Option(
    "pooling",
    "how groups share the timing scale: none, partial or complete",
    default="auto",
    choices=("auto", "none", "partial", "complete"),
)
SHAPE_BY_GROUP = Option(
    "shape_by_group",
    "true to let groups differ in curve shape as well as in timing scale (each group's shape "
    "pooled as the scale is; default false: one shape for every group)",
    parse=flag,
    default=False,
)
CENTRED = Option(
    "centred",
    "true for the centred form of partial pooling (default false: non-centred)",
    parse=flag,
    default=False,
)


# --- validation ------------------------------------------------------------------


def validate(table: pd.DataFrame, outcomes: list[str], options: dict, recipe: str) -> Dataset:
    """Check a cohort table once and lay it out for the likelihood.

    Parameters
    ----------
    table : pandas.DataFrame
        Columns ``cohort``, ``age``, ``exposed``, the ``outcomes`` (cumulative
        counts) and optionally ``group``.
    outcomes : list of str
        The cumulative count columns, in model order.
    options : dict
        The recipe's parsed options (``pooling`` is read here).
    recipe : str
        Recipe name for messages.

    Returns
    -------
    Dataset
        Rows sorted by cohort then age; ``extra`` holds the cell layout.
    """
    tables.require_columns(table, ["cohort", "age", "exposed", *outcomes], recipe)
    cohort, cohort_labels = tables.label_column(table, "cohort")
    age = tables.numeric_column(table, "age")
    negative = np.flatnonzero(age < 0)
    if negative.size:
        i = int(negative[0])
        raise DataError(f"column 'age' {tables.row(i)}: expected an age >= 0; found {age[i]:g}")
    exposed = tables.count_column(table, "exposed", minimum=1)
    counts = np.column_stack([tables.count_column(table, name) for name in outcomes])
    if len(outcomes) == 1:
        tables.not_above(counts[:, 0], exposed, outcomes[0], "exposed")
    else:
        total = counts.sum(axis=1)
        bad = np.flatnonzero(total > exposed)
        if bad.size:
            i = int(bad[0])
            raise DataError(
                f"{tables.row(i)}: outcomes {' + '.join(outcomes)} sum to {total[i]} > exposed {exposed[i]}"
            )
    if "group" in table.columns:
        group, group_labels = tables.label_column(table, "group")
    else:
        group, group_labels = np.zeros(len(table), dtype=np.int64), ["all"]
    same_within_cohort(cohort, cohort_labels, exposed, "exposed")
    same_within_cohort(cohort, cohort_labels, group, "group", group_labels)

    order = np.lexsort((age, cohort))
    cohort_s, age_s = cohort[order], age[order]
    same = (cohort_s[1:] == cohort_s[:-1])
    repeat = np.flatnonzero(same & (age_s[1:] == age_s[:-1]))
    if repeat.size:
        a, b = sorted((int(order[repeat[0]]), int(order[repeat[0] + 1])))
        raise DataError(
            f"column 'age' {tables.row(b)}: cohort '{cohort_labels[cohort_s[repeat[0]]]}' already has "
            f"age {age_s[repeat[0]]:g} in {tables.row(a)}; expected one row per cohort and age"
        )
    counts_s = counts[order]
    for k, name in enumerate(outcomes):
        drop = np.flatnonzero(same & (counts_s[1:, k] < counts_s[:-1, k]))
        if drop.size:
            j = int(drop[0])
            raise DataError(
                f"column '{name}' {tables.row(int(order[j + 1]))}: {counts_s[j + 1, k]} < "
                f"{counts_s[j, k]} at the earlier age {age_s[j]:g} ({tables.row(int(order[j]))}); "
                f"expected counts cumulative (non-decreasing in age) within cohort "
                f"'{cohort_labels[cohort_s[j]]}'"
            )
    positive = age[age > 0]
    if positive.size == 0:
        raise DataError("column 'age': expected at least one age > 0; found none")

    n_rows, n_cohorts = len(order), len(cohort_labels)
    first = np.ones(n_rows, dtype=bool)
    first[1:] = ~same
    start = np.flatnonzero(first)
    slot = np.arange(n_rows) - np.repeat(start, np.diff(np.append(start, n_rows)))
    prev_row = np.where(first, -1, np.arange(n_rows) - 1)
    last_row = np.append(start[1:] - 1, n_rows - 1)
    slots = int(slot.max()) + 1
    tables.check_size(n_rows, recipe)
    cells = n_cohorts * (slots * len(outcomes) + 1)
    if cells > MAX_CELLS:
        raise DataError(
            f"recipe '{recipe}': expected at most {MAX_CELLS} likelihood cells (cohorts x ages x "
            f"outcomes); found {cells} (keep fewer ages per cohort or fewer cohorts)"
        )

    columns = {
        "cohort": cohort_s,
        "age": age_s,
        "exposed": exposed[order],
        "group": group[order],
        "slot": slot,
        "prev_row": prev_row,
    }
    for k, name in enumerate(outcomes):
        columns[name] = counts_s[:, k]
    data = Dataset(
        columns=columns,
        labels={"cohort": cohort_labels, "group": group_labels},
        source_rows=[[int(i)] for i in order],
    )
    pooling = choose_pooling(options, len(group_labels))
    if options.get("shape_by_group") and pooling == "complete":
        raise DataError(
            f"option 'shape_by_group=true' needs groups with their own timing: a 'group' column with "
            f"at least two groups and pooling none or partial; found {len(group_labels)} group(s) "
            f"and pooling {pooling}")
    data.extra.update(
        outcomes=list(outcomes),
        pooling=pooling,
        slots=slots,
        last_row=last_row,
        cohort_exposed=exposed[order][last_row],
        cohort_group=group[order][last_row],
        # Ages enter the model relative to this reference so that default
        # priors on the timing scale do not depend on the unit of age.
        age_ref=float(np.median(positive)),
    )
    return data


def same_within_cohort(cohort, labels, values, name, value_labels=None):
    """One value of ``name`` per cohort; name both rows that disagree."""
    seen: dict[int, int] = {}
    for i, (c, v) in enumerate(zip(cohort, values)):
        j = seen.setdefault(int(c), i)
        if values[j] != v:
            show = (lambda x: repr(value_labels[x])) if value_labels else (lambda x: f"{x:g}")
            raise DataError(
                f"column '{name}' {tables.row(i)}: {show(v)} differs from {show(values[j])} given for "
                f"cohort '{labels[c]}' in {tables.row(j)}; expected one {name} per cohort"
            )


def relative_age(data: Dataset) -> np.ndarray:
    """Ages in units of the reference age (the median positive age)."""
    return data["age"] / data.extra["age_ref"]


def counts_of(data: Dataset) -> np.ndarray:
    """Cumulative counts per row and outcome, shape (rows, K)."""
    return np.column_stack([data[name] for name in data.extra["outcomes"]])


# --- cells -------------------------------------------------------------------------


def cells_from_cumulative(data: Dataset, cumulative: np.ndarray, total: np.ndarray) -> np.ndarray:
    """Cell values (counts or probabilities) from cumulative values per row.

    ``cumulative`` has shape (..., rows, K); ``total`` is what the cells of a
    cohort add up to (``exposed`` for counts, 1 for probabilities), shape
    (..., cohorts). Returns shape (..., cohorts, M * K + 1).
    """
    cumulative = np.asarray(cumulative, dtype=float)
    k = cumulative.shape[-1]
    prev = data["prev_row"]
    before = np.where((prev >= 0)[:, None], cumulative[..., np.maximum(prev, 0), :], 0.0)
    increments = cumulative - before
    lead = cumulative.shape[:-2]
    cells = np.zeros(lead + (len(data.labels["cohort"]), data.extra["slots"] * k + 1))
    columns = data["slot"][:, None] * k + np.arange(k)[None, :]
    cells[..., data["cohort"][:, None], columns] = increments
    cells[..., -1] = np.asarray(total) - cumulative[..., data.extra["last_row"], :].sum(axis=-1)
    return cells


def cell_counts(data: Dataset) -> np.ndarray:
    """The observed cell counts, shape (cohorts, M * K + 1) (the ``counts`` container)."""
    cells = cells_from_cumulative(data, counts_of(data), data.extra["cohort_exposed"])
    return np.rint(cells).astype(np.int64)


def real_cells(data: Dataset) -> np.ndarray:
    """Mask of the cells that exist (not padding), shape (cohorts, M * K + 1)."""
    k = len(data.extra["outcomes"])
    mask = np.zeros((len(data.labels["cohort"]), data.extra["slots"] * k + 1), dtype=bool)
    mask[data["cohort"][:, None], data["slot"][:, None] * k + np.arange(k)[None, :]] = True
    mask[:, -1] = True
    return mask


def cell_probabilities(data: Dataset, cumulative: np.ndarray) -> np.ndarray:
    """Cell probabilities from cumulative incidence per row, clipped and normalised."""
    p = cells_from_cumulative(data, cumulative, 1.0)
    p = np.clip(p, EPS, 1.0)
    return p / p.sum(axis=-1, keepdims=True)


def cumulative_incidence(family, age, scale, shape, share, power=1.0) -> np.ndarray:
    """``share_k * F_k(age) ** power`` (NumPy); ``age`` (rows,), the rest broadcast to (rows, K)."""
    f = curves.cdf(family, np.asarray(age)[:, None], scale, shape)
    return np.asarray(share) * f ** power


# --- the story in PyMC ---------------------------------------------------------------


def timing_scales(data: Dataset, options: dict, prior, dims: tuple, counts):
    """Scale of each group (and outcome), pooled as the ``pooling`` option says.

    Creates ``scale`` (and ``scale_sd`` / ``scale_offset`` for partial
    pooling) and the deterministic ``scale_group`` with dims
    ``("group", *dims)``; returns ``scale_group``. Chains start at the ages
    where the events in the ``counts`` container fell (:func:`event_ages`).
    """
    return pooled_by_group(data, options, prior, "scale", dims, event_ages(data, counts))


def timing_shapes(data: Dataset, options: dict, prior, dims: tuple):
    """Curve shape: one ``shape`` (per outcome) for every group, or per group.

    Under ``shape_by_group`` each group has its own shape, pooled as the
    scale is (``shape_sd`` for partial pooling, the deterministic
    ``shape_group``), returned as a (groups, K) tensor.
    """
    import pytensor.tensor as pt

    if options.get("shape_by_group"):
        group = pooled_by_group(data, options, prior, "shape", dims)
        return pt.reshape(group, (len(data.labels["group"]), len(data.extra["outcomes"])))
    return prior("shape", dims=dims or None)


def pooled_by_group(data: Dataset, options: dict, prior, name: str, dims: tuple, typical=None):
    """A positive parameter ``name`` per group (and outcome), pooled as ``pooling`` says.

    Complete pooling: one ``name`` for all groups. None: ``name`` per group.
    Partial: a typical ``name``, the sd of its log across groups
    (``{name}_sd``) and a group offset on the log scale, centred or not.
    Returns the deterministic ``{name}_group`` with dims ``("group", *dims)``;
    chains start at ``typical`` when given.
    """
    import pymc as pm
    import pytensor.tensor as pt

    pooling = data.extra["pooling"]
    n_groups = len(data.labels["group"])
    group_dims = ("group", *dims)
    if pooling == "complete":
        value = prior(name, dims=dims or None)
        if typical is not None:
            engine.start_at(value, typical, dims)
        log_group = pt.broadcast_to(pt.log(value), (n_groups, *pt.shape(value)))
    elif pooling == "none":
        value = prior(name, dims=group_dims)
        if typical is not None:
            engine.start_at(value, pt.broadcast_to(typical, (n_groups, *typical.shape)), group_dims)
        log_group = pt.log(value)
    else:
        value = prior(name, dims=dims or None)  # typical value across groups
        if typical is not None:
            engine.start_at(value, typical, dims)
        spread = prior(f"{name}_sd")  # sd of its log across groups
        if options.get("centred"):
            log_group = pm.Normal(f"log_{name}_group", pt.log(value), spread, dims=group_dims)
        else:
            offset = pm.Normal(f"{name}_offset", 0.0, 1.0, dims=group_dims)
            log_group = pt.log(value) + spread * offset
    return pm.Deterministic(f"{name}_group", pt.exp(log_group), dims=group_dims)


# --- starting values ---------------------------------------------------------------
# Chains start where the data put the timing and the shares, not at the prior's
# centre: a cohort table whose events all fell before the first look has a
# minor mode (shape near 0, a flat curve) that chains started far away fall
# into and do not leave. The starting values are tensors of the ``counts``
# container, so one compiled model starts every refit at its own data.

# Shares start at least this far inside (0, 1), so that log-odds are finite.
START_MARGIN = 0.02


def observed_shares(data: Dataset, counts):
    """Pooled share of units with each outcome by their cohort's last age (K,), as a tensor."""
    if units.is_units(data):
        return units.observed_shares(data, counts)
    k = len(data.extra["outcomes"])
    events = counts[:, :-1].reshape((counts.shape[0], data.extra["slots"], k)).sum(axis=(0, 1))
    return events / counts.sum()


def event_ages(data: Dataset, counts):
    """Typical relative age of each outcome's events (K,), as a tensor.

    The count-weighted geometric mean of the mid-ages of the intervals in
    which the events fell (an interval-censored event counts at the middle of
    its interval); 1, the reference age, for an outcome without events.
    """
    import pytensor.tensor as pt

    if units.is_units(data):
        return units.event_ages(data, counts)
    k = len(data.extra["outcomes"])
    age = relative_age(data)
    before = np.where(data["prev_row"] >= 0, age[np.maximum(data["prev_row"], 0)], 0.0)
    log_mid = np.zeros((len(data.labels["cohort"]), data.extra["slots"]))
    log_mid[data["cohort"], data["slot"]] = np.log(np.maximum((age + before) / 2, curves.TINY_TIME))
    events = counts[:, :-1].reshape((counts.shape[0], data.extra["slots"], k))
    weighted = (events * log_mid[:, :, None]).sum(axis=(0, 1))
    return pt.exp(weighted / pt.maximum(events.sum(axis=(0, 1)), 1.0))


def cumulative_tensor(data: Dataset, family: str, scale_group, shape, share, relax: str | None, prior,
                      log_shift=None, log_shape_shift=None):
    """Cumulative incidence per row and outcome (rows, K) as a PyTensor expression.

    ``shape`` is what :func:`timing_shapes` returns; ``share`` is one share
    per outcome (K,) or per row and outcome (rows, K); ``log_shift`` (rows,)
    or (rows, K), when given, shifts each row's log timing scale, or each
    outcome's (covariates); ``log_shape_shift`` (rows,) shifts each row's log
    curve shape (the covariates' shape relaxation).

    Adds the shared relaxations: ``curve_power`` (F ** exp(curve_power),
    the exponentiated family) and ``cohort_sd`` (a cohort effect on log scale).
    """
    import pymc as pm
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    scale_group = pt.reshape(scale_group, (len(data.labels["group"]), k))
    scale_row = scale_group[data["group"]]
    if relax == "cohort_sd":
        sd = prior("cohort_sd")
        z = pm.Normal("cohort_z", 0.0, 1.0, dims="cohort")
        effect = pm.Deterministic("cohort_effect", sd * z, dims="cohort")
        scale_row = scale_row * pt.exp(effect[data["cohort"]])[:, None]
    if log_shift is not None:
        scale_row = scale_row * pt.exp(log_shift if log_shift.ndim == 2 else log_shift[:, None])
    age = pt.constant(relative_age(data))[:, None]
    # One shape per outcome, or (groups, K) under shape_by_group.
    shape = shape[data["group"]] if shape.ndim == 2 else pt.reshape(shape, (k,))
    if log_shape_shift is not None:
        shape = shape * pt.exp(log_shape_shift)[:, None]
    f = curves.cdf_tensor(family, age, scale_row, shape)
    if relax == "curve_power":
        f = f ** pt.exp(prior("curve_power"))
    return (share if share.ndim == 2 else pt.reshape(share, (k,))) * f


def cells_tensor(data: Dataset, cumulative):
    """Cell probabilities (cohorts, M * K + 1) from cumulative incidence per row (PyTensor)."""
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    prev = data["prev_row"]
    before = pt.switch(pt.constant(prev >= 0)[:, None], cumulative[np.maximum(prev, 0)], 0.0)
    increments = cumulative - before
    cells = pt.zeros((len(data.labels["cohort"]), data.extra["slots"] * k + 1))
    columns = data["slot"][:, None] * k + np.arange(k)[None, :]
    cells = pt.set_subtensor(cells[data["cohort"][:, None], columns], increments)
    cells = pt.set_subtensor(cells[:, -1], 1.0 - cumulative[data.extra["last_row"]].sum(axis=-1))
    cells = pt.clip(cells, EPS, 1.0)
    return cells / cells.sum(axis=-1, keepdims=True)


def counts_container(data: Dataset):
    """The observed cell counts as the model's ``counts`` container (cohort, cell)."""
    import pymc as pm

    return pm.Data("counts", cell_counts(data), dims=("cohort", "cell"))


def cell_likelihood(data: Dataset, counts, p, relax: str | None, prior):
    """The observed cells ``y``: multinomial per cohort, Dirichlet-multinomial when relaxed."""
    import pymc as pm
    import pytensor.tensor as pt

    n = data.extra["cohort_exposed"]
    if relax == "overdispersion":
        rho = prior("overdispersion")
        kappa = 1.0 / pt.clip(rho, EPS, 1.0 - EPS) - 1.0
        return pm.DirichletMultinomial("y", n=n, a=p * kappa, observed=counts, dims=("cohort", "cell"))
    return pm.Multinomial("y", n=n, p=p, observed=counts, dims=("cohort", "cell"))


def coords(data: Dataset) -> dict:
    """Model coordinates of a cohort layout."""
    k = len(data.extra["outcomes"])
    return {
        "row": np.arange(data.rows),
        "cohort": data.labels["cohort"],
        "group": data.labels["group"],
        "outcome": data.extra["outcomes"],
        "cell": np.arange(data.extra["slots"] * k + 1),
    }


def observed(data: Dataset) -> dict:
    """Values of the outcome container: the cell counts (the units, in the unit layout)."""
    if units.is_units(data):
        return units.observed(data)
    return {"counts": cell_counts(data)}


# --- the story in NumPy ----------------------------------------------------------------


def scales_of(rng: np.random.Generator, data: Dataset, params: dict, k: int) -> np.ndarray:
    """Scale per cohort and outcome (cohorts, K) from a parameter draw.

    Reads ``scale_group`` when the draw has it, else ``scale`` (one per group
    under ``pooling=none``). A ``cohort_effect`` per cohort, or a
    ``cohort_sd`` from which fresh effects are drawn, shifts each cohort's
    log scale.
    """
    n_groups = len(data.labels["group"])
    if "scale_group" in params:
        group = np.asarray(params["scale_group"], dtype=float).reshape(n_groups, k)
    elif data.extra["pooling"] == "none":
        group = np.asarray(params["scale"], dtype=float).reshape(n_groups, k)
    else:
        group = np.broadcast_to(np.asarray(params["scale"], dtype=float).reshape(1, k), (n_groups, k))
    n_cohorts = len(data.labels["cohort"])
    if "cohort_effect" in params:
        effect = np.asarray(params["cohort_effect"], dtype=float).reshape(n_cohorts)
    else:
        effect = rng.normal(0.0, float(params.get("cohort_sd", 0.0)), n_cohorts)
    return group[data.extra["cohort_group"]] * np.exp(effect)[:, None]


def shapes_of(data: Dataset, params: dict, k: int) -> np.ndarray:
    """Curve shape per cohort and outcome (cohorts, K) from a parameter draw.

    Reads ``shape_group`` when the draw has it, else ``shape``: one per
    outcome, or one per group and outcome (``shape_by_group`` unpooled).
    """
    n_groups = len(data.labels["group"])
    shape = np.asarray(params.get("shape_group", params["shape"]), dtype=float)
    group = shape.reshape(n_groups, k) if shape.size == n_groups * k and shape.size != k \
        else np.broadcast_to(shape.reshape(1, k), (n_groups, k))
    return group[data.extra["cohort_group"]]


def simulate_units(rng: np.random.Generator, data: Dataset, family: str, scales: np.ndarray,
                   shape, share, power: float = 1.0, rho: float = 0.0) -> np.ndarray:
    """Follow every unit of every cohort; return cumulative counts per row (rows, K).

    Each unit ends in outcome k with probability ``share_k`` (one per
    outcome, or per cohort and outcome; or never), at a
    time drawn from family F_k with the cohort's scale and shape (``shape``
    per outcome, or per cohort and outcome as :func:`shapes_of` gives); with ``power != 1``
    the time follows F_k ** power (drawn by inverting U ** (1 / power)).
    With ``rho > 0`` the units of a cohort share one draw of the cell
    probabilities from a Dirichlet with concentration (1 / rho - 1): the
    Dirichlet-multinomial story of correlated units.
    """
    k = scales.shape[1]
    shape = np.broadcast_to(np.asarray(shape, dtype=float), scales.shape)
    share = np.broadcast_to(np.asarray(share, dtype=float), scales.shape)
    out = np.zeros((data.rows, k), dtype=np.int64)
    ages = data["age"] / data.extra["age_ref"]
    if rho > 0:
        kappa = 1.0 / rho - 1.0
        cumulative = share[data["cohort"]] * curves.cdf(family, ages[:, None], scales[data["cohort"]],
                                        shape[data["cohort"]]) ** power
        p = cell_probabilities(data, cumulative)
        mask = real_cells(data)
        for c, n in enumerate(data.extra["cohort_exposed"]):
            alpha = p[c][mask[c]] * kappa
            cells = np.zeros(mask.shape[1], dtype=np.int64)
            cells[mask[c]] = rng.multinomial(n, rng.dirichlet(alpha))
            rows = np.flatnonzero(data["cohort"] == c)
            inc = cells[:-1].reshape(-1, k)[data["slot"][rows]]
            out[rows] = np.cumsum(inc, axis=0)
        return out
    closed = 1.0 - share.sum(axis=1)
    for c, n in enumerate(data.extra["cohort_exposed"]):
        rows = np.flatnonzero(data["cohort"] == c)
        outcome = rng.choice(k + 1, size=n, p=np.append(share[c], max(closed[c], 0.0)))
        for j in range(k):
            who = outcome == j
            m = int(who.sum())
            if power == 1.0:
                times = curves.draw_times(rng, family, scales[c, j], shape[c, j], m)
            else:
                times = curves.quantile(family, rng.random(m) ** (1.0 / power), scales[c, j], shape[c, j])
            times = np.sort(times)
            out[rows, j] = np.searchsorted(times, ages[rows], side="right")
    return out


# --- targeted statistics -----------------------------------------------------------------


def cumulative_counts(data: Dataset, y: np.ndarray) -> np.ndarray:
    """Cumulative counts per row and outcome (S, rows, K) from cell counts (S, cohorts, cells)."""
    k = len(data.extra["outcomes"])
    y = np.asarray(y, dtype=float)
    inc = y[..., :-1].reshape(y.shape[:-1] + (data.extra["slots"], k))
    cum = np.cumsum(inc, axis=-2)
    return cum[..., data["cohort"], data["slot"], :]


def _moments(data: Dataset, draws: dict):
    cum = np.asarray(draws["cumulative"], dtype=float)
    cum = cum.reshape(cum.shape[0], data.rows, -1)
    n = data["exposed"][:, None]
    return n * cum, n * cum * (1.0 - cum)


def _flat(*arrays):
    return [a.reshape(a.shape[0], -1) for a in arrays]


def late_trend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Slope of standardised cumulative residuals on log age, over rows at or past the median age."""
    if units.is_units(data):
        return units.hazard_trend(data, outcomes, draws)
    mean, var = _moments(data, draws)
    y = cumulative_counts(data, outcomes["y"])
    late = data["age"] >= np.median(data["age"])
    k = mean.shape[-1]
    log_age = np.repeat(np.log(np.maximum(data["age"][late], curves.TINY_TIME)), k)
    return residual_trend(*_flat(y[:, late], mean[:, late], var[:, late]), log_age)


def plateau_shortfall(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Standardised residual of all outcomes together at the oldest quarter of rows."""
    if units.is_units(data):
        return units.late_shortfall(data, outcomes, draws)
    mean, var = _moments(data, draws)
    y = cumulative_counts(data, outcomes["y"]).sum(axis=-1)
    # Variance of the sum: the outcomes of one row are negatively correlated,
    # n * C (1 - C) for the total incidence C.
    total = mean.sum(axis=-1) / data["exposed"]
    return nearest_shortfall(y, mean.sum(axis=-1), data["exposed"] * total * (1 - total), -data["age"])


def cohort_spread(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Variance across cohorts of each cohort's mean standardised cumulative residual."""
    if units.is_units(data):
        return units.cohort_spread(data, outcomes, draws)
    mean, var = _moments(data, draws)
    y = cumulative_counts(data, outcomes["y"])
    r = standardised(y, mean, var).mean(axis=-1)
    n_cohorts = len(data.labels["cohort"])
    sums = np.zeros((r.shape[0], n_cohorts))
    np.add.at(sums, (slice(None), data["cohort"]), r)
    per_cohort = sums / np.bincount(data["cohort"], minlength=n_cohorts)
    return per_cohort.var(axis=-1)


def covariate_bend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Curvature of the standardised cumulative residuals over bands of each numeric covariate
    (:func:`workbench.covariates.bend`)."""
    if units.is_units(data):
        return units.covariate_bend(data, outcomes, draws)
    mean, var = _moments(data, draws)
    y = cumulative_counts(data, outcomes["y"])

    totals = [a.sum(axis=-1) for a in (y, mean, var)]
    return covariates.bend(data.extra["covariates"],
                           lambda band, n_bands: covariates.band_sums(band, n_bands, *totals))


def covariate_age_trend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """How the slope of standardised cumulative residuals on log age changes across bands of each
    numeric covariate (:func:`workbench.covariates.age_trend_spread`)."""
    if units.is_units(data):
        return units.covariate_age_trend(data, outcomes, draws)
    mean, var = _moments(data, draws)
    y = cumulative_counts(data, outcomes["y"])
    k = mean.shape[-1]
    log_age = np.log(np.maximum(data["age"], curves.TINY_TIME))

    def band_slopes(rows):
        return residual_trend(*_flat(y[:, rows], mean[:, rows], var[:, rows]), np.repeat(log_age[rows], k))

    return covariates.age_trend_spread(data.extra["covariates"], band_slopes)


def cell_dispersion(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Pearson chi-square per real cell of the multinomial (1 under multinomial variation)."""
    cum = np.asarray(draws["cumulative"], dtype=float)
    p = cell_probabilities(data, cum.reshape(cum.shape[0], data.rows, -1))
    n = data.extra["cohort_exposed"][:, None]
    mask = real_cells(data)
    y = np.asarray(outcomes["y"], dtype=float)
    return pearson_dispersion(y[:, mask], (n * p)[:, mask], (n * p * (1 - p))[:, mask])


def curve_draws(posterior: dict, groups: int, k: int, draws: int):
    """At most ``draws`` evenly spaced posterior draws of the curves' parameters.

    Returns ``(pick, scale, shape, share, power)``: the indices of the draws
    kept, the timing scale and shape per group and outcome (S, groups, K),
    the shares (S, K) and the curve power (S,).
    """
    scale = np.asarray(posterior["scale_group"], dtype=float)
    s = scale.shape[0]
    pick = np.linspace(0, s - 1, min(draws, s)).astype(int)
    return (pick, scale.reshape(s, groups, k)[pick], group_shapes(posterior, groups, k)[pick],
            np.asarray(posterior["share"], dtype=float).reshape(s, k)[pick],
            np.exp(np.asarray(posterior.get("curve_power", np.zeros(s)), dtype=float).reshape(s))[pick])


def group_shapes(posterior: dict, groups: int, k: int) -> np.ndarray:
    """Posterior draws of the curve shape per group and outcome, (S, groups, K)."""
    if "shape_group" in posterior:
        shape = np.asarray(posterior["shape_group"], dtype=float)
        return shape.reshape(shape.shape[0], groups, k)
    shape = np.asarray(posterior["shape"], dtype=float)
    return np.broadcast_to(shape.reshape(shape.shape[0], 1, k), (shape.shape[0], groups, k))


# --- figure -----------------------------------------------------------------------------------


def figure(data: Dataset, family: str, posterior: dict, ylabel: str, draws: int = 200,
           predictive: dict | None = None):
    """Cumulative share per outcome over age, stacked, fitted band against the data.

    One panel per group (at most four). Lines and bands are the posterior
    median and 90% interval of the stacked curves. With counts, points are
    each row's observed cumulative shares (stacked over outcomes), each with
    the 90% interval of its replicated shares when ``predictive`` holds the
    replicated cell counts ``y``, and marked where it falls outside; with one
    row per unit, steps are the Aalen-Johansen estimate from the group's
    units (Kaplan-Meier for one outcome).

    With covariates the curves are drawn at chosen covariate values instead
    (:func:`workbench.covariate_curves.figure`), and the figure comes with
    its caption: ``(figure, caption)``.
    """
    import matplotlib.pyplot as plt

    from workbench.report import plots

    if data.extra.get("covariates") is not None:
        from workbench import covariate_curves

        return covariate_curves.figure(data, family, posterior, ylabel, draws, predictive)

    outcomes = data.extra["outcomes"]
    k = len(outcomes)
    groups = data.labels["group"][:4]
    fig, axes = plt.subplots(1, len(groups), figsize=(4.2 * len(groups) + 2.6, 3.6), squeeze=False)
    _, scale, shape, share, power = curve_draws(posterior, len(data.labels["group"]), k, draws)
    grid = np.linspace(0.0, data["age"].max() * 1.05, 120)
    rel = grid / data.extra["age_ref"]
    unit = units.is_units(data)
    observed_share = None if unit else counts_of(data) / data["exposed"][:, None]
    replicated = None
    if predictive and "y" in predictive and not unit:
        y = np.asarray(predictive["y"], dtype=float)
        y = y.reshape(y.shape[0], len(data.labels["cohort"]), -1)
        replicated = np.cumsum(cumulative_counts(data, y) / data["exposed"][None, :, None], axis=-1)
    tones = [plt.get_cmap("viridis")(x) for x in np.linspace(0.15, 0.85, k)] if k > 1 else [plots.FIT]
    # Stacked outcomes share their ages: their whiskers stand slightly apart.
    dodge = (np.arange(k) - (k - 1) / 2) * 0.008 * grid[-1]
    outside = total = 0
    for g, ax in enumerate(axes[0]):
        f = curves.cdf(family, rel[None, :, None], scale[:, None, g, :], shape[:, None, g, :])
        stacked = np.cumsum(share[:, None, :] * f ** power[:, None, None], axis=-1)
        lo, mid, hi = np.percentile(stacked, [5, 50, 95], axis=0)
        rows = data["group"] == g
        if unit:
            at, incidence = units.product_limit(data["time"][rows], data["code"][rows],
                                                data["entry"][rows], k)
            steps = np.cumsum(incidence, axis=-1)
        else:
            obs = np.cumsum(observed_share[rows], axis=-1)
        for j in range(k):
            label = " + ".join(outcomes[: j + 1]) if k > 1 else "fitted"
            ax.fill_between(grid, lo[:, j], hi[:, j], color=tones[j], alpha=0.25, lw=0)
            ax.plot(grid, mid[:, j], color=tones[j], lw=1.6, label=f"{label} (median, 90%)")
            point = tones[j] if k > 1 else plots.INK
            if unit:
                ax.step(np.append(0.0, at), np.append(0.0, steps[:, j]), where="post", color=point, lw=0.9)
                continue
            if replicated is None:
                ax.plot(data["age"][rows], obs[:, j], "o", ms=4, mfc="none", mec=point, mew=0.9)
                continue
            out, shown = plots.predictive_intervals(ax, data["age"][rows] + dodge[j], obs[:, j],
                                                    replicated[:, rows, j], colour=point, labelled=False)
            outside, total = outside + out, total + shown
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("age")
        ax.set_title(groups[g] if len(data.labels["group"]) > 1 else "", fontsize=10)
        ax.spines[["top", "right"]].set_visible(False)
    axes[0][0].set_ylabel(ylabel)
    handles, _ = axes[0][-1].get_legend_handles_labels()
    if replicated is not None:
        handles += plots.interval_legend(outside, total)
    plots.outside_legend(axes[0][-1], handles=handles)
    fig.tight_layout()
    return fig


# --- what both recipes declare -----------------------------------------------------------------


def columns(outcome: Column) -> tuple[Column, ...]:
    """The table's columns around the recipe's outcome column(s)."""
    return (
        Column("cohort", "label of the cohort (units that started together)"),
        Column("age", "age at which the cohort was seen (>= 0, any unit of time)"),
        Column("exposed", "number of units in the cohort (>= 1, the same on every row of a cohort)"),
        outcome,
        Column("group", "optional label: which kind of cohort (one per cohort)", required=False),
    )


TIMING_PARAMETERS = (
    # Scale in units of the median observed age: median 1, 95% between
    # 0.05 and 19 times it, from cohorts seen long after to long before.
    Parameter("scale", "timing scale (per outcome), relative to the median age seen", "lognormal(0,1.5)"),
    Parameter("scale_sd", "sd of log scale across groups (partial pooling)", "halfnormal(0.5)"),
    # Median 1.35, 95% between 0.4 and 4.4: from spread-out to bunched timing.
    Parameter("shape", "shape of the timing curve (per outcome; larger: ages bunched more tightly)",
              "lognormal(0.3,0.6)"),
    # As for the scale: groups' shapes mostly within a factor of about e of each other.
    Parameter("shape_sd", "sd of log shape across groups (partial pooling, shape_by_group=true)",
              "halfnormal(0.5)"),
)
RELAXATION_PARAMETERS = (
    Parameter("curve_power", "log exponent of the exponentiated family F ** exp(curve_power)", "normal(0,0.5)"),
    Parameter("cohort_sd", "sd of log timing scale between cohorts", "halfnormal(0.3)"),
    Parameter("overdispersion", "correlation of units within a cohort (Dirichlet-multinomial)", "beta(1,30)"),
)


def relaxation(build_model, parameter, meaning, null, negligible, applies=None, planted=None,
               planted_options=None, absorbs_misfit=False) -> Relaxation:
    """The expansion of ``build_model`` by one relaxation parameter."""
    return Relaxation(parameter=parameter, meaning=meaning, build=partial(build_model, relax=parameter),
                      null=null, negligible=negligible, applies=applies, planted=planted,
                      planted_options=planted_options, absorbs_misfit=absorbs_misfit)


def cohorts_to_compare(data: Dataset) -> str:
    """Why the table cannot tell cohorts of one group apart ("" when it can)."""
    cohorts, groups = data["cohort"], data["group"]
    if any(len(np.unique(cohorts[groups == g])) >= 2 for g in np.unique(groups)):
        return ""
    if len(np.unique(cohorts)) < 2:
        return "the table holds one cohort, so no cohort can differ from another"
    return "every group holds one cohort, so no cohort can differ from another of its group"


def units_to_compare(data: Dataset) -> str:
    """Why the table cannot show units of a cohort varying together ("" when it can)."""
    if data.extra["cohort_exposed"].max() >= 2:
        return ""
    return "every cohort holds one unit, so no units of a cohort can vary together"


def independence_to_check(data: Dataset) -> str:
    """Why ``independent_units`` cannot be checked on this table ("" when it can)."""
    return units.no_independence_check(data) or (
        "" if units.is_units(data) else units_to_compare(data))


def ages_to_compare(data: Dataset) -> str:
    """Why the table cannot show a curve departing from its family ("" when it can).

    ``data.extra["curve_parameters"]`` counts what fixes one outcome's curve
    (scale, shape and, where free, its share); through that many ages some
    curve of the family passes exactly.
    """
    ages = len(np.unique(data["age"][data["age"] > 0]))
    needed = int(data.extra.get("curve_parameters", 2))
    if ages > needed:
        return ""
    return (f"the table holds {ages} age(s) above 0, and a curve with {needed} parameters passes "
            f"through that many exactly")


def covariate_form(build_model, scale: str) -> tuple[Assumption, ...]:
    """``covariate_form`` of a timing recipe (:func:`workbench.covariates.form_assumption`)."""
    return covariates.form_assumption(build_model, scale, Statistic(
        "covariate_bend",
        "curvature of standardised residuals across bands of each numeric covariate (negative: "
        "the units at both ends of the covariate's range have fewer outcomes than the middle)",
        covariate_bend,
    ), timing=Statistic(
        "covariate_age_trend",
        "trend across bands of each numeric covariate of the slope of standardised residuals on log "
        "age (0 when the covariate shifts the timing alike at every age)",
        covariate_age_trend,
    ))


def shared_assumptions(build_model) -> tuple[Assumption, ...]:
    """curve_shape, cohort_homogeneity and independent_units, with statistics and relaxations."""
    return (
        Assumption(
            key="curve_shape",
            statement="The timing (of every outcome) follows the chosen family.",
            statistic=Statistic(
                "late_trend",
                "slope of standardised cumulative residuals on log age past the median age (one row per "
                "unit: of observed-minus-expected outcomes per time bin on log time)",
                late_trend,
            ),
            relaxation=relaxation(
                build_model, "curve_power",
                "the curve may be the family raised to a power (exponentiated family)",
                # Planted: F ** 3, a curve that starts late and rises steeply for its family.
                null=0.0, negligible=0.1, planted=1.1,
            ),
            advice="Try another family (--set family=...) or a curve with one more shape parameter; "
                   "look at where the residuals bend.",

            informed_by=ages_to_compare,
        ),
        Assumption(
            key="cohort_homogeneity",
            statement="Every cohort (within a group) follows the same timing.",
            statistic=Statistic(
                "cohort_spread",
                "variance across cohorts of the mean standardised residual (one row per unit: of each "
                "cohort's standardised observed-minus-expected outcomes)",
                cohort_spread,
                sides="greater",
            ),
            relaxation=relaxation(
                build_model, "cohort_sd", "each cohort's timing scale may differ (log-normal cohort effect)",
                # Planted: cohorts' timing scales differ by about +-30%.
                null=0.0, negligible=0.05, planted=0.3,
            ),
            advice="Cohorts differ in timing: add a group column for what distinguishes them, or a "
                   "cohort effect on the timing scale.",
            informed_by=cohorts_to_compare,
        ),
        Assumption(
            key="independent_units",
            statement="Units of a cohort behave independently (multinomial variation only).",
            statistic=Statistic(
                "dispersion",
                "Pearson chi-square per likelihood cell (1 under multinomial variation)",
                cell_dispersion,
                sides="greater",
            ),
            relaxation=relaxation(
                build_model, "overdispersion",
                "units of a cohort share a common influence (Dirichlet-multinomial)",
                # Planted: a cohort of 100 varies about 3 times as much as multinomial.
                null=0.0, negligible=0.005, planted=0.02, absorbs_misfit=True,
            ),
            advice="Counts vary more than multinomial: units of a cohort share something (a batch, a "
                   "site, a day); model it as an effect or use the overdispersed likelihood.",
            informed_by=independence_to_check,
        ),
    )
