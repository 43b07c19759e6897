"""stage-transitions: units move through ordered stages until an end stage holds them.

Story. Every period each unit in a transient stage i moves to stage j with
probability ``P[i, j]`` (staying is a move to i), independently of the other
units and of its past (a discrete-time Markov chain). End stages (option
``absorbing``) hold their units for good. With ``moves=forward`` a unit can
stay, move to a later stage in the ``stages`` order, or move to any end stage;
with ``moves=any`` every move is possible; ``moves`` may also list the
possible moves as ``FROM>TO`` pairs (a move the process cannot make should
be left out: its probability is zero, which no log-odds prior reaches). Each
allowed move out of a
transient stage has a log-odds ``move_logit`` against staying (softmax rows).

Data, in one of two layouts.

* Stage counts: the units of each cohort in each stage at consecutive
  periods; every unit is counted in exactly one stage each period.
* Transition counts (a ``from`` column): each row takes the units of a
  cohort that were in stage ``from`` at ``period`` and counts, in the stage
  columns, where they were one period later. Rows a table leaves out hold no
  units.

Likelihood of transition counts (exact): each row is one multinomial draw
of its units over the stages of row ``from`` of the matrix.

Likelihood of stage counts (a documented approximation). Units in end stages at one period
are still there at the next, so only the ``M`` units in transient stages
(the movers) carry information; their destinations (the transient counts at
the next period and the increments of the end stages) are what the model
observes. Given the movers' stages ``m_{t-1}``, the exact law of their
destinations is a sum of independent multinomials, one per source stage (no
closed form). We use one multinomial with the same mean:

    d_t | m_{t-1} ~ Multinomial(M, (m_{t-1} / M) @ P).

Its means are exact and its covariance exceeds the exact one by the positive
semi-definite ``sum_i m_i (P_i - pbar)(P_i - pbar)^T``, so it errs towards
wider, never narrower, uncertainty; it is exact when the movers all sit in
one stage. The first period of each cohort is conditioned on, not modelled.
The dispersion check of ``independent_units`` therefore standardises by the
story's own variance ``sum_i m_i P_ij (1 - P_ij)`` (the deterministic
``story_var``), so that data from the story sit at 1 and units that move
together stand out.

Both layouts reach the model in one form: per step (a cohort's move from
one period to the next, or one row of transition counts) the movers of each
source stage (the ``sources`` container) and their destinations (the
``counts`` container).

Columns: ``cohort``, ``period`` (whole numbers; consecutive within a cohort
for stage counts), one count column per stage, optional ``from`` (transition
counts) and ``group``. Options: ``stages``, ``absorbing``, ``moves``,
``pooling``, ``centred`` and ``covariates``.

Covariates (:mod:`workbench.covariates`). Each covariate column, one value
per cohort in either layout, shifts the log-odds of each allowed move
against staying by its own ``move_effect`` (a multinomial logit per source
stage, McFadden 1974): a unit of a cohort with covariates x leaves stage i
for j with weight ``exp(move_logit[i>j] + x'move_effect[i>j])`` against 1
for staying. ``move_logit`` and ``transition`` then describe a unit at the
numeric covariates' means and the labels' reference levels; ``odds_ratio``
gives each move's effect per unit of its covariate.

References
----------
McFadden, D. (1974). Conditional logit analysis of qualitative choice
behavior. In Frontiers in Econometrics, ed. P. Zarembka, 105-142. Academic Press.
Kemeny, J. G. and Snell, J. L. (1960). Finite Markov Chains. Van Nostrand,
chapter III (absorbing chains, the fundamental matrix N = (I - Q)^-1 and the
absorption probabilities B = N R).
Kalbfleisch, J. D. and Lawless, J. F. (1984). Least-squares estimation of
transition probabilities from aggregate data. Canadian Journal of Statistics
12(3), 169-182 (Markov chains fitted to aggregate stage counts).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from workbench import covariates, tables
from workbench.cohorts import CENTRED, EPS, relaxation
from workbench.errors import DataError, OptionError
from workbench.recipe import (
    Assumption,
    Column,
    Dataset,
    DemoScenario,
    Option,
    Parameter,
    Recipe,
    Statistic,
    choose_pooling,
)
from workbench.statistics import nearest_shortfall, pearson_dispersion, residual_trend_score

NAME = "stage-transitions"
RESERVED = {"cohort", "period", "group", "from"}
# The two table layouts (see the module docstring).
STAGE_COUNTS, TRANSITION_COUNTS = "stage counts", "transition counts"


def _name_list(minimum: int):
    def parse(text: str) -> tuple[str, ...]:
        names = tuple(part.strip() for part in str(text).split(",") if part.strip())
        if len(names) < minimum:
            raise ValueError(f"needs at least {minimum} column name(s) separated by commas")
        if len(set(names)) != len(names):
            raise ValueError("names a stage twice")
        if RESERVED.intersection(names):
            raise ValueError(f"'{sorted(RESERVED.intersection(names))[0]}' is not a stage column")
        return names

    return parse


STAGES = Option("stages", "the stage count columns in their order, comma separated (at least two)",
                parse=_name_list(2))
ABSORBING = Option("absorbing", "the end stages among 'stages', comma separated (at least one)",
                   parse=_name_list(1))


class Move(tuple):
    """One allowed move (FROM, TO); written back as ``FROM>TO`` in labels and notebooks."""

    def __str__(self) -> str:
        return ">".join(self)


def _moves_option(text: str):
    text = str(text).strip()
    if text in {"forward", "any"}:
        return text
    pairs = tuple(Move(part.strip() for part in item.split(">")) for item in text.split(",") if item.strip())
    if not pairs or any(len(pair) != 2 or not all(pair) for pair in pairs):
        raise ValueError("expected forward, any, or moves written FROM>TO separated by commas")
    return pairs


MOVES = Option(
    "moves",
    "forward (stay, move to a later stage or to an end stage), any (every move possible), or the "
    "possible moves as FROM>TO pairs separated by commas (staying is always possible)",
    parse=_moves_option,
    default="forward",
)
COVARIATES = covariates.option("the log-odds of each allowed move against staying")
POOLING = Option(
    "pooling",
    "how groups share the transition probabilities: none, partial or complete",
    default="auto",
    choices=("auto", "none", "partial", "complete"),
)


# --- validation ------------------------------------------------------------------------


def _steps_seen(data: Dataset) -> int:
    """Steps between periods the table shows: stage counts one between consecutive
    periods, transition counts one per period."""
    periods = len(np.unique(data["period"]))
    return periods if data.extra.get("layout") == TRANSITION_COUNTS else periods - 1


def periods_to_compare(data: Dataset) -> str:
    """Why the table cannot show a drift over periods ("" when it can)."""
    # A drift needs moves seen over at least two steps.
    if _steps_seen(data) >= 2:
        return ""
    return "the table follows its units over a single step between periods, so nothing can drift"


def steps_to_follow(data: Dataset) -> str:
    """Why the table cannot show units that fall silent ("" when it can)."""
    # Over one step a unit that fell silent stays in its stage like one that
    # stayed: the dormant share and the stay probability are one number.
    if _steps_seen(data) >= 2:
        return ""
    return ("the table follows its units over a single step between periods, so a unit that fell "
            "silent cannot be told from one that stayed")


def movers_to_compare(data: Dataset) -> str:
    """Why the table cannot show units moving together ("" when it can)."""
    # Units move together only where a step has two of them to move.
    if movers(data).max(initial=0) >= 2:
        return ""
    return "no step has more than one unit to move, so no units can move together"


def allowed_moves(stages, absorbing, moves) -> np.ndarray:
    """Boolean matrix (from, to) of the moves the chain allows.

    ``moves`` is ``"forward"``, ``"any"`` or a tuple of (from, to) stage
    names; staying is always allowed and end stages only hold their units.
    """
    s = len(stages)
    end = np.array([name in absorbing for name in stages])
    if moves == "any":
        allowed = np.ones((s, s), dtype=bool)
    elif moves == "forward":
        allowed = np.triu(np.ones((s, s), dtype=bool)) | end[None, :]
    else:
        allowed = np.eye(s, dtype=bool)
        for source, target in moves:
            for name in (source, target):
                if name not in stages:
                    raise OptionError(f"option 'moves': expected stage names among {', '.join(stages)}; "
                                      f"found {name!r} in {source}>{target}")
            if source in absorbing:
                raise OptionError(f"option 'moves': {source}>{target} leaves the end stage {source!r}; "
                                  f"expected moves out of transient stages only")
            allowed[stages.index(source), stages.index(target)] = True
    allowed[end] = np.eye(s, dtype=bool)[end]
    return allowed


def validate(table: pd.DataFrame, options: dict) -> Dataset:
    """Check the table once and lay out its steps (see the module docstring for the layouts).

    Stage counts: consecutive periods, constant totals, end stages never
    shrink. Transition counts: ``from`` names a stage, one row per cohort,
    period and ``from``, no unit leaves an end stage and none makes a move
    the design does not allow. In both, each covariate is one value per
    cohort (:func:`workbench.covariates.read`, one design row per table row).
    """
    stages, absorbing = list(options["stages"]), list(options["absorbing"])
    unknown = [a for a in absorbing if a not in stages]
    if unknown:
        raise OptionError(f"option 'absorbing': expected names among stages {', '.join(stages)}; "
                          f"found {unknown[0]!r}")
    if len(absorbing) == len(stages):
        raise OptionError("option 'absorbing': expected at least one stage that is not an end stage; "
                          "found every stage listed")
    layout = TRANSITION_COUNTS if "from" in table.columns else STAGE_COUNTS
    tables.require_columns(table, ["cohort", "period", *stages], NAME)
    cohort, cohort_labels = tables.label_column(table, "cohort")
    period = tables.numeric_column(table, "period")
    frac = np.flatnonzero(period != np.round(period))
    if frac.size:
        i = int(frac[0])
        raise DataError(f"column 'period' {tables.row(i)}: expected a whole number; found {period[i]:g}")
    counts = np.column_stack([tables.count_column(table, name) for name in stages])
    if "group" in table.columns:
        group, group_labels = tables.label_column(table, "group")
    else:
        group, group_labels = np.zeros(len(table), dtype=np.int64), ["all"]
    end = np.array([name in absorbing for name in stages])
    allowed = allowed_moves(stages, absorbing, options.get("moves", "forward"))
    period = period.astype(np.int64)
    if layout == TRANSITION_COUNTS:
        source = _stage_codes(table, stages)
        order, step, start_period = _transition_rows(stages, end, allowed, cohort, cohort_labels, period,
                                                     source, counts, group, group_labels)
    else:
        source = None
        order, step, start_period = _stage_count_rows(stages, end, cohort, cohort_labels, period, counts,
                                                      group, group_labels)
    tables.check_size(len(order), NAME)
    c, t = cohort[order], period[order]
    first = _first_period(len(cohort_labels), c, t)  # of each cohort's rows
    started = _first_period(len(cohort_labels), c[step], start_period)  # of its steps
    columns = {"cohort": c, "period": t, "group": group[order], "age": t - first[c]}
    if source is not None:
        columns["from"] = source[order]
    for j, name in enumerate(stages):
        columns[name] = counts[order, j]
    labels = {"cohort": cohort_labels, "group": group_labels}
    if source is not None:
        labels["from"] = stages
    data = Dataset(columns, labels=labels, source_rows=[[int(i)] for i in order])
    pooling = choose_pooling(options, len(group_labels))
    spread = start_period.std()
    reserved = ("cohort", "period", *(["from"] if source is not None else []), *stages, "group")
    design = covariates.read(table, tuple(options.get("covariates", ())), NAME, reserved)
    if design is not None:
        # Every row of a cohort counts the same units: one value per cohort.
        covariates.constant_within(design, table, cohort, cohort_labels)
        design = design.take(order)
    data.extra.update(
        covariates=design,
        layout=layout,
        stages=stages,
        absorbing=end,
        allowed=allowed,
        pooling=pooling,
        step=step,
        # Each step's cohort and group, and the cohort's age and period when its units start to move.
        step_cohort=c[step],
        step_group=group[order][step],
        step_age=start_period - started[c[step]],
        step_period=start_period,
        # Standardised period of each move, for the drift relaxation.
        drift_x=(start_period - start_period.mean()) / (spread if spread > 0 else 1.0),
    )
    return data


def _first_period(n_cohorts: int, cohort: np.ndarray, period: np.ndarray) -> np.ndarray:
    """Earliest of ``period`` per cohort code (cohorts without any: a large number)."""
    first = np.full(n_cohorts, np.iinfo(np.int64).max)
    np.minimum.at(first, cohort, period)
    return first


def _stage_codes(table: pd.DataFrame, stages: list[str]) -> np.ndarray:
    """The ``from`` column as stage indices."""
    codes, labels = tables.label_column(table, "from")
    for code, label in enumerate(labels):
        if label not in stages:
            i = int(np.flatnonzero(codes == code)[0])
            raise DataError(f"column 'from' {tables.row(i)}: expected one of {', '.join(stages)}; "
                            f"found {label!r}")
    return np.array([stages.index(label) for label in labels], dtype=np.int64)[codes]


def _stage_count_rows(stages, end, cohort, cohort_labels, period, n, group, group_labels):
    """Sorted row order, the rows that end a step, and each step's start period (stage counts)."""
    order = np.lexsort((period, cohort))
    c, t, n, g = cohort[order], period[order], n[order], group[order]
    same = c[1:] == c[:-1]
    where = lambda j: tables.row(int(order[j]))  # noqa: E731  (input row of sorted row j)
    for j in np.flatnonzero(same):
        label = cohort_labels[c[j]]
        if t[j + 1] == t[j]:
            raise DataError(f"column 'period' {where(j + 1)}: cohort '{label}' already has period "
                            f"{t[j]} in {where(j)}; expected one row per cohort and period")
        if t[j + 1] != t[j] + 1:
            raise DataError(f"column 'period' {where(j + 1)}: cohort '{label}' jumps from period "
                            f"{t[j]} in {where(j)} to {t[j + 1]}; expected consecutive periods")
        if g[j + 1] != g[j]:
            raise DataError(f"column 'group' {where(j + 1)}: {group_labels[g[j + 1]]!r} differs from "
                            f"{group_labels[g[j]]!r} in {where(j)}; expected one group per cohort")
        if n[j + 1].sum() != n[j].sum():
            raise DataError(f"{where(j + 1)}: stages sum to {n[j + 1].sum()} but to {n[j].sum()} in "
                            f"{where(j)} of cohort '{label}'; expected every unit counted in one "
                            f"stage every period")
        for s, name in enumerate(stages):
            if end[s] and n[j + 1, s] < n[j, s]:
                raise DataError(f"column '{name}' {where(j + 1)}: {n[j + 1, s]} < {n[j, s]} in the "
                                f"previous period ({where(j)}); an end stage never loses units")
    empty = np.flatnonzero(n.sum(axis=1) == 0)
    if empty.size:
        raise DataError(f"{where(int(empty[0]))}: expected at least one unit in some stage; found none")
    if not same.any():
        raise DataError("column 'period': expected at least one cohort seen in two consecutive periods; "
                        "found none")
    step = np.flatnonzero(np.concatenate([[False], same]))  # rows that have a previous period
    return order, step, t[step - 1]


