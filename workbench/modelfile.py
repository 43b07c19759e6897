"""A model file of the user's own, checked like a built-in recipe.

A model file is a Python file that defines

``build_model(data: pandas.DataFrame) -> pymc.Model``
    Required. Builds the model for a table; the observed variables are found
    in the returned model (``observed=`` arguments), whatever their names.
``ASSUMPTIONS``
    Optional list of :class:`workbench.recipe.Assumption`. A statistic's
    ``compute(data, outcomes, draws)`` receives the DataFrame; a
    relaxation's ``build(data)`` receives the DataFrame and returns the
    expanded ``pymc.Model``, whose extra free parameter is named
    ``relaxation.parameter``.
``simulate(rng, data) -> (dict, pandas.DataFrame)``
    Optional independent story for simulation-based calibration: true values
    of every free parameter of the model (drawn from the story's own priors)
    and a table like ``data`` with simulated outcomes.
``PEOPLE_DECISIONS``
    Optional ``True`` when the model informs decisions about people (the
    report then carries its caution).

:func:`design_from_file` returns a :class:`ModelFileDesign`, which answers
the harness the way :class:`workbench.recipe.Design` does. Besides the
user's assumptions, every model file gets the automatic assumptions that
:mod:`workbench.automatic` reads from its likelihoods and its table (a key
the user declares replaces the automatic one) and the generic assumption
``predictions``: posterior predictive checks of the mean, sd, minimum and
maximum of each observed variable (and the share of zeros for counts).

Loading a model file runs the user's code, as importing any Python module
does. Nothing else here evaluates text: tables, plan files and ``--prior``
values are data.

References
----------
Gelman, A., Meng, X.-L. and Stern, H. (1996). Posterior predictive assessment
of model fitness via realized discrepancies. Statistica Sinica 6, 733-807
(summary statistics as discrepancies).
Gelman, A. et al. (2013). Bayesian Data Analysis, 3rd ed., sec. 6.3 (test
quantities such as the minimum, maximum and share of zeros).
"""

from __future__ import annotations

import re
import traceback
import warnings
from dataclasses import dataclass, field, replace
from functools import partial
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from workbench import automatic, tables
from workbench.errors import ModelFileError, OptionError, WorkbenchError
from workbench.findings import GENERIC_ASSUMPTIONS
from workbench.recipe import Assumption, Relaxation, Statistic

# Key and wording of the generic assumption every model file gets.
PREDICTIONS = "predictions"
PREDICTIONS_STATEMENT = ("The model reproduces the basic summaries (mean, sd, minimum, maximum "
                         "and, for counts, the share of zeros) of each observed variable.")
PREDICTIONS_ADVICE = ("See which summary is missed and in which direction: a missed sd or share "
                      "of zeros points at the outcome distribution (extra variation, excess "
                      "zeros), a missed mean at how the mean depends on the covariates, a "
                      "missed minimum or maximum at the tails.")
# Keys a model file may not use for its own assumptions.
RESERVED_KEYS = frozenset(GENERIC_ASSUMPTIONS) | {PREDICTIONS}
# A user's error message is cut here so the command line stays one readable line.
MESSAGE_LIMIT = 200
# How many row numbers a message lists before "...".
ROWS_SHOWN = 5


# --- the table as the harness sees it ---------------------------------------------------


@dataclass
class FrameData:
    """The user's DataFrame, with the small Dataset-like face the harness reads.

    ``frame`` is what the model file's functions receive. ``columns`` holds
    one NumPy array per column (text columns as strings), for the report
    and for fingerprints. ``truth`` is set on tables simulated by the model
    file's ``simulate``: the true parameter values behind them.
    """

    frame: pd.DataFrame
    truth: dict[str, Any] | None = None
    _columns: dict[str, np.ndarray] | None = field(default=None, repr=False, compare=False)

    @property
    def columns(self) -> dict[str, np.ndarray]:
        """One NumPy array per column, by column name."""
        if self._columns is None:
            self._columns = {str(name): _plain(self.frame[name]) for name in self.frame.columns}
        return self._columns

    @property
    def rows(self) -> int:
        """Rows of the table."""
        return int(len(self.frame))

    def __getitem__(self, name: str) -> np.ndarray:
        return self.columns[name]

    def to_frame(self) -> pd.DataFrame:
        """A copy of the table."""
        return self.frame.copy()

    def __getstate__(self):
        return {"frame": self.frame, "truth": self.truth}

    def __setstate__(self, state):
        self.frame, self.truth, self._columns = state["frame"], state["truth"], None


