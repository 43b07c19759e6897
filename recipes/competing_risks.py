"""competing-risks: how each unit of a cohort ends, and when.

Story. A cohort of ``exposed`` units starts at age 0. Each unit ends in one
of K outcomes, outcome k with probability ``share_k``; under
``resolve=estimate`` a remaining share never ends (stays open). Given its
outcome, the unit's age at the end follows a family F_k with its own timing
``scale_k`` and ``shape_k``. The cumulative incidence of outcome k is

    C_k(t) = share_k * F_k(t)

(the mixture model of Larson and Dinse 1985). At each age a cohort was seen
the table gives, per outcome, how many units have ended that way so far; the
units of a cohort fall into cells (outcome k between two looks, or still open
at the last look) by one multinomial draw.

Columns: ``cohort``, ``age``, ``exposed`` and one cumulative count column per
outcome (optional ``group``). Options: ``outcomes`` (the count columns, comma
separated, at least two), ``family``, ``resolve``, ``pooling``, ``shape_by_group``,
``centred`` and ``covariates``.
Ages enter the model relative to the median positive age, as in
``timing-curve``.

Covariates (:mod:`workbench.covariates`). Each covariate column shifts the
log timing scale of each outcome by its own ``time_effect`` (accelerated
failure time form of the outcome's times given the outcome) and the
multinomial log-odds of the outcome shares by ``share_effect`` (the mixture
model of Larson and Dinse 1985 with logistic shares): under
``resolve=all`` the log-odds of each later outcome against the first, under
``resolve=estimate`` the log-odds of every outcome against staying open for
good. ``scale``, ``shape`` and ``share`` then describe a unit at the numeric
covariates' means and the labels' reference levels; ``time_ratio`` and
``odds_ratio`` give each effect per unit of its covariate.

References
----------
Larson, M. G. and Dinse, G. E. (1985). A mixture model for the regression
analysis of competing risks data. Applied Statistics 34(3), 201-211.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from workbench import cohorts, covariates, curves, engine, tables, units
from workbench.recipe import (
    Assumption,
    Column,
    Dataset,
    DemoScenario,
    Option,
    Parameter,
    Recipe,
    Statistic,
)

NAME = "competing-risks"
# The unit layout's own columns (workbench.units): never covariates.
UNIT_COLUMNS = ("time", "outcome", "entry", "cohort", "group")
# The dimension of the share effects: the outcomes whose log-odds move.
COMPARED = "compared"


def _outcome_list(text: str) -> tuple[str, ...]:
    names = tuple(part.strip() for part in str(text).split(",") if part.strip())
    if len(names) < 2:
        raise ValueError("needs at least two column names separated by commas")
    if len(set(names)) != len(names):
        raise ValueError("names a column twice")
    reserved = {"cohort", "age", "exposed", "group"}.intersection(names)
    if reserved:
        raise ValueError(f"'{sorted(reserved)[0]}' is not an outcome column")
    return names


OUTCOMES = Option("outcomes", "the outcome count columns, comma separated (at least two)", parse=_outcome_list)
COVARIATES = covariates.option("each outcome's timing scale and the outcome shares")
RESOLVE = Option(
    "resolve",
    "all (every unit ends in one of the outcomes) or estimate (a share may stay open for good)",
    default="all",
    choices=("all", "estimate"),
)


def validate(table: pd.DataFrame, options: dict) -> Dataset:
    """Check the table: one row per unit when it has a ``time`` column
    (:func:`workbench.units.validate`), else cohort counts (:func:`workbench.cohorts.validate`)."""
    names = tuple(options.get("covariates", ()))
    outcomes = list(options["outcomes"])
    if units.is_unit_table(table):
        data = units.validate(table, outcomes, options, NAME)
        design = covariates.read(table, names, NAME, UNIT_COLUMNS)
    else:
        data = cohorts.validate(table, outcomes, options, NAME)
        design = covariates.read(table, names, NAME, ("cohort", "age", "exposed", *outcomes, "group"))
        if design is not None:
            covariates.constant_within(design, table, *tables.label_column(table, "cohort"))
            design = design.take(np.asarray([rows[0] for rows in data.source_rows]))
    data.extra["covariates"] = design
    # What fixes one outcome's curve: its share, scale and shape.
    data.extra["curve_parameters"] = 3
    return data


# --- the story in NumPy ---------------------------------------------------------------


def _shares(params: dict, k: int) -> np.ndarray:
    if "share" in params:
        share = np.asarray(params["share"], dtype=float).reshape(k)
    else:
        weight = np.exp(np.append(0.0, np.asarray(params["share_logit"], dtype=float).reshape(-1)))
        share = weight[:k] / weight.sum()
    return share * (1.0 - float(params.get("unresolved", 0.0)))


def compared(options: dict, outcomes) -> list[str]:
    """The outcomes whose log-odds the share effects move (against the reference)."""
    return list(outcomes) if options["resolve"] == "estimate" else list(outcomes)[1:]


def simulate(rng: np.random.Generator, data: Dataset, params: dict, options: dict) -> Dataset:
    """Follow every unit: draw its outcome, then its age at the end; count per table age.

    ``params`` is one draw of the model's variables (``scale`` or
    ``scale_group``, ``shape``, ``share`` or ``share_logit``, with covariates
    ``time_effect`` (outcomes, covariates) and ``share_effect`` (compared
    outcomes, covariates) on the model's scale) and may carry
    ``unresolved``, ``curve_power``, ``cohort_sd`` or ``cohort_effect`` and
    ``overdispersion`` to plant faults.
    """
    k = len(data.extra["outcomes"])
    design = data.extra.get("covariates")
    # Per row and outcome: the covariates' shift of the log timing scale, and the shares.
    time_shift = np.broadcast_to(covariates.linear_by(design, params, "time_effect")
                                 + np.reshape(covariates.curvature_shift(design, params), (-1, 1)),
                                 (data.rows, k))
    share = _shares({**params, "unresolved": 0.0}, k)
    if design is not None and "share_effect" in params:
        share = covariates.shift_shares(share, covariates.linear_by(design, params, "share_effect"),
                                        against_open=options["resolve"] == "estimate")
    share = np.broadcast_to(share, (data.rows, k)) * (1.0 - float(params.get("unresolved", 0.0)))
    power = float(np.exp(params.get("curve_power", 0.0)))
    if units.is_units(data):
        return units.simulate(rng, data, options["family"], cohorts.scales_of(rng, data, params, k),
                              cohorts.shapes_of(data, params, k), share,
                              power=power, log_shift=time_shift,
                              log_shape_shift=covariates.shape_shift(design, params))
    last = data.extra["last_row"]
    shape_shift = np.broadcast_to(covariates.shape_shift(design, params), (data.rows,))
    counts = cohorts.simulate_units(
        rng, data, options["family"], cohorts.scales_of(rng, data, params, k) * np.exp(time_shift[last]),
        cohorts.shapes_of(data, params, k) * np.exp(shape_shift[last])[:, None], share[last], power=power,
        rho=float(params.get("overdispersion", 0.0)),
    )
    return data.replace(**{name: counts[:, j] for j, name in enumerate(data.extra["outcomes"])})


# --- the story in PyMC -------------------------------------------------------------------


def build_model(data: Dataset, options: dict, prior, relax: str | None = None):
    """The PyMC model; ``relax`` names one relaxation parameter to add."""
    import pymc as pm
    import pytensor.tensor as pt

    k = len(data.extra["outcomes"])
    unit = units.is_units(data)
    model_coords = units.coords(data) if unit else cohorts.coords(data)
    estimate = options["resolve"] == "estimate"
    # Log-odds of every part against the first outcome (the reference).
    model_coords["part"] = data.extra["outcomes"][1:] + (["open"] if estimate else [])
    design = data.extra.get("covariates")
    if design is not None:
        model_coords[covariates.DIM] = list(design.effects)
        model_coords[COMPARED] = compared(options, data.extra["outcomes"])
    with pm.Model(coords=model_coords) as model:
        counts = units.container(data) if unit else cohorts.counts_container(data)
        time_shift = (None if design is None else covariates.bent(
            design, prior, relax, covariates.shifts(design, prior, "time_effect", over="outcome"), by_element=True))
        shape_shift = None if design is None else covariates.shaped(design, prior, relax)
        scale_group = cohorts.timing_scales(data, options, prior, dims=("outcome",), counts=counts)
        shape = cohorts.timing_shapes(data, options, prior, dims=("outcome",))
        logit = prior("share_logit", dims="part")
        # Chains start at the shares the cohorts show (outcomes, then open).
        seen = cohorts.observed_shares(data, counts)
        seen = pt.concatenate([seen, pt.stack([1.0 - seen.sum()])]) if estimate else seen
        log_seen = pt.log(pt.maximum(seen, cohorts.START_MARGIN))
        engine.start_at(logit, log_seen[1:] - log_seen[0], ("part",))
        log_parts = pt.special.log_softmax(pt.concatenate([pt.zeros(1), logit]), axis=-1)
        parts = pt.exp(log_parts)
        share = parts[:k]
        row_share = None
        if design is not None:
            # Each row's shares: the reference unit's multinomial log-odds
            # against the reference part (open for good under resolve=estimate,
            # else the first outcome) shifted by its covariates.
            shift = covariates.shifts(design, prior, "share_effect", over=COMPARED)
            if estimate:
                eta = log_parts[:k] - log_parts[k] + shift
                eta = pt.concatenate([eta, pt.zeros((data.rows, 1))], axis=1)
            else:
                eta = pt.concatenate([pt.zeros((data.rows, 1)), logit + shift], axis=1)
            row_share = pt.special.softmax(eta, axis=-1)[:, :k]
        if estimate:
            pm.Deterministic("open_share", parts[k])
            if relax == "unresolved":
                # Already relaxed by the estimated open share: stays at its null.
                pm.Deterministic("unresolved", pt.zeros(()))
        elif relax == "unresolved":
            resolved = 1.0 - prior("unresolved")
            share = share * resolved
            row_share = None if row_share is None else row_share * resolved
        share = pm.Deterministic("share", share, dims="outcome")
        row_share = share if row_share is None else row_share
        if unit:
            closed = not estimate and relax != "unresolved"
            units.likelihood(data, counts, options["family"], scale_group, shape, row_share, relax, prior,
                             closed, log_shift=time_shift, log_shape_shift=shape_shift)
            return model
        cumulative = cohorts.cumulative_tensor(
            data, options["family"], scale_group, shape, row_share, relax, prior, log_shift=time_shift,
            log_shape_shift=shape_shift,
        )
        pm.Deterministic("cumulative", cumulative, dims=("row", "outcome"))
        cohorts.cell_likelihood(data, counts, cohorts.cells_tensor(data, cumulative), relax, prior)
    return model


# --- report quantities ----------------------------------------------------------------------


def derived(data: Dataset, options: dict, posterior: dict) -> dict:
    """Shares at maturity per outcome (and open), and each outcome's median age per group."""
    outcomes = data.extra["outcomes"]
    share = np.asarray(posterior["share"], dtype=float)
    out = {f"share {name}": share[:, j] for j, name in enumerate(outcomes)}
    if "open_share" in posterior:
        out["share open for good"] = np.asarray(posterior["open_share"], dtype=float).reshape(-1)
    scale = np.asarray(posterior["scale_group"], dtype=float)
    scale = scale.reshape(scale.shape[0], len(data.labels["group"]), len(outcomes))
    shape = cohorts.group_shapes(posterior, len(data.labels["group"]), len(outcomes))
    for g, label in enumerate(data.labels["group"]):
        suffix = "" if len(data.labels["group"]) == 1 else f", {label}"
        for j, name in enumerate(outcomes):
            median = curves.quantile(options["family"], 0.5, scale[:, g, j], shape[:, g, j])
            out[f"median age {name}{suffix}"] = median * data.extra["age_ref"]
    return out


