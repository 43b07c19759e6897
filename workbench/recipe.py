"""What a recipe is: plain data (columns, options, parameters, assumptions)
plus plain functions (validate, simulate, build the PyMC model).

A recipe module defines one module-level ``RECIPE = Recipe(...)``. The harness
never special-cases a recipe: every recipe answers the same questions through
the fields below, and :class:`Design` binds a recipe to the options and prior
overrides of one run.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping

import numpy as np

from workbench.errors import OptionError

REQUIRED = object()  # sentinel: an option without a default must be given


def option_text(value: Any) -> str:
    """The ``--set`` text of a parsed option value: a list as ``a,b``, an on/off as ``true``/``false``."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (tuple, list)):
        return ",".join(str(v) for v in value)
    return str(value)


@dataclass(frozen=True)
class Column:
    """A column of the input table."""

    name: str
    meaning: str
    required: bool = True


def flag(text: str) -> bool:
    """Parse an on/off option value (``--set centred=true``)."""
    low = str(text).strip().lower()
    if low in {"true", "yes", "1"}:
        return True
    if low in {"false", "no", "0"}:
        return False
    raise ValueError("must be true or false")


@dataclass(frozen=True)
class Option:
    """A design option set with ``--set NAME=VALUE``.

    ``parse`` turns the command-line text into a value and raises
    ``ValueError`` with a short reason when it cannot.
    """

    name: str
    meaning: str
    parse: Callable[[str], Any] = str
    default: Any = REQUIRED
    choices: tuple = ()

    def read(self, text: Any) -> Any:
        """Parse and check one value; raise :class:`OptionError` naming the option."""
        if isinstance(text, str):
            try:
                value = self.parse(text)
            except (TypeError, ValueError) as err:
                raise OptionError(
                    f"option '{self.name}': expected {self.meaning}; found {text!r} ({err})"
                ) from None
        else:
            value = text
        if self.choices and value not in self.choices:
            raise OptionError(
                f"option '{self.name}': expected one of {', '.join(map(str, self.choices))}; "
                f"found {text!r}"
            )
        return value


@dataclass(frozen=True)
class Parameter:
    """A model parameter with its default prior (``DIST(ARGS)`` syntax)."""

    name: str
    meaning: str
    prior: str


@dataclass(frozen=True)
class Statistic:
    """A targeted predictive statistic (a discrepancy in the sense of
    Gelman, Meng and Stern 1996): a number that moves when its assumption fails.

    ``compute(data, outcomes, draws)`` is vectorised over S posterior draws:
    ``outcomes`` maps each observed name to an array with a leading axis of
    length S (the observed data broadcast, or replicated data), ``draws`` maps
    each posterior variable to its S draws. It returns an array of length S.

    ``sides`` says which departures count: ``"two"``, ``"greater"`` (the
    observed value is larger than replicated ones when the assumption fails)
    or ``"less"``.
    """

    name: str
    meaning: str
    compute: Callable[..., np.ndarray]
    sides: str = "two"


@dataclass(frozen=True)
class Relaxation:
    """A nested expansion of the model with one extra parameter.

    ``build(data, options, prior)`` returns the expanded PyMC model; its extra
    parameter is ``parameter`` (declared with its prior among the recipe's
    parameters) and ``null`` is the value that restores the assumption.
    ``negligible`` is the distance from the null below which the expansion
    makes no practical difference; the verdict asks how much posterior mass
    lies beyond it. ``planted`` is a realistic violation strength: the value
    benchmarks and tests give the parameter when they plant this fault;
    ``planted_options`` are the design options under which the fault can
    be planted at all (e.g. ``eventual=all``: an estimated eventual share
    already absorbs units that never have the event).
    """

    parameter: str
    meaning: str
    build: Callable[..., Any]
    null: float
    negligible: float
    # applies(options) -> False when the design's options already relax the
    # assumption (e.g. an estimated eventual share); None means always.
    applies: Callable[[Mapping[str, Any]], bool] | None = None
    planted: float | None = None
    planted_options: Mapping[str, str] | None = None
    # True for extra variation that any misfit can hide in (a beta-binomial or
    # Dirichlet-multinomial concentration): with large counts it gains from a
    # structural fault as much as from its own, so the verdict step names it
    # the cause only when it remains under the best structural relaxation.
    absorbs_misfit: bool = False

    def applies_to(self, options: Mapping[str, Any]) -> bool:
        """Whether this expansion means anything under the given options."""
        return self.applies is None or bool(self.applies(options))


