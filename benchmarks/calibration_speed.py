"""How much faster is run_calibration than the loop a user writes by hand?

Runs, in one process, the same calibration of threshold-geometry two ways:

* naive: per replicate, draw parameters from the prior, simulate, build the
  PyMC model for the simulated data and call ``pm.sample`` (PyMC's default
  sampler), then rank the truth among thinned draws;
* ``run_calibration``: the model compiled once, the data swapped per
  replicate; by default this process starts alone and adds helper processes
  only when the work left pays for their start-up. For comparison it also
  times a fixed pool of worker processes (``--pool``), each of which imports
  and compiles before its first replicate.

Both use the same draws, tuning steps, chains and L. Prints seconds per
replicate for each, their ratio, and replicates per second over a larger
run. Wall-clock seconds, so run it on an otherwise idle machine.

    .venv/bin/python benchmarks/calibration_speed.py              # 50 + 50, then 1000
    .venv/bin/python benchmarks/calibration_speed.py --large 0    # skip the large run
    .venv/bin/python benchmarks/calibration_speed.py --naive 10   # fewer naive replicates
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np
import pandas as pd

from workbench import registry
from workbench.calibration import CALIBRATION_SETTINGS, DEFAULT_RANKS, run_calibration
from workbench.recipe import make_design

# An invented practice range: eight distances, a thousand attempts in all.
TABLE = pd.DataFrame({
    "distance": [0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0],
    "attempts": [60, 80, 100, 120, 150, 150, 200, 200],
    "successes": [58, 70, 75, 70, 60, 45, 45, 35],
})
OPTIONS = {"clearance": "0.05"}


def naive_loop(design, data, sims: int, seed: int) -> float:
    """Seconds per replicate of the hand-written loop."""
    import logging

    import pymc as pm

    logging.getLogger("pymc").setLevel(logging.ERROR)
    settings = CALIBRATION_SETTINGS
    rng = np.random.default_rng(seed)
    start = time.perf_counter()
    for i in range(sims):
        prior_model = design.build(data)
        with prior_model:
            prior = pm.sample_prior_predictive(draws=1, random_seed=rng)
        params = {name: prior.prior[name].values[0, 0] for name in prior.prior.data_vars}
        simulated = design.simulate(rng, data, params)
        with design.build(simulated):
            trace = pm.sample(draws=settings.draws, tune=settings.tune, chains=settings.chains,
                              random_seed=rng, progressbar=False, compute_convergence_checks=False)
        draws = trace.posterior["spread"].values.ravel()
        thinned = draws[np.linspace(0, draws.size - 1, DEFAULT_RANKS).astype(int)]
        _ = int(np.sum(thinned < params["spread"]))
    return (time.perf_counter() - start) / sims


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sims", type=int, default=50, help="replicates of run_calibration")
    parser.add_argument("--naive", type=int, default=None,
                        help="replicates of the naive loop (default: --sims)")
    parser.add_argument("--large", type=int, default=1000,
                        help="replicates of the throughput run (0 skips it)")
    parser.add_argument("--workers", type=int, default=None,
                        help="default: the default executor (this process first, helpers when they pay)")
    parser.add_argument("--pool", type=int, default=2,
                        help="also time this many worker processes side by side (0 skips it)")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    warnings.simplefilter("ignore")

    recipe = registry.load().get("threshold-geometry")
    design = make_design(recipe, OPTIONS, {})
    data = recipe.validate(TABLE, design.options)
    cores = os.cpu_count()
    print(f"threshold-geometry, {data.rows} distances; {CALIBRATION_SETTINGS.chains} chains x "
          f"{CALIBRATION_SETTINGS.draws} draws after {CALIBRATION_SETTINGS.tune} tuning steps; "
          f"L = {DEFAULT_RANKS}; {cores} cores")

    naive_sims = args.naive or args.sims
    naive = naive_loop(design, data, naive_sims, args.seed)
    print(f"naive loop (build + pm.sample per replicate): {naive:.2f} s per replicate "
          f"over {naive_sims}")

    start = time.perf_counter()
    result = run_calibration(design, data, args.sims, args.seed, workers=args.workers, quiet=True)
    small = time.perf_counter() - start
    fast = small / args.sims
    how = f"{args.workers} workers" if args.workers else "default executor"
    print(f"run_calibration ({how}, compiling included): {fast:.3f} s per replicate over "
          f"{args.sims} ({len(result.failures)} failed)")
    print(f"ratio naive / run_calibration: {naive / fast:.1f}")

    if args.pool:
        start = time.perf_counter()
        pooled = run_calibration(design, data, args.sims, args.seed, workers=args.pool, quiet=True)
        each = (time.perf_counter() - start) / args.sims
        same = pooled.records == result.records
        print(f"run_calibration on {args.pool} worker processes (each imports and compiles): "
              f"{each:.3f} s per replicate over {args.sims}; ratio {naive / each:.1f}; "
              f"replicates {'identical' if same else 'DIFFERENT'}")

    if args.large > args.sims:
        # The model compiled for the first run is reused: this is the cost per replicate.
        start = time.perf_counter()
        big = run_calibration(design, data, args.large, args.seed + 1, workers=args.workers,
                              quiet=True)
        seconds = time.perf_counter() - start
        print(f"{args.large} replicates (model already compiled): {seconds:.0f} s, "
              f"{args.large / seconds:.1f} replicates per second ({len(big.failures)} failed)")


if __name__ == "__main__":
    main()