def figure(data: Dataset, options: dict, posterior: dict, predictive: dict):
    """Stacked cumulative shares of the outcomes over age against the cohorts."""
    return cohorts.figure(data, options["family"], posterior, "share ended (stacked by outcome)",
                          predictive=predictive)


# --- demo scenario -----------------------------------------------------------------------------

# Invented: support tickets opened in weekly batches end either solved or
# withdrawn by the customer; every ticket ends one way or the other.
DEMO_TRUTH_DAYS = {
    "share": [0.7, 0.3],
    "scale_days": [3.0, 8.0],
    "shape": [1.4, 1.0],
}


def demo(rng: np.random.Generator) -> DemoScenario:
    """Support tickets: 10 weekly batches, counted at fixed days after opening."""
    looks = np.array([1, 2, 4, 7, 14, 28, 42])
    rows = []
    for week in range(10):
        age_now = 70 - 7 * week
        opened = int(rng.integers(150, 320))
        for day in looks[looks <= age_now]:
            rows.append({"cohort": f"week-{week + 1:02d}", "age": int(day), "exposed": opened,
                         "solved": 0, "withdrawn": 0})
    options = {"outcomes": "solved,withdrawn", "family": "weibull", "resolve": "all"}
    design_options = RECIPE.read_options(options)
    data = validate(pd.DataFrame(rows), design_options)
    truth = {
        "share": DEMO_TRUTH_DAYS["share"],
        "scale": [s / data.extra["age_ref"] for s in DEMO_TRUTH_DAYS["scale_days"]],
        "shape": DEMO_TRUTH_DAYS["shape"],
    }
    simulated = simulate(rng, data, truth, design_options)
    table = simulated.to_frame()[["cohort", "age", "exposed", "solved", "withdrawn"]].astype(
        {"age": int})
    return DemoScenario(
        title="Support tickets: solved or withdrawn",
        story=("A help desk follows each week's new tickets at 1, 2, 4, 7, 14, 28 and 42 days; a "
               "ticket ends solved or withdrawn by the customer. What share ends each way, and how "
               "fast? (ages in days; model scales are relative to the median look of "
               f"{data.extra['age_ref']:g} days)"),
        table=table,
        options=options,
        truth={**truth, "scale_days": DEMO_TRUTH_DAYS["scale_days"]},
    )