@dataclass(frozen=True)
class Assumption:
    """One assumption of the generative story, with the checks that test it."""

    key: str
    statement: str
    statistic: Statistic | None = None
    relaxation: Relaxation | None = None
    # What to try when the assumption fails: text, or ``advice(options) ->
    # str`` when the remedy depends on the design (an option already set is
    # no remedy).
    advice: str | Callable[[Mapping[str, Any]], str] = ""
    # ``informed_by(data) -> str``: "" when the table can inform the
    # assumption, else why it cannot (one cohort cannot differ from others);
    # the assumption is then `unchecked` with that reason, and neither its
    # statistic nor its relaxation is judged.
    informed_by: Callable[["Dataset"], str] | None = None
    # ``made(options) -> bool``: False when the design does not make this
    # assumption at all (no covariates, no covariate_form); None: always made.
    made: Callable[[Mapping[str, Any]], bool] | None = None

    def made_under(self, options: Mapping[str, Any]) -> bool:
        """Whether a design with these options makes this assumption."""
        return self.made is None or bool(self.made(options))

    def advice_for(self, options: Mapping[str, Any]) -> str:
        """The advice under the design's options."""
        return self.advice(options) if callable(self.advice) else self.advice

    def uninformed(self, data: "Dataset") -> str:
        """Why ``data`` cannot inform this assumption ("" when it can)."""
        return self.informed_by(data) if self.informed_by is not None else ""


@dataclass(frozen=True)
class DemoScenario:
    """An invented scenario: a table simulated from documented true values."""

    title: str
    story: str
    table: Any  # pandas DataFrame as a user would have it
    options: dict[str, str]
    truth: dict[str, Any]


@dataclass(frozen=True)
class Recipe:
    """A generative process template.

    validate(table, options) -> Dataset
        Check the table once, at the boundary; raise ``DataError``.
    simulate(rng, data, params, options) -> Dataset
        Independent NumPy simulator: new outcomes for the same design.
    build_model(data, options, prior) -> pymc.Model
        The PyMC model of the same story. Outcomes enter through ``pm.Data``
        containers named as in ``observed`` so that one compiled model serves
        every refit; ``prior(name, **kwargs)`` creates a parameter with its
        (possibly overridden) prior.
    observed(data) -> {container name: array}
        The values of the outcome containers for a dataset.
    outcome_names
        The observed random variables of the model (their posterior predictive
        draws feed the statistics).
    covariate
        The column the report plots against (distance, age, ...).
    figure(data, options, posterior, predictive) -> matplotlib Figure, optional
        The recipe's own picture of fitted versus observed; ``posterior`` and
        ``predictive`` map variable names to draws flattened over
        (chain, draw) into a leading axis. It may return ``(figure,
        caption)`` when the caption depends on the data (the values drawn).
    derived(data, options, posterior) -> {name: array of S draws}, optional
        Quantities the report summarises with their uncertainty (shares at
        maturity, long-run absorption shares, ...).
    demo(rng) -> DemoScenario, optional
        An invented scenario for ``workbench demo``.
    people_decisions
        True when the recipe is typically used for decisions about people
        (the report then carries the caution).
    approximate_likelihood
        Empty when the model's likelihood is the story's exact law; otherwise
        why it only approximates it (a text, or a function of the dataset
        giving it, when that depends on the table's layout). Calibration then
        still ranks the log-likelihood but does not count its departure
        against the model code (data from the exact story are expected to
        rank off), and the prior predictive check compares mean outcomes only.
    """

    name: str
    summary: str
    columns: tuple[Column, ...]
    options: tuple[Option, ...]
    parameters: tuple[Parameter, ...]
    assumptions: tuple[Assumption, ...]
    validate: Callable[..., Any]
    simulate: Callable[..., Any]
    build_model: Callable[..., Any]
    observed: Callable[..., Mapping[str, np.ndarray]]
    outcome_names: tuple[str, ...]
    covariate: str
    figure: Callable[..., Any] | None = None
    derived: Callable[..., Any] | None = None
    demo: Callable[..., "DemoScenario"] | None = None
    people_decisions: bool = False
    source: str = ""
    approximate_likelihood: str | Callable[["Dataset"], str] = ""
    # How the report names each observed variable, from the table's columns
    # ({"y": "successes"}); a function of the options when the columns are options.
    outcome_columns: Mapping[str, str] | Callable[[dict], Mapping[str, str]] | None = None

    def read_options(self, given: Mapping[str, Any]) -> dict[str, Any]:
        """Parse ``--set`` values against the declared options, filling defaults."""
        known = {o.name: o for o in self.options}
        unknown = sorted(set(given) - set(known))
        if unknown:
            raise OptionError(
                f"recipe '{self.name}' has no option '{unknown[0]}'; "
                f"expected one of: {', '.join(known) or '(none)'}"
            )
        values = {}
        for name, option in known.items():
            if name in given:
                values[name] = option.read(given[name])
            elif option.default is REQUIRED:
                raise OptionError(
                    f"recipe '{self.name}' needs option '{name}' ({option.meaning}); "
                    f"found none: add --set {name}=VALUE"
                )
            else:
                values[name] = option.default
        return values


