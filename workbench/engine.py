"""Compile once, sample, and keep one DataTree.

A :class:`Sampler` compiles a PyMC model with nutpie once; every later run
only swaps the observed data (``pm.Data`` containers), which is how
calibration, relaxations and comparisons refit without recompiling.
:func:`fit` produces the full set of groups the checks read: prior,
prior_predictive, posterior, sample_stats, log_likelihood, log_prior,
posterior_predictive and observed_data.
"""

from __future__ import annotations

import logging
import os
import sys
import time
import warnings
import weakref
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np
import xarray as xr

from workbench.errors import WorkbenchError
from workbench.interrupts import interrupts_kept


@dataclass(frozen=True)
class Settings:
    """How much to sample. The defaults suit a report; tests use fewer draws."""

    draws: int = 1000
    tune: int = 1000
    chains: int = 4
    prior_draws: int = 500
    # The acceptance rate step-size adaptation aims at: 0.8 is the default of
    # nutpie and Stan; raising it (0.9-0.99) shrinks the steps, which removes
    # divergences that come from curvature rather than from a region the
    # sampler cannot enter (Betancourt 2017, sec. 6.2; common practice).
    target_accept: float = 0.8
    cores: int = field(default_factory=lambda: min(4, os.cpu_count() or 1))

    def to_dict(self) -> dict:
        """The settings a result depends on (the core count changes no draw)."""
        return {"draws": self.draws, "tune": self.tune, "chains": self.chains,
                "prior_draws": self.prior_draws, "target_accept": self.target_accept}


def seed_stream(seed: int, *names: str) -> dict[str, int]:
    """Independent integer seeds for named stages, all derived from ``seed``.

    The same ``seed`` and names give the same integers on every machine.
    """
    children = np.random.SeedSequence(seed).spawn(len(names))
    return {name: int(child.generate_state(1, dtype=np.uint32)[0]) for name, child in zip(names, children)}


# Where a model's chains start, as its builder asked (start_at): model ->
# {variable name: tensor of the model's data containers}.
_STARTS: "weakref.WeakKeyDictionary[Any, dict[str, Any]]" = weakref.WeakKeyDictionary()


def start_at(rv, value, dims: tuple = ()) -> None:
    """Start the chains of ``rv`` near ``value``, a tensor of the model's data containers.

    Call it inside the model's context. Every refit of the compiled model
    starts at the value for its own data (nutpie still jitters each chain
    around it). Skipped when the prior in force (which a user may have
    overridden) has no density there for the data at hand.
    """
    import pymc as pm
    import pytensor.tensor as pt

    model = pm.modelcontext(None)
    value = pt.reshape(value, tuple(len(model.coords[d]) for d in dims))
    try:
        # A finiteness test of one vector: the fast-compiling mode takes a
        # tenth of the default's compile time (0.07 s against 0.15-4.9 s).
        allowed = bool(np.all(np.isfinite(pm.logp(rv, value).eval(mode="FAST_COMPILE"))))
    except Exception:  # a prior PyMC cannot evaluate there keeps its own start
        allowed = False
    if allowed:
        _STARTS.setdefault(model, {})[rv.name] = value