def _plain(column: pd.Series) -> np.ndarray:
    values = column.to_numpy()
    # Object arrays hash by address; text has a stable byte form.
    return values.astype(str) if values.dtype == object else values


# --- the recipe-like record the report reads --------------------------------------------


@dataclass(frozen=True)
class ModelFileRecipe:
    """What the report and writers read from ``design.recipe`` for a model file."""

    name: str
    summary: str
    source: str
    simulate: Callable | None = None
    people_decisions: bool = False
    figure: Callable | None = None
    derived: Callable | None = None
    covariate: str | None = None
    demo: Callable | None = None
    columns: tuple = ()
    options: tuple = ()
    parameters: tuple = ()
    assumptions: tuple = ()


# --- loading the file ---------------------------------------------------------------------


def load_module(path: Path):
    """Import a model file by path (a changed file is loaded afresh).

    Parameters
    ----------
    path : Path
        The model file.

    Returns
    -------
    module
        The imported module, run once per process and file content.

    Raises
    ------
    ModelFileError
        The file is missing, has a syntax error (file:line) or its
        module-level code raises (file:line of the failing statement).
    """
    from workbench import registry

    if not path.is_file():
        raise ModelFileError(f"model file {str(path)!r}: expected a readable Python file; found none")
    try:
        return registry.load_module(path)
    except SyntaxError as err:
        raise ModelFileError(f"{path}:{err.lineno}: syntax error: {err.msg}") from None
    except (Exception, SystemExit) as err:  # any error in the user's module-level code, or sys.exit
        raise ModelFileError(f"{_where(path, err)}: loading the model file raised {_describe(err)}") from err


def _where(path: Path, err: BaseException) -> str:
    """``file:line`` of the innermost frame of ``err`` inside the model file."""
    line = None
    target = Path(path).resolve()
    for frame in traceback.extract_tb(err.__traceback__):
        try:
            if Path(frame.filename).resolve() == target:
                line = frame.lineno
        except (OSError, ValueError):
            continue
    return f"{path}:{line}" if line else str(path)


def _describe(err: BaseException) -> str:
    if isinstance(err, SystemExit):
        return f"SystemExit (sys.exit({err.code!r})); a model file must not end the process"
    text = " ".join(str(err).split())
    if len(text) > MESSAGE_LIMIT:
        text = text[: MESSAGE_LIMIT - 3] + "..."
    return f"{type(err).__name__}: {text}" if text else type(err).__name__


def design_from_file(path: str | Path, options: dict | None = None,
                     priors: dict | None = None) -> "ModelFileDesign":
    """Load a model file and bind it as a design.

    Parameters
    ----------
    path : str or Path
        The model file (``*.py``).
    options : dict, optional
        Must be empty: a model file has no ``--set`` options.
    priors : dict, optional
        Must be empty: a model file sets its own priors in ``build_model``.

    Returns
    -------
    ModelFileDesign

    Raises
    ------
    ModelFileError
        The file cannot be loaded or does not follow the contract.
    OptionError
        Options or prior overrides were given.
    """
    path = Path(path)
    if options:
        raise OptionError(
            f"model file '{path.name}' takes no --set options; found '{sorted(options)[0]}' "
            f"(set such values inside the file)"
        )
    if priors:
        raise OptionError(
            f"--prior does not apply to model file '{path.name}'; found '{sorted(priors)[0]}' "
            f"(its priors are written in build_model)"
        )
    return ModelFileDesign(path)