def _transition_rows(stages, end, allowed, cohort, cohort_labels, period, source, n, group, group_labels):
    """Sorted row order, the rows that are steps, and each step's start period (transition counts)."""
    order = np.lexsort((source, period, cohort))
    c, t, f = cohort[order], period[order], source[order]
    where = lambda j: tables.row(int(order[j]))  # noqa: E731  (input row of sorted row j)
    twin = np.flatnonzero((c[1:] == c[:-1]) & (t[1:] == t[:-1]) & (f[1:] == f[:-1]))
    if twin.size:
        j = int(twin[0])
        raise DataError(f"{where(j + 1)}: cohort '{cohort_labels[c[j]]}' already has period {t[j]} "
                        f"from '{stages[f[j]]}' in {where(j)}; expected one row per cohort, period "
                        f"and from-stage")
    _, first_row = np.unique(cohort, return_index=True)
    other = np.flatnonzero(group != group[first_row][cohort])
    if other.size:
        i, j = int(other[0]), int(first_row[cohort[other[0]]])
        raise DataError(f"column 'group' {tables.row(i)}: {group_labels[group[i]]!r} differs from "
                        f"{group_labels[group[j]]!r} in {tables.row(j)}; expected one group per cohort")
    moved = np.argwhere((n > 0) & ~allowed[source])
    if moved.size:
        i, j = (int(x) for x in moved[0])
        why = ("an end stage never loses units" if end[source[i]]
               else "a move the design does not allow (option 'moves')")
        raise DataError(f"column '{stages[j]}' {tables.row(i)}: {n[i, j]} unit(s) moved from "
                        f"'{stages[source[i]]}' to '{stages[j]}', {why}")
    step = np.flatnonzero(~end[f])
    if not (n[order][step].sum(axis=1) > 0).any():
        raise DataError("expected at least one row with units in a stage that is not an end stage; "
                        "found none")
    return order, step, t[step]