class Sampler:
    """One compiled model; sample it again and again with new observed data.

    ``fits`` is how many fits the caller expects on this compiled model
    (``None``: many, as in calibration); with ``settings`` it picks nutpie's
    native C wrappers or the light path (:mod:`workbench.compiling`).
    """

    def __init__(self, model, fits: int | None = 1, settings: "Settings | None" = None):
        from workbench import compiling

        self.model = model
        settings = settings or Settings()
        with warnings.catch_warnings(), interrupts_kept():
            warnings.simplefilter("ignore")
            if fits is None:
                made = compiling.native(model, _STARTS.get(model))
            else:
                made = compiling.choose(model, _STARTS.get(model), fits=fits,
                                        draws_per_chain=settings.draws + settings.tune,
                                        chains=settings.chains, cores=settings.cores)
        self.compiled = made.model
        self.path = made.path
        self.compile_seconds = made.seconds
        self.data_names = set(made.data_names)
        self.model_data_names = {var.name for var in model.data_vars}
        self._log_likelihood = None

    def log_likelihood(self, posterior: xr.Dataset) -> xr.Dataset:
        """Pointwise log-likelihood of every observed variable at each posterior draw.

        What ``pm.compute_log_likelihood`` gives, with its function compiled
        once per sampler rather than once per fit: refits of one compiled
        model (folds, calibration replicates) would otherwise pay a compile
        each. The function reads the data the model's containers hold now.
        """
        from pymc.backends.arviz import apply_function_over_dataset, coords_and_dims_for_inferencedata
        from pymc.model.transform.conditioning import remove_value_transforms

        if self._log_likelihood is None:
            # Draws are kept untransformed, so the function takes untransformed values.
            plain = remove_value_transforms(self.model)
            observed = list(plain.observed_RVs)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fn = plain.compile_fn(inputs=plain.value_vars, outs=plain.logp(vars=observed, sum=False),
                                      on_unused_input="ignore")
            dtypes = {plain.rvs_to_values[rv].name: plain.rvs_to_values[rv].type.dtype
                      for rv in plain.free_RVs}
            self._log_likelihood = (plain, fn, tuple(rv.name for rv in observed), dtypes)
        plain, fn, names, dtypes = self._log_likelihood
        # The transformed copy holds copies of the containers: give them today's values.
        for var in self.model.data_vars:
            plain[var.name].set_value(var.get_value())
        coords, dims = coords_and_dims_for_inferencedata(self.model)
        inputs = posterior[[rv.name for rv in self.model.free_RVs]].astype(dtypes, copy=False)
        return apply_function_over_dataset(fn, inputs, output_var_names=names,
                                           sample_dims=("chain", "draw"), dims=dims, coords=coords,
                                           progressbar=False)

    def with_data(self, observed: Mapping[str, np.ndarray]):
        """The compiled model with new values in its observed containers."""
        if not observed:
            return self.compiled
        unknown = set(observed) - self.model_data_names
        if unknown:
            raise WorkbenchError(f"model has no data container named {sorted(unknown)[0]!r}")
        # A container the log-density never reads is not part of the compiled model.
        return self.compiled.with_data(
            **{k: np.asarray(v) for k, v in observed.items() if k in self.data_names})

    def run(
        self,
        seed: int,
        settings: Settings,
        observed: Mapping[str, np.ndarray] | None = None,
        progress: bool = False,
        label: str = "sampling",
    ) -> xr.DataTree:
        """Posterior and sample_stats for the given observed containers.

        ``progress`` shows nutpie's bar on a terminal and plain ``label:``
        lines with counts and time left elsewhere (logs, CI).
        """
        with interrupts_kept():
            return self._run(seed, settings, observed, progress, label)

    def _run(self, seed, settings, observed, progress, label) -> xr.DataTree:
        import nutpie

        compiled = self.with_data(observed or {})
        terminal = sys.stderr.isatty()
        lines = _SamplingLines(settings, label) if progress and not terminal else None
        try:
            # Not blocking: nutpie's own wait turns Ctrl-C into a partial trace,
            # which would let an interrupted run go on and write its files.
            with containers_set(self.model, observed or {}):
                background = nutpie.sample(
                    compiled,
                    draws=settings.draws,
                    tune=settings.tune,
                    chains=settings.chains,
                    cores=min(settings.cores, settings.chains),
                    seed=seed,
                    target_accept=settings.target_accept,
                    progress_bar=progress and terminal,
                    progress_callback=lines,
                    save_warmup=False,
                    blocking=False,
                )
                try:
                    trace = background.wait()
                except BaseException:
                    background.cancel()
                    raise
        finally:
            if lines is not None:
                lines.bar.close()
        return xr.DataTree.from_dict(
            {"posterior": trace["posterior"].to_dataset(), "sample_stats": trace["sample_stats"].to_dataset()}
        )


@contextmanager
def containers_set(model, observed: Mapping[str, np.ndarray]):
    """The model's data containers hold ``observed`` inside the block, their old values after.

    nutpie draws each chain's starting point from the PyMC model's containers,
    not from the data given to the compiled model, and a recipe's starting
    values may be computed from the data.
    """
    import pymc as pm

    saved = {name: model[name].get_value() for name in observed}
    pm.set_data({k: np.asarray(v) for k, v in observed.items()}, model=model)
    try:
        yield
    finally:
        pm.set_data(saved, model=model)