def _reload(path: str, outcomes: dict[str, bool],
            derived: tuple[automatic.Spec, ...] = ()) -> "ModelFileDesign":
    design = ModelFileDesign(Path(path))
    design._outcomes = dict(outcomes)
    design._automatic = tuple(derived)
    return design


# --- the design -----------------------------------------------------------------------------


class ModelFileDesign:
    """A user's model file bound as a design (the protocol of ``recipe.Design``).

    The observed variables are learnt from the model that
    :meth:`validate` builds on the table; the generic ``predictions``
    statistics follow them.
    """

    is_model_file = True

    def __init__(self, path: Path):
        self.path = Path(path)
        module = load_module(self.path)
        self.module = module
        build = getattr(module, "build_model", None)
        if not callable(build):
            raise ModelFileError(
                f"{self.path}: defines no build_model(data) function; expected one that takes a "
                f"pandas DataFrame and returns a pymc.Model"
            )
        self._build_model = build
        self._assumptions = _read_assumptions(self.path, getattr(module, "ASSUMPTIONS", ()))
        story = getattr(module, "simulate", None)
        if story is not None and not callable(story):
            raise ModelFileError(f"{self.path}: simulate is not a function; expected "
                                 f"simulate(rng, data) -> (dict of true values, DataFrame)")
        self._story = story
        # The calibration runner reads ``design.simulate``: None means "no independent story".
        self.simulate = self._simulate if story is not None else None
        self.options: dict[str, Any] = {}
        self.priors: dict[str, str] = {}
        self._outcomes: dict[str, bool] = {}  # observed variable -> is a count
        # Assumptions read from the likelihoods and the table by validate (plain data).
        self._automatic: tuple[automatic.Spec, ...] = ()
        self._fitted = automatic.FittedValues(build)
        doc = (module.__doc__ or "").strip().splitlines()
        self.recipe = ModelFileRecipe(
            name=self.path.name,
            summary=doc[0] if doc else f"Model file {self.path.name}.",
            source=str(self.path.resolve()),
            simulate=self.simulate,
            people_decisions=bool(getattr(module, "PEOPLE_DECISIONS", False)),
            assumptions=self._assumptions,
        )

    # -- naming

    @property
    def name(self) -> str:
        """The file name (the summary's ``recipe`` field)."""
        return self.path.name

    def label(self) -> str:
        """The file name: a model file has no options to list."""
        return self.path.name

    def key(self) -> str:
        """The design's identity for fit caches and duplicate checks: its label."""
        return self.label()

    def __reduce__(self):
        # Worker processes reload the file by path (a design holds its functions).
        return (_reload, (str(self.path.resolve()), self._outcomes, self._automatic))

    # -- what the harness asks

    @property
    def outcome_names(self) -> tuple[str, ...]:
        """The observed variables found by :meth:`validate`."""
        return tuple(self._outcomes)

    @property
    def assumptions(self) -> tuple[Assumption, ...]:
        """The user's assumptions, the automatic ones, then one ``predictions`` entry per
        default statistic.

        The automatic assumptions (:mod:`workbench.automatic`) are those
        :meth:`validate` read from the likelihoods and the table; a key the
        user declares replaces the automatic one. Several entries share the
        key ``predictions``; the verdict step judges them as one assumption.
        """
        own = tuple(_on_frame_assumption(self.path, a) for a in self._assumptions)
        keys = {a.key for a in own}
        derived = automatic.assumptions(tuple(s for s in self._automatic if s.key not in keys),
                                        self._fitted)
        return own + derived + default_assumptions(self._outcomes)

    def validate(self, table: pd.DataFrame) -> FrameData:
        """Build the model on the table once and check it can be sampled.

        Raises :class:`ModelFileError` when build_model fails, returns no
        model, observes no variable, observes missing or infinite values,
        or has a log-probability that is not finite at its initial point;
        the same for each relaxation's model.
        """
        if not isinstance(table, pd.DataFrame) or table.empty:
            raise ModelFileError(f"{self.path}: expected a table with at least one row")
        data = FrameData(table)
        model = self._user_model(self._build_model, data.frame, "build_model")
        check_observed(self.path, model, "build_model")
        check_initial_point(self.path, model, "build_model")
        self._outcomes = {rv.name: _is_count(model, rv) for rv in model.observed_RVs}
        self._automatic = automatic.derive(model, data.frame, self._build_model,
                                           {a.key for a in self._assumptions})
        for assumption in self._assumptions:
            relaxation = assumption.relaxation
            if relaxation is None:
                continue
            what = f"the relaxation of '{assumption.key}'"
            relaxed = self._user_model(relaxation.build, data.frame, what)
            free = [rv.name for rv in relaxed.free_RVs]
            if relaxation.parameter not in free:
                raise ModelFileError(
                    f"{self.path}: {what} has no free parameter '{relaxation.parameter}'; "
                    f"found {', '.join(free) or 'none'}"
                )
            observed = sorted(rv.name for rv in relaxed.observed_RVs)
            if observed != sorted(self._outcomes):
                raise ModelFileError(
                    f"{self.path}: {what} observes {', '.join(observed) or 'nothing'}; expected "
                    f"the variables of build_model ({', '.join(sorted(self._outcomes))})"
                )
            check_observed(self.path, relaxed, what)
            check_initial_point(self.path, relaxed, what)
        return data

    def build(self, data: FrameData, relaxation: Relaxation | None = None):
        """The model for ``data`` (expanded by ``relaxation``), outcomes in data containers.

        Observed values written as constants are moved into ``pm.Data``
        containers so one compiled model can be refitted to new outcomes.
        """
        builder = relaxation.build if relaxation is not None else self._build_model
        what = "build_model" if relaxation is None else f"the relaxation '{relaxation.parameter}'"
        return with_data_containers(self._user_model(builder, _frame(data), what))

    def observed(self, data: FrameData) -> dict[str, np.ndarray]:
        """Outcome container name -> the values ``build_model`` observes for ``data``."""
        from pymc.backends.arviz import find_observations

        model = self._user_model(self._build_model, _frame(data), "build_model")
        names = container_names(model)
        return {names[name]: np.asarray(values) for name, values in find_observations(model).items()}

    def check_simulator(self, data: FrameData) -> None:
        """Run ``simulate`` once and check what it returns against the model.

        Raises :class:`ModelFileError` when it returns something other than
        (dict, DataFrame), misses a true value of a free parameter, gives a
        value of the wrong shape, or a table the model cannot observe.
        """
        if self.simulate is None:
            return
        import pymc as pm

        simulated = self.simulate(np.random.default_rng(0), data, {})
        model = self._user_model(self._build_model, data.frame, "build_model")
        free = list(model.free_RVs)
        # One prior draw gives the shape of each parameter on its own scale.
        shapes = [np.shape(v) for v in pm.draw(free, random_seed=0)] if free else []
        for rv, expected in zip(free, shapes):
            if rv.name not in simulated.truth:
                raise ModelFileError(
                    f"{self.path}: simulate returned no true value for free parameter "
                    f"'{rv.name}'; expected one for each of {', '.join(v.name for v in free)}"
                )
            found = np.shape(simulated.truth[rv.name])
            if found != expected:
                raise ModelFileError(
                    f"{self.path}: simulate's true value of '{rv.name}' has shape {found}; "
                    f"expected {expected}"
                )
        on_simulated = self._user_model(self._build_model, simulated.frame, "build_model")
        check_observed(self.path, on_simulated, "build_model on simulated data")

    # -- helpers

    def _simulate(self, rng: np.random.Generator, data: FrameData, params: dict) -> FrameData:
        """The user's story: its own true values and a simulated table (``params`` unused)."""
        try:
            result = self._story(rng, _frame(data).copy())
        except WorkbenchError:
            raise
        except (Exception, SystemExit) as err:
            raise ModelFileError(f"{_where(self.path, err)}: simulate raised {_describe(err)}") from err
        if (not isinstance(result, tuple) or len(result) != 2 or not isinstance(result[0], dict)
                or not isinstance(result[1], pd.DataFrame)):
            raise ModelFileError(
                f"{self.path}: simulate returned {_kind(result)}; expected a tuple "
                f"(dict of true parameter values, DataFrame like the data)"
            )
        truth, frame = result
        return FrameData(frame, truth={str(k): np.asarray(v) for k, v in truth.items()})

    def _user_model(self, builder: Callable, frame: pd.DataFrame, what: str):
        """Call a user builder; any failure becomes one line naming file and line."""
        import pymc as pm
        from pymc.exceptions import ImputationWarning

        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", ImputationWarning)
            try:
                model = builder(frame)
            except WorkbenchError:
                raise
            except (Exception, SystemExit) as err:
                hint = ""
                if isinstance(err, KeyError) and err.args and err.args[0] not in frame.columns:
                    hint = f" (the table's columns: {', '.join(map(str, frame.columns))})"
                raise ModelFileError(
                    f"{_where(self.path, err)}: {what} raised {_describe(err)}{hint}") from err
        for w in caught:
            if issubclass(w.category, ImputationWarning):
                raise ModelFileError(_missing_message(self.path, str(w.message), frame, what))
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        if not isinstance(model, pm.Model):
            raise ModelFileError(
                f"{self.path}: {what} returned {_kind(model)}; expected a pymc.Model "
                f"(end build_model with 'return model' after the 'with pm.Model() as model:' block)"
            )
        if not model.observed_RVs:
            raise ModelFileError(
                f"{self.path}: {what} returned a model with no observed variable; expected at "
                f"least one distribution with observed= data"
            )
        return model


