"""How long does validating a 100,000-row table take, per recipe?

Builds one large table per recipe (threshold-geometry: rows that sum to a
few distinct distances and groups, so it validates; the cohort and stage
recipes: one row per cohort and look, so they reach the row limit) and times
``recipe.validate`` on it, reading the table back from CSV first as the
command line would. Prints seconds and rows per second, and what validation
answered (the summed row count or the one-line refusal). Wall-clock seconds,
so run it on an otherwise idle machine.

    .venv/bin/python benchmarks/validate_large.py
    .venv/bin/python benchmarks/validate_large.py --rows 1000000
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from workbench import registry, tables
from workbench.errors import WorkbenchError


def large_table(name: str, options: dict, rows: int, rng: np.random.Generator) -> pd.DataFrame:
    """A valid-looking table of ``rows`` rows for the recipe ``name``."""
    if name == "threshold-geometry":
        attempts = rng.integers(1, 20, size=rows)
        return pd.DataFrame({"distance": rng.choice([1.0, 2, 3, 5, 8, 13, 21], size=rows),
                             "attempts": attempts, "successes": rng.binomial(attempts, 0.5),
                             "group": rng.choice(["north", "south", "east"], size=rows)})
    half = rows // 2
    cohort = np.repeat([f"c{i}" for i in range(half)], 2)
    if name == "stage-transitions":
        stages = list(options["stages"])
        table = pd.DataFrame({"cohort": cohort, "period": np.tile([0, 1], half)})
        for s, stage in enumerate(stages):
            table[stage] = np.tile([10, 8] if s == 0 else [0, 2] if s == 1 else [0, 0], half)
        return table
    outcomes = list(options.get("outcomes", ["events"]))
    table = pd.DataFrame({"cohort": cohort, "age": np.tile([1.0, 2.0], half), "exposed": 50})
    for k, outcome in enumerate(outcomes):
        table[outcome] = np.tile([k + 1, k + 2], half)
    return table


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=100_000)
    args = parser.parse_args()
    rng = np.random.default_rng(1)
    with tempfile.TemporaryDirectory() as scratch:
        for name, recipe in sorted(registry.load().recipes.items()):
            options = recipe.read_options(recipe.demo(np.random.default_rng(0)).options)
            path = Path(scratch) / f"{name}.csv"
            large_table(name, options, args.rows, rng).to_csv(path, index=False)
            start = time.perf_counter()
            table = tables.read_table(path)
            read = time.perf_counter() - start
            try:
                answer = f"validated: {recipe.validate(table, options).rows} model rows"
            except WorkbenchError as err:
                answer = f"refused: {err}"
            seconds = time.perf_counter() - start
            print(f"{name:20s} {seconds:6.2f} s ({read:.2f} s reading), "
                  f"{args.rows / seconds:,.0f} rows/s; {answer}")


if __name__ == "__main__":
    main()
