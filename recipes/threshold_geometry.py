"""threshold-geometry: an attempt succeeds when its aiming error is small enough.

Story. Each attempt from distance x is aimed with an angular error drawn from
Normal(0, spread). The target tolerates a lateral miss of ``clearance``, so the
attempt succeeds when |error| < arcsin(clearance / x); from x <= clearance
every attempt succeeds. Success probability:

    p(x) = 2 * Phi(arcsin(clearance / x) / spread) - 1.

Columns: ``distance``, ``attempts``, ``successes`` (optional ``group``).
Options: ``clearance`` (> 0, unit of distance), ``pooling`` and ``centred`` for
group-level designs.

References
----------
Gelman, A. and Nolan, D. (2002). Teaching Statistics 24(3), 93-95: the
geometric success model this recipe implements.
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pandas as pd
from scipy.special import erf

from workbench import tables
from workbench.recipe import (
    Assumption,
    Column,
    Dataset,
    Option,
    Parameter,
    Recipe,
    Relaxation,
    Statistic,
    choose_pooling,
    flag,
)
from workbench.statistics import nearest_shortfall, pearson_dispersion, residual_trend

NAME = "threshold-geometry"

# Keeps every probability strictly inside (0, 1) so the likelihood never sees
# log(0); far below any rate a count table can resolve.
EPS = 1e-9


def _positive_float(text: str) -> float:
    value = float(text)
    if not np.isfinite(value) or value <= 0:
        raise ValueError("must be a number > 0")
    return value


POOLING = Option(
    "pooling",
    "how groups share the spread: none, partial or complete",
    default="auto",
    choices=("auto", "none", "partial", "complete"),
)
CENTRED = Option(
    "centred",
    "true for the centred form of partial pooling (default false: non-centred)",
    parse=flag,
    default=False,
)


# --- validation --------------------------------------------------------------


def validate(table: pd.DataFrame, options: dict) -> Dataset:
    """Check the table; sum rows that share distance and group."""
    tables.require_columns(table, ["distance", "attempts", "successes"], NAME)
    distance = tables.positive_column(table, "distance")
    attempts = tables.count_column(table, "attempts", minimum=1)
    successes = tables.count_column(table, "successes")
    tables.not_above(successes, attempts, "successes", "attempts")
    if "group" in table.columns:
        group, labels = tables.label_column(table, "group")
    else:
        group, labels = np.zeros(len(table), dtype=np.int64), ["all"]
    # Identical covariate rows carry no extra information apart; sum them.
    keys = pd.DataFrame({"distance": distance, "group": group})
    order = keys.groupby(["group", "distance"], sort=True).ngroup().to_numpy()
    n = order.max() + 1
    tables.check_size(n, NAME, what="distinct rows after summing rows with the same distance and group")
    summed = Dataset(
        columns={
            "distance": np.zeros(n),
            "attempts": np.bincount(order, attempts, n).astype(np.int64),
            "successes": np.bincount(order, successes, n).astype(np.int64),
            "group": np.zeros(n, dtype=np.int64),
        },
        labels={"group": labels},
        source_rows=[[] for _ in range(n)],
    )
    summed.columns["distance"][order] = distance
    summed.columns["group"][order] = group
    for row, target in enumerate(order):
        summed.source_rows[target].append(row)
    pooling = choose_pooling(options, len(labels))
    summed.extra["pooling"] = pooling
    return summed


# --- the story in NumPy --------------------------------------------------------


def success_probability(distance, clearance, spread):
    """2 * Phi(arcsin(clearance / distance) / spread) - 1, inside (EPS, 1 - EPS)."""
    distance = np.asarray(distance, dtype=float)
    ratio = np.clip(clearance / distance, 0.0, 1.0)
    p = erf(np.arcsin(ratio) / (spread * np.sqrt(2.0)))  # = 2 * Phi(z) - 1
    p = np.where(distance <= clearance, 1.0, p)
    return np.clip(p, EPS, 1.0 - EPS)


def _spread_at(data: Dataset, params: dict) -> np.ndarray:
    """Spread per row; group spreads come from ``log_spread_group`` when pooled."""
    if "log_spread_group" in params:
        per_group = np.exp(np.asarray(params["log_spread_group"], dtype=float))
    else:
        per_group = np.asarray(params["spread"], dtype=float)
    spread = np.broadcast_to(per_group, (len(data.labels["group"]),))[data["group"]]
    slope = float(params.get("spread_slope", 0.0))
    if slope:
        spread = spread * np.exp(slope * _centred_log_distance(data["distance"]))
    return spread


def _centred_log_distance(distance):
    log_d = np.log(distance)
    return log_d - log_d.mean()


def simulate(rng: np.random.Generator, data: Dataset, params: dict, options: dict) -> Dataset:
    """Simulate every attempt's aiming error and count successes.

    ``params`` is one prior or posterior draw of the model's variables.
    Besides ``spread``, accepts the relaxation parameters (``spread_slope``,
    ``extra_failure``, ``overdispersion``) so faults can be planted.
    """
    clearance = options["clearance"]
    spread = _spread_at(data, params)
    extra = float(params.get("extra_failure", 0.0))
    rho = float(params.get("overdispersion", 0.0))
    out = np.empty(data.rows, dtype=np.int64)
    for i, (x, n, s) in enumerate(zip(data["distance"], data["attempts"], spread)):
        tolerance = np.arcsin(min(clearance / x, 1.0))
        if rho > 0:
            # Attempts of one row share a common aiming offset: correlated outcomes.
            kappa = 1.0 / rho - 1.0
            p = success_probability(x, clearance, s)
            p_row = rng.beta(p * kappa, (1 - p) * kappa)
            hits = rng.random(n) < p_row
        else:
            errors = rng.normal(0.0, s, size=n)
            hits = np.abs(errors) < tolerance
        if extra > 0:
            hits &= rng.random(n) >= extra
        out[i] = hits.sum()
    return data.replace(successes=out)


# --- the story in PyMC ---------------------------------------------------------


def build_model(data: Dataset, options: dict, prior, relax: str | None = None):
    """The PyMC model; ``relax`` names one relaxation parameter to add."""
    import pymc as pm
    import pytensor.tensor as pt

    clearance = options["clearance"]
    pooling = data.extra["pooling"]
    groups = data.labels["group"]
    coords = {"row": np.arange(data.rows), "group": groups}
    with pm.Model(coords=coords) as model:
        distance = pm.Data("distance", data["distance"], dims="row")
        attempts = pm.Data("attempts", data["attempts"], dims="row")
        successes = pm.Data("successes", data["successes"], dims="row")
        group = pm.Data("group_index", data["group"], dims="row")
        if pooling == "complete":
            spread = prior("spread")
            spread_row = spread
        elif pooling == "none":
            spread = prior("spread", dims="group")
            spread_row = spread[group]
        else:
            spread = prior("spread")  # typical spread across groups
            spread_sd = prior("spread_sd")  # sd of log spread across groups
            if options.get("centred"):
                log_spread_g = pm.Normal(
                    "log_spread_group", pt.log(spread), spread_sd, dims="group"
                )
            else:
                offset = pm.Normal("spread_offset", 0.0, 1.0, dims="group")
                log_spread_g = pm.Deterministic(
                    "log_spread_group", pt.log(spread) + spread_sd * offset, dims="group"
                )
            spread_row = pt.exp(log_spread_g)[group]
        if relax == "spread_slope":
            slope = prior("spread_slope")
            log_d = pt.log(distance)
            spread_row = spread_row * pt.exp(slope * (log_d - log_d.mean()))
        ratio = pt.clip(clearance / distance, 0.0, 1.0)
        # 2 * Phi(z) - 1 = erf(z / sqrt 2), without the cancellation near 1.
        p_geo = pt.erf(pt.arcsin(ratio) / (spread_row * np.sqrt(2.0)))
        p_geo = pt.switch(distance <= clearance, 1.0, p_geo)
        if relax == "extra_failure":
            p_geo = p_geo * (1.0 - prior("extra_failure"))
        p = pm.Deterministic("p", pt.clip(p_geo, EPS, 1.0 - EPS), dims="row")
        if relax == "overdispersion":
            rho = prior("overdispersion")
            kappa = 1.0 / pt.clip(rho, EPS, 1.0 - EPS) - 1.0
            pm.BetaBinomial(
                "y", alpha=p * kappa, beta=(1.0 - p) * kappa, n=attempts,
                observed=successes, dims="row",
            )
        else:
            pm.Binomial("y", n=attempts, p=p, observed=successes, dims="row")
    return model


def observed(data: Dataset) -> dict:
    return {"successes": data["successes"]}


# --- targeted statistics -------------------------------------------------------


def _expected(data, draws):
    return data["attempts"] * draws["p"], draws["p"]


def residual_trend_stat(data, outcomes, draws):
    mean, p = _expected(data, draws)
    var = data["attempts"] * p * (1 - p)
    return residual_trend(outcomes["y"], mean, var, np.log(data["distance"]))


def nearest_shortfall_stat(data, outcomes, draws):
    mean, p = _expected(data, draws)
    var = data["attempts"] * p * (1 - p)
    return nearest_shortfall(outcomes["y"], mean, var, data["distance"])


def dispersion_stat(data, outcomes, draws):
    mean, p = _expected(data, draws)
    var = data["attempts"] * p * (1 - p)
    return pearson_dispersion(outcomes["y"], mean, var)


def distances_to_compare(data) -> str:
    """Why the table cannot show a spread changing with distance ("" when it can)."""
    # A trend on log distance needs three distances to be told from noise.
    if len(np.unique(data["distance"])) >= 3:
        return ""
    return "the table holds fewer than three distances, so no trend with distance can show"


def two_distances_needed(data) -> str:
    """Why the table cannot tell another failure from the aim's ("" when it can)."""
    # At one distance a constant extra failure and a wider spread give the
    # same success rate: only the change of the rate with distance parts them.
    if len(np.unique(data["distance"])) >= 2:
        return ""
    return ("the table holds one distance, where a failure that is not the aim's cannot be told "
            "from a wider spread")