def _frame(data) -> pd.DataFrame:
    return data.frame if isinstance(data, FrameData) else data


def _kind(value) -> str:
    return "None" if value is None else f"a {type(value).__name__}"


def _read_assumptions(path: Path, declared) -> tuple[Assumption, ...]:
    """Check ``ASSUMPTIONS``: a list of Assumption with unique, unreserved keys."""
    if isinstance(declared, Assumption):
        declared = [declared]
    if not isinstance(declared, (list, tuple)):
        raise ModelFileError(
            f"{path}: ASSUMPTIONS is {_kind(declared)}; expected a list of "
            f"workbench.recipe.Assumption"
        )
    seen = set()
    for i, item in enumerate(declared, start=1):
        if not isinstance(item, Assumption):
            raise ModelFileError(
                f"{path}: ASSUMPTIONS item {i} is {_kind(item)}; expected a workbench.recipe.Assumption"
            )
        if item.key in RESERVED_KEYS:
            raise ModelFileError(
                f"{path}: ASSUMPTIONS item {i} uses the key '{item.key}', which the workbench "
                f"checks itself; expected another name"
            )
        if item.key in seen:
            raise ModelFileError(f"{path}: ASSUMPTIONS declares the key '{item.key}' twice")
        seen.add(item.key)
        if item.statistic is not None and not isinstance(item.statistic, Statistic):
            raise ModelFileError(
                f"{path}: the statistic of '{item.key}' is {_kind(item.statistic)}; expected a "
                f"workbench.recipe.Statistic"
            )
        if item.relaxation is not None and not isinstance(item.relaxation, Relaxation):
            raise ModelFileError(
                f"{path}: the relaxation of '{item.key}' is {_kind(item.relaxation)}; expected a "
                f"workbench.recipe.Relaxation"
            )
    return tuple(declared)


