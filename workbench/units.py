"""Units followed one by one: right-censored, possibly late-entering, event times.

The unit layout of the ``timing-curve`` and ``competing-risks`` recipes: one
row per unit with ``time`` (when the unit was last seen, or had its outcome),
``event`` (timing-curve: 1 when the event happened at ``time``, 0 when the
unit was still without it when last seen) or ``outcome`` (competing-risks:
the outcome's name, empty when the unit was last seen without one), and the
optional ``entry`` (when the unit came under observation, 0 by default:
delayed entry, or left truncation), ``cohort`` and ``group`` columns.

Likelihood. With cumulative incidence ``C_k(t) = share_k * F_k(t) ** power``
(the mixture of Larson and Dinse 1985; one outcome with ``share = eventual``
is the cure model of Farewell 1982) and survival ``S(t) = 1 - sum_k C_k(t)``,
a unit contributes

    d C_k(t) / dt / S(entry)      when it had outcome k at ``time = t``,
    S(t) / S(entry)               when it was last seen at ``t`` without one,

the exact likelihood of independent right censoring and left truncation
(Klein and Moeschberger 2003, section 3.5). It is one observed variable ``y``
(one log-likelihood term per unit, so PSIS-LOO runs over units) whose value
per unit is ``(time, code)``, code 0 for censored and k + 1 for outcome k.

Replicated units. A replicated unit draws its time from the fitted story
given that it had no outcome before its entry, and is censored at its own
censoring time: the time it was last seen when it had no outcome. A unit
seen with its outcome never showed its censoring time; it gets one drawn
once, when the table is read, from the Kaplan-Meier estimate of the
censoring distribution beyond its time (the reverse Kaplan-Meier of
Schemper and Smith 1996), so replicated tables are censored as the observed
one is.

Statistics. Cumulative hazard residuals H(time) - H(entry) (Cox and Snell
1968) summed into observed-minus-expected events per time bin and per
cohort: under the model and independent censoring the observed events of a
bin minus the hazard integrated over the units' time at risk in it have mean
zero and variance the expected count (the counting-process martingale,
Andersen et al. 1993), whatever the censoring.

References
----------
Andersen, P. K., Borgan, Ø., Gill, R. D. and Keiding, N. (1993). Statistical
Models Based on Counting Processes. Springer.
Cox, D. R. and Snell, E. J. (1968). A general definition of residuals. JRSS B
30(2), 248-275.
Farewell, V. T. (1982). The use of mixture models for the analysis of survival
data with long-term survivors. Biometrics 38(4), 1041-1046.
Klein, J. P. and Moeschberger, M. L. (2003). Survival Analysis, 2nd ed.
Springer.
Larson, M. G. and Dinse, G. E. (1985). A mixture model for the regression
analysis of competing risks data. Applied Statistics 34(3), 201-211.
Schemper, M. and Smith, T. L. (1996). A note on quantifying follow-up in
studies of failure time. Controlled Clinical Trials 17(4), 343-346.
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pandas as pd

from workbench import curves, engine, tables
from workbench.errors import DataError
from workbench.recipe import Dataset, choose_pooling
from workbench.statistics import VARIANCE_FLOOR, residual_trend, standardised

LAYOUT = "units"
# The observed variable's two fields per unit.
FIELDS = ("time", "outcome")
# One row per unit: the pointwise log-likelihood that PSIS-LOO needs holds
# draws x units numbers (4,000 x 100,000 x 8 bytes = 3.2 GB), the most a
# 24 GB machine holds for a fit and its relaxed fits at reduced draws.
# Common practice for interactive sampling, not a published figure.
MAX_UNITS = 100_000
# Time bins of the statistics: at most this many, at quantiles of the
# observed outcome times, and at least MIN_EVENTS_PER_BIN outcomes in each so
# that every bin's observed-minus-expected count is near normal (a Poisson
# count of 10 has skew 0.3; common practice).
TIME_BINS = 8
MIN_EVENTS_PER_BIN = 10
# The plateau statistic reads the bins past this quantile of outcome times.
LATE_QUANTILE = 0.75
# A statistic is evaluated on at most this many unit-draws (units x draws);
# beyond it, on an evenly thinned subset of draws, each value standing for
# the draws around it: 100,000 units keep 200 draws, whose p-value has a
# Monte Carlo error below 0.04, and a statistic stays within seconds.
STATISTIC_BUDGET = 20_000_000
# The censoring times drawn for units seen with their outcome are drawn
# from this seed: the same table always gets the same replicated censoring.
CENSORING_SEED = 20261203


def is_unit_table(table: pd.DataFrame) -> bool:
    """Whether a table is in the unit layout (a ``time`` column) rather than cohort counts."""
    return "time" in [str(c) for c in table.columns]


def is_units(data) -> bool:
    """Whether a validated dataset holds units (this layout)."""
    return getattr(data, "extra", {}).get("layout") == LAYOUT


# --- validation ------------------------------------------------------------------------


def validate(table: pd.DataFrame, outcomes: list[str] | None, options: dict, recipe: str) -> Dataset:
    """Check a unit table once and lay it out for the likelihood.

    Parameters
    ----------
    table : pandas.DataFrame
        Columns ``time`` and ``event`` (``outcomes`` None: one outcome) or
        ``outcome`` (the names in ``outcomes``); optional ``entry``,
        ``cohort`` and ``group``.
    outcomes : list of str or None
        The outcome names of a competing-risks table, in model order.
    options : dict
        The recipe's parsed options (``pooling`` is read here).
    recipe : str
        Recipe name for messages.

    Returns
    -------
    Dataset
        One row per unit in the table's order; ``extra['layout']`` is ``"units"``.
    """
    indicator = "event" if outcomes is None else "outcome"
    # A covariate may be called age (age at entry, say): it is no cohort count.
    clash = [c for c in ("age", "exposed") if c in table.columns and c not in options.get("covariates", ())]
    if clash:
        raise DataError(
            f"recipe '{recipe}': expected either one row per unit (time, {indicator}) or cohort "
            f"counts (age, exposed, ...); found both 'time' and '{clash[0]}'")
    tables.require_columns(table, ["time", indicator], recipe)
    tables.check_size(len(table), recipe, limit=MAX_UNITS, what="units (one row each)")
    time = tables.numeric_column(table, "time")
    bad = np.flatnonzero(time <= 0)
    if bad.size:
        i = int(bad[0])
        raise DataError(f"column 'time' {tables.row(i)}: expected a time > 0 (when the unit was "
                        f"last seen or had its outcome); found {time[i]:g}")
    if "entry" in table.columns:
        entry = tables.numeric_column(table, "entry")
        bad = np.flatnonzero(entry < 0)
        if bad.size:
            i = int(bad[0])
            raise DataError(f"column 'entry' {tables.row(i)}: expected an entry time >= 0; "
                            f"found {entry[i]:g}")
        late = np.flatnonzero(entry >= time)
        if late.size:
            i = int(late[0])
            raise DataError(f"column 'entry' {tables.row(i)}: expected entry < time; found entry "
                            f"{entry[i]:g} >= time {time[i]:g}")
    else:
        entry = np.zeros(len(table))
    names = ["event"] if outcomes is None else list(outcomes)
    code = _event_codes(table) if outcomes is None else _outcome_codes(table, names)
    if not (code > 0).any():
        raise DataError(f"column '{indicator}': expected at least one unit with "
                        f"{'the event' if outcomes is None else 'an outcome'}; found none")
    group, group_labels = (tables.label_column(table, "group") if "group" in table.columns
                           else (np.zeros(len(table), dtype=np.int64), ["all"]))
    # Without a cohort column the units of a group form one cohort.
    cohort, cohort_labels = (tables.label_column(table, "cohort") if "cohort" in table.columns
                             else (group.copy(), list(group_labels)))
    cohort_group = np.zeros(len(cohort_labels), dtype=np.int64)
    first: dict[int, int] = {}
    for i, (c, g) in enumerate(zip(cohort, group)):
        j = first.setdefault(int(c), i)
        if group[j] != g:
            raise DataError(
                f"column 'group' {tables.row(i)}: {group_labels[g]!r} differs from "
                f"{group_labels[group[j]]!r} given for cohort '{cohort_labels[c]}' in "
                f"{tables.row(j)}; expected one group per cohort")
        cohort_group[c] = g
    data = Dataset(
        columns={"time": time, "code": code, "entry": entry, "cohort": cohort, "group": group,
                 "follow": censoring_times(time, code, entry),
                 # The report's covariate: the age at which each unit was last seen.
                 "age": time},
        labels={"cohort": cohort_labels, "group": group_labels},
        source_rows=[[i] for i in range(len(table))],
    )
    data.extra.update(
        layout=LAYOUT,
        outcomes=names,
        pooling=choose_pooling(options, len(group_labels)),
        # The statistics recompute the curves from the draws.
        family=options["family"],
        cohort_group=cohort_group,
        # Times enter the model relative to this reference (as ages do in
        # the cohort layout), so default priors fit any unit of time.
        age_ref=float(np.median(time)),
        bins=time_bins(time[code > 0]),
    )
    return data


def _event_codes(table: pd.DataFrame) -> np.ndarray:
    values = tables.numeric_column(table, "event")
    bad = np.flatnonzero((values != 0) & (values != 1))
    if bad.size:
        i = int(bad[0])
        raise DataError(f"column 'event' {tables.row(i)}: expected 1 (the event happened at time) "
                        f"or 0 (still without it when last seen); found {values[i]:g}")
    return values.astype(np.int64)


def _outcome_codes(table: pd.DataFrame, names: list[str]) -> np.ndarray:
    raw = table["outcome"]
    text = raw.astype(str).str.strip().to_numpy()
    empty = raw.isna().to_numpy() | (text == "")
    codes = np.zeros(len(table), dtype=np.int64)
    lookup = {name: k + 1 for k, name in enumerate(names)}
    for i in np.flatnonzero(~empty):
        code = lookup.get(text[i])
        if code is None:
            raise DataError(f"column 'outcome' {tables.row(int(i))}: expected one of "
                            f"{', '.join(names)} or an empty cell (last seen without an outcome); "
                            f"found {text[i][:60]!r}")
        codes[i] = code
    return codes


def time_bins(event_times: np.ndarray) -> np.ndarray:
    """Bin edges (0, quantiles of the outcome times, inf) for the statistics."""
    n_bins = int(np.clip(event_times.size // MIN_EVENTS_PER_BIN, 1, TIME_BINS))
    inner = np.quantile(event_times, np.arange(1, n_bins) / n_bins) if n_bins > 1 else np.array([])
    return np.concatenate([[0.0], np.unique(inner), [np.inf]])


# --- Kaplan-Meier and Aalen-Johansen ------------------------------------------------------


def product_limit(time, code, entry, k: int):
    """Aalen-Johansen cumulative incidence of each outcome, with delayed entry.

    Returns the distinct outcome times and the cumulative incidence of each
    outcome just after them, shape (times, k); with one outcome it is one
    minus the Kaplan-Meier survival. A unit is at risk at t when
    entry < t <= time.

    References
    ----------
    Aalen, O. O. and Johansen, S. (1978). An empirical transition matrix for
    non-homogeneous Markov chains based on censored observations. Scand. J.
    Statist. 5(3), 141-150.
    """
    time, code, entry = (np.asarray(a) for a in (time, code, entry))
    at = np.unique(time[code > 0])
    at_risk = (np.searchsorted(np.sort(entry), at, side="left")
               - np.searchsorted(np.sort(time), at, side="left")).astype(float)
    events = np.zeros((at.size, k))
    np.add.at(events, (np.searchsorted(at, time[code > 0]), code[code > 0] - 1), 1.0)
    hazard = events / np.maximum(at_risk, 1.0)[:, None]
    total = hazard.sum(axis=1)
    survival_before = np.concatenate([[1.0], np.cumprod(1.0 - total)[:-1]])
    return at, np.cumsum(survival_before[:, None] * hazard, axis=0)


def censoring_times(time: np.ndarray, code: np.ndarray, entry: np.ndarray) -> np.ndarray:
    """Each unit's censoring time: its time when censored, else a draw beyond its time.

    The draw comes from the reverse Kaplan-Meier estimate (censoring as the
    event) conditional on exceeding the unit's time; mass beyond the last
    censoring time puts the unit at the table's last time.
    """
    follow = time.astype(float).copy()
    seen = code > 0
    if not seen.any():
        return follow
    censored = (~seen).astype(np.int64)
    end = float(time.max())
    if not censored.any():
        follow[seen] = end
        return follow
    at, incidence = product_limit(time, censored, entry, 1)
    cumulative = incidence[:, 0]
    rng = np.random.default_rng(CENSORING_SEED)
    t = time[seen]
    # G(t): the share of censoring times at or before t.
    start = np.where(t < at[0], 0.0, cumulative[np.maximum(np.searchsorted(at, t, side="right") - 1, 0)])
    u = start + rng.random(t.size) * (1.0 - start)
    index = np.searchsorted(cumulative, u, side="left")
    drawn = np.where(index < at.size, at[np.minimum(index, at.size - 1)], end)
    follow[seen] = np.maximum(drawn, t)
    return follow


# --- the story in PyMC --------------------------------------------------------------------


def coords(data: Dataset) -> dict:
    """Model coordinates of a unit layout."""
    return {
        "unit": np.arange(data.rows),
        "field": list(FIELDS),
        "cohort": data.labels["cohort"],
        "group": data.labels["group"],
        "outcome": data.extra["outcomes"],
    }


def observed(data: Dataset) -> dict:
    """Values of the outcome container: per unit its time and its outcome code."""
    return {"units": np.column_stack([data["time"], data["code"]]).astype(float)}


def container(data: Dataset):
    """The observed units as the model's ``units`` container (unit, field)."""
    import pymc as pm

    return pm.Data("units", observed(data)["units"], dims=("unit", "field"))