def rows_to_compare(data) -> str:
    """Why the table cannot show rows varying more than binomial ("" when it can)."""
    # One row is matched exactly by the fitted rate: no spread is left to judge.
    if data.rows >= 2:
        return ""
    return "the table holds one row, which the fitted rate matches exactly"


def _relaxation(parameter, meaning, null, negligible, planted, absorbs_misfit=False):
    return Relaxation(
        parameter=parameter,
        meaning=meaning,
        build=partial(build_model, relax=parameter),
        null=null,
        negligible=negligible,
        planted=planted,
        absorbs_misfit=absorbs_misfit,
    )


# --- report figure and demo scenario -------------------------------------------
def figure(data: Dataset, options: dict, posterior: dict, predictive: dict):
    """Success share by distance: the fitted success probability's band, and each
    row's observed share with the 90% interval of its replicated shares."""
    from workbench.report import plots

    observed = data["successes"] / data["attempts"]
    rate = predictive["y"] / data["attempts"] if "y" in predictive else None
    fitted = posterior.get("p")
    fig = plots.predictive_by_covariate(
        data["distance"], observed, None, rate, "distance", "share of attempts that succeed",
        fitted=None if fitted is None else np.asarray(fitted).reshape(-1, data.rows))
    return fig


def demo(rng: np.random.Generator):
    """Seed-pod launcher: an invented field-robot scenario with known spread."""
    from workbench.recipe import DemoScenario

    truth = {"spread": 0.021}
    clearance = 0.35  # metres: half the width of a planting gap
    # Near rows (success close to 1) show failures that are not the aim's; far rows
    # (success well below 1) carry the information about extra variation between sessions.
    distance = np.array([1.0, 1.5, 2, 3, 4, 5, 6, 8, 10, 12, 14, 16, 18, 20, 22, 25, 28, 30])
    attempts = rng.integers(120, 400, size=distance.size)
    base = validate(pd.DataFrame({"distance": distance, "attempts": attempts,
                                  "successes": np.zeros_like(attempts)}), {})
    sim = simulate(rng, base, truth, {"clearance": clearance})
    table = pd.DataFrame({"distance": distance, "attempts": attempts, "successes": sim["successes"]})
    return DemoScenario(
        title="Seed-pod launcher trials",
        story=("A reforestation drone launches seed pods at planting gaps 0.7 m wide from "
               "1 to 30 m away; a pod lands when its sideways angle error stays within the gap."),
        table=table,
        options={"clearance": str(clearance)},
        truth=truth,
    )