# --- assumptions ----------------------------------------------------------------------------------


def _resolve_is_all(options) -> bool:
    return options.get("resolve") == "all"


RECIPE = Recipe(
    name=NAME,
    summary="Each unit of a cohort ends in one of several outcomes, each with its own timing.",
    columns=cohorts.columns(
        Column("<outcome>", "one column per outcome named in 'outcomes': units ended that way by "
                            "that age (cumulative)")),
    options=(OUTCOMES, cohorts.FAMILY, RESOLVE, cohorts.POOLING, cohorts.SHAPE_BY_GROUP, cohorts.CENTRED,
             COVARIATES),
    parameters=(
        *cohorts.TIMING_PARAMETERS,
        # Log-odds against the first outcome: sd 1.5 keeps a share between
        # about 5% and 95% of the pair a priori without favouring either.
        Parameter("share_logit", "log-odds of each later outcome (and the open part) against the first",
                  "normal(0,1.5)"),
        # As in timing-curve (workbench.covariates.PARAMETERS), one per outcome:
        # 95% of time ratios between 1/7 and 7 per sd.
        Parameter("time_effect", "shift of each outcome's log timing scale per sd of a numeric covariate "
                  "(per level of a label, against its reference level: the first in sorted order)",
                  "normal(0,1)"),
        # On the log-odds scale: 95% of odds ratios between 1/20 and 20.
        Parameter("share_effect", "shift of each outcome's log-odds against the reference (the first "
                  "outcome; staying open for good under resolve=estimate) per sd of a numeric covariate "
                  "(per level of a label)", "normal(0,1.5)"),
        covariates.CURVATURE_PARAMETER,
        covariates.SHAPE_SLOPE_PARAMETER,
        # Relaxation parameters (only present in the expanded models).
        Parameter("unresolved", "share of units that never end (resolve=all relaxed)", "beta(1,20)"),
        *cohorts.RELAXATION_PARAMETERS,
    ),
    assumptions=(
        Assumption(
            key="all_resolve",
            statement="Every unit ends in one of the outcomes eventually (under resolve=all; "
                      "otherwise one estimated share stays open).",
            statistic=Statistic(
                "plateau_level",
                "standardised residual of all ended units at the oldest quarter of rows (one row per unit: "
                "observed-minus-expected outcomes past the 75th percentile of outcome times)",
                cohorts.plateau_shortfall,
            ),
            relaxation=cohorts.relaxation(
                build_model, "unresolved", "a share of units may never end",
                null=0.0, negligible=0.01, applies=_resolve_is_all,
                # Planted: a tenth of units never end, fitted as if all do.
                planted=0.1, planted_options={"resolve": "all"},
            ),
            advice="Some units may never end: use --set resolve=estimate, or look for an outcome "
                   "that the table does not count.",
            informed_by=cohorts.ages_to_compare,
        ),
        *cohorts.shared_assumptions(build_model),
        *cohorts.covariate_form(build_model, "each outcome's log timing scale"),
    ),
    validate=validate,
    simulate=simulate,
    build_model=build_model,
    observed=cohorts.observed,
    outcome_names=("y",),
    outcome_columns=lambda options: {"y": " and ".join(options["outcomes"]) + " counts"},
    covariate="age",
    figure=figure,
    derived=derived,
    demo=demo,
)