def observed_shares(data: Dataset, units):
    """Share of units seen with each outcome (K,), as a tensor (a starting value)."""
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    code = units[:, 1]
    return pt.stack([pt.eq(code, j + 1).mean() for j in range(k)])


def event_ages(data: Dataset, units):
    """Typical relative time of each outcome (K,), as a tensor (a starting value).

    The geometric mean of the times of the units seen with that outcome; 1,
    the reference, for an outcome no unit had.
    """
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    log_time = pt.log(units[:, 0] / data.extra["age_ref"])
    out = []
    for j in range(k):
        seen = pt.eq(units[:, 1], j + 1)
        out.append(pt.exp((seen * log_time).sum() / pt.maximum(seen.sum(), 1.0)))
    return pt.stack(out)


def unit_scales(data: Dataset, scale_group, relax: str | None, prior):
    """Timing scale per unit and outcome (units, K), with the cohort effect when relaxed."""
    import pymc as pm
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    scale = pt.reshape(scale_group, (len(data.labels["group"]), k))[data["group"]]
    if relax == "cohort_sd":
        sd = prior("cohort_sd")
        z = pm.Normal("cohort_z", 0.0, 1.0, dims="cohort")
        effect = pm.Deterministic("cohort_effect", sd * z, dims="cohort")
        scale = scale * pt.exp(effect[data["cohort"]])[:, None]
    return scale