def stage_counts(data: Dataset) -> np.ndarray:
    """Counts per row and stage (rows, S)."""
    return np.column_stack([data[name] for name in data.extra["stages"]])


def observed(data: Dataset) -> dict:
    """The containers: per step, the movers of each source stage and their destinations.

    Stage counts: the movers are the units in transient stages before the
    step, their destinations the transient counts after it and what each end
    stage gained (units already in an end stage stay put). Transition counts:
    a row's units all move from its ``from`` stage.
    """
    n = stage_counts(data)
    step = data.extra["step"]
    if data.extra["layout"] == TRANSITION_COUNTS:
        counts = n[step]
        sources = np.zeros_like(counts)
        sources[np.arange(step.size), data["from"][step]] = counts.sum(axis=1)
        return {"counts": counts, "sources": sources}
    previous = n[step - 1]
    sources = np.where(data.extra["absorbing"][None, :], 0, previous)
    return {"counts": n[step] - (previous - sources), "sources": sources}


def movers(data: Dataset) -> np.ndarray:
    """Units that move at each step (steps,)."""
    return observed(data)["sources"].sum(axis=1)


def cohort_states(data: Dataset) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(cohort, age, stage counts) of every cohort at every period the table shows.

    Transition counts give the transient stages from the ``from`` rows and
    the end stages as what they gained since the cohort's first period (its
    units already in an end stage then are not in such a table).
    """
    if data.extra["layout"] == STAGE_COUNTS:
        return data["cohort"], data["age"], stage_counts(data)
    values = observed(data)
    sources, counts = values["sources"], values["counts"]
    cohorts, ages = data.extra["step_cohort"], data.extra["step_age"]
    end = data.extra["absorbing"]
    rows = []
    for c in np.unique(cohorts):
        mine = cohorts == c
        for a in np.unique(np.concatenate([ages[mine], ages[mine] + 1])):
            at, before = mine & (ages == a), mine & (ages == a - 1)
            # Transient stages: the from-rows of this period, else where the last period's units went.
            transient = (sources[at].sum(axis=0) if at.any()
                         else np.where(end, 0, counts[before].sum(axis=0)))
            gained = np.where(end, counts[mine & (ages < a)].sum(axis=0), 0)
            rows.append((c, a, transient + gained))
    cohort, age, states = zip(*rows)
    return np.array(cohort, dtype=np.int64), np.array(age, dtype=np.int64), np.array(states, dtype=np.int64)


# --- transition matrices ------------------------------------------------------------------


def _moves(data: Dataset) -> tuple[np.ndarray, np.ndarray]:
    """(from, to) indices of the allowed moves out of transient stages, staying excluded."""
    allowed, end = data.extra["allowed"], data.extra["absorbing"]
    return np.nonzero(allowed & ~end[:, None] & ~np.eye(len(end), dtype=bool))


def move_labels(data: Dataset) -> list[str]:
    """Names of the moves that carry a log-odds parameter, e.g. ``applied>training``."""
    stages = data.extra["stages"]
    return [f"{stages[i]}>{stages[j]}" for i, j in zip(*_moves(data))]


def _matrix_from_logits(data: Dataset, logit):
    """Transition matrices (..., S, S): each move's log-odds against staying, rows normalised."""
    import pytensor.tensor as pt

    rows, cols = _moves(data)
    s = len(data.extra["absorbing"])
    lead = tuple(logit.shape[:-1]) if logit.ndim > 1 else ()
    m = pt.set_subtensor(pt.zeros((*lead, s, s))[..., rows, cols], pt.exp(logit))
    m = m + np.eye(s)  # staying (and every end stage holding its units) has weight 1
    return m / m.sum(axis=-1, keepdims=True)