class _SamplingLines:
    """nutpie's progress callback feeding plain progress lines (draws of all chains)."""

    def __init__(self, settings: Settings, label: str):
        from workbench.progress import Progress

        self.bar = Progress(settings.chains * (settings.draws + settings.tune), label)
        self.done = 0

    def __call__(self, chains) -> None:
        try:
            done = sum(int(chain.finished_draws) for chain in chains)
            if done > self.done:
                self.bar.advance(done - self.done)
                self.done = done
        except Exception:  # progress output must never stop a sampler
            pass


@dataclass
class Fit:
    """A fitted design: the DataTree, the model and its compiled sampler."""

    idata: xr.DataTree
    model: Any
    sampler: Sampler
    seconds: float
    label: str = "model"

    def draws(self, names=None, group: str = "posterior") -> dict[str, np.ndarray]:
        """Variables of a group flattened over (chain, draw) to a leading axis."""
        ds = self.idata[group].to_dataset()
        names = names or list(ds.data_vars)
        return {n: _flatten(ds[n]) for n in names if n in ds}


def _flatten(da: xr.DataArray) -> np.ndarray:
    values = da.values
    return values.reshape((-1,) + values.shape[2:])


def _observed_data(model) -> xr.Dataset:
    """The observed values of every observed variable, with the model's dims."""
    from pymc.backends.arviz import find_observations

    out = {}
    for name, data in find_observations(model).items():
        dims = model.named_vars_to_dims.get(name)
        dims = tuple(dims) if dims else tuple(f"{name}_dim_{i}" for i in range(np.ndim(data)))
        out[name] = xr.DataArray(np.asarray(data), dims=dims)
    return xr.Dataset(out)


def fit(
    model,
    seed: int,
    settings: Settings = Settings(),
    sampler: Sampler | None = None,
    observed: Mapping[str, np.ndarray] | None = None,
    progress: bool = False,
    label: str = "model",
    say: Callable[[str], None] = lambda _: None,
    predictive: bool = True,
    prior: bool = True,
) -> Fit:
    """Sample prior, posterior and both predictives of ``model``.

    ``sampler`` reuses a compiled model (``observed`` then swaps the data).
    ``prior=False`` skips the prior and prior predictive; ``predictive=False``
    keeps only what model comparison needs (posterior, sample_stats,
    log_likelihood, observed_data).
    """
    import pymc as pm

    # PyMC resets its logger on import and then announces every sampling step.
    logging.getLogger("pymc").setLevel(logging.WARNING)
    start = time.perf_counter()
    seeds = seed_stream(seed, "prior", "posterior", "posterior_predictive")
    if sampler is None:
        say(f"{label}: compiling")
        sampler = Sampler(model, settings=settings)
    model = sampler.model
    if observed:
        with model:
            pm.set_data({k: np.asarray(v) for k, v in observed.items()})
    groups = {}
    if predictive and prior:
        say(f"{label}: prior predictive")
        with model, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            prior = pm.sample_prior_predictive(draws=settings.prior_draws, random_seed=seeds["prior"])
        groups.update({name: prior[name].to_dataset() for name in prior.children})
    else:
        groups["observed_data"] = _observed_data(model)
    say(f"{label}: sampling {settings.chains} chains")
    posterior = sampler.run(seeds["posterior"], settings, observed=observed, progress=progress,
                            label=f"{label}: sampling")
    groups.update({name: posterior[name].to_dataset() for name in posterior.children})
    idata = xr.DataTree.from_dict(groups)
    say(f"{label}: log-likelihood" + (" and posterior predictive" if predictive else ""))
    with model, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        idata["log_likelihood"] = sampler.log_likelihood(idata["posterior"].to_dataset())
        if predictive:
            if prior:
                pm.stats.compute_log_prior(idata, extend_inferencedata=True, progressbar=False)
            pm.sample_posterior_predictive(
                idata, random_seed=seeds["posterior_predictive"], extend_inferencedata=True,
                progressbar=False,
            )
            from workbench.modelfile import censor_replicates

            # Censored outcomes are replicated censored as the data were.
            censor_replicates(model, idata)
    return Fit(idata, model, sampler, time.perf_counter() - start, label)