def likelihood(data: Dataset, units, family: str, scale_group, shape, share, relax: str | None,
               prior, closed: bool, log_shift=None, log_shape_shift=None):
    """The observed units ``y``: the censored, truncated mixture likelihood of the module docstring.

    ``closed`` is True when the shares add up to one by construction (every
    unit ends in an outcome): the survival then has no open part. ``share``
    is one share per outcome (K,) or one per unit and outcome (units, K);
    ``log_shift`` (units,) or (units, K), when given, shifts each unit's log
    timing scale, or each outcome's (covariates in the accelerated failure time form);
    ``log_shape_shift`` (units,) each unit's log curve shape.
    """
    import pymc as pm
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    scale = unit_scales(data, scale_group, relax, prior) * data.extra["age_ref"]
    if log_shift is not None:
        scale = scale * pt.exp(log_shift if log_shift.ndim == 2 else log_shift[:, None])
    share = share if share.ndim == 2 else pt.reshape(share, (k,))
    power = pt.exp(prior("curve_power")) if relax == "curve_power" else pt.ones(())
    entry = pm.Data("entry", data["entry"].astype(float), dims="unit")
    follow = pm.Data("follow", data["follow"].astype(float), dims="unit")
    logp = partial(_logp, family=family, closed=closed, powered=relax == "curve_power")
    random = partial(_random, family=family)
    # One shape per outcome, or (groups, K) under shape_by_group: each unit its group's.
    shape = shape[data["group"]] if shape.ndim == 2 else pt.reshape(shape, (k,))
    if log_shape_shift is not None:
        shape = shape * pt.exp(log_shape_shift)[:, None]
    return pm.CustomDist(
        "y", entry, follow, scale, shape, share, power,
        pt.zeros(len(FIELDS)),
        logp=logp, random=random, signature="(),(),(k),(k),(k),(),(f)->(f)",
        observed=units, dims=("unit", "field"),
    )