def transition_matrices(data: Dataset, options: dict, prior):
    """Transition matrix of each group, pooled as ``pooling`` says; adds ``transition_group``.

    Returns the matrices (groups, S, S) and their move log-odds (groups, moves).
    """
    import pymc as pm
    import pytensor.tensor as pt

    pooling = data.extra["pooling"]
    n_groups = len(data.labels["group"])
    dims = ("group", "from", "to")
    if pooling == "none":
        group_logit = prior("move_logit", dims=("group", "move"))
        per_group = _matrix_from_logits(data, group_logit)
    else:
        logit = prior("move_logit", dims="move")
        common = pm.Deterministic("transition", _matrix_from_logits(data, logit), dims=("from", "to"))
        if pooling == "complete":
            group_logit = pt.broadcast_to(logit, (n_groups, logit.shape[0]))
            per_group = pt.broadcast_to(common, (n_groups, *common.shape))
        else:
            spread = prior("transition_sd")  # sd of move log-odds across groups
            if options.get("centred"):
                group_logit = pm.Normal("move_logit_group", logit, spread, dims=("group", "move"))
            else:
                z = pm.Normal("transition_offset", 0.0, 1.0, dims=("group", "move"))
                group_logit = logit + spread * z
            per_group = _matrix_from_logits(data, group_logit)
    return pm.Deterministic("transition_group", per_group, dims=dims), group_logit


def cohort_covariates(data: Dataset) -> covariates.Design | None:
    """The covariates with one design row per cohort (None without covariates)."""
    design = data.extra.get("covariates")
    if design is None:
        return None
    _, first = np.unique(data["cohort"], return_index=True)
    return design.take(first)


def _cohort_matrices(data: Dataset, matrices, group_logit, prior, relax: str | None = None):
    """Each cohort's matrix (C, S, S): its group's, each move's log-odds against staying
    shifted by the cohort's covariates (``move_effect``, dims (move, covariate)); under the
    ``covariate_form`` relaxation the shift bends with each numeric covariate."""
    design = cohort_covariates(data)
    cohort_group = _cohort_group(data)
    if design is None:
        return matrices[cohort_group]
    shift = covariates.bent(design, prior, relax, covariates.shifts(design, prior, "move_effect", over="move"),
                            by_element=True)
    return _matrix_from_logits(data, group_logit[cohort_group] + shift)


def _with_drift(data: Dataset, matrices, drift):
    """Per-move matrices whose stay probabilities scale by exp(drift * standardised period)."""
    import pytensor.tensor as pt

    transient = (~data.extra["absorbing"]).astype(float)
    f = pt.exp(drift * data.extra["drift_x"])[:, None, None]
    boost = matrices * np.eye(len(transient))[None] * transient[None, :, None] * (f - 1.0)
    m = matrices + boost
    return m / m.sum(axis=-1, keepdims=True)


def _with_dormant(data: Dataset, visible, dormant, start, previous_age, cohort_of_step):
    """Visible one-step matrices when transient units may fall silent (dormant) for good.

    ``visible`` holds each cohort's matrix (C, S, S).
    A dormant unit stays recorded in the stage where it fell silent. The
    dormant share of each stage is forecast from the cohort's first period by
    the augmented chain; the previous counts are split by that share.
    """
    import pytensor.tensor as pt

    end = data.extra["absorbing"]
    s = len(end)
    transient = np.flatnonzero(~end)
    t = len(transient)
    moving = (~end)[None, :, None]  # transient source rows
    active = visible + dormant * moving * (np.eye(s)[None] - visible)
    c = visible.shape[0]
    aug = pt.zeros((c, s + t, s + t))
    aug = pt.set_subtensor(aug[:, :s, :s], (1.0 - dormant) * visible
                           + np.eye(s)[None] * end[None, :, None] * dormant)
    aug = pt.set_subtensor(aug[:, transient, s + np.arange(t)], dormant)
    aug = pt.set_subtensor(aug[:, s + np.arange(t), s + np.arange(t)], 1.0)
    share = pt.concatenate([start / start.sum(axis=-1, keepdims=True), pt.zeros((c, t))], axis=-1)
    forecasts = [share]
    for _ in range(int(previous_age.max())):
        share = (share[:, :, None] * aug).sum(axis=1)
        forecasts.append(share)
    forecast = pt.stack(forecasts)[previous_age, cohort_of_step]  # (R, S + T)
    awake = forecast[:, transient] / pt.maximum(forecast[:, transient] + forecast[:, s:], EPS)
    keep = pt.ones((forecast.shape[0], s))
    keep = pt.set_subtensor(keep[:, transient], awake)
    per_step = active[cohort_of_step]
    return keep[:, :, None] * per_step + (1.0 - keep)[:, :, None] * np.eye(s)[None]


def _cohort_group(data: Dataset) -> np.ndarray:
    out = np.zeros(len(data.labels["cohort"]), dtype=np.int64)
    out[data["cohort"]] = data["group"]
    return out


# --- the story in PyMC ------------------------------------------------------------------------


