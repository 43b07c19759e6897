"""Write the invented covariate example of the README: lavender cuttings that flower.

Story. A nursery roots 400 lavender cuttings in two composts (``peat-free``
and ``standard``) on benches kept at different temperatures (12 to 22 °C) and
records the day each cutting opens its first flower; the season ends after
100 to 140 days (benches were set up over a month), and some cuttings never
flower. The table is one row per cutting (``time``, ``event``, ``temp_c``,
``compost``), simulated by the timing-curve recipe's own simulator from the
true values in TRUTH.

    python scripts/flowering_table.py examples/lavender_flowering.csv
"""

import sys

import numpy as np
import pandas as pd

from recipes.timing_curve import RECIPE

CUTTINGS = 400
# True values (invented): a typical cutting (at the mean temperature, in
# peat-free compost) flowers with probability 0.75, Weibull timing with scale
# 60 days and shape 3; each degree warmer shortens the time by 6% (time ratio
# 0.94) and raises the odds of flowering by 20% (odds ratio 1.2); standard
# compost lengthens the time by 15% (time ratio 1.15) and halves the odds
# (odds ratio 0.5).
TRUTH = {"scale_days": 60.0, "shape": 3.0, "eventual": 0.75,
         "time_ratio": {"temp_c": 0.94, "compost=standard": 1.15},
         "odds_ratio": {"temp_c": 1.2, "compost=standard": 0.5}}
OPTIONS = {"family": "weibull", "eventual": "estimate", "covariates": "temp_c,compost"}


def table(seed: int = 11):
    rng = np.random.default_rng(seed)
    # The skeleton: each cutting watched until its season ends (the simulator
    # draws its outcome afresh; one event makes the skeleton a valid table).
    frame = pd.DataFrame({"time": rng.uniform(100.0, 140.0, CUTTINGS), "event": 0})
    frame.loc[0, "event"] = 1
    frame["temp_c"] = np.round(rng.uniform(12.0, 22.0, CUTTINGS), 1)
    frame["compost"] = rng.choice(["peat-free", "standard"], CUTTINGS)
    options = RECIPE.read_options(OPTIONS)
    data = RECIPE.validate(frame, options)
    design = data.extra["covariates"]
    effects = list(design.effects)
    # On the model's scale: log ratios per sd of a number, per level of a label.
    per_unit = dict(zip(effects, design.per_unit))
    params = {
        "scale": TRUTH["scale_days"] / data.extra["age_ref"],
        "shape": TRUTH["shape"],
        "eventual": TRUTH["eventual"],
        "time_effect": np.array([np.log(TRUTH["time_ratio"][e]) * per_unit[e] for e in effects]),
        "share_effect": np.array([np.log(TRUTH["odds_ratio"][e]) * per_unit[e] for e in effects]),
    }
    # The reference unit sits at the mean temperature of this table.
    simulated = RECIPE.simulate(rng, data, params, options)
    out = frame[["temp_c", "compost"]].copy()
    out.insert(0, "event", simulated["code"].astype(int))
    out.insert(0, "time", np.round(simulated["time"], 2))
    return out


if __name__ == "__main__":
    table().to_csv(sys.argv[1] if len(sys.argv) > 1 else "lavender_flowering.csv", index=False)
