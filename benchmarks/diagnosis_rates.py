"""Detection and false-alarm rates of the diagnosis, per recipe.

For every recipe with a demo scenario: simulate data that satisfy every
assumption, and data that violate exactly one assumption at a time (at the
strength its relaxation declares as ``planted``), over many seeds; run the
full check on each; print per scenario the share of runs that mark the right
assumption broken (target >= 0.9) and the share that mark any other
assumption broken (target <= 0.05; for clean data, any broken verdict).

    .venv/bin/python benchmarks/diagnosis_rates.py --seeds 20
    .venv/bin/python benchmarks/diagnosis_rates.py --recipe threshold-geometry --seeds 5
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings

from workbench import engine, registry, rates

DETECTION_TARGET = 0.9
FALSE_ALARM_TARGET = 0.05


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--recipe", action="append", help="recipe name (repeatable; default: all)")
    parser.add_argument("--scenario", action="append",
                        help="only this scenario: '(clean)' or an assumption key (repeatable)")
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--draws", type=int, default=1000)
    parser.add_argument("--tune", type=int, default=1000)
    parser.add_argument("--json", help="also write the table as JSON here")
    parser.add_argument("--verbose", action="store_true")
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    reg = registry.load()
    names = args.recipe or sorted(n for n, r in reg.recipes.items() if r.demo is not None)
    settings = engine.Settings(draws=args.draws, tune=args.tune)
    seeds = range(args.first_seed, args.first_seed + args.seeds)
    say = (lambda m: print(m, file=sys.stderr, flush=True)) if args.verbose else (lambda _: None)
    rows = []
    print(f"{'recipe':<20} {'planted fault':<22} {'runs':>4} {'right broken':>12} {'other broken':>12}  targets")
    for name in names:
        recipe = reg.get(name)
        for scenario, planted in rates.scenarios(recipe).items():
            if args.scenario and scenario not in args.scenario:
                continue
            start = time.perf_counter()
            tally = rates.run_scenario(recipe, scenario, planted, seeds, settings, say)
            row = {"recipe": name, **tally.row(), "seconds": round(time.perf_counter() - start, 1),
                   "failures": tally.failures}
            rows.append(row)
            detected = "-" if row["detected"] is None else f"{row['detected']:.2f}"
            other = "-" if row["other_broken"] is None else f"{row['other_broken']:.2f}"
            ok_detect = row["detected"] is None or row["detected"] >= DETECTION_TARGET
            ok_other = row["other_broken"] is not None and row["other_broken"] <= FALSE_ALARM_TARGET
            mark = "met" if ok_detect and ok_other else "MISSED"
            print(f"{name:<20} {scenario:<22} {tally.runs:>4} {detected:>12} {other:>12}  {mark}"
                  + (f"  ({len(tally.failures)} failed fits)" if tally.failures else ""), flush=True)
    if args.json:
        with open(args.json, "w") as handle:
            json.dump({"seeds": list(seeds), "draws": args.draws, "rows": rows}, handle, indent=2)
    return 0


if __name__ == "__main__":
    sys.exit(main())
