"""Random layouts for the diagnosis rates: a table skeleton and true values per seed.

Each recipe's rates were first measured on its demo layout alone; a rule
tuned there can fail elsewhere. :func:`draw` returns, for one recipe and one
random generator, a layout drawn within the ranges below (rows or cohorts,
covariate range and spacing, units, inspection schedule) with true values,
and :func:`fault_strength` a planted strength within its range. The ranges
are documented in the README beside the rates they produced.

Every layout is built in terms the story cares about, not in table units, so
that every draw can show the fault at all: threshold-geometry distances run
from where the aim almost always succeeds to where it mostly fails (the
tolerance angle between 3 and 15 spreads at the nearest row and 0.3 to 0.8
at the farthest); timing looks run from a fraction of the timing scale to a
few times it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

# Planted strengths per (recipe, fault): uniform between the two values.
# Each range holds the strength the relaxation declares as ``planted`` or
# lies beside it, and reaches down to strengths no test can always see.
STRENGTHS = {
    ("threshold-geometry", "shared_spread"): ("spread_slope", 0.2, 0.6),
    ("threshold-geometry", "angle_only"): ("extra_failure", 0.02, 0.08),
    ("threshold-geometry", "independent_attempts"): ("overdispersion", 0.01, 0.04),
    ("timing-curve", "eventual_fraction"): ("never", 0.1, 0.3),
    ("timing-curve", "curve_shape"): ("curve_power", 0.7, 1.4),
    ("timing-curve", "cohort_homogeneity"): ("cohort_sd", 0.2, 0.4),
    # The eventual share drifts linearly on the log-odds scale over the cohorts'
    # order, by this much from the first cohort to the last.
    ("timing-curve", "cohort_homogeneity:eventual-drift"): ("eventual_drift", 1.0, 2.0),
    ("timing-curve", "independent_units"): ("overdispersion", 0.01, 0.04),
    # A unit 2 sd from the dose's mean 1.8 to 6 times as slow as one at the mean.
    ("timing-curve", "covariate_form"): ("covariate_curvature", 0.15, 0.45),
    # The dose moves the curve's shape: a unit 2 sd above the mean dose has a
    # shape 1.35 to 2.2 times the typical one.
    ("timing-curve", "covariate_form:shape"): ("shape_slope", 0.15, 0.4),
    ("competing-risks", "all_resolve"): ("unresolved", 0.05, 0.15),
    ("competing-risks", "curve_shape"): ("curve_power", 0.7, 1.4),
    ("competing-risks", "cohort_homogeneity"): ("cohort_sd", 0.2, 0.4),
    ("competing-risks", "independent_units"): ("overdispersion", 0.01, 0.04),
    ("stage-transitions", "no_missing_exit"): ("dormant", 0.03, 0.08),
    ("stage-transitions", "time_homogeneity"): ("stay_drift", 0.25, 0.5),
    ("stage-transitions", "independent_units"): ("overdispersion", 0.03, 0.07),
}

# Ranges of the layouts (uniform unless said), in the story's terms.
RANGES = {
    "threshold-geometry": (
        "6-20 distances, evenly or log-evenly spaced; tolerance angle at the nearest distance 3-15 "
        "aiming spreads, at the farthest 0.3-0.8; 50-150 attempts at the smallest row and up to "
        "1.5-3 times that at others; clearance 0.2-0.5; spread 0.012-0.035 rad"),
    "timing-curve": (
        "6-20 cohorts of 40-100 units (up to 1.5-3 times that); 5-12 looks from 0.25-0.6 to 2-4 "
        "timing scales, evenly or geometrically spaced; in half the layouts later cohorts are "
        "younger (seen at fewer looks, at least 3); scale 5-20 days, shape 1.5-3, eventual share "
        "0.6-0.95"),
    "timing-curve (units with a dose)": (
        "150-500 units in 3-8 cohorts, one row per unit, each followed 1.5-4 timing scales "
        "(administrative censoring); a numeric dose, uniform or skewed (geometric) over a range "
        "2-20 wide; scale 5-20 days, shape 1.5-3, eventual share 0.6-0.95; the dose shifts the log "
        "timing scale by -0.5 to 0.5 and the eventual share's log-odds by -0.7 to 0.7 per sd"),
    "competing-risks": (
        "6-14 cohorts of 100-320 units; 5-9 looks from 0.2-0.5 to 4-8 times the faster outcome's "
        "scale, geometrically spaced; in half the layouts later cohorts are younger; first "
        "outcome's share 0.55-0.8, scales 3-10 days and 1-3 times that, shapes 0.8-2"),
    "stage-transitions": (
        "6-14 monthly intakes of 30-100 units, followed 8-16 months (later intakes fewer, at "
        "least 3); applied stays 0.3-0.6 and moves on to training in 60-85% of its moves, training "
        "stays 0.55-0.8 and certifies in 50-80% of its moves; stage counts or transition counts"),
}


@dataclass
class Layout:
    """A drawn layout: recipe options, table skeleton (outcomes zero), true values, description."""

    options: dict
    table: pd.DataFrame
    truth: dict
    describe: dict = field(default_factory=dict)


def draw(recipe: str, rng: np.random.Generator, layout: str = "") -> Layout:
    """One layout of ``recipe``; ``layout`` picks stage-transitions' 'stage counts' or 'transition counts'."""
    if recipe == "threshold-geometry":
        return _throws(rng)
    if recipe == "timing-curve":
        return _timing_dose(rng) if layout == DOSE else _timing(rng)
    if recipe == "competing-risks":
        return _competing(rng)
    if recipe == "stage-transitions":
        return _stages(rng, layout or "stage counts")
    raise KeyError(f"no random layout for recipe {recipe!r}")


