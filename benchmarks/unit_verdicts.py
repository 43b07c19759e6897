"""Verdicts on unit tables (one row per unit) across sizes, censoring and planted faults.

Each scenario simulates a unit table with :func:`workbench.units.simulate_table`
from the documented true values below, runs the full check at the given
sampling settings and prints the verdicts, the share of units censored and
the seconds taken. Clean scenarios should show no ``broken`` verdict; a
planted fault should make its own assumption ``broken``.

    .venv/bin/python benchmarks/unit_verdicts.py --seeds 1
    .venv/bin/python benchmarks/unit_verdicts.py --only clean --seeds 3 --draws 400

True values (invented). timing-curve: individually tagged tree seeds
emerge on a Weibull curve with scale 9 days and shape 2.4, and 82% of seeds
are viable (``eventual``). competing-risks: support tickets end solved (70%,
Weibull scale 3 days, shape 1.4) or withdrawn (30%, scale 8 days, shape 1.0).
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from workbench import api, engine, units

TIMING = {"family": "weibull", "scale": [9.0], "shape": [2.4], "share": [0.82]}
TICKETS = {"family": "weibull", "scale": [3.0, 8.0], "shape": [1.4, 1.0], "share": [0.7, 0.3],
           "outcomes": ["solved", "withdrawn"]}
# Follow-up: light (every unit watched 20-60 days) or heavy (5-20 days and
# lost at 5% a day); late entry up to 3 days.
FOLLOW = {"light": {"follow": (20.0, 60.0)}, "heavy": {"follow": (5.0, 20.0), "dropout": 0.05}}

SCENARIOS = [
    # name, recipe, truth, units, cohorts, follow, entry, planted, options
    ("clean", "timing-curve", TIMING, 300, 1, "light", 0.0, {}, {}),
    ("clean", "timing-curve", TIMING, 2000, 8, "heavy", 3.0, {}, {}),
    ("clean", "timing-curve", TIMING, 1000, 6, "light", 3.0, {}, {}),
    ("clean", "competing-risks", TICKETS, 1500, 6, "heavy", 3.0, {}, {"resolve": "all"}),
    ("clean", "competing-risks", TICKETS, 400, 4, "light", 0.0, {}, {"resolve": "all"}),
    ("cohort_homogeneity", "timing-curve", TIMING, 1000, 8, "heavy", 0.0, {"cohort_sd": 0.3}, {}),
    ("cohort_homogeneity", "competing-risks", TICKETS, 1500, 8, "light", 0.0, {"cohort_sd": 0.3},
     {"resolve": "all"}),
    ("eventual_fraction", "timing-curve", TIMING, 1000, 4, "light", 0.0, {}, {"eventual": "all"}),
    ("curve_shape", "timing-curve", {**TIMING, "share": [1.0]}, 1000, 4, "light", 0.0, {"power": 3.0},
     {"eventual": "all"}),
]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=1)
    parser.add_argument("--only", help="run the scenarios of this name only")
    parser.add_argument("--draws", type=int, default=400)
    parser.add_argument("--chains", type=int, default=4)
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    settings = engine.Settings(draws=args.draws, tune=args.draws, chains=args.chains, prior_draws=300)
    folder = Path(tempfile.mkdtemp(prefix="unit-verdicts-"))
    for name, recipe, truth, n, cohorts, follow, entry, planted, options in SCENARIOS:
        if args.only and name != args.only:
            continue
        for seed in range(1, args.seeds + 1):
            rng = np.random.default_rng([seed, n, cohorts])
            table = units.simulate_table(
                rng, truth["family"], truth["scale"], truth["shape"], truth["share"], n,
                cohorts=cohorts, entry=entry, outcomes=truth.get("outcomes"),
                cohort_sd=planted.get("cohort_sd", 0.0), power=planted.get("power", 1.0),
                **FOLLOW[follow])
            path = folder / f"{name}-{recipe}-{n}-{seed}.csv"
            table.to_csv(path, index=False)
            censored = float(np.mean((table["event"] == 0) if "event" in table else (table["outcome"] == "")))
            run_options = dict(options)
            if "outcomes" in truth:
                run_options["outcomes"] = ",".join(truth["outcomes"])
            start = time.perf_counter()
            result = api.check(recipe, path, options=run_options, seed=seed, settings=settings,
                               write=False, history=False)
            verdicts = result.verdicts()
            broken = sorted(k for k, v in verdicts.items() if v == "broken")
            right = (name in broken) if name != "clean" else not broken
            print(f"{name:20s} {recipe:16s} units {n:5d} cohorts {cohorts} follow {follow:5s} "
                  f"entry {entry:g} censored {censored:.2f} seed {seed}: "
                  f"{'ok ' if right else 'MISS'} broken={broken} "
                  f"doubtful={sorted(k for k, v in verdicts.items() if v == 'doubtful')} "
                  f"({time.perf_counter() - start:.0f} s)", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
