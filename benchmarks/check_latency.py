"""How much longer than one bare fit does a full default check take?

For each case, two whole processes are timed in turn (bare, check, bare,
check, ...), so a drift in the machine's speed touches both alike:

* bare: import PyMC and nutpie, build the base model, compile it with
  ``nutpie.compile_pymc_model`` and sample it with ``nutpie.sample`` at the
  default draws (4 chains of 1000 after 1000 tuning steps): the least a user
  pays to fit the model at all;
* check: ``workbench check`` with default settings (relaxed models,
  predictive checks, PSIS-LOO, power-scaling, the report, the notebook).

Cases: the threshold-geometry and timing-curve demo tables (written by the
recipes' own demo scenarios), ``examples/sourdough_rise.py`` and
``tests/model_files/bird_sightings.py`` with no ASSUMPTIONS on its clean
scenario plus a ``farm`` column the model ignores (three automatic
relaxations: dispersion, excess zeros, same across farms). Prints the
median wall seconds of each and their ratio (median of the pairwise ratios).

    .venv/bin/python benchmarks/check_latency.py             # 3 pairs per case
    .venv/bin/python benchmarks/check_latency.py --runs 1 --case sourdough
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
WORKBENCH = str(Path(sys.executable).with_name("workbench"))
CASES = ("threshold-geometry", "timing-curve", "sourdough", "bird-sightings")
# Farms of the bird-sightings case: transects are assigned in turn.
FARMS = ("ash", "brook", "clay", "dale")


def case_inputs(case: str, folder: Path) -> tuple[str, str, dict]:
    """(target, table path, options) of a case; demo tables are written into ``folder``."""
    if case == "sourdough":
        return (str(ROOT / "examples" / "sourdough_rise.py"),
                str(ROOT / "examples" / "sourdough_rise.csv"), {})
    import numpy as np

    from workbench import registry

    if case == "bird-sightings":
        import importlib.util

        source = ROOT / "tests" / "model_files" / "bird_sightings.py"
        spec = importlib.util.spec_from_file_location("bird_sightings", source)
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        table = module.scenario_table(1)
        table["farm"] = [FARMS[i % len(FARMS)] for i in range(len(table))]
        path = folder / "bird-sightings.csv"
        table.to_csv(path, index=False)
        return str(source), str(path), {}

    scenario = registry.load().get(case).demo(np.random.default_rng(1))
    path = folder / f"{case}.csv"
    scenario.table.to_csv(path, index=False)
    return case, str(path), dict(scenario.options)


def bare(case: str, folder: str) -> None:
    """The bare fit, run in its own process by ``--bare``."""
    import nutpie

    from workbench import api

    target, table, options = case_inputs(case, Path(folder))
    design = api.resolve_design(target, options)
    data, _ = api.load_data(design, table)
    compiled = nutpie.compile_pymc_model(design.build(data))
    nutpie.sample(compiled, draws=1000, tune=1000, chains=4, seed=1, progress_bar=False)


def timed(command: list[str]) -> float:
    start = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True)
    seconds = time.perf_counter() - start
    if done.returncode != 0:
        raise SystemExit(f"failed: {' '.join(command)}\n{done.stderr[-2000:]}")
    return seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=3, help="pairs of runs per case")
    parser.add_argument("--case", choices=CASES, action="append", help="only these cases")
    parser.add_argument("--bare", choices=CASES, help=argparse.SUPPRESS)
    parser.add_argument("--folder", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.bare:
        bare(args.bare, args.folder)
        return
    folder = Path(tempfile.mkdtemp(prefix="check-latency-"))
    print(f"{'case':20s} {'bare fit s':>11s} {'check s':>9s} {'ratio':>7s}")
    for case in args.case or CASES:
        target, table, options = case_inputs(case, folder)
        sets = [a for k, v in options.items() for a in ("--set", f"{k}={v}")]
        bare_s, check_s, ratios = [], [], []
        for i in range(args.runs):
            out = folder / f"{case}-{i}"
            b = timed([sys.executable, __file__, "--bare", case, "--folder", str(folder)])
            c = timed([WORKBENCH, "check", target, "--data", table, *sets, "--out", str(out),
                       "--quiet", "--history", str(folder / "history.sqlite")])
            bare_s.append(b)
            check_s.append(c)
            ratios.append(c / b)
        print(f"{case:20s} {statistics.median(bare_s):11.1f} {statistics.median(check_s):9.1f} "
              f"{statistics.median(ratios):7.2f}", flush=True)


if __name__ == "__main__":
    main()