def _on_frame_assumption(path: Path, assumption: Assumption) -> Assumption:
    """The assumption with its statistic fed the DataFrame (the harness passes FrameData)."""
    statistic = assumption.statistic
    if statistic is None:
        return assumption
    compute = partial(_user_statistic, str(path), assumption.key, statistic.compute)
    return replace(assumption, statistic=replace(statistic, compute=compute))


def _user_statistic(path: str, key: str, compute, data, outcomes, draws):
    try:
        return compute(_frame(data), outcomes, draws)
    except WorkbenchError:
        raise
    except (Exception, SystemExit) as err:
        raise ModelFileError(
            f"{_where(Path(path), err)}: the statistic of '{key}' raised {_describe(err)}"
        ) from err


# --- default statistics -------------------------------------------------------------------


SUMMARIES = {
    "mean": ("mean", lambda y: y.mean(axis=1)),
    "sd": ("standard deviation", lambda y: y.std(axis=1)),
    "min": ("minimum", lambda y: y.min(axis=1)),
    "max": ("maximum", lambda y: y.max(axis=1)),
    "share_zero": ("share of zeros", lambda y: (y == 0).mean(axis=1)),
}


def summary_statistic(name: str, summary: str, data, outcomes, draws) -> np.ndarray:
    """One summary of observed variable ``name``, per draw (rows of the leading axis).

    Parameters
    ----------
    name : str
        The observed variable.
    summary : str
        A key of :data:`SUMMARIES`.
    data, draws
        Unused (the summaries depend on the outcomes only).
    outcomes : dict
        Observed or replicated values, leading axis of S draws.

    Returns
    -------
    numpy.ndarray
        S values.

    References
    ----------
    Gelman et al. (2013), Bayesian Data Analysis, 3rd ed., sec. 6.3.
    """
    y = np.asarray(outcomes[name], dtype=float)
    return SUMMARIES[summary][1](y.reshape(y.shape[0], -1))