def build_model(data: Dataset, options: dict, prior, relax: str | None = None):
    """The PyMC model; ``relax`` names one relaxation parameter to add."""
    import pymc as pm
    import pytensor.tensor as pt

    values = observed(data)
    stages = data.extra["stages"]
    coords = {"step": np.arange(data.extra["step"].size), "stage": stages, "from": stages, "to": stages,
              "group": data.labels["group"], "move": move_labels(data), "cohort": data.labels["cohort"]}
    if data.extra.get("covariates") is not None:
        coords[covariates.DIM] = list(data.extra["covariates"].effects)
    with pm.Model(coords=coords) as model:
        counts = pm.Data("counts", values["counts"], dims=("step", "stage"))
        moving = pm.Data("sources", values["sources"], dims=("step", "stage"))
        per_cohort = _cohort_matrices(data, *transition_matrices(data, options, prior), prior, relax)
        per_step = per_cohort[data.extra["step_cohort"]]
        if relax == "stay_drift":
            per_step = _with_drift(data, per_step, prior("stay_drift"))
        elif relax == "dormant":
            cohort_of_step, age = data.extra["step_cohort"], data.extra["step_age"]
            # Each cohort's movers when it is first seen start the dormant forecast.
            first = np.flatnonzero(age == 0)
            start = pt.zeros((len(data.labels["cohort"]), len(data.extra["stages"])))
            start = pt.inc_subtensor(start[cohort_of_step[first]], moving[first])
            start = pt.set_subtensor(start[:, 0], start[:, 0] + pt.eq(start.sum(axis=-1), 0))
            per_step = _with_dormant(data, per_cohort, prior("dormant"), start, age, cohort_of_step)
        total = moving.sum(axis=-1, keepdims=True)
        source = moving / pt.maximum(total, 1.0)
        p = (source[:, :, None] * per_step).sum(axis=1)
        p = pt.clip(p, EPS, 1.0)
        p = pm.Deterministic("expected", p / p.sum(axis=-1, keepdims=True), dims=("step", "stage"))
        # Variance of each destination count when the movers of every source
        # stage move independently (the story's exact law, not the likelihood's).
        pm.Deterministic("story_var", (moving[:, :, None] * per_step * (1.0 - per_step)).sum(axis=1),
                         dims=("step", "stage"))
        n = total[:, 0]
        if relax == "overdispersion":
            rho = prior("overdispersion")
            kappa = 1.0 / pt.clip(rho, EPS, 1.0 - EPS) - 1.0
            pm.DirichletMultinomial("y", n=n, a=p * kappa, observed=counts, dims=("step", "stage"))
        else:
            pm.Multinomial("y", n=n, p=p, observed=counts, dims=("step", "stage"))
    return model


# --- the story in NumPy -------------------------------------------------------------------------


def _matrices_of(data: Dataset, params: dict) -> np.ndarray:
    """Each cohort's transition matrix (C, S, S) in one draw of the model's variables."""
    n_groups = len(data.labels["group"])
    if "transition_group" in params:
        shape = (n_groups, *data.extra["allowed"].shape)
        per_group = np.asarray(params["transition_group"], dtype=float).reshape(shape)
    else:
        m = np.asarray(params["transition"], dtype=float)
        per_group = np.broadcast_to(m, (n_groups, *m.shape))
    return shifted_by_covariates(data, per_group[_cohort_group(data)], params)


def shifted_by_covariates(data: Dataset, matrices: np.ndarray, params: dict) -> np.ndarray:
    """Cohort matrices (..., C, S, S) with each allowed move's log-odds against staying
    shifted by the cohort's covariates.

    ``params`` may hold ``move_effect``, one draw (moves, covariates) or
    draws (..., moves, covariates) matching the leading axes of ``matrices``;
    without it (or without covariates) the matrices come back as they are.
    """
    design = cohort_covariates(data)
    if design is None or "move_effect" not in params:
        return matrices
    shift = covariates.linear_by(design, params, "move_effect")  # (..., C, moves)
    shift = shift + np.asarray(covariates.curvature_shift(design, params))[..., None]
    rows, cols = _moves(data)
    out = np.array(matrices, dtype=float)
    for i in np.unique(rows):
        mine = np.flatnonzero(rows == i)
        # Staying first: the reference of the row's multinomial log-odds.
        to = np.concatenate([[i], cols[mine]])
        out[..., i, to] = covariates.shift_shares(out[..., i, to], shift[..., mine], against_open=False)
    return out


def simulate(rng: np.random.Generator, data: Dataset, params: dict, options: dict) -> Dataset:
    """New outcomes for the table's layout: units move independently, one multinomial per stage.

    Stage counts: every cohort moves period by period from its first counts.
    Transition counts: each row's units move from its ``from`` stage (the
    rows' unit counts are kept, as the model conditions on them).

    ``params`` holds ``transition`` (or ``transition_group``), with
    covariates ``move_effect`` (moves, covariates) on the model's scale (a
    unit at the numbers' means and the labels' reference levels moves as
    ``transition`` says), and may carry ``stay_drift``, ``dormant`` and
    ``overdispersion`` to plant faults: the stay probability scaled by
    exp(drift * standardised period), a per-period chance that a transient
    unit falls silent in its stage for good, and per-period move
    probabilities shared by a cohort's units (Dirichlet with concentration
    1 / overdispersion - 1).
    """
    matrices = _matrices_of(data, params)
    drift = float(params.get("stay_drift", 0.0))
    dormant = float(params.get("dormant", 0.0))
    rho = float(params.get("overdispersion", 0.0))
    if data.extra["layout"] == TRANSITION_COUNTS:
        n = _simulate_rows(rng, data, matrices, drift, dormant, rho)
    else:
        n = _simulate_cohorts(rng, data, matrices, drift, dormant, rho)
    return data.replace(**{name: n[:, j] for j, name in enumerate(data.extra["stages"])})


def _simulate_cohorts(rng, data: Dataset, matrices, drift: float, dormant: float, rho: float) -> np.ndarray:
    """Stage counts of every row, each cohort moved from its first period on."""
    end = data.extra["absorbing"]
    s = len(end)
    n = stage_counts(data).copy()
    step_of_row = {int(r): j for j, r in enumerate(data.extra["step"])}
    silent = np.zeros(s, dtype=np.int64)
    for row in range(data.rows):
        if row not in step_of_row:
            silent[:] = 0  # a cohort's first period: everyone active
            continue
        m = _story_matrix(data, matrices, step_of_row[row], drift)
        nxt = np.zeros(s, dtype=np.int64)
        for i in range(s):
            movers = n[row - 1, i] - silent[i]
            if end[i]:
                nxt[i] += n[row - 1, i]
                continue
            fall = rng.binomial(movers, dormant) if dormant > 0 else 0
            silent[i] += fall
            nxt[i] += silent[i]
            nxt += _destinations(rng, movers - fall, m[i], rho)
        n[row] = nxt
    return n


def _simulate_rows(rng, data: Dataset, matrices, drift: float, dormant: float, rho: float) -> np.ndarray:
    """Destination counts of every row of transition counts, for its own units."""
    n = stage_counts(data).copy()
    sources = observed(data)["sources"]
    awake = _awake_shares(data, matrices, dormant, sources) if dormant > 0 else np.ones(len(sources))
    for u, row in enumerate(data.extra["step"]):
        i = data["from"][row]
        silent = rng.binomial(sources[u, i], 1.0 - awake[u]) if awake[u] < 1 else 0
        out = _destinations(rng, sources[u, i] - silent, _story_matrix(data, matrices, u, drift)[i], rho)
        out[i] += silent
        n[row] = out
    return n


