"""Two ways to hand a PyMC model to nutpie, and the rule that picks one.

nutpie's own compile (``nutpie.compile_pymc_model``) wraps the model's
log-density and its deterministic expansion in numba C callbacks. The chains
then run on every core without Python in the loop, but the wrappers hold data
of the running process and numba cannot cache them: every process compiles
them again, about 6-8 s for a small model on this project's 2-core reference
machine (profiled by wrapping ``numba.cfunc``: the PyTensor functions inside
take 0.6 s of the 7.5 s, because PyTensor's numba file cache already holds
them).

The *light* path keeps PyTensor's numba functions, which its file cache
serves after the first run, and gives them to nutpie as Python callables
(nutpie's ``from_pyfunc``, the route its JAX backend takes). It compiles in
about 1-2 s, and each log-density call pays a few microseconds of Python and
holds the interpreter lock, so the chains take turns on one core.

:func:`choose` takes the native path when the expected number of fits on the
compiled model, times the sampling time it saves, outweighs the wrappers'
compile time; else the light path. One short timing of the log-density at
the starting point decides. Both paths evaluate the same log-density from the
same starting points and seeds, so the draws are the same
(``tests/test_compiling.py`` checks it).
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

# Seconds nutpie spends compiling its two C wrappers around a small model
# (measured: 6.8-7.7 s for the threshold-geometry demo, 7-9 s for the
# timing-curve demo, with other work on the machine; `benchmarks/check_latency.py`).
NATIVE_WRAP_SECONDS = 6.0
# Log-density evaluations per draw: NUTS takes 2^depth - 1 leapfrog steps; a
# well-adapted small model sits at depth 2-4 (3-15 steps), so 10 is a central
# value (Hoffman and Gelman 2014 on the tree; measured 5-12 on the demos'
# sample_stats n_steps).
STEPS_PER_DRAW = 10
# Python's share of each light call: nutpie's callback, argument conversion
# and the numba dispatcher (measured 3-10 us per call on the demos).
LIGHT_CALL_SECONDS = 8e-6
# One log-density call is timed in batches of this many calls, and the
# fastest batch counts: a busy machine only ever slows a batch down (the
# `timeit` module's advice to read the minimum).
TIMING_CALLS = 10
TIMING_BATCHES = 7


@dataclass
class Compiled:
    """A model nutpie can sample, its data container names and how it was made."""

    model: Any  # the nutpie model
    path: str  # "native" or "light"
    data_names: frozenset[str]  # containers the log-density reads
    seconds: float


def _light_parts(model, initial_points):
    """PyTensor's numba functions of ``model`` and nutpie's helpers around them."""
    from nutpie import compile_pymc as nutpie_pymc
    from pymc.initial_point import make_initial_point_fn

    jitter = set(model.free_RVs)
    start = make_initial_point_fn(model=model, overrides=initial_points, default_strategy="support_point",
                                  jitter_rvs=jitter, return_transformed=True)
    start = nutpie_pymc._wrap_with_lock(start)
    (n_dim, _, logp_fn, expand_fn, initial_point_fn, shape_info,
     reparameterized) = nutpie_pymc._make_functions(
        model, mode="NUMBA", compute_grad=True, join_expanded=False,
        pymc_initial_point_fn=start, var_names=None)
    return nutpie_pymc, n_dim, logp_fn, expand_fn, initial_point_fn, shape_info, reparameterized


def light(model, initial_points=None) -> tuple[Compiled, Callable[[], float]]:
    """The light nutpie model, and a function timing one log-density call."""
    from nutpie.compiled_pyfunc import from_pyfunc

    began = time.perf_counter()
    (nutpie_pymc, n_dim, logp_pt, expand_pt, initial_point_fn, shape_info,
     reparameterized) = _light_parts(model, initial_points)
    logp_jit, expand_jit = logp_pt.vm.jit_fn, expand_pt.vm.jit_fn
    logp_names = [var.name for var in logp_pt.get_shared()]
    expand_names = [var.name for var in expand_pt.get_shared()]
    shared = {var.name: np.asarray(var.get_value())
              for var in (*logp_pt.get_shared(), *expand_pt.get_shared())}
    names, _, shapes = shape_info
    dtypes = [np.dtype("float64")] * len(names)

    def make_logp():
        def logp(x, **data):
            value, grad = logp_jit(x, *[data[name] for name in logp_names])
            return float(value), np.asarray(grad, dtype="float64", order="C")
        return logp

    def make_expand(seed1, seed2, chain):
        def expand(x, **data):
            values = expand_jit(x, *[data[name] for name in expand_names])
            return {name: np.asarray(value, dtype=dtype, order="C").reshape(shape)
                    for name, value, dtype, shape in zip(names, values, dtypes, shapes, strict=True)}
        return expand

    dims, coords = nutpie_pymc._prepare_dims_and_coords(model, shape_info, reparameterized)
    compiled = from_pyfunc(
        ndim=n_dim, make_logp_fn=make_logp, make_expand_fn=make_expand,
        make_initial_point_fn=initial_point_fn, expanded_dtypes=dtypes,
        expanded_shapes=shapes, expanded_names=names, shared_data=shared,
        dims=dims, coords=coords, reparameterized_names=reparameterized)
    # The first call compiles (or loads from PyTensor's cache) the functions.
    point = np.asarray(initial_point_fn(0), dtype="float64")
    logp = make_logp()
    logp(point, **shared)
    seconds = time.perf_counter() - began

    def per_call() -> float:
        fastest = float("inf")
        for _ in range(TIMING_BATCHES):
            start = time.perf_counter()
            for _ in range(TIMING_CALLS):
                logp(point, **shared)
            fastest = min(fastest, (time.perf_counter() - start) / TIMING_CALLS)
        return fastest

    return Compiled(compiled, "light", frozenset(logp_names) | frozenset(expand_names), seconds), per_call


def native(model, initial_points=None) -> Compiled:
    """nutpie's own compile: C callbacks, chains on every core."""
    import nutpie

    began = time.perf_counter()
    compiled = nutpie.compile_pymc_model(model, initial_points=initial_points)
    names = frozenset(var.name for var in compiled.shared_var_keys)
    return Compiled(compiled, "native", names, time.perf_counter() - began)


def native_pays(call_seconds: float, fits: int, draws_per_chain: int, chains: int, cores: int) -> bool:
    """Whether the native wrappers save more sampling time than they cost to compile.

    Light chains take turns on one core and pay Python on every call; native
    chains share ``cores`` cores.
    """
    calls = fits * chains * draws_per_chain * STEPS_PER_DRAW
    light_seconds = calls * (call_seconds + LIGHT_CALL_SECONDS)
    native_seconds = calls * call_seconds / max(1, min(cores, chains))
    return light_seconds - native_seconds > NATIVE_WRAP_SECONDS


def choose(model, initial_points=None, fits: int = 1, draws_per_chain: int = 2000,
           chains: int = 4, cores: int = 1) -> Compiled:
    """Compile ``model`` the way that finishes ``fits`` fits soonest (see the module text)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            compiled, per_call = light(model, initial_points)
        except (AttributeError, ImportError, TypeError, ValueError):
            # nutpie's helpers are not public: a version that moved them
            # still gets the native path.
            return native(model, initial_points)
        if native_pays(per_call(), fits, draws_per_chain, chains, cores):
            return native(model, initial_points)
    return compiled