def default_assumptions(outcomes: dict[str, bool]) -> tuple[Assumption, ...]:
    """One ``predictions`` assumption entry per (observed variable, summary).

    Parameters
    ----------
    outcomes : dict of str to bool
        Each observed variable and whether it is a count (discrete and
        non-negative); counts also get the share of zeros.

    Returns
    -------
    tuple of Assumption
        Entries sharing the key ``predictions``, each with one
        :func:`summary_statistic` (two-sided).

    References
    ----------
    Gelman et al. (2013), Bayesian Data Analysis, 3rd ed., sec. 6.3.
    """
    entries = []
    for name, is_count in outcomes.items():
        keys = ["mean", "sd", "min", "max"] + (["share_zero"] if is_count else [])
        for key in keys:
            meaning = f"{SUMMARIES[key][0]} of {name}"
            entries.append(Assumption(
                key=PREDICTIONS,
                statement=PREDICTIONS_STATEMENT,
                statistic=Statistic(f"{name}_{key}", meaning, partial(summary_statistic, name, key)),
                advice=PREDICTIONS_ADVICE,
            ))
    return tuple(entries)


def _is_count(model, rv) -> bool:
    """Discrete outcomes whose observed values are all >= 0."""
    from pymc.backends.arviz import find_observations

    if not rv.dtype.startswith(("int", "uint")):
        return False
    values = np.asarray(find_observations(model)[rv.name])
    return bool(values.size and np.all(values >= 0))


# --- checks of a built model ----------------------------------------------------------------


def check_observed(path: Path, model, what: str) -> None:
    """Every observed value of ``model`` is a finite number.

    Parameters
    ----------
    path : Path
        The model file (named in the message).
    model : pymc.Model
        A model built by the file.
    what : str
        Which builder made it, for the message.

    Raises
    ------
    ModelFileError
        Naming the variable and the positions of missing or infinite values.
    """
    from pymc.backends.arviz import find_observations

    for name, values in find_observations(model).items():
        values = np.asarray(values)
        if values.dtype.kind not in "biuf":
            raise ModelFileError(
                f"{path}: {what} observes '{name}' with values of type {values.dtype}; "
                f"expected numbers"
            )
        bad = ~np.isfinite(values.astype(float))
        if bad.any():
            rows = np.flatnonzero(bad.reshape(-1)) + 1
            raise ModelFileError(
                f"{path}: observed variable '{name}' has {bad.sum()} missing or infinite "
                f"value(s) at position(s) {_rows(rows)}; expected finite numbers (drop or fill "
                f"those rows of the table)"
            )