def _story_matrix(data: Dataset, matrices, u: int, drift: float) -> np.ndarray:
    """The matrix of step ``u``: its cohort's, stay probabilities scaled by exp(drift * period)."""
    end = data.extra["absorbing"]
    m = matrices[data.extra["step_cohort"][u]].copy()
    if drift:
        f = np.exp(drift * data.extra["drift_x"][u])
        m[~end, :] *= np.where(np.eye(len(end), dtype=bool)[~end], f, 1.0)
        m /= m.sum(axis=1, keepdims=True)
    return m


def _destinations(rng, units: int, p: np.ndarray, rho: float) -> np.ndarray:
    """Where ``units`` leaving one stage end up; with ``rho`` they share one Dirichlet draw of ``p``."""
    if rho > 0:
        p = rng.dirichlet(np.maximum(p * (1.0 / rho - 1.0), EPS))
    return rng.multinomial(units, p / p.sum())


def _awake_shares(data: Dataset, matrices, dormant: float, sources: np.ndarray) -> np.ndarray:
    """Share of each step's units that have not fallen silent, forecast from the cohort's start.

    The NumPy twin of the augmented chain in :func:`_with_dormant`.
    """
    end = data.extra["absorbing"]
    cohorts, ages = data.extra["step_cohort"], data.extra["step_age"]
    stage_of = sources.argmax(axis=1)
    out = np.ones(len(cohorts))
    for c in np.unique(cohorts):
        mine = np.flatnonzero(cohorts == c)
        active = sources[mine[ages[mine] == 0]].sum(axis=0).astype(float)
        silent = np.zeros_like(active)
        m = matrices[c]
        for a in range(int(ages[mine].max()) + 1):
            for u in mine[ages[mine] == a]:
                total = active[stage_of[u]] + silent[stage_of[u]]
                out[u] = active[stage_of[u]] / total if total > 0 else 1.0
            falls = np.where(end, 0.0, active * dormant)
            silent += falls
            active = (active - falls) @ m
    return out


# --- absorption --------------------------------------------------------------------------------------


def absorption_shares(transition: np.ndarray, absorbing: np.ndarray) -> np.ndarray:
    """Probability of ending in each end stage from each transient stage (..., T, A).

    Solves (I - Q) B = R for every leading index: B = N R with the
    fundamental matrix N = (I - Q)^-1 (Kemeny and Snell 1960, III.3).
    """
    transition = np.asarray(transition, dtype=float)
    transient = ~np.asarray(absorbing)
    q = transition[..., transient, :][..., :, transient]
    r = transition[..., transient, :][..., :, ~transient]
    eye = np.eye(q.shape[-1])
    return np.linalg.solve(eye - q, r)


def derived(data: Dataset, options: dict, posterior: dict) -> dict:
    """Long-run absorption shares from each transient stage and for the cohorts' start mix.

    With covariates the shares from each stage are a unit's at the numbers'
    means and the labels' reference levels; the start mix moves each
    cohort's units by its own matrix.
    """
    stages = data.extra["stages"]
    end = data.extra["absorbing"]
    transient_names = [s for s, e in zip(stages, end) if not e]
    end_names = [s for s, e in zip(stages, end) if e]
    cohort, age, states = cohort_states(data)
    start, start_cohort = states[age == 0].astype(float), cohort[age == 0]
    start_group = _cohort_group(data)[start_cohort]
    if "transition" in posterior:
        m = np.asarray(posterior["transition"], dtype=float)
        matrices = {"": (m, np.ones(len(start), dtype=bool))}
        per_group = np.broadcast_to(m[:, None], (m.shape[0], len(data.labels["group"]), *m.shape[1:]))
    else:
        per_group = np.asarray(posterior["transition_group"], dtype=float)
        matrices = {f" ({label})": (per_group[:, g], start_group == g)
                    for g, label in enumerate(data.labels["group"])}
    by_cohort = cohort_covariates(data) is not None
    if by_cohort:
        per_cohort = shifted_by_covariates(data, per_group[:, _cohort_group(data)], posterior)
        # Units of each cohort's start ending in each end stage (draws, starts, A).
        ending = _ending(absorption_shares(per_cohort[:, start_cohort], end), start, end)
    out = {}
    for suffix, (m, mine) in matrices.items():
        b = absorption_shares(m, end)
        # Without covariates one matrix moves every cohort: the start mix moves as one.
        ends = ending[:, mine].sum(axis=1) if by_cohort else _ending(b, start[mine].sum(axis=0), end)
        for a, name in enumerate(end_names):
            for i, source in enumerate(transient_names):
                out[f"ends in {name} from {source}{suffix}"] = b[:, i, a]
            out[f"ends in {name}, cohorts' start mix{suffix}"] = ends[..., a] / start[mine].sum()
    return out


def _ending(b: np.ndarray, start: np.ndarray, end: np.ndarray) -> np.ndarray:
    """Units ending in each end stage (..., A): ``start`` (..., S) moved by absorption shares ``b`` (..., T, A)."""
    return np.einsum("...ta,...t->...a", b, start[..., ~end]) + start[..., end]


# --- targeted statistics ------------------------------------------------------------------------------


def _moments(data: Dataset, draws: dict):
    p = np.asarray(draws["expected"], dtype=float)
    n = movers(data)[:, None]
    return n * p, n * p * (1 - p), p