def fault_strength(recipe: str, fault: str, rng: np.random.Generator) -> tuple[str, float]:
    parameter, low, high = STRENGTHS[(recipe, fault)]
    return parameter, float(rng.uniform(low, high))


def _spaced(rng, low, high, n):
    """n values from low to high, evenly or geometrically spaced (chosen at random)."""
    if rng.random() < 0.5:
        return np.linspace(low, high, n), "even"
    return np.geomspace(low, high, n), "geometric"


def _throws(rng) -> Layout:
    clearance = float(np.round(rng.uniform(0.2, 0.5), 3))
    spread = float(rng.uniform(0.012, 0.035))
    rows = int(rng.integers(6, 21))
    near, far = rng.uniform(3, 15), rng.uniform(0.3, 0.8)
    # Distance at which the tolerance angle is z spreads: clearance / sin(z * spread).
    d_near, d_far = clearance / np.sin(near * spread), clearance / np.sin(far * spread)
    distance, spacing = _spaced(rng, d_near, d_far, rows)
    distance = np.unique(np.round(distance, 2))
    low = int(rng.integers(50, 151))
    attempts = rng.integers(low, int(low * rng.uniform(1.5, 3.0)) + 1, size=distance.size)
    table = pd.DataFrame({"distance": distance, "attempts": attempts, "successes": 0})
    return Layout({"clearance": str(clearance)}, table, {"spread": spread},
                  {"rows": int(distance.size), "spacing": spacing, "distance": [float(distance[0]), float(distance[-1])],
                   "attempts": [int(attempts.min()), int(attempts.max())], "spread": spread,
                   "clearance": clearance})


def _looks(rng, first, last, n):
    ages, spacing = _spaced(rng, first, last, n)
    return np.unique(np.round(ages, 1)), spacing


def _cohort_rows(rng, n_cohorts, looks, staggered, units_low, units_high, outcomes, min_looks=3):
    rows = []
    for c in range(n_cohorts):
        seen = looks
        if staggered:
            # Later cohorts are younger: cohort c is seen at the first looks only.
            keep = max(min_looks, int(round(len(looks) * (1.0 - 0.6 * c / max(n_cohorts - 1, 1)))))
            seen = looks[:keep]
        units = int(rng.integers(units_low, units_high + 1))
        for age in seen:
            rows.append({"cohort": f"c{c + 1:02d}", "age": float(age), "exposed": units,
                         **{o: 0 for o in outcomes}})
    return pd.DataFrame(rows)


def _timing(rng) -> Layout:
    scale_days, shape, eventual = rng.uniform(5, 20), rng.uniform(1.5, 3.0), rng.uniform(0.6, 0.95)
    n_cohorts = int(rng.integers(6, 21))
    looks, spacing = _looks(rng, scale_days * rng.uniform(0.25, 0.6), scale_days * rng.uniform(2.0, 4.0),
                            int(rng.integers(5, 13)))
    staggered = bool(rng.random() < 0.5)
    low = int(rng.integers(40, 101))
    table = _cohort_rows(rng, n_cohorts, looks, staggered, low, int(low * rng.uniform(1.5, 3.0)), ["events"])
    age_ref = float(np.median(table["age"][table["age"] > 0]))
    truth = {"scale": scale_days / age_ref, "shape": float(shape), "eventual": float(eventual)}
    return Layout({"family": "weibull", "eventual": "estimate"}, table, truth,
                  {"cohorts": n_cohorts, "looks": int(looks.size), "spacing": spacing, "staggered": staggered,
                   "units": [int(table["exposed"].min()), int(table["exposed"].max())],
                   "scale_days": float(scale_days), "shape": float(shape), "eventual": float(eventual)})


DOSE = "units with a dose"