def _missing_message(path: Path, warning: str, frame: pd.DataFrame, what: str) -> str:
    """PyMC would impute missing observed values; the workbench refuses them instead."""
    found = re.search(r"Data in (\S+) contains missing values", warning)
    name = found.group(1) if found else "an observed variable"
    empty = [c for c in frame.columns if frame[c].isna().any()]
    column = name if name in empty else (empty[0] if len(empty) == 1 else None)
    where = ""
    if column is not None:
        empty_rows = np.flatnonzero(frame[column].isna().to_numpy())
        where = f"; column '{column}' is empty at {tables.rows(empty_rows, ROWS_SHOWN)}"
    return (f"{path}: {what} observes '{name}' with missing values (NaN){where}; expected "
            f"every observed value (drop or fill those rows of the table)")


def _rows(rows: np.ndarray) -> str:
    shown = ", ".join(str(int(r)) for r in rows[:ROWS_SHOWN])
    return shown + (" ..." if len(rows) > ROWS_SHOWN else "")


def check_initial_point(path: Path, model, what: str) -> None:
    """The log-probability of every variable is finite at the model's initial point.

    Parameters
    ----------
    path : Path
        The model file (named in the message).
    model : pymc.Model
        A model built by the file.
    what : str
        Which builder made it, for the message.

    Raises
    ------
    ModelFileError
        Naming the first variable whose log-probability (``model.point_logps``
        at ``model.initial_point()``) is -inf or NaN: the sampler could not
        start there.
    """
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            point = model.initial_point()
            logps = model.point_logps(point)
    except Exception as err:  # PyMC could not even evaluate the starting point
        raise ModelFileError(
            f"{path}: {what}: the model's initial point cannot be evaluated ({_describe(err)})"
        ) from err
    bad = [(name, float(value)) for name, value in logps.items() if not np.isfinite(value)]
    if not bad:
        return
    name, value = bad[0]
    observed = {rv.name for rv in model.observed_RVs}
    if name in observed:
        hint = ("its observed values lie outside what its distribution allows at the starting "
                "parameters (negative counts, values beyond a bound, a scale of zero)")
    else:
        hint = "its starting value lies outside what its distribution allows (set an initval)"
    others = f" (and {len(bad) - 1} more)" if len(bad) > 1 else ""
    raise ModelFileError(
        f"{path}: {what}: the log-probability of '{name}' is {'nan' if np.isnan(value) else value} "
        f"at the model's initial point{others}; {hint}"
    )


# --- outcomes in data containers ---------------------------------------------------------------


def container_names(model) -> dict[str, str]:
    """The data container of each observed variable.

    Parameters
    ----------
    model : pymc.Model

    Returns
    -------
    dict of str to str
        Observed variable -> container name. A variable observed through
        ``pm.Data`` keeps that container; one observed through constants gets
        ``<name>_observed`` (``_`` added until the name is free), the name
        :func:`with_data_containers` gives it.
    """
    from pytensor.compile.sharedvalue import SharedVariable

    taken = set(model.named_vars)
    names = {}
    for rv in model.observed_RVs:
        value = model.rvs_to_values[rv]
        if isinstance(value, SharedVariable) and value.name:
            names[rv.name] = value.name
            continue
        name = f"{rv.name}_observed"
        while name in taken:
            name += "_"
        taken.add(name)
        names[rv.name] = name
    return names


