"""One check run, start to end: fit, relax, check, judge.

Data flow is one way: dataset -> design -> fits -> findings -> verdicts. The
result object holds everything the writers need; writers compute nothing.
"""

from __future__ import annotations

import os
import platform
import sys
import threading
import time
import warnings
from collections import deque
from concurrent.futures import Future, as_completed
from dataclasses import dataclass, field
from datetime import datetime, timezone
from importlib import metadata
from typing import Any, Callable

from workbench import checks, engine, estimates, executor, interrupts, kfold, revisions, verdicts
from workbench.checks.computation import computation_summary
from workbench.findings import Finding
from workbench.progress import Progress

# Versions recorded in every manifest: the interpreter and each scientific
# dependency whose numbers could change a result.
VERSIONED = ("workbench", "pymc", "pytensor", "arviz", "arviz-base", "arviz-stats", "nutpie",
             "numpy", "scipy", "pandas", "xarray", "matplotlib")


def versions() -> dict[str, str]:
    found = {"python": platform.python_version()}
    for name in VERSIONED:
        try:
            found[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            pass
    return found


@dataclass
class DataInfo:
    path: str
    sha256: str
    rows: int


@dataclass
class CheckRun:
    """Everything one check produced."""

    design: Any
    data: Any
    data_info: DataInfo
    seed: int
    settings: engine.Settings
    fit: engine.Fit
    relaxed: dict[str, engine.Fit]
    findings: list[Finding]
    verdicts: list[verdicts.Verdict]
    extras: dict[str, Any]
    calibration: Any = None
    started: str = ""
    seconds: float = 0.0
    versions: dict[str, str] = field(default_factory=versions)
    # Exact refits where PSIS-LOO could not decide a relaxation (kfold.CrossValidation).
    refits: Any = None


# Compiled models of this process, by design, relaxation and data layout:
# refitting the same design to new outcomes (benchmarks, calibration-style
# loops, comparisons) swaps data instead of recompiling.
_COMPILED: dict[tuple, tuple[Any, engine.Sampler]] = {}


def _layout(model) -> tuple:
    """What a compiled model fixes besides the values of its data containers.

    The containers' shapes and every constant of its log-density and
    deterministics: a recipe may write covariates from the table (ages,
    cohort sizes) into the graph as constants, and a model compiled for one
    table must not serve another table of the same shape.
    """
    import hashlib

    import numpy as np
    from pytensor.graph.basic import Constant
    from pytensor.graph.traversal import ancestors

    digest = hashlib.sha256()
    for var in ancestors([model.logp(), *model.deterministics]):
        if isinstance(var, Constant):
            value = np.asarray(var.data)
            digest.update(f"{value.dtype}{value.shape}".encode())
            digest.update(value.tobytes())
    shapes = tuple(sorted((v.name, v.get_value().shape, str(v.get_value().dtype)) for v in model.data_vars))
    return shapes, digest.hexdigest()


def fit_design(design, data, seed: int, settings: engine.Settings, relaxation=None, **kwargs) -> engine.Fit:
    """Fit ``design`` (optionally relaxed) to ``data``, reusing a compiled model when one fits."""
    fresh = design.build(data, relaxation)
    key = (design.key(), getattr(relaxation, "parameter", None), _layout(fresh))
    if key not in _COMPILED:
        _COMPILED[key] = (fresh, engine.Sampler(fresh, settings=settings))
        return engine.fit(fresh, seed, settings, sampler=_COMPILED[key][1], **kwargs)
    model, sampler = _COMPILED[key]
    values = {v.name: v.get_value() for v in fresh.data_vars}
    return engine.fit(model, seed, settings, sampler=sampler, observed=values, **kwargs)


def _fit_relaxed(design, data, parameter: str, seed: int, settings: engine.Settings, fitter=None):
    """Fit one relaxed model (in a worker process or in this one); returns its DataTree."""
    warnings.simplefilter("ignore")
    relaxation = next(a.relaxation for a in design.assumptions
                      if a.relaxation and a.relaxation.parameter == parameter)
    # Posterior predictive draws let the checks ask whether another
    # assumption's statistic still looks wrong once this one is relaxed.
    result = (fitter or fit_design)(design, data, seed, settings, relaxation, prior=False)
    return result.idata, result.seconds


def relaxation_workers(fits: int, settings: engine.Settings, main: engine.Fit | None) -> int:
    """Processes for ``fits`` relaxed models by default: helpers only when they pay.

    A relaxed model costs about what the base model cost (one more
    parameter); the base fit's compile and sampling seconds feed the rule in
    :func:`workbench.executor.fits_worth_helpers`. A fit served from a cache
    measured nothing here, and its relaxations are likely cached too.
    """
    compile_seconds = getattr(getattr(main, "sampler", None), "compile_seconds", None)
    if compile_seconds is None:
        return 1
    # The fit's seconds count sampling and predictive draws, not compiling.
    return executor.fits_worth_helpers(fits, compile_seconds, main.seconds, settings.chains)


def relaxation_names(design, data) -> list[str]:
    """The relaxed models a check fits: declared, applying to the options, informed by the table."""
    return list(dict.fromkeys(a.relaxation.parameter for a in design.assumptions
                              if a.relaxation is not None and a.relaxation.applies_to(design.options)
                              and not a.uninformed(data)))


def fit_relaxations(design, data, seed: int, settings: engine.Settings, workers: int | None,
                    say: Callable[[str], None], fitter=None, progress: bool = False,
                    main: engine.Fit | None = None, helper=None) -> dict[str, engine.Fit]:
    """Fit every declared relaxation, in this process or in helper processes.

    ``workers=None`` chooses by :func:`relaxation_workers` from the base fit
    ``main``: on a small machine and a small model this process alone is the
    fast path, reusing its compiled models. ``workers=N`` asks for N
    processes (1: this one). Each expanded model is compiled once where it
    runs. Seeds derive from the run seed and the parameter name, so results
    do not depend on scheduling. ``progress`` counts finished models on
    standard error (a bar on a terminal, plain lines elsewhere). ``helper``
    is an :class:`EarlyHelper` started before the base fit: it shares the
    relaxed models with this process when the base fit left a core free.
    """
    names = relaxation_names(design, data)
    if not names:
        return {}
    seeds = engine.seed_stream(seed, *[f"relax:{n}" for n in names])
    if helper is not None and workers is None and helper.pays(main):
        say(f"fitting {len(names)} relaxed model(s) in this process and one helper")
        with Progress(len(names), "relaxed models", quiet=not progress) as bar:
            return helper.share(
                names,
                lambda n: _fit_relaxed(design, data, n, seeds[f"relax:{n}"], settings, fitter),
                lambda n: (_fit_relaxed, design, data, n, seeds[f"relax:{n}"], settings, fitter),
                bar.advance)
    if workers is None:
        workers = relaxation_workers(len(names), settings, main)
    workers = max(1, min(len(names), workers))
    if workers == 1:
        say(f"fitting {len(names)} relaxed model(s) in this process")
        out = {}
        with Progress(len(names), "relaxed models", quiet=not progress) as bar:
            for n in names:
                idata, seconds = _fit_relaxed(design, data, n, seeds[f"relax:{n}"], settings, fitter)
                out[n] = engine.Fit(idata, None, None, seconds, label=f"relaxed:{n}")
                bar.advance()
        return out
    say(f"fitting {len(names)} relaxed model(s) on {workers} process(es)")
    # Threads would share one interpreter lock and PyTensor's compile lock;
    # separate processes compile in parallel.
    done = {}
    with executor.process_pool(workers) as pool, \
            Progress(len(names), "relaxed models", quiet=not progress) as bar:
        with executor.user_script_hidden():
            futures = {pool.submit(_fit_relaxed, design, data, n, seeds[f"relax:{n}"], settings,
                                   fitter): n for n in names}
        for future in as_completed(futures):
            idata, seconds = future.result()
            n = futures[future]
            done[n] = engine.Fit(idata, None, None, seconds, label=f"relaxed:{n}")
            bar.advance()
    return {n: done[n] for n in names}


class EarlyHelper:
    """One helper process started before the base fit, sharing the relaxed models.

    On the light compile path (:mod:`workbench.compiling`) this process
    samples on one core; the helper imports on the other while the base
    model fits, then both take relaxed models from one queue, this process
    from the front and the helper from the back. Seeds belong to the models,
    so the results do not depend on who fitted what.
    """

    def __init__(self):
        self.pool = executor.process_pool(1)
        with executor.user_script_hidden():
            self.ready = self.pool.submit(executor.warm_up)

    @staticmethod
    def wanted(fits: int, workers: int | None, relax: bool) -> bool:
        return (relax and workers is None and executor.cores() >= 2
                and fits >= executor.EARLY_HELPER_FITS)

    def pays(self, main: engine.Fit | None) -> bool:
        # A base fit on nutpie's native wrappers already sampled on every
        # core; a fit read from a cache says its relaxations are cached too.
        sampler = getattr(main, "sampler", None)
        return sampler is not None and getattr(sampler, "path", "") == "light"

    def share(self, names: list[str], here: Callable, there: Callable, advance: Callable) -> dict:
        queue = deque(names)
        lock = threading.Lock()
        done: dict[str, engine.Fit] = {}
        failures: list[BaseException] = []
        idle = threading.Event()

        def give(started=None) -> None:
            if started is not None and started.exception() is not None:
                failures.append(started.exception())
            with lock:
                name = queue.pop() if queue and not failures else None
            if name is None:
                idle.set()
                return
            try:
                # The helper process exists (started by the warm-up), so no
                # new process starts here and the main module stays as it is.
                future = self.pool.submit(*there(name))
            except BaseException as err:
                with lock:
                    queue.append(name)
                failures.append(err)
                idle.set()
                return
            future.add_done_callback(lambda f, n=name: received(n, f))

        def received(name: str, future: Future) -> None:
            try:
                idata, seconds = future.result()
            except BaseException:
                # A helper that failed or died: this process fits the model.
                with lock:
                    queue.append(name)
                    failures.append(RuntimeError("helper failed"))
                idle.set()
                return
            with lock:
                done[name] = engine.Fit(idata, None, None, seconds, label=f"relaxed:{name}")
            advance()
            give()

        def fit_here(name: str) -> None:
            idata, seconds = here(name)
            with lock:
                done[name] = engine.Fit(idata, None, None, seconds, label=f"relaxed:{name}")
            advance()

        self.ready.add_done_callback(give)
        while True:
            with lock:
                name = queue.popleft() if queue else None
            if name is None:
                break
            fit_here(name)
        if not self.ready.done():
            # Everything was fitted here before the helper was ready.
            idle.set()
        idle.wait()
        # Whatever a failed helper left behind is fitted here (an error in the
        # model itself then surfaces in this process, as without a helper).
        while queue:
            fit_here(queue.popleft())
        return {n: done[n] for n in names}

    def close(self) -> None:
        self.pool.shutdown(wait=False, cancel_futures=True)


def refit_where_psis_fails(design, data, main: engine.Fit, relaxed: dict[str, engine.Fit], seed: int,
                           settings: engine.Settings, say: Callable[[str], None]) -> kfold.CrossValidation:
    """Exact refits for the relaxations whose PSIS-LOO difference cannot decide (see :mod:`workbench.kfold`).

    Only a relaxation whose parameter leaves its null often enough for the
    verdict rule to read the elpd difference is refitted.
    """
    from workbench.checks.relaxation import share_beyond
    from workbench.rules.model_fit import SHARE_BEYOND_DOUBTFUL

    if not relaxed:
        return kfold.CrossValidation()
    by_parameter = {a.relaxation.parameter: a.relaxation for a in design.assumptions if a.relaxation}
    pull = {p: share_beyond(by_parameter[p], fit) for p, fit in relaxed.items() if p in by_parameter}
    return kfold.refit_untrusted(design, data, main, relaxed, seed, settings, pull,
                                 SHARE_BEYOND_DOUBTFUL, say)


def run_check(
    design,
    data,
    data_info: DataInfo,
    seed: int = 1,
    settings: engine.Settings = engine.Settings(),
    relax: bool = True,
    workers: int | None = None,
    calibrate: Callable[[], Any] | None = None,
    say: Callable[[str], None] = lambda _: None,
    progress: bool = False,
    fitter: Callable[..., engine.Fit] | None = None,
    revise: bool = True,
) -> CheckRun:
    """Fit the design, its relaxations and calibration; judge every assumption.

    ``fitter`` stands in for :func:`fit_design` (same arguments), e.g. a
    :class:`workbench.fitcache.CachedFitter` that reuses stored fits. When
    the main fit shows the funnel of a centred scale and ``revise`` is on,
    the non-centred form is fitted too (:func:`workbench.revisions.revise`).
    """
    start = time.perf_counter()
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    seeds = engine.seed_stream(seed, "main", "relaxations", "revisions", "refits")
    helper = (EarlyHelper() if EarlyHelper.wanted(len(relaxation_names(design, data)), workers, relax)
              else None)
    try:
        main = (fitter or fit_design)(design, data, seeds["main"], settings, progress=progress,
                                      label=design.label(), say=say)
        revised = revisions.revise(design, data, main, seeds["revisions"], settings, fitter,
                                   say) if revise else []
        relaxed = fit_relaxations(design, data, seeds["relaxations"], settings, workers, say,
                                  fitter, progress, main, helper) if relax else {}
    finally:
        if helper is not None:
            helper.close()
    refits = refit_where_psis_fails(design, data, main, relaxed, seeds["refits"], settings, say)
    calibration = calibrate() if calibrate else None
    context = checks.Context(design, data, main, relaxed, calibration, refits, revisions=revised)
    interrupts.raise_if_interrupted()
    say("running checks")
    # An assumption the table cannot inform is left unchecked, with the reason.
    uninformed = {a.key: a.uninformed(data) for a in design.assumptions if a.uninformed(data)}
    findings = [f for f in checks.run_all(context) if f.assumption not in uninformed]
    context.extras["computation"] = computation_summary(main.idata)
    context.extras["parameters"] = estimates.parameters(main.idata)
    derived = getattr(getattr(design, "recipe", None), "derived", None)
    if derived is not None:
        context.extras["derived"] = summarise_draws(derived(data, design.options, main.draws()))
    declared = [(a.key, a.statement, a.advice_for(design.options)) for a in design.assumptions]
    judged = verdicts.decide(declared, findings, uninformed)
    context.extras["revisions"] = revised
    for record in revised:
        record["before"]["verdict"] = next(v.verdict for v in judged if v.key == record["assumption"])
    return CheckRun(design, data, data_info, seed, settings, main, relaxed, findings, judged,
                    context.extras, calibration, started, time.perf_counter() - start, refits=refits)


# Derived quantities are shown with their central 90% interval.
DERIVED_INTERVAL = (5, 95)


def summarise_draws(draws: dict) -> dict:
    """Mean and central interval of each derived quantity (element by element)."""
    import numpy as np

    out = {}
    for name, values in draws.items():
        values = np.asarray(values, dtype=float).reshape(len(values), -1)
        for i in range(values.shape[1]):
            label = name if values.shape[1] == 1 else f"{name}[{i}]"
            low, high = np.percentile(values[:, i], DERIVED_INTERVAL)
            out[label] = {"mean": float(values[:, i].mean()), "low": float(low), "high": float(high)}
    return out


def command_line() -> str:
    return " ".join(os.path.basename(a) if i == 0 else a for i, a in enumerate(sys.argv))