RECIPE = Recipe(
    name=NAME,
    summary="Attempts succeed when a normal aiming error stays within a geometric tolerance.",
    columns=(
        Column("distance", "distance of the attempts (> 0, same unit as clearance)"),
        Column("attempts", "number of attempts at that distance (>= 1)"),
        Column("successes", "number of those attempts that succeeded"),
        Column("group", "optional label: who or what made the attempts", required=False),
    ),
    options=(
        Option("clearance", "the lateral tolerance, a number > 0 in the unit of distance",
               parse=_positive_float),
        POOLING,
        CENTRED,
    ),
    parameters=(
        # Median 0.05 rad (about 3 degrees), 95% between 0.007 and 0.35 rad:
        # covers careful to sloppy aiming without favouring either.
        Parameter("spread", "standard deviation of the aiming error (radians)", "lognormal(-3,1)"),
        Parameter("spread_sd", "sd of log spread across groups (partial pooling)", "halfnormal(0.5)"),
        # Relaxation parameters (only present in the expanded models).
        Parameter("spread_slope", "change of log spread per unit of log distance", "normal(0,0.5)"),
        Parameter("extra_failure", "share of attempts that fail whatever their angle", "beta(1,20)"),
        Parameter("overdispersion", "correlation of attempts within a row (beta-binomial)", "beta(1,30)"),
    ),
    assumptions=(
        Assumption(
            key="shared_spread",
            statement="One aiming spread holds at every distance.",
            statistic=Statistic(
                "residual_trend",
                "slope of standardised residuals against log distance",
                residual_trend_stat,
            ),
            relaxation=_relaxation(
                "spread_slope", "log spread may change linearly with log distance",
                # Spread growing as distance^0.4: a length error that adds to the angle.
                null=0.0, negligible=0.1, planted=0.4,
            ),
            advice="Let the spread depend on distance (e.g. spread * distance^slope) or add a "
                   "second error source that grows with distance, such as a length error.",
            informed_by=distances_to_compare,
        ),
        Assumption(
            key="angle_only",
            statement="Nothing but the aiming error fails an attempt.",
            statistic=Statistic(
                "nearest_shortfall",
                "standardised shortfall of successes at the nearest quarter of distances",
                nearest_shortfall_stat,
                sides="less",
            ),
            relaxation=_relaxation(
                "extra_failure", "a constant share of attempts fails whatever the angle",
                # One attempt in twenty lost to something other than aim.
                null=0.0, negligible=0.01, planted=0.05,
            ),
            advice="Add a failure mode that does not depend on the angle (a constant or "
                   "distance-dependent extra failure probability) and ask what causes it.",

            informed_by=two_distances_needed,
        ),
        Assumption(
            key="independent_attempts",
            statement="Attempts at one distance are independent (binomial variation only).",
            statistic=Statistic(
                "dispersion",
                "Pearson chi-square per row (1 under binomial variation)",
                dispersion_stat,
                sides="greater",
            ),
            relaxation=_relaxation(
                "overdispersion", "attempts within a row share a common offset (beta-binomial)",
                # Within-row correlation 0.02: variance about 6x binomial at 250
                # attempts, as when each row is one session with its own conditions.
                null=0.0, negligible=0.005, planted=0.02, absorbs_misfit=True,
            ),
            advice="Rows vary more than binomial: add a row- or session-level effect "
                   "(beta-binomial or a random effect) or a group column for who attempted.",

            informed_by=rows_to_compare,
        ),
    ),
    validate=validate,
    simulate=simulate,
    build_model=build_model,
    observed=observed,
    outcome_names=("y",),
    outcome_columns={"y": "successes"},
    covariate="distance",
    figure=figure,
    demo=demo,
)