def _log1mexp(x):
    """log(1 - exp(x)) for x <= 0, accurate at both ends (Mächler 2012)."""
    import pytensor.tensor as pt

    return pt.switch(x < -np.log(2.0), pt.log1p(-pt.exp(x)), pt.log(-pt.expm1(x)))


def _log_survival(family, t, scale, shape, share, power, closed: bool, powered: bool):
    """log S(t) = log(1 - sum_k share_k F_k(t) ** power) per unit; t (n,), scale (n, K)."""
    import pytensor.tensor as pt

    log_sf = curves.log_survival_tensor(family, t[:, None], scale, shape)
    if powered:
        log_f = _log1mexp(pt.minimum(log_sf, -curves.TINY_SURVIVAL))
        log_sf = _log1mexp(pt.minimum(power * log_f, -curves.TINY_SURVIVAL))
    parts = pt.log(share) + log_sf
    if not closed:
        open_share = pt.maximum(1.0 - share.sum(axis=-1), curves.TINY_SURVIVAL)
        parts = pt.concatenate(
            [parts, pt.broadcast_to(pt.shape_padright(pt.log(open_share)), (t.shape[0], 1))], axis=1)
    return pt.logsumexp(parts, axis=1)


def _logp(value, entry, follow, scale, shape, share, power, fields, family, closed, powered):
    import pytensor.tensor as pt

    share = share if share.ndim == 2 else pt.reshape(share, (-1,))
    shape = shape if shape.ndim == 2 else pt.reshape(shape, (-1,))
    power = pt.reshape(power, ())
    t, code = value[:, 0], value[:, 1]
    log_density = pt.log(share) + curves.log_density_tensor(family, t[:, None], scale, shape)
    if powered:
        log_sf = curves.log_survival_tensor(family, t[:, None], scale, shape)
        log_f = _log1mexp(pt.minimum(log_sf, -curves.TINY_SURVIVAL))
        log_density = log_density + pt.log(power) + (power - 1.0) * log_f
    # Elementwise choice of each unit's outcome (no indexing: its gradient stays elementwise).
    k = len(log_density.type.shape) and log_density.type.shape[1]
    outcome = log_density[:, 0]
    for j in range(1, k):
        outcome = pt.switch(pt.eq(code, j + 1), log_density[:, j], outcome)
    seen = _log_survival(family, t, scale, shape, share, power, closed, powered)
    late = entry > 0
    # Evaluated at a safe time where there is no entry, then switched off.
    at_entry = _log_survival(family, pt.switch(late, entry, t), scale, shape, share, power, closed,
                             powered)
    return pt.switch(code > 0, outcome, seen) - pt.switch(late, at_entry, 0.0)