def _timing_dose(rng) -> Layout:
    """One row per unit with a numeric covariate (``dose``) that shifts its timing and share."""
    scale_days, shape, eventual = rng.uniform(5, 20), rng.uniform(1.5, 3.0), rng.uniform(0.6, 0.95)
    n, n_cohorts = int(rng.integers(150, 501)), int(rng.integers(3, 9))
    low, width = rng.uniform(0, 5), rng.uniform(2, 20)
    skewed = bool(rng.random() < 0.5)
    if skewed:
        dose = low + width * (np.exp(rng.uniform(0, np.log(11), n)) - 1) / 10
    else:
        dose = rng.uniform(low, low + width, n)
    follow = np.round(scale_days * rng.uniform(1.5, 4.0, n), 2)
    # A skeleton: every unit censored at its follow-up time but the first (the
    # table must hold one event); the simulator redraws every unit's outcome.
    table = pd.DataFrame({"time": follow, "event": np.r_[1, np.zeros(n - 1, dtype=int)],
                          "cohort": [f"c{c + 1}" for c in rng.integers(0, n_cohorts, n)],
                          "dose": np.round(dose, 2)})
    age_ref = float(np.median(table["time"]))
    truth = {"scale": scale_days / age_ref, "shape": float(shape), "eventual": float(eventual),
             "time_effect": np.array([rng.uniform(-0.5, 0.5)]),
             "share_effect": np.array([rng.uniform(-0.7, 0.7)])}
    return Layout({"family": "weibull", "eventual": "estimate", "covariates": "dose"}, table, truth,
                  {"units": n, "cohorts": n_cohorts, "dose": [float(dose.min()), float(dose.max())],
                   "skewed": skewed, "scale_days": float(scale_days), "shape": float(shape),
                   "eventual": float(eventual), "time_effect": float(truth["time_effect"][0]),
                   "share_effect": float(truth["share_effect"][0])})


def _competing(rng) -> Layout:
    first = rng.uniform(0.55, 0.8)
    s1 = rng.uniform(3, 10)
    scales = [s1, s1 * rng.uniform(1.0, 3.0)]
    shapes = [float(rng.uniform(0.8, 2.0)), float(rng.uniform(0.8, 2.0))]
    n_cohorts = int(rng.integers(6, 15))
    looks = np.unique(np.round(np.geomspace(s1 * rng.uniform(0.2, 0.5), s1 * rng.uniform(4, 8),
                                            int(rng.integers(5, 10))), 1))
    staggered = bool(rng.random() < 0.5)
    table = _cohort_rows(rng, n_cohorts, looks, staggered, 100, 320, ["solved", "withdrawn"])
    age_ref = float(np.median(table["age"][table["age"] > 0]))
    truth = {"share": [float(first), float(1 - first)], "scale": [s / age_ref for s in scales], "shape": shapes}
    return Layout({"outcomes": "solved,withdrawn", "family": "weibull", "resolve": "all"}, table, truth,
                  {"cohorts": n_cohorts, "looks": int(looks.size), "staggered": staggered,
                   "share": float(first), "scale_days": [float(s) for s in scales], "shape": shapes})


STAGES = ("applied", "training", "certified", "left")
STAGE_OPTIONS = {"stages": ",".join(STAGES), "absorbing": "certified,left",
                 "moves": "applied>training,applied>left,training>certified,training>left"}


def _stages(rng, layout: str) -> Layout:
    a_stay, a_train = rng.uniform(0.3, 0.6), rng.uniform(0.6, 0.85)
    t_stay, t_cert = rng.uniform(0.55, 0.8), rng.uniform(0.5, 0.8)
    p = np.array([
        [a_stay, (1 - a_stay) * a_train, 0.0, (1 - a_stay) * (1 - a_train)],
        [0.0, t_stay, (1 - t_stay) * t_cert, (1 - t_stay) * (1 - t_cert)],
        [0.0, 0.0, 1.0, 0.0],
        [0.0, 0.0, 0.0, 1.0],
    ])
    n_intakes, follow = int(rng.integers(6, 15)), int(rng.integers(8, 17))
    rows = []
    for intake in range(n_intakes):
        months = max(3, follow - intake)
        size = int(rng.integers(30, 101))
        if layout == "stage counts":
            for month in range(intake, intake + months + 1):
                rows.append({"cohort": f"intake-{intake + 1:02d}", "period": month, "applied": size,
                             "training": 0, "certified": 0, "left": 0})
            continue
        # Transition counts: a skeleton whose units move by the true matrix (the
        # recipe's simulator redraws every row's destinations for its own units).
        n = np.array([size, 0, 0, 0])
        for month in range(intake, intake + months):
            after = n * np.array([0, 0, 1, 1])
            for i in (0, 1):
                if n[i] == 0:
                    continue
                moved = rng.multinomial(n[i], p[i])
                rows.append({"cohort": f"intake-{intake + 1:02d}", "period": month, "from": STAGES[i],
                             **dict(zip(STAGES, moved))})
                after = after + moved
            n = after
    table = pd.DataFrame(rows)
    return Layout(dict(STAGE_OPTIONS), table, {"transition": p},
                  {"layout": layout, "intakes": n_intakes, "follow": follow,
                   "applied_stay": float(a_stay), "training_stay": float(t_stay)})
