"""timing-curve: when units of a cohort have one event, and how many ever do.

Story. A cohort of ``exposed`` units starts at age 0. Each unit ever has the
event with probability ``eventual`` (1 under ``eventual=all``); if it does, its
age at the event follows a parametric family F with a timing ``scale`` and a
``shape``. The share of the cohort with the event by age t is

    C(t) = eventual * F(t).

The table counts events cumulatively up to each age at which a cohort was
seen. A cohort seen once is one binomial draw; a cohort seen at several ages
gives one multinomial draw of the increments between its ages and of the units
still without the event (interval censoring), never independent binomials.

Ages enter the model in units of the reference age (the median positive age
in the table), so the default prior on ``scale`` fits days, weeks or years
alike; :func:`derived` reports timings back in the table's unit.

Columns: ``cohort``, ``age``, ``exposed``, ``events`` (optional ``group``).
Options: ``family``, ``eventual``, ``pooling``, ``shape_by_group`` (each group
its own curve shape, pooled as the scale), ``centred`` and ``covariates``.

Covariates (:mod:`workbench.covariates`). Each covariate column shifts a
unit's log timing scale by ``time_effect`` (accelerated failure time form)
and, under ``eventual=estimate``, the log-odds of its eventual share by
``share_effect`` (logistic mixture cure model), per sd of a numeric column or
per level of a label against its reference level. ``scale`` and ``eventual``
then describe a unit at the numeric covariates' means and the labels'
reference levels; ``time_ratio`` and ``odds_ratio`` give each effect per unit
of its covariate.

References
----------
Farewell, V. T. (1982). The use of mixture models for the analysis of survival
data with long-term survivors. Biometrics 38(4), 1041-1046.
Kalbfleisch, J. D. and Prentice, R. L. (2002). The Statistical Analysis of
Failure Time Data, 2nd ed. (parametric families, grouped data likelihood).
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

NAME = "timing-curve"
OUTCOME = "events"
# The unit layout's own columns (workbench.units): never covariates.
UNIT_COLUMNS = ("time", "event", "entry", "cohort", "group")

EVENTUAL = Option(
    "eventual",
    "estimate (some units may never have the event) or all (every unit has it eventually)",
    default="estimate",
    choices=("estimate", "all"),
)


def validate(table: pd.DataFrame, options: dict) -> Dataset:
    """Check the table: one row per unit when it has a ``time`` column
    (:func:`workbench.units.validate`), else cohort counts (:func:`workbench.cohorts.validate`)."""
    names = tuple(options.get("covariates", ()))
    if units.is_unit_table(table):
        data = units.validate(table, None, options, NAME)
        design = covariates.read(table, names, NAME, UNIT_COLUMNS)
    else:
        data = cohorts.validate(table, [OUTCOME], options, NAME)
        design = covariates.read(table, names, NAME, ("cohort", "age", "exposed", OUTCOME, "group"))
        if design is not None:
            covariates.constant_within(design, table, *tables.label_column(table, "cohort"))
            design = design.take(np.asarray([rows[0] for rows in data.source_rows]))
    data.extra["covariates"] = design
    # What fixes the curve: scale and shape, and the eventual share when estimated.
    data.extra["curve_parameters"] = 3 if options.get("eventual") == "estimate" else 2
    return data


# --- the story in NumPy -------------------------------------------------------------


def simulate(rng: np.random.Generator, data: Dataset, params: dict, options: dict) -> Dataset:
    """Follow every unit of every cohort and count events at the table's ages.

    ``params`` is one draw of the model's variables (``scale`` or
    ``scale_group``, ``shape``, ``eventual``, with covariates ``time_effect``
    and ``share_effect`` on the model's scale) and may carry the relaxation
    parameters (``never``, ``curve_power``, ``cohort_sd`` or
    ``cohort_effect``, ``overdispersion``) so that faults can be planted.
    """
    eventual = float(params.get("eventual", 1.0)) if options["eventual"] == "estimate" else 1.0
    eventual *= 1.0 - float(params.get("never", 0.0))
    design = data.extra.get("covariates")
    # Per row: the covariates' shift of the log timing scale and the eventual share.
    time_shift = np.broadcast_to(covariates.linear(design, params, "time_effect")
                                 + covariates.curvature_shift(design, params), (data.rows,))
    share = np.full((data.rows, 1), eventual)
    if options["eventual"] == "estimate" and "share_effect" in params:
        logit = np.log(eventual) - np.log1p(-min(eventual, 1.0 - cohorts.EPS))
        share = 1.0 / (1.0 + np.exp(-(logit + covariates.linear(design, params, "share_effect"))))[:, None]
    if units.is_units(data):
        return units.simulate(rng, data, options["family"], cohorts.scales_of(rng, data, params, 1),
                              cohorts.shapes_of(data, params, 1), share,
                              power=float(np.exp(params.get("curve_power", 0.0))), log_shift=time_shift,
                              log_shape_shift=covariates.shape_shift(design, params))
    last = data.extra["last_row"]
    shape_shift = np.broadcast_to(covariates.shape_shift(design, params), (data.rows,))
    counts = cohorts.simulate_units(
        rng, data, options["family"],
        cohorts.scales_of(rng, data, params, 1) * np.exp(time_shift[last])[:, None],
        cohorts.shapes_of(data, params, 1) * np.exp(shape_shift[last])[:, None], share[last],
        power=float(np.exp(params.get("curve_power", 0.0))),
        rho=float(params.get("overdispersion", 0.0)),
    )
    return data.replace(events=counts[:, 0])


# --- the story in PyMC ------------------------------------------------------------------


def build_model(data: Dataset, options: dict, prior, relax: str | None = None):
    """The PyMC model; ``relax`` names one relaxation parameter to add."""
    import pymc as pm
    import pytensor.tensor as pt

    unit = units.is_units(data)
    design = data.extra.get("covariates")
    coords = units.coords(data) if unit else cohorts.coords(data)
    if design is not None:
        coords[covariates.DIM] = list(design.effects)
    with pm.Model(coords=coords) as model:
        counts = units.container(data) if unit else cohorts.counts_container(data)
        time_shift = None if design is None else covariates.bent(
            design, prior, relax, covariates.shifts(design, prior, "time_effect"))
        shape_shift = None if design is None else covariates.shaped(design, prior, relax)
        scale_group = cohorts.timing_scales(data, options, prior, dims=(), counts=counts)
        shape = cohorts.timing_shapes(data, options, prior, dims=())
        if options["eventual"] == "estimate":
            eventual = prior("eventual")
            seen = cohorts.observed_shares(data, counts)[0]
            engine.start_at(eventual, pt.clip(seen, cohorts.START_MARGIN, 1.0 - cohorts.START_MARGIN))
            if relax == "never":
                # Already relaxed by the estimated eventual share: the
                # expansion does not apply and stays at its null.
                pm.Deterministic("never", pt.zeros(()))
        elif relax == "never":
            eventual = 1.0 - prior("never")
        else:
            eventual = pt.ones(())
        share = pm.Deterministic("share", pt.reshape(eventual, (1,)), dims="outcome")
        logit_share = None
        if design is not None and options["eventual"] == "estimate":
            # Each row's eventual share: the reference share shifted on the log-odds scale.
            logit_share = (pt.log(eventual) - pt.log1p(-eventual)
                           + covariates.shifts(design, prior, "share_effect"))
        row_share = share if logit_share is None else pm.math.sigmoid(logit_share)[:, None]
        if unit:
            if relax == "cohort_share_sd" and options["eventual"] == "estimate":
                # Each unit's eventual share: its cohort's, on the log-odds scale
                # about the typical one (and its covariates' shift).
                sd = prior("cohort_share_sd")
                z = pm.Normal("cohort_share_z", 0.0, 1.0, dims="cohort")
                logit_unit = (pt.log(eventual) - pt.log1p(-eventual) if logit_share is None
                              else logit_share) + (sd * z)[data["cohort"]]
                row_share = pm.math.sigmoid(logit_unit)[:, None]
            elif relax == "cohort_share_sd":
                # Every unit has the event under eventual=all: no share to differ.
                pm.Deterministic("cohort_share_sd", pt.zeros(()))
            closed = options["eventual"] == "all" and relax != "never"
            units.likelihood(data, counts, options["family"], scale_group, shape, row_share, relax, prior,
                             closed, log_shift=time_shift, log_shape_shift=shape_shift)
            return model
        if relax == "cohort_share_sd" and options["eventual"] == "estimate":
            # Each cohort's eventual share on the log-odds scale about the typical one.
            sd = prior("cohort_share_sd")
            z = pm.Normal("cohort_share_z", 0.0, 1.0, dims="cohort")
            logit_row = (pt.log(eventual) - pt.log1p(-eventual) if logit_share is None
                         else logit_share) + (sd * z)[data["cohort"]]
            cumulative = cohorts.cumulative_tensor(
                data, options["family"], scale_group, shape, pt.ones((1,)), relax, prior,
                log_shift=time_shift,
            ) * pm.math.sigmoid(logit_row)[:, None]
        else:
            if relax == "cohort_share_sd":
                # Every unit has the event under eventual=all: no share to differ.
                pm.Deterministic("cohort_share_sd", pt.zeros(()))
            cumulative = cohorts.cumulative_tensor(
                data, options["family"], scale_group, shape, row_share, relax, prior,
                log_shift=time_shift, log_shape_shift=shape_shift,
            )
        pm.Deterministic("cumulative", cumulative[:, 0], dims="row")
        cohorts.cell_likelihood(data, counts, cohorts.cells_tensor(data, cumulative), relax, prior)
    return model


# --- report quantities --------------------------------------------------------------------


def derived(data: Dataset, options: dict, posterior: dict) -> dict:
    """Eventual share and, per group, the age by which half of the eventual events happen."""
    out = {"eventual share": np.asarray(posterior["share"], dtype=float).reshape(-1)}
    scale = np.asarray(posterior["scale_group"], dtype=float)
    scale = scale.reshape(scale.shape[0], -1)
    shape = cohorts.group_shapes(posterior, len(data.labels["group"]), 1)
    for g, label in enumerate(data.labels["group"]):
        median = curves.quantile(options["family"], 0.5, scale[:, g], shape[:, g, 0]) * data.extra["age_ref"]
        out["median age" if len(data.labels["group"]) == 1 else f"median age ({label})"] = median
    return out


def figure(data: Dataset, options: dict, posterior: dict, predictive: dict):
    """Cumulative share with the event over age: fitted curve and band against the cohorts."""
    return cohorts.figure(data, options["family"], posterior, "share with the event",
                          predictive=predictive)


# --- demo scenario ---------------------------------------------------------------------------

# Invented: trays of tree seeds sown on different days and inspected for
# seedlings; about 82% of seeds are viable, emergence follows a Weibull curve
# with scale 9 days and shape 2.4.
DEMO_TRUTH_DAYS = {"scale_days": 9.0, "shape": 2.4, "eventual": 0.82}


def demo(rng: np.random.Generator) -> DemoScenario:
    """Seedling emergence in a nursery: trays sown on 14 days, inspected until emergence ends."""
    # Every other day while seedlings come up, once more a week after.
    inspections = np.array([3, 5, 7, 9, 11, 13, 15, 17, 19, 21, 28])
    rows = []
    for tray in range(14):
        sown_days_ago = 30 - 2 * tray  # the youngest trays have fewer inspections so far
        seeds = int(rng.integers(60, 140))
        for day in inspections[inspections <= sown_days_ago]:
            rows.append({"cohort": f"tray-{tray + 1:02d}", "age": int(day), "exposed": seeds, "events": 0})
    skeleton = pd.DataFrame(rows)
    options = {"family": "weibull", "eventual": "estimate"}
    design_options = RECIPE.read_options(options)
    data = validate(skeleton, design_options)
    truth = {
        "scale": DEMO_TRUTH_DAYS["scale_days"] / data.extra["age_ref"],
        "shape": DEMO_TRUTH_DAYS["shape"],
        "eventual": DEMO_TRUTH_DAYS["eventual"],
    }
    simulated = simulate(rng, data, truth, design_options)
    table = simulated.to_frame()[["cohort", "age", "exposed", "events"]].astype({"age": int})
    return DemoScenario(
        title="Seedling emergence in a tree nursery",
        story=("A nursery sows a tray of native tree seed every other day and counts seedlings "
               "every other day from day 3 to day 21 and once more at day 28; not every seed is "
               "viable. How many seeds ever emerge, and how fast? (ages in days; model scale is "
               "relative to the median "
               f"inspection age of {data.extra['age_ref']:g} days)"),
        table=table,
        options=options,
        truth={**truth, "scale_days": DEMO_TRUTH_DAYS["scale_days"]},
    )


# --- assumptions --------------------------------------------------------------------------------


def _eventual_is_all(options) -> bool:
    return options.get("eventual") == "all"


def _eventual_is_estimated(options) -> bool:
    return options.get("eventual") == "estimate"


def _plateau_advice(options) -> str:
    if _eventual_is_all(options):
        return ("Let a share of units never have the event (--set eventual=estimate), or follow "
                "the oldest cohorts longer before trusting the plateau.")
    # The share is estimated already: the late events miss the curve's tail or
    # differ between cohorts.
    return ("The late events miss what one estimated eventual share and the chosen family predict: "
            "try another family (--set family=...), let cohorts differ (a cohort or group column), "
            "or follow the oldest cohorts longer before trusting the plateau.")


RECIPE = Recipe(
    name=NAME,
    summary="Units of a cohort have one event at a random age; some may never have it.",
    columns=cohorts.columns(
        Column("events", "units with the event by that age (cumulative, non-decreasing in age)")),
    options=(cohorts.FAMILY, EVENTUAL, cohorts.POOLING, cohorts.SHAPE_BY_GROUP, cohorts.CENTRED,
             covariates.COVARIATES),
    parameters=(
        *cohorts.TIMING_PARAMETERS,
        Parameter("eventual", "share of units that ever have the event (eventual=estimate; with "
                  "covariates: at their means and reference levels)", "beta(1,1)"),
        *covariates.PARAMETERS,
        covariates.CURVATURE_PARAMETER,
        covariates.SHAPE_SLOPE_PARAMETER,
        # Relaxation parameters (only present in the expanded models).
        Parameter("never", "share of units that never have the event (eventual=all relaxed)", "beta(1,20)"),
        # sd 0.5 on log-odds: cohorts' eventual shares a few points to about
        # ten points apart around a share of a half.
        Parameter("cohort_share_sd", "sd of the eventual share's log-odds between cohorts", "halfnormal(0.5)"),
        *cohorts.RELAXATION_PARAMETERS,
    ),
    assumptions=(
        Assumption(
            key="eventual_fraction",
            statement="The share of units that ever have the event is as modelled "
                      "(all of them under eventual=all, one estimated share otherwise).",
            statistic=Statistic(
                "plateau_level",
                "standardised residual of cumulative events at the oldest quarter of rows (one row per unit: "
                "observed-minus-expected outcomes past the 75th percentile of outcome times)",
                cohorts.plateau_shortfall,
            ),
            relaxation=cohorts.relaxation(
                build_model, "never", "a share of units may never have the event",
                null=0.0, negligible=0.01, applies=_eventual_is_all,
                # Planted: a fifth of units never have the event, fitted as if all do.
                planted=0.2, planted_options={"eventual": "all"},
            ),
            advice=_plateau_advice,
            informed_by=cohorts.ages_to_compare,
        ),
        *cohorts.shared_assumptions(build_model),
        # Cohorts may differ in how many units ever have the event, not only in
        # timing. Without this structural expansion such a difference shows as a
        # late trend, a plateau shortfall and extra variation at once, and only
        # the catch-all overdispersion can absorb it. Judged by the statistic of
        # the entry above (an assumption is judged once per key).
        Assumption(
            key="cohort_homogeneity",
            statement="Every cohort (within a group) follows the same timing.",
            relaxation=cohorts.relaxation(
                build_model, "cohort_share_sd",
                "each cohort's eventual share may differ (log-normal effect on its log-odds)",
                null=0.0, negligible=0.1, applies=_eventual_is_estimated,
            ),
            informed_by=cohorts.cohorts_to_compare,
        ),
        *cohorts.covariate_form(build_model, "the log timing scale"),
    ),
    validate=validate,
    simulate=simulate,
    build_model=build_model,
    observed=cohorts.observed,
    outcome_names=("y",),
    outcome_columns={"y": "events"},
    covariate="age",
    figure=figure,
    derived=derived,
    demo=demo,
)
