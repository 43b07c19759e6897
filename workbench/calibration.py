"""Simulation-based calibration (SBC): does the model as coded tell its own story?

For each replicate: draw parameters from the model's prior, simulate outcomes
for the same design (distances, cohort sizes) with the recipe's independent
NumPy simulator, refit the model to the simulated outcomes, and rank each
generating value among ``L`` near-independent posterior draws. When the
PyMC model encodes the same story as the simulator and the sampler is
faithful, every rank is uniform on ``0..L``; a model that codes a variance
where the story has a standard deviation gives ranks piled at the ends.

Speed comes from compiling once: every process compiles the model, the prior
draw and the log-likelihood once and reuses them for all its replicates
(only the outcome data containers change). Replicates run in local worker
processes or on a Dask distributed cluster; each replicate's seeds derive
from ``(seed, replicate index)`` alone, so results are identical whatever
the executor. Finished replicates are appended to a checkpoint (JSON lines)
in the run folder; rerunning the same call continues where it stopped.

Ranks are taken among ``L`` draws spread evenly over the pooled chains; the
default settings give about 2.5 L effective draws, and a fit whose ESS falls
below ``L`` is rerun once with more draws. Fits that fail or diverge are
recorded with their reason and left out of the ranks; they never stop the
run. A design without a simulator (``design.simulate is None``) is
calibrated against the model's own prior predictive, which checks the
sampler but not the model code; the result says so.

Public API
----------
run_calibration(design, data, sims, seed, *, workers=None, cluster=None,
                folder=None, settings=None, quiet=False, ranks=99) -> CalibrationResult
load_calibration(folder, sims=None) -> CalibrationResult
replicate_seeds(seed, index) -> the seeds of one replicate

References
----------
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
Validating Bayesian inference algorithms with simulation-based calibration.
arXiv:1804.06788.
Modrák, M., Moon, A. H., Kim, S., Bürkner, P., Huurre, N., Faltejsková, K.,
Gelman, A. and Vehtari, A. (2023). Simulation-based calibration checking for
Bayesian computation: the choice of test quantities shapes sensitivity.
Bayesian Analysis (the log-likelihood as a derived test quantity).
Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
discrete uniformity and its applications in goodness-of-fit evaluation and
multiple sample comparison. Statistics and Computing 32, 32.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import threading
import time
import uuid
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Iterable, Iterator

import numpy as np

from workbench import executor
from workbench.engine import Settings
from workbench.errors import ModelFileError, OptionError, OutputError, WorkbenchError
from workbench.progress import Progress
from workbench.uniformity import UniformityTest, rank_uniformity

# Ranks are taken among L = 99 thinned draws: L + 1 = 100 has many divisors,
# so the ECDF test and the rank histogram get exact equal-width bins.
DEFAULT_RANKS = 99
# Two chains of 300 draws after 300 tuning steps: on the reference recipe the
# bulk ESS is about 0.4 per draw, so 600 draws give ~2.5 L effective draws
# and thinning to L leaves them near-independent (measured over 100 prior draws).
CALIBRATION_SETTINGS = Settings(draws=300, tune=300, chains=2, cores=1)
# A fit whose bulk ESS falls below L is run once more with this many times
# the draws; autocorrelated draws would pile ranks at the ends (Talts et al.
# 2018, sec. 4.1) and look like a coding error.
ESS_RETRY_FACTOR = 4
# A replicate whose worker process dies this many times is recorded as
# failed instead of being retried again (a replicate that kills its worker
# every time must not stall the run).
MAX_WORKER_LOSSES = 3
# With the default number of workers the parent process starts alone (it
# compiles once and runs replicates at once) and starts helper processes only
# when the work it measured left for itself is worth it
# (workbench.executor.helpers_pay).
# Replicates the parent times (after the first, which includes compiling)
# before it decides whether to start helpers; it decides earlier once this
# many seconds have passed.
TIMED_REPLICATES = 3
TIMING_SECONDS = 2.0
# Name of the derived test quantity (Modrák et al. 2023).
LOG_LIKELIHOOD = "log_likelihood"
CHECKPOINT = "calibration.jsonl"
FORMAT = "workbench.calibration/1"
# Where the replicates' generating values come from.
SIMULATOR_RECIPE = "recipe"  # the recipe's independent simulator: checks the model code
SIMULATOR_MODEL = "model"  # the model's own prior predictive: checks the sampler only


# --- result -------------------------------------------------------------------


@dataclass
class CalibrationResult:
    """Ranks of every replicate and the uniformity test of each quantity.

    Attributes
    ----------
    sims : int
        Replicates asked for.
    L : int
        Posterior draws each rank is taken among (ranks lie in ``0..L``).
    ranks : dict of str to ndarray
        One rank per successful replicate for each quantity: every scalar
        parameter element (``spread``, ``offset[2]``) and ``log_likelihood``.
    tests : dict of str to UniformityTest
        The uniformity test of each quantity's ranks.
    replicates : list of int
        Indices of the successful replicates, in the order of ``ranks``.
    failures : list of dict
        ``{"index": int, "reason": str}`` for each replicate whose simulation
        or fit failed, diverged or whose worker died.
    simulator : str
        ``"recipe"`` (independent simulator: checks the model code) or
        ``"model"`` (the model's own prior predictive: checks the sampler only).
    records : dict of int to dict
        The checkpoint record of every finished replicate.
    """

    sims: int
    L: int
    ranks: dict[str, np.ndarray]
    tests: dict[str, UniformityTest]
    replicates: list[int]
    failures: list[dict]
    simulator: str = SIMULATOR_RECIPE
    records: dict[int, dict] = field(default_factory=dict, repr=False)
    seconds: float = 0.0
    folder: str | None = None

    @property
    def parameters(self) -> dict[str, dict]:
        """Each quantity's test as a plain dict (``p_value`` first)."""
        return {name: test.to_dict() for name, test in self.tests.items()}

    @property
    def checks_model_code(self) -> bool:
        """True when outcomes came from an independent simulator."""
        return self.simulator == SIMULATOR_RECIPE

    @property
    def low_ess(self) -> int:
        """Successful replicates whose ESS stayed below L even after the retry."""
        return sum(1 for i in self.replicates if self.records[i].get("min_ess", np.inf) < self.L)

    def to_dict(self) -> dict:
        """The ``calibration`` section of summary.json."""
        return {
            "sims": self.sims,
            "parameters": self.parameters,
            "L": self.L,
            "completed": len(self.replicates),
            "failed": len(self.failures),
            "failures": list(self.failures),
            "low_ess": self.low_ess,
            "simulator": self.simulator,
            "checks": "model code" if self.checks_model_code else "sampler only",
            "ranks": {name: [int(r) for r in values] for name, values in self.ranks.items()},
            "replicates": list(self.replicates),
            "seconds": self.seconds,
        }


# --- seeds and fingerprints -----------------------------------------------------


def replicate_seeds(seed: int, index: int) -> dict[str, int]:
    """Seeds of one replicate, from ``(seed, index)`` alone (never from the worker).

    Returns integer seeds for the prior draw, the simulation, the fit, the
    fit's retry and the thinning.
    """
    state = np.random.SeedSequence(int(seed), spawn_key=(int(index),)).generate_state(5)
    names = ("prior", "simulate", "fit", "refit", "thin")
    return {name: int(value) for name, value in zip(names, state)}


def _data_digest(data) -> str:
    digest = hashlib.sha256()
    columns = getattr(data, "columns", None)
    if isinstance(columns, dict):
        for name in sorted(columns):
            values = np.ascontiguousarray(columns[name])
            digest.update(f"{name}:{values.dtype.str}:{values.shape};".encode())
            digest.update(values.tobytes())
        digest.update(json.dumps(getattr(data, "labels", {}), sort_keys=True, default=str).encode())
    elif hasattr(data, "to_numpy") and hasattr(data, "columns"):
        import pandas as pd

        digest.update(",".join(map(str, data.columns)).encode())
        digest.update(pd.util.hash_pandas_object(data, index=True).values.tobytes())
    else:
        digest.update(pickle.dumps(data))
    return digest.hexdigest()


def _design_label(design) -> str:
    label = getattr(design, "label", None)
    return label() if callable(label) else str(getattr(design, "name", type(design).__name__))


def _has_simulator(design) -> bool:
    if getattr(design, "simulate", None) is None:
        return False
    recipe = getattr(design, "recipe", None)
    return recipe is None or getattr(recipe, "simulate", None) is not None


# --- one compiled model per process -----------------------------------------------


@dataclass(frozen=True)
class _Job:
    """What a worker needs to run any replicate of one calibration."""

    model_key: str
    design: Any
    data: Any
    seed: int
    settings: Settings  # per fit; its cores are this process's share
    L: int
    simulator: str


class _Compiled:
    """One model compiled once per process: the sampler, and, compiled on first
    use, the prior draw and the log-likelihood of each simulator mode."""

    def __init__(self, design, data):
        from workbench.engine import Sampler

        self.model = design.build(data)
        # Many refits of one compiled model: nutpie's native wrappers pay.
        self.sampler = Sampler(self.model, fits=None)
        self.free = [rv.name for rv in self.model.free_RVs]
        # Each element's label by the model's coordinates (move_effect[larva>spat, temp_c]).
        self.dims = {name: self.model.named_vars_to_dims.get(name) for name in self.free}
        self.coords = {dim: list(values) for dim, values in self.model.coords.items() if values is not None}
        self._draws: dict[str, tuple] = {}
        self._logliks: dict[tuple, tuple] = {}
        self.lock = threading.Lock()

    def prior_draw(self, simulator: str):
        """(function, its random generators, output names, outcome containers)."""
        if simulator not in self._draws:
            from pymc.pytensorf import compile as compile_graph

            model = self.model
            outputs = list(model.free_RVs) + list(model.deterministics)
            outcomes = {}
            if simulator == SIMULATOR_MODEL:
                outcomes = _outcome_containers(model, self.sampler.data_names)
                outputs += [model[name] for name in outcomes]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fn, updates = compile_graph([], outputs, random_seed=False, return_updates=True)
            self._draws[simulator] = (fn, list(updates), [v.name for v in outputs], outcomes)
        return self._draws[simulator]

    def loglik(self, containers: tuple[str, ...]):
        """(function, input dtypes) of the observed log-likelihood for these containers."""
        if containers not in self._logliks:
            self._logliks[containers] = _loglik_function(self.model, self.free, list(containers))
        return self._logliks[containers]

    def replicate(self, job: _Job, index: int) -> dict:
        """Simulate, refit and rank one replicate; failures become a reason."""
        from pymc.pytensorf import reseed_rngs

        seeds = replicate_seeds(job.seed, index)
        record: dict[str, Any] = {"index": index, "failed": None}
        draw, rngs, names, outcomes = self.prior_draw(job.simulator)
        reseed_rngs(rngs, seeds["prior"])
        drawn = dict(zip(names, draw()))
        truth = {name: np.asarray(drawn[name]) for name in self.free}
        try:
            if job.simulator == SIMULATOR_RECIPE:
                simulated = job.design.simulate(np.random.default_rng(seeds["simulate"]), job.data,
                                                drawn)
                observed = {k: np.asarray(v) for k, v in job.design.observed(simulated).items()}
                # A story that draws its own parameters (a model file's simulate) ranks those.
                if getattr(simulated, "truth", None) is not None:
                    truth = {name: np.asarray(simulated.truth[name], dtype=float)
                             for name in self.free}
            else:
                observed = {container: np.asarray(drawn[rv]) for rv, container in outcomes.items()}
        except Exception as err:  # the user's simulator: record, never abort the run
            record["failed"] = f"simulation failed: {type(err).__name__}: {err}"
            return _with_truth(record, truth)
        settings = job.settings
        for fit_seed in (seeds["fit"], seeds["refit"]):
            try:
                posterior, divergences = _sample_arrays(self.sampler, fit_seed, settings, observed,
                                                        self.free)
            except Exception as err:  # a sampler error is a failed replicate
                record["failed"] = f"fit failed: {type(err).__name__}: {err}"
                return _with_truth(record, truth)
            if not all(np.isfinite(v).all() for v in posterior.values()):
                record["failed"] = "fit failed: non-finite posterior draws"
                return _with_truth(record, truth)
            min_ess = _min_ess(posterior)
            if min_ess >= job.L or fit_seed == seeds["refit"]:
                break
            settings = replace(settings, draws=settings.draws * ESS_RETRY_FACTOR)
        rng = np.random.default_rng(seeds["thin"])
        total = settings.chains * settings.draws
        # L evenly spaced draws across the pooled chains, from a random offset.
        positions = (rng.uniform(0, total / job.L) + np.arange(job.L) * total / job.L).astype(int)
        ranks = {}
        thinned = {}
        for name in self.free:
            pooled = posterior[name].reshape((total,) + posterior[name].shape[2:])[positions]
            thinned[name] = pooled
            for label, true, draws in _elements(name, truth[name], pooled, self.dims[name], self.coords):
                ranks[label] = _rank(true, draws, rng)
        containers = tuple(observed)
        true_ll = self._loglik(containers, [truth[n] for n in self.free], observed)
        draws_ll = np.array([self._loglik(containers, [thinned[n][k] for n in self.free], observed)
                             for k in range(job.L)])
        ranks[LOG_LIKELIHOOD] = _rank(true_ll, draws_ll, rng)
        record.update(ranks=ranks, divergences=divergences, min_ess=round(float(min_ess), 2),
                      draws=total)
        if divergences:
            record["failed"] = f"{divergences} divergent transitions"
            _with_truth(record, truth)
        return record

    def _loglik(self, containers, values, observed) -> float:
        fn, dtypes = self.loglik(containers)
        args = [np.asarray(v, dtype=d) for v, d in zip(values, dtypes)]
        args += [np.asarray(observed[c], dtype=d) for c, d in zip(containers, dtypes[len(values):])]
        value = float(fn(*args))
        return value if not np.isnan(value) else -np.inf


# Generating values kept with a failed replicate, per parameter: enough
# elements to see where in the prior the fits fail, few enough for a line.
TRUTH_ELEMENTS = 6


def _with_truth(record: dict, truth: dict) -> dict:
    """Keep the generating values of a failed replicate (the report lists them)."""
    record["truth"] = {name: [round(float(x), 6) for x in np.ravel(value)[:TRUTH_ELEMENTS]]
                       for name, value in truth.items()}
    return record


def _sample_arrays(sampler, seed: int, settings: Settings, observed, names):
    """Posterior draws ``(chain, draw, *shape)`` of ``names`` and the number of
    divergent transitions, for new observed data on the compiled model.

    Reads nutpie's raw trace: for a small model, building the DataTree costs
    about five times the sampling itself, and calibration needs only arrays.
    The draws are the same as :meth:`workbench.engine.Sampler.run` gives.
    """
    import nutpie
    import pyarrow

    from workbench.engine import containers_set

    compiled = sampler.with_data(observed)
    with warnings.catch_warnings(), containers_set(sampler.model, observed):
        warnings.simplefilter("ignore")
        raw = nutpie.sample(compiled, draws=settings.draws, tune=settings.tune,
                            chains=settings.chains, cores=min(settings.cores, settings.chains),
                            target_accept=settings.target_accept,
                            seed=seed, progress_bar=False, save_warmup=False,
                            return_raw_trace=True)
    draw_batches, stat_batches = raw.get_arrow_trace()
    chains: dict[str, list] = {name: [] for name in names}
    divergences = 0

    def column(batch, name) -> np.ndarray:
        return pyarrow.array(batch.column(name)).to_numpy(zero_copy_only=False)

    for draws, stats in zip(draw_batches, stat_batches):
        kept = ~column(stats, "tuning").astype(bool)
        divergences += int(column(stats, "diverging")[kept].sum())
        for name in names:
            values = draws.column(name)
            shape = values.field.metadata.get(b"shape", b"").decode()
            shape = tuple(int(n) for n in shape.split(",") if n)
            flat = pyarrow.array(values)
            if hasattr(flat, "flatten"):  # vector variables come as one list per draw
                flat = flat.flatten()
            flat = flat.to_numpy(zero_copy_only=False)
            chains[name].append(flat.reshape((draws.num_rows,) + shape)[kept])
    return {name: np.stack(found) for name, found in chains.items()}, divergences


def _outcome_containers(model, data_names) -> dict[str, str]:
    """Observed variable name -> the pm.Data container holding its values."""
    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.traversal import graph_inputs

    found = {}
    for rv in model.observed_RVs:
        value = model.rvs_to_values[rv]
        shared = [v for v in graph_inputs([value])
                  if isinstance(v, SharedVariable) and v.name in data_names]
        if len(shared) != 1:
            raise ModelFileError(
                f"calibration without a simulator needs each observed variable's values in one "
                f"pm.Data container; observed variable '{rv.name}' has {len(shared)}"
            )
        found[rv.name] = shared[0].name
    return found


def _loglik_function(model, free: list[str], containers: list[str]):
    """Compiled log-likelihood of the observed variables at constrained parameter
    values, with the outcome containers as explicit inputs."""
    from pymc.model.transform.conditioning import remove_value_transforms
    from pymc.pytensorf import compile as compile_graph

    plain = remove_value_transforms(model)
    values = [plain.rvs_to_values[plain[name]] for name in free]
    shared = [plain[name] for name in containers]
    inputs = [s.type() for s in shared]
    logp = plain.logp(vars=plain.observed_RVs, sum=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fn = compile_graph(values + inputs, logp, givens=list(zip(shared, inputs)),
                           on_unused_input="ignore")
    return fn, [v.type.dtype for v in values + inputs]


def _min_ess(posterior: dict[str, np.ndarray]) -> float:
    from arviz_stats.base import array_stats

    lowest = np.inf
    for values in posterior.values():
        ess = array_stats.ess(values, chain_axis=0, draw_axis=1, method="bulk")
        lowest = min(lowest, float(np.nanmin(np.asarray(ess))) if np.size(ess) else np.inf)
    return lowest


def _elements(name: str, truth: np.ndarray, draws: np.ndarray, dims=None, coords=None):
    """(label, true value, draws) for each scalar element: ``name`` or ``name[a, b]``.

    Elements are labelled by the model's coordinates where ``dims`` and
    ``coords`` give them, else by position.
    """
    from workbench.estimates import labels_by_coords

    if truth.ndim == 0:
        yield name, float(truth), draws
        return
    labels = labels_by_coords(name, dims, coords or {}, truth.shape)
    for label, idx in zip(labels, np.ndindex(truth.shape)):
        yield label, float(truth[idx]), draws[(slice(None),) + idx]


def _rank(true: float, draws: np.ndarray, rng: np.random.Generator) -> int:
    """Draws below the true value; ties split at random (a uniform rank under the null)."""
    below = int(np.sum(draws < true))
    ties = int(np.sum(draws == true))
    return below + (int(rng.integers(0, ties + 1)) if ties else 0)


_COMPILED: dict[str, _Compiled] = {}
_COMPILED_LOCK = threading.Lock()


def _compiled_for(job: _Job) -> _Compiled:
    """This process's compiled model for the job (compiled on first use)."""
    with _COMPILED_LOCK:
        kit = _COMPILED.get(job.model_key)
        if kit is None:
            kit = _COMPILED[job.model_key] = _Compiled(job.design, job.data)
        return kit


def _replicate_task(job: _Job, index: int) -> dict:
    """Run one replicate in this process (the unit of work of every executor)."""
    kit = _compiled_for(job)
    # One replicate at a time per compiled model: its random generators are
    # reseeded per replicate and must not be shared between threads.
    with kit.lock:
        return kit.replicate(job, index)


# --- executors ---------------------------------------------------------------------


def _in_process(job: _Job, todo: list[int]) -> Iterator[dict]:
    for index in todo:
        yield _replicate_task(job, index)


def _parent_first(job: _Job, todo: list[int], workers: int) -> Iterator[dict]:
    """The parent runs replicates itself and starts helpers when they pay off.

    The parent compiles once and starts at once, with every core for its
    chains; after timing a few replicates it hands the rest to ``workers - 1``
    helper processes and keeps working beside them when the remaining work
    exceeds :data:`workbench.executor.HELPERS_WORTH_SECONDS`, and otherwise finishes alone. A short
    calibration thus never waits for processes to start.
    """
    cores = os.cpu_count() or 1
    alone = replace(job, settings=replace(job.settings, cores=max(1, min(job.settings.chains, cores))))
    pending = list(todo)
    yield _replicate_task(alone, pending.pop(0))  # pays for compiling
    timed, started = 0, time.perf_counter()
    while pending and timed < TIMED_REPLICATES and time.perf_counter() - started < TIMING_SECONDS:
        yield _replicate_task(alone, pending.pop(0))
        timed += 1
    if not pending:
        return
    each = (time.perf_counter() - started) / max(timed, 1)
    if executor.helpers_pay(each * len(pending), workers):
        # run_calibration already gave ``job`` one core per process for several workers.
        yield from _local_pool(job, pending, workers - 1, parent_works=True)
    else:
        yield from _in_process(alone, pending)


def _worker_main(conn, job: _Job) -> None:
    """A local worker process: compile, say so, then run the replicate indices
    it is sent, one at a time."""
    import signal

    # Ctrl-C is the parent's to handle: it keeps the checkpoint consistent
    # and stops the workers.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    warnings.simplefilter("ignore")
    try:
        _compiled_for(job)
        conn.send(("ready", None))
        while True:
            index = conn.recv()
            if index is None:
                return
            conn.send(("record", _replicate_task(job, index)))
    except (EOFError, OSError):
        return  # the parent has gone
    except Exception as err:  # not a replicate failure: e.g. the model does not build
        try:
            conn.send(("error", err))
        except Exception:
            conn.send(("error", RuntimeError(f"{type(err).__name__}: {err}")))


def _lost(index: int, losses: int) -> dict:
    return {"index": index, "failed": f"worker process died {losses} times while running it"}


@dataclass
class _Worker:
    process: Any
    ready: bool = False
    index: int | None = None


def _local_pool(job: _Job, todo: list[int], workers: int, parent_works: bool = False) -> Iterator[dict]:
    """Replicates on local worker processes, each compiling the model once.

    A worker takes work once it has compiled, one replicate at a time, so
    when a worker process dies exactly its replicate is known: it is run
    again (on a survivor or a fresh worker; survivors keep their compiled
    model) or, after :data:`MAX_WORKER_LOSSES` deaths, recorded as failed.
    With ``parent_works`` this process runs replicates too, one between
    each look at the workers.
    """
    from collections import deque
    from multiprocessing.connection import wait as wait_for

    context = executor.spawn_context()
    pending = deque(todo)
    losses: dict[int, int] = {}
    live: dict[Any, _Worker] = {}
    deaths = 0

    def start() -> None:
        parent, child = context.Pipe()
        process = context.Process(target=_worker_main, args=(child, job), daemon=True)
        with executor.user_script_hidden():
            process.start()
        child.close()
        live[parent] = _Worker(process)

    def hand_out(conn) -> None:
        if pending:
            live[conn].index = pending.popleft()
            conn.send(live[conn].index)

    try:
        for _ in range(min(workers, len(pending))):
            start()
        while pending or any(w.index is not None for w in live.values()):
            for conn in wait_for(list(live), timeout=0 if parent_works and pending else None):
                worker = live[conn]
                try:
                    kind, payload = conn.recv()
                except (EOFError, OSError):  # the worker process died
                    del live[conn]
                    conn.close()
                    worker.process.join(timeout=10)
                    deaths += 1
                    if deaths > MAX_WORKER_LOSSES * (workers + len(todo)):
                        raise WorkbenchError("calibration: worker processes keep dying; "
                                             "see the system log for killed processes") from None
                    index = worker.index
                    if index is not None:
                        losses[index] = losses.get(index, 0) + 1
                        if losses[index] >= MAX_WORKER_LOSSES:
                            yield _lost(index, losses[index])
                        else:
                            pending.appendleft(index)
                    if pending and len(live) < workers:
                        start()
                    continue
                if kind == "error":
                    raise payload
                if kind == "record":
                    worker.index = None
                    yield payload
                worker.ready = True
                hand_out(conn)
            if parent_works and pending:
                yield _replicate_task(job, pending.popleft())
    finally:
        _stop_workers(live)


def _stop_workers(live: dict) -> None:
    """End the worker processes this run started: idle ready workers are asked
    to stop, the others (compiling, or interrupted mid-replicate) terminated."""
    for conn, worker in live.items():
        if worker.ready and worker.index is None:
            try:
                conn.send(None)
            except OSError:
                pass
        elif worker.process.is_alive():
            worker.process.terminate()
    for conn, worker in live.items():
        worker.process.join(timeout=10)
        if worker.process.is_alive():
            worker.process.terminate()
            worker.process.join(timeout=10)
        conn.close()


def _dask_pool(job: _Job, todo: list[int], cluster) -> Iterator[dict]:
    """Replicates on a Dask distributed cluster (a scheduler address, a cluster or a Client).

    The scheduler reruns the tasks of a worker that dies; a replicate that
    outlives the scheduler's allowed failures is recorded as failed.
    """
    from distributed import Client, as_completed
    from distributed.scheduler import KilledWorker

    if isinstance(cluster, Client):
        client, own = cluster, False
    else:
        address = getattr(cluster, "scheduler_address", cluster)
        try:
            client = Client(address, timeout="20s", set_as_default=False)
        except (OSError, TimeoutError) as err:
            raise WorkbenchError(
                f"--cluster: cannot reach a Dask scheduler at {address!r} ({err})"
            ) from None
        own = True
    run = uuid.uuid4().hex[:8]
    futures = []
    try:
        index_of = {}
        for index in todo:
            future = client.submit(_replicate_task, job, index, key=f"calibration-{run}-{index}",
                                   pure=False)
            index_of[future.key] = index
            futures.append(future)
        for future in as_completed(futures, loop=client.loop):
            index = index_of[future.key]
            try:
                record = future.result()
            except KilledWorker:
                record = _lost(index, MAX_WORKER_LOSSES)
            yield record
    except BaseException:
        client.cancel(futures)
        raise
    finally:
        if own:
            client.close()


# --- checkpoint --------------------------------------------------------------------


class Checkpoint:
    """Finished replicates, one JSON line each, after a header line.

    Each line is written whole, flushed and synced before the next replicate
    is counted, so an interrupted run loses at most the line being written;
    a half-written last line is dropped when the run resumes.
    """

    def __init__(self, folder: str | os.PathLike, header: dict):
        self.path = Path(folder) / CHECKPOINT
        self.header = header
        self._file = None

    def open(self) -> dict[int, dict]:
        """Read finished replicates (refusing another run's file), then open for appending."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        records: dict[int, dict] = {}
        # A file without one whole line was cut while its header was written.
        if self.path.exists() and b"\n" in self.path.read_bytes():
            found, records, keep = read_checkpoint(self.path)
            _refuse_other_run(self.path, found, self.header)
            with open(self.path, "r+b") as f:
                f.truncate(keep)  # drop a half-written last line
            self._file = open(self.path, "a", encoding="utf-8")
        else:
            self._file = open(self.path, "w", encoding="utf-8")
            self._write(self.header)
        return records

    def append(self, record: dict) -> None:
        self._write(record)

    def _write(self, obj: dict) -> None:
        self._file.write(json.dumps(obj, separators=(",", ":"), allow_nan=True) + "\n")
        self._file.flush()
        os.fsync(self._file.fileno())

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None


def read_checkpoint(path) -> tuple[dict, dict[int, dict], int]:
    """(header, records by index, byte length of the whole lines) of a checkpoint."""
    raw = Path(path).read_bytes()
    keep = raw.rfind(b"\n") + 1
    lines = raw[:keep].splitlines()
    if not lines:
        raise OutputError(f"{path}: not a calibration checkpoint (no header line)")
    try:
        header = json.loads(lines[0])
    except ValueError:
        header = {}
    if header.get("format") != FORMAT:
        raise OutputError(f"{path}: not a calibration checkpoint (expected format {FORMAT})")
    records: dict[int, dict] = {}
    for line in lines[1:]:
        try:
            record = json.loads(line)
        except ValueError:
            continue  # only a torn write can leave a bad line; its replicate is redone
        records.setdefault(int(record["index"]), record)
    return header, records, keep


def _refuse_other_run(path: Path, found: dict, expected: dict) -> None:
    for key in ("design", "data", "seed", "settings", "L", "simulator"):
        if found.get(key) != expected.get(key):
            raise OutputError(
                f"{path} holds replicates of another calibration ({key}: found "
                f"{_short(found.get(key))}, this run has {_short(expected.get(key))}); "
                f"use another folder or delete the file"
            )


def _short(value) -> str:
    text = json.dumps(value, sort_keys=True) if not isinstance(value, str) else value
    return text if len(text) <= 40 else text[:16] + "…"


# --- summary -----------------------------------------------------------------------


def summarise(records: dict[int, dict], sims: int, L: int, simulator: str = SIMULATOR_RECIPE,
              seconds: float = 0.0, folder: str | None = None) -> CalibrationResult:
    """Build the result from finished replicate records (indices ``0..sims-1``).

    Replicates that failed are listed with their reason and left out of the
    ranks; the uniformity test runs on the rest.
    """
    finished = {i: r for i, r in records.items() if i < sims}
    ok = sorted(i for i, r in finished.items() if not r.get("failed"))
    failures = [{"index": i, "reason": finished[i]["failed"],
                 **({"truth": finished[i]["truth"]} if finished[i].get("truth") else {})}
                for i in sorted(finished) if finished[i].get("failed")]
    names: list[str] = list(finished[ok[0]]["ranks"]) if ok else []
    ranks = {name: np.array([finished[i]["ranks"][name] for i in ok], dtype=np.int64) for name in names}
    tests = {name: rank_uniformity(values, L) for name, values in ranks.items()}
    return CalibrationResult(sims, L, ranks, tests, ok, failures, simulator, finished, seconds, folder)


def load_calibration(folder, sims: int | None = None) -> CalibrationResult:
    """The result stored in a run folder's checkpoint, without running anything."""
    path = Path(folder) / CHECKPOINT
    if not path.exists():
        raise OutputError(f"{folder}: no calibration checkpoint ({CHECKPOINT}) found")
    header, records, _ = read_checkpoint(path)
    sims = sims if sims is not None else (max(records) + 1 if records else 0)
    return summarise(records, sims, header["L"], header.get("simulator", SIMULATOR_RECIPE),
                     folder=str(folder))


# --- the run -----------------------------------------------------------------------


def run_calibration(
    design,
    data,
    sims: int,
    seed: int,
    *,
    workers: int | None = None,
    cluster=None,
    folder=None,
    settings: Settings | None = None,
    quiet: bool = False,
    ranks: int = DEFAULT_RANKS,
) -> CalibrationResult:
    """Simulation-based calibration of a design on the data's covariates.

    Parameters
    ----------
    design : workbench.recipe.Design
        The model and its independent simulator. When ``design.simulate`` is
        None, outcomes come from the model's own prior predictive; the result
        then says it checks the sampler, not the model code.
    data : workbench.recipe.Dataset
        Supplies the design (distances, cohort sizes); outcomes are simulated.
    sims : int
        Number of replicates.
    seed : int
        Every replicate's seeds derive from ``(seed, replicate index)``.
    workers : int, optional
        Local worker processes; 1 runs in this process. By default this
        process starts alone and adds helpers up to the machine's cores when
        the work it measured is long enough to pay for their start-up
        (:data:`workbench.executor.HELPERS_WORTH_SECONDS`). Ignored when ``cluster`` is given.
    cluster : str or distributed cluster/Client, optional
        A Dask scheduler address (``"tcp://host:8786"``) to send replicates to.
    folder : path, optional
        Run folder for the checkpoint ``calibration.jsonl``; rerunning the
        same call continues there, never redoing a finished replicate.
    settings : workbench.engine.Settings, optional
        Draws, tuning steps and chains per fit (default
        :data:`CALIBRATION_SETTINGS`); ``chains * draws`` must be at least ``ranks + 1``.
    quiet : bool, default False
        No progress output.
    ranks : int, default 99
        L, the number of thinned posterior draws each true value is ranked among.

    Returns
    -------
    CalibrationResult

    Raises
    ------
    OptionError
        For a bad number of replicates or settings too small for ``ranks``.
    OutputError
        When ``folder`` holds the checkpoint of another calibration.

    References
    ----------
    Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
    Validating Bayesian inference algorithms with simulation-based
    calibration. arXiv:1804.06788.
    Modrák, M. et al. (2023). Simulation-based calibration checking for
    Bayesian computation: the choice of test quantities shapes sensitivity.
    Bayesian Analysis.
    """
    start = time.perf_counter()
    sims, L = int(sims), int(ranks)
    if sims < 1:
        raise OptionError(f"calibration: expected at least 1 replicate; found {sims}")
    if L < 2:
        raise OptionError(f"calibration: expected at least 2 ranked draws; found {L}")
    base = settings or CALIBRATION_SETTINGS
    if base.chains * base.draws < L + 1:
        raise OptionError(
            f"calibration: {base.chains} chains x {base.draws} draws cannot be thinned to "
            f"{L} near-independent draws; expected at least {L + 1} draws in all"
        )
    simulator = SIMULATOR_RECIPE if _has_simulator(design) else SIMULATOR_MODEL
    local = cluster is None
    chosen = workers is not None
    workers = max(1, int(workers if chosen else os.cpu_count() or 1)) if local else 0
    header = {
        "format": FORMAT,
        "design": _design_label(design),
        "data": _data_digest(data),
        "seed": int(seed),
        "settings": {"draws": base.draws, "tune": base.tune, "chains": base.chains,
                     "target_accept": base.target_accept},
        "L": L,
        "simulator": simulator,
    }
    # One compiled model serves both simulator modes of a design on these data.
    model_key = hashlib.sha256(json.dumps([header["design"], header["data"]]).encode()).hexdigest()
    # Chains share the cores left over by the other workers; the draws do not
    # depend on the thread count.
    cores = max(1, min(base.chains, (os.cpu_count() or 1) // workers)) if workers == 1 else 1
    job = _Job(model_key, design, data, int(seed), replace(base, cores=cores), L, simulator)

    checkpoint = Checkpoint(folder, header) if folder is not None else None
    records = checkpoint.open() if checkpoint else {}
    try:
        todo = [i for i in range(sims) if i not in records]
        if todo and (not local or workers > 1):
            if local and not chosen and _unportable(job):
                workers = 1  # helpers could not rebuild the design; this process does it all
            else:
                _check_portable(job)
        done = sum(1 for i in records if i < sims)
        failed = sum(1 for i, r in records.items() if i < sims and r.get("failed"))
        with Progress(sims, "calibration", quiet, done=done, failed=failed) as bar:
            if not todo:
                stream: Iterable[dict] = ()
            elif not local:
                stream = _dask_pool(job, todo, cluster)
            elif workers == 1 or len(todo) == 1:
                stream = _in_process(job, todo)
            elif not chosen:
                stream = _parent_first(job, todo, workers)
            else:
                stream = _local_pool(job, todo, min(workers, len(todo)))
            for record in stream:
                if checkpoint:
                    checkpoint.append(record)
                records[record["index"]] = record
                bar.advance(failed=int(bool(record.get("failed"))))
    finally:
        if checkpoint:
            checkpoint.close()
    return summarise(records, sims, L, simulator, time.perf_counter() - start,
                     str(folder) if folder is not None else None)


def _unportable(job: _Job) -> Exception | None:
    """Why the design cannot travel to another process (None when it can)."""
    try:
        pickle.loads(pickle.dumps(job))
    except Exception as err:
        return err
    return None


def _check_portable(job: _Job) -> None:
    """Fail early, with one line, when the design cannot travel to another process."""
    err = _unportable(job)
    if err is not None:
        raise OptionError(
            f"calibration on several processes needs a design that can be rebuilt from its "
            f"recipe file; found one that cannot ({type(err).__name__}: {err}); use workers=1"
        )