def _random(entry, follow, scale, shape, share, power, fields, rng=None, size=None, family=None):
    n = np.shape(entry)[-1] if size is None else int(size[-1])
    k = np.shape(scale)[-1]
    share = np.broadcast_to(share, (n, k)) if np.ndim(share) >= 2 else np.reshape(share, (-1,))[-k:]
    shape = np.broadcast_to(shape, (n, k)) if np.ndim(shape) >= 2 else np.reshape(shape, (-1,))[-k:]
    return draw_units(
        rng, family, np.broadcast_to(entry, (n,)), np.broadcast_to(follow, (n,)),
        np.broadcast_to(scale, (n, k)), shape, share,
        float(np.reshape(power, (-1,))[0]),
    )


# --- the story in NumPy -------------------------------------------------------------------


def draw_units(rng: np.random.Generator, family: str, entry, follow, scale, shape, share,
               power: float = 1.0, cohort_power=None) -> np.ndarray:
    """Follow every unit from its entry to its censoring time; return (time, code) per unit.

    Each unit ends in outcome k with probability ``share_k`` (its own, when
    ``share`` is (units, K); or never), at
    a time drawn from F_k ** power with its scale, given that it had no
    outcome by its ``entry``; it is seen with its outcome when that time is
    at or before ``follow``, else censored at ``follow``. Times are drawn by
    NumPy's own generators where power is 1 (independent of the model's
    formulas) and by inversion otherwise.
    """
    entry, follow = np.asarray(entry, dtype=float), np.asarray(follow, dtype=float)
    scale = np.asarray(scale, dtype=float)
    n, k = scale.shape
    shape = np.broadcast_to(np.asarray(shape, dtype=float), (n, k))
    share = np.broadcast_to(np.asarray(share, dtype=float), (n, k))
    reached = curves.cdf(family, entry[:, None], scale, shape) ** power  # F_k(entry)^p
    weight = np.column_stack([share * (1.0 - reached), np.maximum(1.0 - share.sum(axis=1), 0.0)])
    weight = weight / weight.sum(axis=1, keepdims=True)
    outcome = (rng.random(n)[:, None] > np.cumsum(weight, axis=1)[:, :-1]).sum(axis=1)
    times = np.full(n, np.inf)
    for j in range(k):
        who = np.flatnonzero(outcome == j)
        if not who.size:
            continue
        late = entry[who] > 0
        if power == 1.0 and not late.any():
            times[who] = curves.draw_times(rng, family, scale[who, j], shape[who, j], who.size)
        else:
            low = reached[who, j]
            u = low + rng.random(who.size) * (1.0 - low)
            times[who] = curves.quantile(family, u ** (1.0 / power), scale[who, j], shape[who, j])
    times = np.maximum(times, entry + curves.TINY_TIME * np.maximum(entry, 1.0))
    seen = times <= follow
    return np.column_stack([np.where(seen, times, follow), np.where(seen, outcome + 1, 0)]).astype(float)


def simulate(rng: np.random.Generator, data: Dataset, family: str, scales: np.ndarray, shapes, share,
             power: float = 1.0, log_shift=0.0, log_shape_shift=0.0) -> Dataset:
    """New outcomes for the units of ``data`` (same entries and censoring times).

    ``scales`` and ``shapes`` are the timing scale, in the model's relative
    time, and the curve shape per cohort and outcome (cohorts, K); ``log_shift`` (units,)
    shifts each unit's log scale, (units, K) each outcome's, and ``share``
    may be one per unit and outcome (covariates); ``log_shape_shift`` (units,)
    shifts each unit's log curve shape.
    """
    shift = np.asarray(log_shift, dtype=float)
    scale = scales[data["cohort"]] * data.extra["age_ref"] * np.exp(shift[:, None] if shift.ndim == 1 else shift)
    shape = np.asarray(shapes, dtype=float)[data["cohort"]]
    shape = shape * np.exp(np.broadcast_to(np.asarray(log_shape_shift, dtype=float), (data.rows,)))[:, None]
    drawn = draw_units(rng, family, data["entry"], data["follow"], scale, shape, share, power)
    out = data.replace(time=drawn[:, 0], code=drawn[:, 1].astype(np.int64), age=drawn[:, 0])
    # The statistics' time bins follow the outcome times, as validating the new table would
    # set them (the reference time stays: the parameters are relative to it).
    out.extra = {**data.extra, "bins": time_bins(drawn[drawn[:, 1] > 0, 0])}
    return out