@dataclass
class Dataset:
    """A validated table: plain arrays, trusted by everything downstream.

    ``columns`` holds one NumPy array per column (labels as integer codes),
    ``labels`` the original text of each label column, in code order.
    ``source_rows`` maps each dataset row to the input table's row numbers
    (several when identical rows were summed).
    """

    columns: dict[str, np.ndarray]
    labels: dict[str, list[str]] = field(default_factory=dict)
    source_rows: list[list[int]] = field(default_factory=list)
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def rows(self) -> int:
        return len(next(iter(self.columns.values()))) if self.columns else 0

    def __getitem__(self, name: str) -> np.ndarray:
        return self.columns[name]

    def replace(self, **columns: np.ndarray) -> "Dataset":
        """A copy with some columns replaced (simulated outcomes)."""
        new = dict(self.columns)
        new.update(columns)
        return Dataset(new, self.labels, self.source_rows, self.extra)

    def to_frame(self):
        """The dataset as a pandas DataFrame with label columns as text."""
        import pandas as pd

        frame = pd.DataFrame(self.columns)
        for name, labels in self.labels.items():
            frame[name] = [labels[i] for i in self.columns[name]]
        return frame


# Partial pooling learns how much groups differ from the groups themselves:
# with two groups that spread rests on one difference and its posterior is
# the prior's (a funnel the sampler diverges in), so automatic pooling keeps
# the groups apart below this many (Gelman 2006, Prior distributions for
# variance parameters in hierarchical models: few groups inform a group-level
# scale little).
PARTIAL_POOLING_MIN_GROUPS = 3


def choose_pooling(options: Mapping[str, Any], groups: int) -> str:
    """The pooling in force: ``options['pooling']`` or, for ``auto``, by group count.

    ``auto`` gives ``complete`` for one group, ``none`` (each group its own
    value) below :data:`PARTIAL_POOLING_MIN_GROUPS` and ``partial`` from there.
    Raises :class:`DataError` when the option asks for groups the table lacks.
    """
    from workbench.errors import DataError

    pooling = options.get("pooling", "auto")
    if pooling == "auto":
        if groups < 2:
            return "complete"
        return "partial" if groups >= PARTIAL_POOLING_MIN_GROUPS else "none"
    if pooling in {"none", "partial"} and groups < 2:
        raise DataError(f"option 'pooling={pooling}' needs a 'group' column with at least two "
                        f"groups; found {groups}")
    return pooling


