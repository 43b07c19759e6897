"""Write the invented stage-transitions covariate example of the README: oyster larvae that settle.

Story. A shellfish hatchery starts a batch of oyster larvae in a tank every
week, 18 batches in all. Each week a swimming larva (``larva``) may settle
as spat (``spat``) or be lost, and settled spat may be moved out to the
nursery beds (``planted``) or be lost; ``planted`` and ``lost`` are end
stages. Each batch's tank is kept at one water temperature (16 to 24 °C)
and fed one of two diets (``algae`` or ``paste``). The hatchery counts every
batch in each stage weekly for ten weeks (the last batches until week 20). The table (``cohort``, ``period``,
the four stage counts, ``temp_c``, ``feed``) is simulated by the
stage-transitions recipe's own simulator from the true values in TRUTH.

    python scripts/hatchery_table.py examples/oyster_hatchery.csv
"""

import sys

import numpy as np
import pandas as pd

from recipes.stage_transitions import RECIPE, move_labels

BATCHES = 18
LAST_WEEK = 20
WEEKS_FOLLOWED = 10
STAGES = ("larva", "spat", "planted", "lost")
# True values (invented). A batch at the mean temperature on algae: a larva
# settles in a week with probability 0.30 and is lost with 0.15; spat are
# planted out with 0.30 and lost with 0.10. Odds ratios of each move against
# staying, per degree warmer and for paste against algae: warmth speeds
# settling and spares larvae; paste slows settling and loses more of both.
TRUTH = {
    "transition": [[0.55, 0.30, 0.00, 0.15],
                   [0.00, 0.60, 0.30, 0.10],
                   [0.00, 0.00, 1.00, 0.00],
                   [0.00, 0.00, 0.00, 1.00]],
    "odds_ratio": {"larva>spat": {"temp_c": 1.2, "feed=paste": 0.6},
                   "larva>lost": {"temp_c": 0.9, "feed=paste": 1.5},
                   "spat>planted": {"temp_c": 1.1, "feed=paste": 1.0},
                   "spat>lost": {"temp_c": 1.0, "feed=paste": 1.4}},
}
OPTIONS = {"stages": ",".join(STAGES), "absorbing": "planted,lost",
           "moves": "larva>spat,larva>lost,spat>planted,spat>lost", "covariates": "temp_c,feed"}


def table(seed: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    # The skeleton: each batch's larvae all swimming every week (the simulator
    # moves them afresh from the first week on).
    rows = []
    for batch in range(BATCHES):
        larvae = int(rng.integers(150, 301))
        temp = float(rng.choice(np.arange(16.0, 24.5, 0.5)))
        feed = ("algae", "paste")[batch % 2]
        for week in range(batch, min(batch + WEEKS_FOLLOWED, LAST_WEEK) + 1):
            rows.append({"cohort": f"batch-{batch + 1:02d}", "period": week, "larva": larvae, "spat": 0,
                         "planted": 0, "lost": 0, "temp_c": temp, "feed": feed})
    frame = pd.DataFrame(rows)
    options = RECIPE.read_options(OPTIONS)
    data = RECIPE.validate(frame, options)
    design = data.extra["covariates"]
    # On the model's scale: log odds ratios per sd of a number, per level of a label.
    per_unit = dict(zip(design.effects, design.per_unit))
    params = {
        "transition": np.array(TRUTH["transition"]),
        "move_effect": np.array([[np.log(TRUTH["odds_ratio"][m][e]) * per_unit[e] for e in design.effects]
                                 for m in move_labels(data)]),
    }
    # The reference unit sits at the mean temperature of this table's rows.
    simulated = RECIPE.simulate(rng, data, params, options)
    index = [r[0] for r in simulated.source_rows]
    return frame.assign(**{s: pd.Series(simulated[s], index=index) for s in STAGES})


if __name__ == "__main__":
    table().to_csv(sys.argv[1] if len(sys.argv) > 1 else "oyster_hatchery.csv", index=False)