def simulate_table(rng: np.random.Generator, family: str, scale, shape, share, units: int,
                   cohorts: int = 1, follow: tuple[float, float] = (0.0, np.inf),
                   dropout: float = 0.0, entry: float = 0.0, outcomes: list[str] | None = None,
                   cohort_sd: float = 0.0, power: float = 1.0) -> pd.DataFrame:
    """A unit table as an analyst has it, from documented true values.

    Units join ``cohorts`` consecutive cohorts evenly; each unit is watched
    from an entry age drawn uniformly up to ``entry`` (0: from the start)
    until an administrative end drawn uniformly in ``follow`` after entry
    (staggered enrolment, a study that closes on one day), or earlier when
    it is lost at rate ``dropout`` per unit of time. ``scale`` (per outcome,
    in the table's time unit), ``shape`` and ``share`` are the story's true
    values; ``cohort_sd`` shifts each cohort's log scale by a normal draw
    and ``power`` raises every curve to a power (planted faults). With
    ``outcomes`` the table has an ``outcome`` column (competing-risks), else
    an ``event`` column (timing-curve).
    """
    scale = np.atleast_1d(np.asarray(scale, dtype=float))
    k = scale.size
    cohort = np.arange(units) * cohorts // units
    effect = rng.normal(0.0, cohort_sd, cohorts) if cohort_sd > 0 else np.zeros(cohorts)
    start = rng.uniform(0.0, entry, units) if entry > 0 else np.zeros(units)
    window = rng.uniform(follow[0], follow[1], units) if np.isfinite(follow[1]) else np.full(units, np.inf)
    lost = rng.exponential(1.0 / dropout, units) if dropout > 0 else np.full(units, np.inf)
    until = start + np.minimum(window, lost)
    drawn = draw_units(rng, family, start, until, scale[None, :] * np.exp(effect)[cohort][:, None],
                       shape, share, power)
    table = pd.DataFrame({"time": drawn[:, 0]})
    code = drawn[:, 1].astype(int)
    if outcomes is None:
        table["event"] = code
    else:
        table["outcome"] = [outcomes[c - 1] if c > 0 else "" for c in code]
    if entry > 0:
        table["entry"] = start
    if cohorts > 1:
        table["cohort"] = [f"c{c + 1:02d}" for c in cohort]
    return table


# --- targeted statistics -------------------------------------------------------------------


def _unit_curves(data: Dataset, draws: dict, family: str, picked: np.ndarray):
    """The curves of the ``picked`` draws, one per cohort or, with covariates, per unit.

    Returns the curve of each unit (n,), and per draw the scale (S, L, K) in
    table time, shape (S, L, K), share (S, L, K) and power (S,) of the L curves.
    """
    from workbench import cohorts, covariates

    k = len(data.extra["outcomes"])
    group = np.asarray(draws["scale_group"], dtype=float)[picked]
    s = group.shape[0]
    group = group.reshape(s, len(data.labels["group"]), k)
    scale = group[:, data.extra["cohort_group"], :] * data.extra["age_ref"]
    if "cohort_effect" in draws:
        effect = np.asarray(draws["cohort_effect"], dtype=float)[picked]
        scale = scale * np.exp(effect.reshape(s, -1, 1))
    # One shape per outcome, or per group and outcome (shape_by_group): per cohort (S, C, K).
    shape = cohorts.group_shapes(draws, len(data.labels["group"]), k)[picked][:, data.extra["cohort_group"], :]
    share = np.asarray(draws["share"], dtype=float)[picked].reshape(s, 1, k)
    power = np.exp(np.asarray(draws.get("curve_power", np.zeros(len(draws["shape"]))),
                              dtype=float)[picked].reshape(s))
    design = data.extra.get("covariates")
    # The relaxed model whose cohorts differ in eventual share: each cohort's log-odds shift (S, C).
    cohort_shift = None
    if "cohort_share_z" in draws:
        cohort_shift = (np.asarray(draws["cohort_share_sd"], dtype=float)[picked].reshape(s, 1)
                        * np.asarray(draws["cohort_share_z"], dtype=float)[picked].reshape(s, -1))
    if design is None:
        if cohort_shift is not None:
            share = covariates.shift_shares(share, cohort_shift[..., None], against_open=True)
        return data["cohort"], scale, shape, np.broadcast_to(share, scale.shape), power
    # Each unit its own curve: its cohort's scale shifted by its covariates.
    picked_draws = {name: np.asarray(draws[name])[picked] for name in
                    ("time_effect", "share_effect", covariates.CURVATURE, covariates.SHAPE_SLOPE) if name in draws}
    if np.ndim(draws.get("time_effect", np.zeros((1, 1)))) == 3:
        # One effect per outcome and covariate (competing risks).
        time_shift = covariates.linear_by(design, picked_draws, "time_effect")
    else:
        time_shift = np.asarray(covariates.linear(design, picked_draws, "time_effect"))[..., None]
    # The covariate_form relaxations: the shift bent, the shape moved (S, units) or (units,).
    time_shift = time_shift + np.asarray(covariates.curvature_shift(design, picked_draws))[..., None]
    scale = scale[:, data["cohort"], :] * np.exp(time_shift)
    shape = shape[:, data["cohort"], :] * np.exp(np.asarray(covariates.shape_shift(design, picked_draws)))[..., None]
    if np.ndim(draws.get("share_effect", np.zeros((1, 1)))) == 3:
        # Multinomial log-odds per outcome: against the open share when one is
        # estimated (an effect for every outcome), else against the first outcome.
        shift = covariates.linear_by(design, picked_draws, "share_effect")
        share = covariates.shift_shares(share, shift, against_open=shift.shape[-1] == k)
        return np.arange(data.rows), scale, shape, np.broadcast_to(share, scale.shape), power
    shift = np.zeros((s, data.rows))
    if "share_effect" in picked_draws:
        shift = shift + covariates.linear(design, picked_draws, "share_effect")
    if cohort_shift is not None:
        shift = shift + cohort_shift[:, data["cohort"]]
    if "share_effect" in picked_draws or cohort_shift is not None:
        share = covariates.shift_shares(share, shift[..., None], against_open=True)
    return np.arange(data.rows), scale, shape, np.broadcast_to(share, scale.shape), power