def stuck_excess(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Standardised excess of units still in transient stages at the oldest quarter of moves."""
    _, _, p = _moments(data, draws)
    transient = ~data.extra["absorbing"]
    n = movers(data)
    q = p[..., transient].sum(axis=-1)
    y = np.asarray(outcomes["y"], dtype=float)[..., transient].sum(axis=-1)
    return nearest_shortfall(y, n * q, n * q * (1 - q), -data.extra["step_age"])


def period_trend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Slope of standardised residuals of transient-stage counts on period, over its standard error.

    Scored against the residuals' own scatter, so that units moving in
    batches (``independent_units``) do not pass for a drift.
    """
    mean, var, _ = _moments(data, draws)
    transient = ~data.extra["absorbing"]
    y = np.asarray(outcomes["y"], dtype=float)[..., transient]
    s = mean.shape[0]
    x = np.repeat(data.extra["step_period"], transient.sum()).astype(float)
    return residual_trend_score(y.reshape(s, -1), mean[..., transient].reshape(s, -1),
                                var[..., transient].reshape(s, -1), x)


def move_bend(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Curvature of transient-stage residuals across bands of each numeric covariate
    (:func:`workbench.covariates.bend`; each step in its cohort's band)."""
    mean, var, _ = _moments(data, draws)
    transient = ~data.extra["absorbing"]
    y = np.asarray(outcomes["y"], dtype=float)[..., transient].sum(axis=-1)
    mean, var = mean[..., transient].sum(axis=-1), var[..., transient].sum(axis=-1)

    return covariates.bend(data.extra["covariates"].take(data.extra["step"]),
                           lambda band, n_bands: covariates.band_sums(band, n_bands, y, mean, var))


def _reachable(data: Dataset) -> np.ndarray:
    """Mask (steps, stages) of the destinations some mover of the step can reach."""
    moving = observed(data)["sources"]
    return ((moving > 0).astype(int) @ data.extra["allowed"].astype(int)) > 0


def dispersion(data: Dataset, outcomes: dict, draws: dict) -> np.ndarray:
    """Pearson chi-square per reachable (move, stage) cell, standardised by the story's variance.

    The variance is the exact one of independent movers (``story_var``), not
    the wider one of the one-multinomial likelihood, so data from the story
    give about 1 and units that move together give more.
    """
    mean, _, _ = _moments(data, draws)
    var = np.asarray(draws["story_var"], dtype=float)
    mask = _reachable(data)
    y = np.asarray(outcomes["y"], dtype=float)
    return pearson_dispersion(y[:, mask], mean[:, mask], var[:, mask])


# --- figure -------------------------------------------------------------------------------------------


# Seed of the replicated cohorts drawn for the figure's intervals: the same
# fit always gives the same figure.
FIGURE_SEED = 20


def figure(data: Dataset, options: dict, posterior: dict, predictive: dict, draws: int = 200):
    """Stacked stage shares by cohort age: observed (pooled over cohorts) against the fitted chain.

    Bands are the 90% interval of the fitted shares; each observed point
    carries the 90% interval of the same pooled share in replicated cohorts
    (every cohort's starting units moved through the fitted chain, each
    unit on its own, as the story says) and is marked where it falls outside.
    """
    import matplotlib.pyplot as plt

    from workbench.report import plots

    stages = data.extra["stages"]
    cohort, age, n = cohort_states(data)
    n = n.astype(float)
    group_of = _cohort_group(data)
    ages = np.arange(age.max() + 1)
    tg = np.asarray(posterior["transition_group"], dtype=float)
    pick = np.linspace(0, tg.shape[0] - 1, min(draws, tg.shape[0])).astype(int)
    # Each cohort's own chain: its group's, shifted by its covariates.
    per_cohort = shifted_by_covariates(data, tg[pick][:, group_of],
                                       {k: np.asarray(v)[pick] for k, v in posterior.items() if k == "move_effect"})
    rng = np.random.default_rng(FIGURE_SEED)
    fitted = np.zeros((len(pick), ages.size, len(stages)))
    replicated = np.zeros_like(fitted)
    observed_mix = np.zeros((ages.size, len(stages)))
    for row in np.flatnonzero((age == 0) & (n.sum(axis=1) > 0)):
        rows = np.flatnonzero(cohort == cohort[row])
        seen = set(age[rows].tolist())
        share = np.broadcast_to(n[row] / n[row].sum(), (len(pick), len(stages)))
        m = per_cohort[:, cohort[row]]
        moved = np.broadcast_to(np.eye(len(stages)), m.shape)  # chain over a periods, from each stage
        for a in range(age[rows].max() + 1):
            fitted[:, a] += n[row].sum() * share
            if a in seen:
                replicated[:, a] += _units_moved(rng, n[row], moved)
            share = np.einsum("ds,dst->dt", share, m)
            moved = np.einsum("dsu,dut->dst", moved, m)
        observed_mix[age[rows]] += n[rows]
    fitted /= fitted.sum(axis=-1, keepdims=True)
    seen_ages = observed_mix.sum(axis=-1) > 0
    observed_mix /= np.where(seen_ages, observed_mix.sum(axis=-1), 1.0)[:, None]
    replicated = np.cumsum(replicated[:, seen_ages] / np.maximum(replicated[:, seen_ages].sum(-1, keepdims=True), 1.0),
                           axis=-1)
    lo, mid, hi = np.percentile(np.cumsum(fitted, axis=-1), [5, 50, 95], axis=0)
    stacked = np.cumsum(observed_mix, axis=-1)
    tones = [plt.get_cmap("viridis")(x) for x in np.linspace(0.1, 0.9, len(stages))]
    fig, ax = plt.subplots(figsize=(6.4, 3.8))
    dodge = (np.arange(len(stages) - 1) - (len(stages) - 2) / 2) * 0.008 * max(ages[-1], 1)
    outside = total = 0
    for j, name in enumerate(stages[:-1]):
        ax.fill_between(ages, lo[:, j], hi[:, j], color=tones[j], alpha=0.3, lw=0)
        ax.plot(ages, mid[:, j], color=tones[j], lw=1.6, label=f"up to {name} (fitted)")
        out, shown = plots.predictive_intervals(ax, ages[seen_ages] + dodge[j], stacked[seen_ages, j],
                                                replicated[:, :, j], colour=tones[j], labelled=False)
        outside, total = outside + out, total + shown
    handles, _ = ax.get_legend_handles_labels()
    handles += plots.interval_legend(outside, total)
    handles[-2].set_label("observed (all cohorts)")
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("periods since the cohort's first period")
    ax.set_ylabel("share of units (stacked by stage)")
    ax.spines[["top", "right"]].set_visible(False)
    plots.outside_legend(ax, handles=handles)
    fig.tight_layout()
    return fig


def _units_moved(rng: np.random.Generator, start: np.ndarray, moved: np.ndarray) -> np.ndarray:
    """Stage counts (draws, S) of ``start`` units (S,) each moved by ``moved`` (draws, S, S)."""
    out = np.zeros(moved.shape[::2])
    for s, units in enumerate(np.asarray(start, dtype=np.int64)):
        if units > 0:
            p = np.clip(moved[:, s], 0.0, None)
            out += rng.multinomial(units, p / p.sum(axis=-1, keepdims=True))
    return out


# --- demo scenario --------------------------------------------------------------------------------------

# Invented: volunteers apply, train, and end certified or leave.
DEMO_STAGES = ("applied", "training", "certified", "left")
DEMO_TRUTH = {
    "transition": [
        [0.45, 0.40, 0.00, 0.15],
        [0.00, 0.70, 0.20, 0.10],
        [0.00, 0.00, 1.00, 0.00],
        [0.00, 0.00, 0.00, 1.00],
    ]
}


def demo(rng: np.random.Generator) -> DemoScenario:
    """A volunteer training programme: monthly intakes followed month by month."""
    rows = []
    for intake in range(12):
        months = 12 - intake  # later intakes are followed for fewer months so far
        size = int(rng.integers(40, 90))
        for month in range(intake, intake + months + 1):
            rows.append({"cohort": f"intake-{intake + 1:02d}", "period": month,
                         "applied": size, "training": 0,
                         "certified": 0, "left": 0})
    options = {"stages": ",".join(DEMO_STAGES), "absorbing": "certified,left",
               "moves": "applied>training,applied>left,training>certified,training>left"}
    design_options = RECIPE.read_options(options)
    data = validate(pd.DataFrame(rows), design_options)
    simulated = simulate(rng, data, {"transition": np.array(DEMO_TRUTH["transition"])}, design_options)
    table = simulated.to_frame()[["cohort", "period", *DEMO_STAGES]]
    b = absorption_shares(np.array(DEMO_TRUTH["transition"]), data.extra["absorbing"])
    return DemoScenario(
        title="Volunteer training programme",
        story=("A rescue service takes a monthly intake of volunteer applicants; each month an "
               "applicant may start training or leave, a trainee may certify or leave. Where do "
               f"applicants end up in the long run? (true: {b[0, 0]:.0%} certified, "
               f"{b[0, 1]:.0%} leave)"),
        table=table,
        options=options,
        truth={**DEMO_TRUTH, "certified_from_applied": float(b[0, 0]), "left_from_applied": float(b[0, 1])},
    )


# --- assumptions ---------------------------------------------------------------------------------------------


def likelihood_note(data: Dataset) -> str:
    """Why the likelihood only approximates the story on stage counts ('' for transition counts)."""
    if data.extra["layout"] == TRANSITION_COUNTS:
        return ""
    return ("the model uses one multinomial per period where the story sums one multinomial per "
            "source stage (same means, wider spread), so the log-likelihood of data from the story "
            "ranks off and the prior predictive spread of the counts is too wide; the parameters' "
            "ranks and the mean counts test the code and the priors")


RECIPE = Recipe(
    name=NAME,
    summary="Units move through ordered stages each period until an end stage holds them.",
    columns=(
        Column("cohort", "label of the cohort (units that entered together)"),
        Column("period", "period number (whole, consecutive within a cohort)"),
        Column("<stage>", "one column per stage named in 'stages': units in that stage then (with "
                          "'from': where the row's units were one period later)"),
        Column("from", "optional stage name: the row counts transitions of the units in this stage "
                       "at 'period' (exact likelihood)", required=False),
        Column("group", "optional label: which kind of cohort (one per cohort)", required=False),
    ),
    options=(STAGES, ABSORBING, MOVES, POOLING, CENTRED, COVARIATES),
    parameters=(
        # Log-odds against staying, centred at -1.5: a period is usually
        # shorter than a stay in a stage (each move about a fifth as likely
        # as staying), while sd 1.5 still lets a move dominate (common practice).
        Parameter("move_logit", "log-odds of each allowed move against staying", "normal(-1.5,1.5)"),
        # Per sd of a numeric covariate: 95% of odds ratios between 1/7 and 7,
        # a strong effect next to move_logit's own spread of 1.5.
        Parameter("move_effect", "shift of each allowed move's log-odds against staying per sd of a numeric "
                  "covariate (per level of a label, against its reference level: the first in sorted order)",
                  "normal(0,1)"),
        Parameter("transition_sd", "sd of move log-odds across groups (partial pooling)",
                  "halfnormal(0.5)"),
        # Relaxation parameters (only present in the expanded models).
        Parameter("dormant", "per-period chance that a transient unit falls silent in its stage",
                  "beta(1,20)"),
        Parameter("stay_drift", "change of log stay weight per sd of period", "normal(0,0.5)"),
        Parameter("overdispersion", "correlation of units' moves within a cohort and period",
                  "beta(1,30)"),
        Parameter(covariates.CURVATURE, "bend of the covariates' shift of every move's log-odds: curvature "
                  "x (z^2 - 1) per numeric covariate z (standardised; covariate_form relaxed)", "normal(0,0.5)"),
    ),
    assumptions=(
        Assumption(
            key="no_missing_exit",
            statement="Every way a unit leaves is a modelled stage (nobody silently stops moving).",
            statistic=Statistic(
                "stuck_excess",
                "standardised excess of units in transient stages at the oldest quarter of moves",
                stuck_excess,
                sides="greater",
            ),
            relaxation=relaxation(build_model, "dormant",
                                  "transient units may fall silent in their stage for good",
                                  # Planted: 5% of active units a period fall silent.
                                  null=0.0, negligible=0.01, planted=0.05),
            advice="Units stop moving without reaching an end stage: add the missing exit as an end "
                   "stage (e.g. 'inactive') or record when units are lost to follow-up.",

            informed_by=steps_to_follow,
        ),
        Assumption(
            key="time_homogeneity",
            statement="Transition probabilities do not drift with period.",
            statistic=Statistic("period_trend",
                                "slope of transient-stage residuals on period over its standard error",
                                period_trend),
            relaxation=relaxation(build_model, "stay_drift", "the stay probabilities may drift with period",
                                  # Planted: stays lengthen by half from one sd of period to the next.
                                  null=0.0, negligible=0.05, planted=0.4),
            advice="The chain changes over time: split the table into eras (a group column) or "
                   "let the probabilities depend on period.",
            informed_by=periods_to_compare,
        ),
        Assumption(
            key="independent_units",
            statement="Units move independently of each other (multinomial variation only).",
            statistic=Statistic("dispersion",
                                "Pearson chi-square per reachable cell (at most 1 under the model)",
                                dispersion, sides="greater"),
            relaxation=relaxation(build_model, "overdispersion",
                                  "units of a cohort move together (Dirichlet-multinomial)",
                                  # Planted: a stage of 50 units varies about 3.5 times as much as multinomial.
                                  null=0.0, negligible=0.005, planted=0.05, absorbs_misfit=True),
            advice="Counts vary more than multinomial: units move in batches; model a cohort-period "
                   "effect or use the overdispersed likelihood.",

            informed_by=movers_to_compare,
        ),
        *covariates.form_assumption(build_model, "each move's log-odds against staying", Statistic(
            "move_bend",
            "curvature of transient-stage residuals across bands of each numeric covariate (negative: "
            "cohorts at both ends of the covariate's range stay less than the middle)",
            move_bend,
        )),
    ),
    validate=validate,
    simulate=simulate,
    build_model=build_model,
    observed=observed,
    outcome_names=("y",),
    outcome_columns={"y": "stage counts"},
    covariate="period",
    figure=figure,
    derived=derived,
    demo=demo,
    approximate_likelihood=likelihood_note,
)
