"""Sourdough rise: a starter's height follows a logistic growth curve.

Story. A bakery feeds its starter, fills four identical jars and measures how
far the dough has risen above the feed line (mm) every hour for ten hours.
Yeast growth slows as food runs out, so the rise follows a logistic curve

    curve(hour) = max_rise / (1 + exp(-rate * (hour - midpoint)))

and each reading adds a ruler-and-eye error Normal(0, noise).

Columns: ``jar`` (label), ``hour`` (hours since feeding), ``rise_mm``.
The table ``sourdough_rise.csv`` beside this file was simulated by
``python examples/sourdough_rise.py`` from the true values in TRUE_VALUES.

Check it with

    workbench check examples/sourdough_rise.py --data examples/sourdough_rise.csv --sbc 100
"""

import numpy as np
import pandas as pd
import pymc as pm

from workbench.recipe import Assumption, Relaxation, Statistic

# The values the example table was simulated from (invented).
TRUE_VALUES = {"max_rise": 44.0, "rate": 0.9, "midpoint": 5.5, "noise": 1.2}
JARS = ("A", "B", "C", "D")
HOURS = np.arange(0, 11)


def _curve(hour, max_rise, rate, midpoint):
    return max_rise / (1.0 + np.exp(-rate * (hour - midpoint)))


def _model(data: pd.DataFrame, noise_grows: bool) -> pm.Model:
    hour = data["hour"].to_numpy(float)
    with pm.Model() as model:
        # A starter at room temperature rises by 20-80 mm, fastest at 3-8 hours.
        max_rise = pm.LogNormal("max_rise", np.log(40.0), 0.4)
        rate = pm.LogNormal("rate", np.log(0.8), 0.4)
        midpoint = pm.Normal("midpoint", 5.0, 1.5)
        noise = pm.HalfNormal("noise", 2.0)
        curve = pm.Deterministic(
            "curve", max_rise / (1.0 + pm.math.exp(-rate * (hour - midpoint))))
        if noise_grows:
            # Readings may get harder as the dough domes: noise scales by
            # exp(noise_slope) from the feed line to the full rise.
            noise_slope = pm.Normal("noise_slope", 0.0, 1.0)
            noise = noise * pm.math.exp(noise_slope * (curve / max_rise - 0.5))
        pm.Normal("rise_mm", curve, noise, observed=data["rise_mm"].to_numpy(float))
    return model


def build_model(data: pd.DataFrame) -> pm.Model:
    """The logistic rise with a constant reading error."""
    return _model(data, noise_grows=False)


def build_growing_noise(data: pd.DataFrame) -> pm.Model:
    """The same story with a reading error that may change with height."""
    return _model(data, noise_grows=True)


def noise_trend(data, outcomes, draws):
    """Correlation of the absolute residual with the fitted height, per draw."""
    residual = np.abs(outcomes["rise_mm"] - draws["curve"])
    height = draws["curve"]
    r = residual - residual.mean(axis=1, keepdims=True)
    h = height - height.mean(axis=1, keepdims=True)
    return (r * h).sum(axis=1) / np.sqrt((r**2).sum(axis=1) * (h**2).sum(axis=1))


ASSUMPTIONS = [
    Assumption(
        key="constant_noise",
        statement="A reading is as precise at the top of the rise as at the feed line.",
        statistic=Statistic("noise_trend", "correlation of |residual| with the fitted height",
                            noise_trend, sides="greater"),
        relaxation=Relaxation("noise_slope", "the reading error may grow or shrink with height",
                              build_growing_noise, null=0.0, negligible=0.2),
        advice="Let the reading error depend on the height (or read the jars another way).",
    ),
]


def story(rng: np.random.Generator, data: pd.DataFrame, values: dict) -> pd.DataFrame:
    """Readings for the jars and hours of ``data`` under the given true values."""
    curve = _curve(data["hour"].to_numpy(float), values["max_rise"], values["rate"],
                   values["midpoint"])
    out = data.copy()
    out["rise_mm"] = rng.normal(curve, values["noise"])
    return out


def simulate(rng: np.random.Generator, data: pd.DataFrame):
    """Draw true values from the priors, then readings: the calibration's independent story."""
    values = {
        "max_rise": rng.lognormal(np.log(40.0), 0.4),
        "rate": rng.lognormal(np.log(0.8), 0.4),
        "midpoint": rng.normal(5.0, 1.5),
        "noise": abs(rng.normal(0.0, 2.0)),
    }
    return values, story(rng, data, values)


def example_table(seed: int = 20240501) -> pd.DataFrame:
    """The example table: four jars read hourly, simulated from TRUE_VALUES.

    Readings are written to 0.1 mm, as a ruler gives them (far below the noise).
    """
    design = pd.DataFrame([(jar, hour) for jar in JARS for hour in HOURS], columns=["jar", "hour"])
    table = story(np.random.default_rng(seed), design, TRUE_VALUES)
    return table.round({"rise_mm": 1})


if __name__ == "__main__":
    from pathlib import Path

    example_table().to_csv(Path(__file__).with_suffix(".csv"), index=False)