def _hazard(family, t, scale, shape, share, power):
    """Cumulative hazard -log S(t); t (S, n), scale, shape and share (S, n, K), power (S,)."""
    f = curves.cdf(family, t[..., None], scale, shape) ** power[:, None, None]
    survival = 1.0 - (share * f).sum(axis=-1)
    return -np.log(np.maximum(survival, curves.TINY_SURVIVAL))


def hazard_counts(data: Dataset, y: np.ndarray, draws: dict, groups: tuple | None = None):
    """Observed and expected outcomes per time bin (S, B) and per cohort (S, C).

    ``groups`` = (index per unit, count) sums per those groups instead of
    per cohort (bands of a covariate).

    ``y`` holds (time, code) per unit with a leading axis of S draws. A
    unit's expected outcomes in a bin are its cumulative hazard over the
    part of its time at risk (entry, time] that falls in the bin. Evaluated
    on at most :data:`STATISTIC_BUDGET` unit-draws (see there).
    """
    family = data.extra["family"]
    y = np.asarray(y, dtype=float)
    s_all, n = y.shape[0], data.rows
    step = max(1, int(np.ceil(s_all * n / STATISTIC_BUDGET)))
    picked = np.arange(0, s_all, step)
    curve, scale_c, shape, share_c, power = _unit_curves(data, draws, family, picked)
    edges = data.extra["bins"]
    n_bins, n_curves = edges.size - 1, scale_c.shape[1]
    cohort, entry = data["cohort"], data["entry"]
    group, n_cohorts = (cohort, len(data.labels["cohort"])) if groups is None else groups
    chunk = max(1, STATISTIC_BUDGET // (20 * max(n, 1)))
    outputs = [np.zeros((picked.size, n_bins)) for _ in range(2)] + \
        [np.zeros((picked.size, n_cohorts)) for _ in range(2)]
    finite = edges[1:-1]
    for lo in range(0, picked.size, chunk):
        part = slice(lo, lo + chunk)
        m = picked[part].size
        t, code = y[picked[part], :, 0], y[picked[part], :, 1]
        scale = scale_c[part][:, curve, :]
        args = (shape[part][:, curve, :], share_c[part][:, curve, :], power[part])
        h_t = _hazard(family, t, scale, *args)
        h_e = _hazard(family, np.broadcast_to(entry, t.shape), scale, *args) if entry.any() else 0.0 * h_t
        # H at the inner bin edges per draw and curve (S, L, B-1).
        edge_scale = scale_c[part][:, :, None, :]
        f = curves.cdf(family, finite[None, None, :, None], edge_scale, shape[part][:, :, None, :])
        f = f ** power[part][:, None, None, None]
        h_edge = -np.log(np.maximum(1.0 - (share_c[part][:, :, None, :] * f).sum(-1), curves.TINY_SURVIVAL))
        h_edge = np.concatenate([np.zeros((m, n_curves, 1)), h_edge, np.full((m, n_curves, 1), np.inf)], 2)
        draw = np.arange(m)[:, None]
        bin_of = _bin_of(edges, t)
        top = _clipped_sums(h_t, bin_of, curve, h_edge)
        bottom = _clipped_sums(h_e, np.broadcast_to(_bin_of(edges, entry), t.shape), curve, h_edge)
        seen = (code > 0).astype(float)
        outputs[0][part] = _sums(draw * n_bins + bin_of, seen, m * n_bins).reshape(m, n_bins)
        outputs[1][part] = np.maximum(top - bottom, 0.0)
        by_cohort = draw * n_cohorts + np.asarray(group)[None, :]
        outputs[2][part] = _sums(by_cohort, seen, m * n_cohorts).reshape(m, n_cohorts)
        outputs[3][part] = _sums(by_cohort, h_t - h_e, m * n_cohorts).reshape(m, n_cohorts)
    # Each value stands for the `step` draws from its own on.
    fill = np.minimum(np.arange(s_all) // step, picked.size - 1)
    return tuple(a[fill] for a in outputs)


def _bin_of(edges: np.ndarray, t) -> np.ndarray:
    """The time bin of each time: bin b holds (edges[b], edges[b + 1]]."""
    return np.clip(np.searchsorted(edges, t, side="left") - 1, 0, edges.size - 2)


def _clipped_sums(h, bin_of, cohort, h_edge) -> np.ndarray:
    """Per draw and bin, the sum over units of H clipped to the bin's cumulative-hazard range.

    ``h`` (S, n) is each unit's cumulative hazard at a time in bin
    ``bin_of`` (S, n); ``h_edge`` (S, C, B + 1) the hazard at the bin edges
    for each cohort. A unit past bin b adds the bin's upper edge, one before
    it the lower edge, one inside it its own value, so that one pass over
    the units serves every bin (H is increasing in time).
    """
    m, n_cohorts, n_edges = h_edge.shape
    n_bins = n_edges - 1
    draw = np.arange(m)[:, None]
    index = (draw * n_cohorts + cohort[None, :]) * n_bins + bin_of
    counts = _sums(index, 1.0, m * n_cohorts * n_bins).reshape(m, n_cohorts, n_bins)
    upto = np.cumsum(counts, axis=2)
    below = upto - counts
    above = upto[:, :, -1:] - upto
    upper = np.where(above > 0, above * np.where(np.isfinite(h_edge[:, :, 1:]), h_edge[:, :, 1:], 0.0), 0.0)
    inside = _sums(draw * n_bins + bin_of, h, m * n_bins).reshape(m, n_bins)
    return (upper + below * h_edge[:, :, :-1]).sum(axis=1) + inside


def _sums(index, weights, size) -> np.ndarray:
    return np.bincount(np.ravel(index), weights=np.ravel(np.broadcast_to(weights, np.shape(index))),
                       minlength=size)


def bin_times(data: Dataset) -> np.ndarray:
    """A representative time per bin: the geometric middle (the last bin: its lower edge x 2)."""
    edges = data.extra["bins"]
    low = np.maximum(edges[:-1], edges[1] / 2 if edges.size > 2 else data.extra["age_ref"] / 2)
    high = np.where(np.isfinite(edges[1:]), edges[1:], 2 * np.maximum(edges[:-1], low))
    return np.sqrt(low * high)


def hazard_trend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Slope of standardised observed-minus-expected outcomes per time bin on log time."""
    observed_bins, expected_bins, _, _ = hazard_counts(data, outcomes["y"], draws)
    return residual_trend(observed_bins, expected_bins, expected_bins, np.log(bin_times(data)))


def late_shortfall(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Standardised observed-minus-expected outcomes over the bins past the late quantile."""
    observed_bins, expected_bins, _, _ = hazard_counts(data, outcomes["y"], draws)
    edges = data.extra["bins"]
    late = edges[:-1] >= np.quantile(edges[1:-1], LATE_QUANTILE) if edges.size > 2 else np.ones(1, bool)
    late[-1] = True
    o, e = observed_bins[:, late].sum(axis=1), expected_bins[:, late].sum(axis=1)
    return (o - e) / np.sqrt(np.maximum(e, VARIANCE_FLOOR))


def cohort_spread(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Variance across cohorts of each cohort's standardised observed-minus-expected outcomes."""
    _, _, observed_cohorts, expected_cohorts = hazard_counts(data, outcomes["y"], draws)
    return standardised(observed_cohorts, expected_cohorts, expected_cohorts).var(axis=-1)


def covariate_bend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """:func:`workbench.covariates.bend` on each band's observed and expected outcomes."""
    from workbench import covariates

    def per_band(band, n_bands):
        _, _, observed, expected = hazard_counts(data, outcomes["y"], draws, (band, n_bands))
        return observed, expected, expected

    return covariates.bend(data.extra["covariates"], per_band)


def units_of(data: Dataset, rows: np.ndarray) -> Dataset:
    """The units ``rows`` of a unit layout as a dataset of their own (same cohorts, bins and
    reference time; the covariates' rows taken with them)."""
    extra = dict(data.extra)
    if extra.get("covariates") is not None:
        extra["covariates"] = extra["covariates"].take(rows)
    return Dataset({k: v[rows] for k, v in data.columns.items()}, data.labels,
                   [data.source_rows[i] for i in rows] if data.source_rows else [], extra)


def covariate_age_trend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """:func:`workbench.covariates.age_trend_spread` on each band's hazard trend (:func:`hazard_trend`)."""
    from workbench import covariates

    y = np.asarray(outcomes["y"])

    def band_slopes(rows):
        return hazard_trend(units_of(data, rows), {"y": y[:, rows]}, draws)

    return covariates.age_trend_spread(data.extra["covariates"], band_slopes)


def no_independence_check(data: Dataset) -> str:
    """Why ``independent_units`` is not checked on unit rows ("" for cohort counts)."""
    if not is_units(data):
        return ""
    return ("with one row per unit there is no count whose spread could exceed independent "
            "units'; a shared influence within cohorts shows as cohorts that differ, which "
            "cohort_homogeneity checks")