@dataclass
class Design:
    """A recipe bound to the options and prior overrides of one run."""

    recipe: Recipe
    options: dict[str, Any]
    priors: dict[str, str]
    # The options the user wrote, in the order written: the label keeps them
    # even where they repeat a default (timing-curve:family=weibull).
    typed: tuple[str, ...] = ()

    @property
    def name(self) -> str:
        return self.recipe.name

    @property
    def assumptions(self) -> tuple[Assumption, ...]:
        """The assumptions this design makes (covariate_form only with covariates)."""
        return tuple(a for a in self.recipe.assumptions if a.made_under(self.options))

    @property
    def outcome_names(self) -> tuple[str, ...]:
        return self.recipe.outcome_names

    def prior_text(self, name: str) -> str:
        """The prior in force for a parameter: the override or the recipe's default."""
        if name in self.priors:
            return self.priors[name]
        for parameter in self.recipe.parameters:
            if parameter.name == name:
                return parameter.prior
        raise OptionError(f"recipe '{self.recipe.name}' declares no parameter '{name}'")

    def prior(self, name: str, **kwargs):
        """Create parameter ``name`` with its prior inside the current PyMC model."""
        from workbench.priors import parse_prior

        return parse_prior(self.prior_text(name), where=f"prior of {name}").create(name, **kwargs)

    def build(self, data: Dataset, relaxation: Relaxation | None = None):
        """The PyMC model for ``data``, expanded by ``relaxation`` when given."""
        builder = relaxation.build if relaxation else self.recipe.build_model
        return builder(data, self.options, self.prior)

    def validate(self, table) -> Dataset:
        return self.recipe.validate(table, self.options)

    def observed(self, data: Dataset) -> Mapping[str, np.ndarray]:
        return self.recipe.observed(data)

    def simulate(self, rng: np.random.Generator, data: Dataset, params: dict) -> Dataset:
        return self.recipe.simulate(rng, data, params, self.options)

    def __reduce__(self):
        # Recipes hold functions and option values of modules loaded by path
        # under private names that another process cannot import: a worker
        # rebuilds the design from plain data (the file, the recipe's name and
        # the options as the user types them).
        if not self.recipe.source:
            # A recipe imported as an ordinary module (``from recipes.timing_curve
            # import RECIPE``) pickles by reference to that module.
            return (Design, (self.recipe, self.options, dict(self.priors), tuple(self.typed)))
        options = {k: option_text(v) for k, v in self.options.items() if v is not None}
        return (_design_from_source, (self.recipe.source, self.recipe.name, options, dict(self.priors),
                                      tuple(self.typed)))

    def label(self) -> str:
        """The design as the user wrote it, e.g. ``timing-curve:family=weibull``.

        The options typed come first in their order, then any other option
        that differs from its default, then the prior overrides.
        """
        shown = [k for k in self.typed if k in self.options] + \
            [k for k in self._changed() if k not in self.typed]
        return self._text(shown)

    def key(self) -> str:
        """The design's identity whatever way it was written: options that differ
        from their defaults, in name order (fit caches and duplicate checks)."""
        return self._text(self._changed())

    def _changed(self) -> list[str]:
        defaults = {o.name: o.default for o in self.recipe.options}
        return [k for k, v in sorted(self.options.items()) if v != defaults.get(k)]

    def _text(self, names: list[str]) -> str:
        parts = [self.recipe.name] + [f"{k}={option_text(self.options[k])}" for k in names]
        parts += [f"{k}~{v}" for k, v in sorted(self.priors.items())]
        return ":".join(parts)


def outcome_words(design) -> dict[str, str]:
    """The table columns behind each observed variable of ``design`` ({} when unknown)."""
    named = getattr(getattr(design, "recipe", None), "outcome_columns", None) or {}
    return dict(named(design.options) if callable(named) else named)


def likelihood_approximation(design, data) -> str:
    """Why the design's likelihood only approximates its story on ``data`` ('' when it is exact)."""
    note = getattr(getattr(design, "recipe", None), "approximate_likelihood", "") or ""
    return note(data) if callable(note) else note


def _design_from_source(source: str, name: str, options: dict, priors: dict,
                        typed: tuple[str, ...] = ()) -> "Design":
    from workbench.registry import recipe_from_file

    recipe = recipe_from_file(source, name)
    return Design(recipe, recipe.read_options(options), priors, typed)


def make_design(recipe: Recipe, options: Mapping[str, Any], priors: Mapping[str, str]) -> Design:
    """Bind a recipe to parsed options and checked prior overrides."""
    from workbench.priors import check_support, parse_prior

    values = recipe.read_options(options)
    known = {p.name for p in recipe.parameters}
    checked = {}
    for name, text in priors.items():
        if name not in known:
            from difflib import get_close_matches

            close = get_close_matches(name, known, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else f" (parameters: {', '.join(sorted(known))})"
            raise OptionError(f"--prior: recipe '{recipe.name}' has no parameter '{name}'{hint}")
        spec = parse_prior(str(text), where=f"--prior {name}")
        default = next(p.prior for p in recipe.parameters if p.name == name)
        check_support(spec, parse_prior(default, where=f"prior of {name}"), name, f"--prior {name}")
        checked[name] = str(spec)
    return Design(recipe, values, checked, tuple(k for k in options if k in values))
