"""Where independent fits run: this process, or helper processes when they pay.

A check with two or more relaxed models starts one helper before its base
fit (:data:`EARLY_HELPER_FITS`, :class:`workbench.harness.EarlyHelper`): on
the light compile path this process samples on one core, so the helper's
start-up costs nothing but the other core.

Otherwise one rule decides, for relaxations and calibration alike: a helper process
spends seconds of a core importing PyMC and compiling before its first fit,
so helpers are started only when the work they would take off this process
is worth more than their start-up. Helpers are spawned (not forked: the
parent may already run sampler threads) without re-importing the user's
script, so a script or notebook with no ``if __name__ == "__main__":`` guard
works as written.
"""

from __future__ import annotations

import os
import sys
from concurrent.futures import ProcessPoolExecutor
from contextlib import contextmanager
from multiprocessing import get_context
from typing import Iterator

# Seconds a fresh helper process spends importing PyMC, nutpie and the
# workbench before it can compile (measured 3.3-4.4 s on 2 busy cores;
# rounded up for the unpickling of the table and the design).
HELPER_START_SECONDS = 6.0
# A model compiled after another in the same process costs about half the
# first compile (threshold-geometry demo: 5.8 s for the base model, 3.0-3.1 s
# for each relaxed model after it): the code generated for shared operations
# is reused.
WARM_COMPILE_SHARE = 0.5
# Calibration: the parent times its first replicates and starts helpers when
# the work left exceeds this many seconds. A helper spends about 10-20 s of a
# core importing and compiling before its first replicate
# (benchmarks/calibration_speed.py: 18 s for two on 2 cores), so helpers pay
# off only for work of at least twice that.
HELPERS_WORTH_SECONDS = 40.0


# A check starts one helper process before its base fit when it has at least
# this many relaxed models to fit: the helper imports while the base model
# compiles and samples (on the light path this process uses one core), then
# takes relaxed models off this process's queue.
EARLY_HELPER_FITS = 2


def warm_up() -> int:
    """Run in a fresh helper: import what a fit needs, so its first fit starts at once."""
    import nutpie  # noqa: F401
    import pymc  # noqa: F401

    from workbench import harness  # noqa: F401

    return os.getpid()


def cores() -> int:
    return os.cpu_count() or 1


def helpers_pay(seconds_left: float, workers: int) -> bool:
    """Whether ``workers`` processes beat this process alone on the work left."""
    return workers > 1 and seconds_left > HELPERS_WORTH_SECONDS


def fits_worth_helpers(fits: int, compile_seconds: float, sample_seconds: float, chains: int,
                       available: int | None = None) -> int:
    """How many processes to fit ``fits`` models of the given cost with (1: this one alone).

    ``compile_seconds`` and ``sample_seconds`` are what the base model cost
    in this process, its first compile. Here the fits run one after another,
    each compiling warm (:data:`WARM_COMPILE_SHARE`) and sampling its chains
    on every core. A helper starts cold (:data:`HELPER_START_SECONDS`, then a
    first compile at full cost); helpers compile side by side, and sample
    side by side only where the machine has cores for each helper's chains.
    """
    available = cores() if available is None else available
    workers = max(1, min(fits, available))
    if workers == 1:
        return 1
    sampling_speedup = max(1, min(workers, available // max(1, chains)))
    warm = WARM_COMPILE_SHARE * compile_seconds
    alone = fits * (warm + sample_seconds)
    per_helper = -(-fits // workers)
    helped = (HELPER_START_SECONDS + compile_seconds + (per_helper - 1) * warm
              + fits * sample_seconds / sampling_speedup)
    return workers if helped < alone else 1


@contextmanager
def user_script_hidden() -> Iterator[None]:
    """Start processes without re-running the ``__main__`` script in them.

    ``spawn`` imports the parent's main module in each child (by name or by
    file path); a user's script with no ``__main__`` guard would then run its
    whole check again in every child. The children here run workbench
    functions only, so the main module is hidden while they start.
    """
    main = sys.modules.get("__main__")
    if main is None:
        yield
        return
    saved = {name: main.__dict__[name] for name in ("__file__", "__spec__") if name in main.__dict__}
    main.__dict__.pop("__file__", None)
    main.__dict__["__spec__"] = None
    try:
        yield
    finally:
        main.__dict__.pop("__spec__", None)
        main.__dict__.update(saved)


def spawn_context():
    """The multiprocessing context every helper process is started from."""
    return get_context("spawn")


def process_pool(workers: int) -> ProcessPoolExecutor:
    """A pool of spawned helpers that end when this process dies.

    Submit to it with :func:`user_script_hidden` active: helpers start on
    the first submits.
    """
    from workbench.orphans import exit_with_parent

    return ProcessPoolExecutor(workers, mp_context=spawn_context(), initializer=exit_with_parent,
                               initargs=(os.getpid(),))