def with_data_containers(model):
    """The model with every constant observed value moved into a data container.

    Parameters
    ----------
    model : pymc.Model

    Returns
    -------
    pymc.Model
        ``model`` itself when every observed variable already reads a
        ``pm.Data`` container; otherwise an equivalent model rebuilt through
        PyMC's function-graph form, with the same log-probability, whose
        outcomes a compiled sampler can swap (see :func:`container_names`).
    """
    import pytensor
    from pymc.model.fgraph import (
        ModelObservedRV,
        model_from_fgraph,
        model_named,
        model_observed_rv,
    )
    from pymc.pytensorf import toposort_replace
    from pytensor.compile.sharedvalue import SharedVariable
    from pytensor.graph.basic import Constant

    from workbench.revisions import model_graph, model_with_initial

    names = container_names(model)
    if all(isinstance(model.rvs_to_values[rv], SharedVariable) for rv in model.observed_RVs):
        return model
    graph, _, initial = model_graph(model)
    swaps = []
    for node in graph.toposort():
        if not isinstance(node.op, ModelObservedRV):
            continue
        rv, value = node.inputs
        if not isinstance(value, Constant):
            continue
        name = names[node.op.name]
        container = pytensor.shared(np.asarray(value.data), name=name, shape=(None,) * value.ndim)
        named = model_named(container, name, *node.op.dims)
        swaps.append((node.outputs[0], model_observed_rv(rv, named, node.op.name, *node.op.dims)))
    toposort_replace(graph, swaps)
    return model_with_initial(model_from_fgraph(graph, mutate_fgraph=True), initial)


# --- censored outcomes ------------------------------------------------------------------------


def censoring_bounds(model) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """The bounds of every observed ``pm.Censored`` variable, broadcast to its observed values.

    Parameters
    ----------
    model : pymc.Model

    Returns
    -------
    dict of str to (numpy.ndarray, numpy.ndarray)
        Observed variable -> (lower, upper); -inf / inf where a side is open.
    """
    from pymc.backends.arviz import find_observations
    from pymc.distributions.censored import CensoredRV

    values = find_observations(model)
    out = {}
    for rv in model.observed_RVs:
        if not isinstance(rv.owner.op, CensoredRV):
            continue
        observed = np.asarray(values[rv.name], dtype=float)
        lower, upper = (np.broadcast_to(np.asarray(bound.eval(), dtype=float), observed.shape)
                        for bound in rv.owner.inputs[1:3])
        out[rv.name] = (lower, upper)
    return out


def censor_replicates(model, idata) -> list[str]:
    """Censor the replicated draws of each observed ``pm.Censored`` variable as the data were.

    PyMC already replicates an observation through its own bounds. An
    observation whose upper bound is open (a unit seen with its event, coded
    ``upper=inf``) never showed the censoring time it would have had: one is
    drawn for it, once per fit and from a fixed seed, from the Kaplan-Meier
    estimate of the censoring times (the observations at their upper bound)
    beyond its value (the reverse Kaplan-Meier, Schemper and Smith 1996; see
    :func:`workbench.units.censoring_times`), and its replicated draws are
    censored there. Without it, replicated event times run beyond any
    follow-up and every summary of the replicated data (sd, maximum) looks
    unlike the observed one on a model that is right. LOO-PIT then gets
    replicates tied with a censored observation at its bound, which ArviZ's
    randomised PIT spreads uniformly over (F(c), 1): the PIT of a
    right-censored observation.

    Parameters
    ----------
    model : pymc.Model
        The fitted model.
    idata : xarray.DataTree
        Its fit, with a ``posterior_predictive`` group (changed in place).

    Returns
    -------
    list of str
        The censored variables whose replicates were censored.
    """
    from workbench.units import censoring_times

    if "posterior_predictive" not in idata.children:
        return []
    group = idata["posterior_predictive"]
    done = []
    for name, (lower, upper) in censoring_bounds(model).items():
        if name not in group.data_vars:
            continue
        observed = np.asarray(idata["observed_data"][name].values, dtype=float)
        flat, high = observed.ravel(), upper.ravel().copy()
        censored = np.isfinite(high) & (flat >= high)
        open_top = ~np.isfinite(high)
        if censored.any() and open_top.any():
            code = np.where(censored, 0, 1)
            drawn = censoring_times(flat, code, np.full(flat.size, -np.inf))
            high[open_top] = drawn[open_top]
            # An open-topped unit beyond every censoring time keeps an open top.
            high[open_top & (drawn <= flat)] = np.inf
        replicated = group[name].values
        clipped = np.clip(replicated, lower, high.reshape(observed.shape))
        idata["posterior_predictive"][name] = group[name].copy(data=clipped)
        done.append(name)
    return done
