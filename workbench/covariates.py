"""Covariates: columns of the table that shift each unit's timing and eventual share.

A covariate is a numeric column (a dose, a size, an age at entry) or a label
column (a site, a variety). It enters the model as one column of a design
matrix per effect: a number standardised to mean 0 and sd 1 inside the model
(so one default prior fits any unit), a label as one indicator per level
other than its reference level, the first in sorted order.

In the ``timing-curve`` recipe each effect shifts the log timing scale (the
accelerated failure time form, Kalbfleisch and Prentice 2002, section 2.3.3:
a unit with covariates x has times ``exp(x'b)`` as long as a reference unit)
and the log-odds of the eventual share (the logistic mixture cure model of
Farewell 1982). The effects are reported per unit of the covariate (per
level against the reference for labels) as time ratios and odds ratios.
In ``stage-transitions`` each effect shifts the log-odds of an allowed move
against staying in the stage (a multinomial logit per source stage,
McFadden 1974), reported as odds ratios.

References
----------
Farewell, V. T. (1982). The use of mixture models for the analysis of survival
data with long-term survivors. Biometrics 38(4), 1041-1046.
McFadden, D. (1974). Conditional logit analysis of qualitative choice
behavior. In Frontiers in Econometrics, ed. P. Zarembka, 105-142. Academic Press.
Kalbfleisch, J. D. and Prentice, R. L. (2002). The Statistical Analysis of
Failure Time Data, 2nd ed. Wiley.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from workbench import tables
from workbench.errors import DataError
from workbench.recipe import Assumption, Option, Parameter, Relaxation, Statistic

# A column is read as numbers when more than this share of its non-empty
# cells are numbers; its other cells are then errors (a typo in a dose
# column), not extra levels of a label (common practice).
NUMERIC_SHARE = 0.5
# The dimension of the effect parameters.
DIM = "covariate"
# Each effect parameter's interpretable form per unit of its covariate.
RATIOS = {"time_effect": "time_ratio", "share_effect": "odds_ratio", "move_effect": "odds_ratio"}


def parse_names(text: str) -> tuple[str, ...]:
    """``"dose,site"`` -> ``("dose", "site")``; empty text: no covariates."""
    if not str(text).strip():
        return ()
    names = tuple(part.strip() for part in str(text).split(","))
    if "" in names:
        raise ValueError("a column name between every two commas")
    if len(set(names)) != len(names):
        raise ValueError("each column at most once")
    return names


def option(shifted: str) -> Option:
    """The ``covariates`` option of a recipe whose covariates shift ``shifted``."""
    return Option("covariates", f"a comma list of table columns (numbers or labels) that shift {shifted} "
                                "(default: none)", parse=parse_names, default=())


COVARIATES = option("the timing scale and the eventual share")

PARAMETERS = (
    # Per sd of a numeric covariate (per level for labels): 95% of time
    # ratios between 1/7 and 7, from no effect to a very strong one.
    Parameter("time_effect", "shift of the log timing scale per sd of a numeric covariate (per level of "
              "a label, against its reference level: the first in sorted order)", "normal(0,1)"),
    # On the log-odds scale: 95% of odds ratios between 1/20 and 20.
    Parameter("share_effect", "shift of the eventual share's log-odds per sd of a numeric covariate (per "
              "level of a label, against its reference level)", "normal(0,1.5)"),
)

# --- covariate_form: effects as modelled, linear on the model's scale ------------------------

# The relaxation parameter of ``covariate_form``: the log timing scale (or
# the log-odds of each move) bends with every numeric covariate by
# ``curvature * (z**2 - 1)``, z the covariate standardised. sd 0.5: 95% of
# curvatures within +-1, a unit 2 sd from the mean then up to e**3 (20
# times) as slow or as fast as one at the mean, against e**1.5 (4.5) for
# half that; the data decide within that range.
CURVATURE = "covariate_curvature"
CURVATURE_PARAMETER = Parameter(
    CURVATURE, "bend of the covariates' shift: curvature x (z^2 - 1) per numeric covariate z "
               "(standardised; covariate_form relaxed)", "normal(0,0.5)")
# A curvature this small moves a unit 2 sd from the mean by 3 x 0.05 = 0.15
# on the log scale (a 16% longer or shorter time) against one at the mean:
# as small as the cohort effects counted negligible (cohort_sd 0.05, about
# +-10% between cohorts two sd apart).
CURVATURE_NEGLIGIBLE = 0.05
# Planted: a unit 2 sd from the mean 2.5 times as slow as one at the mean
# (or, for moves, with 2.5 times the odds of each move).
CURVATURE_PLANTED = 0.3
# The second relaxation of ``covariate_form`` in the timing recipes: the
# covariates act on the curve's shape as well as its scale, so their time
# ratio differs between early and late ages (the accelerated failure time
# form fails). The log curve shape moves by ``shape_slope`` per sd of each
# numeric covariate. sd 0.3: 95% of slopes within +-0.6, a unit 2 sd from
# the mean then with a shape up to 3.3 times (or a third of) the typical one.
SHAPE_SLOPE = "shape_slope"
SHAPE_SLOPE_PARAMETER = Parameter(
    SHAPE_SLOPE, "change of the log curve shape per sd of each numeric covariate (covariate_form "
                 "relaxed: the covariates' time ratio differs between early and late ages)", "normal(0,0.3)")
# A slope this small changes the shape of a unit 2 sd from the mean by 6%:
# less than a shape's posterior sd on a few hundred units.
SHAPE_NEGLIGIBLE = 0.03
# Planted: a unit 2 sd above the mean has a shape 1.6 times the typical one.
SHAPE_PLANTED = 0.25
# A curvature needs three distinct values to show; bands of a numeric
# covariate for the statistic: at most this many, by quantile.
BANDS = 5


@dataclass(frozen=True)
class Design:
    """The covariates of a validated table.

    ``matrix`` has one row per dataset row and one column per effect
    (standardised numbers, 0/1 indicators); ``per_unit`` divides an effect
    on that scale to give it per unit of the covariate (the sd for numbers,
    1 for labels); ``effects`` names the columns (``dose``, ``site=north``);
    ``spans`` gives each covariate's first and past-last matrix column.
    """

    names: tuple[str, ...]
    effects: tuple[str, ...]
    matrix: np.ndarray
    per_unit: np.ndarray
    mean: np.ndarray
    references: dict
    spans: dict = field(default_factory=dict)

    def take(self, order: np.ndarray) -> "Design":
        return Design(self.names, self.effects, self.matrix[order], self.per_unit, self.mean,
                      self.references, self.spans)

    def is_label(self, name: str) -> bool:
        return name in self.references

    def levels(self, name: str) -> list[str]:
        """A label covariate's levels, the reference first."""
        start, stop = self.spans[name]
        return [self.references[name]] + [e[len(name) + 1:] for e in self.effects[start:stop]]

    def values(self, name: str) -> np.ndarray:
        """Each row's value of a covariate on its own scale: a number, or a label's level."""
        start, stop = self.spans[name]
        block = self.matrix[:, start:stop]
        if not self.is_label(name):
            return block[:, 0] * self.per_unit[start] + self.mean[start]
        codes = np.where(block.any(axis=1), block.argmax(axis=1) + 1, 0)
        return np.asarray(self.levels(name), dtype=object)[codes]

    def row(self, values: dict) -> np.ndarray:
        """One design-matrix row (standardised, indicators) for covariate values on their
        own scale; a covariate not in ``values`` sits at its mean or reference level."""
        x = np.zeros(len(self.effects))
        for name, value in values.items():
            start, stop = self.spans[name]
            if self.is_label(name):
                level = self.levels(name).index(value)
                if level:
                    x[start + level - 1] = 1.0
            else:
                x[start] = (float(value) - self.mean[start]) / self.per_unit[start]
        return x


def read(table: pd.DataFrame, names: tuple[str, ...], recipe: str, reserved: tuple[str, ...]) -> Design | None:
    """Check the covariate columns of ``table`` and build their design (None: no covariates).

    ``reserved`` are the layout's own columns, which cannot be covariates.
    """
    if not names:
        return None
    present = [str(c) for c in table.columns]
    for name in names:
        if name in reserved:
            raise DataError(f"option 'covariates': expected columns other than the layout's own "
                            f"({', '.join(reserved)}); found {name!r}")
        if name not in present:
            tables.require_columns(table, [name], recipe)
    blocks, effects, per_unit, mean, references, spans = [], [], [], [], {}, {}
    for name in names:
        start = len(effects)
        if _is_numeric(table[name]):
            values = tables.numeric_column(table, name)
            sd = float(values.std())
            if not sd > 0:
                raise DataError(f"column '{name}': expected a covariate that varies; found the value "
                                f"{values[0]:g} on every row")
            blocks.append(((values - values.mean()) / sd)[:, None])
            effects.append(name)
            per_unit.append(sd)
            mean.append(float(values.mean()))
            spans[name] = (start, len(effects))
            continue
        codes, seen = tables.label_column(table, name)
        levels = sorted(seen)
        codes = np.asarray([levels.index(level) for level in seen])[codes]
        if len(levels) < 2:
            raise DataError(f"column '{name}': expected a label covariate with at least two levels; "
                            f"found only {levels[0]!r}")
        # The reference is the first level in sorted order.
        references[name] = levels[0]
        blocks.append((codes[:, None] == np.arange(1, len(levels))[None, :]).astype(float))
        effects.extend(f"{name}={level}" for level in levels[1:])
        per_unit.extend([1.0] * (len(levels) - 1))
        mean.extend([0.0] * (len(levels) - 1))
        spans[name] = (start, len(effects))
    return Design(tuple(names), tuple(effects), np.hstack(blocks), np.asarray(per_unit),
                  np.asarray(mean), references, spans)


def has_covariates(options) -> bool:
    """Whether the design's options name any covariate (``covariate_form`` is made only then)."""
    return bool(options.get("covariates"))


def numeric_names(design: Design | None) -> list[str]:
    """The numeric covariates of a design (labels have one free effect per level: no form to bend)."""
    if design is None:
        return []
    return [name for name in design.names if not design.is_label(name)]


def form_to_check(data) -> str:
    """Why the table cannot show a covariate's effect bending ("" when it can)."""
    design = data.extra.get("covariates")
    numeric = numeric_names(design)
    if not numeric:
        return ("every covariate is a label, and a label's levels each have their own effect, so "
                "there is no form of the effect to be wrong")
    if any(len(np.unique(design.values(name))) >= 3 for name in numeric):
        return ""
    return ("every numeric covariate takes at most two values, and a line passes through two "
            "points exactly")


def curvature_basis(design: Design | None) -> np.ndarray | None:
    """Per row: the sum over numeric covariates of ``z**2 - 1`` (z standardised); None without any."""
    numeric = numeric_names(design)
    if not numeric:
        return None
    columns = [design.matrix[:, design.spans[name][0]] for name in numeric]
    return np.sum([z**2 - 1.0 for z in columns], axis=0)


def _times_basis(basis: np.ndarray | None, params: dict, name: str):
    """``params[name]`` times ``basis``: one draw gives (rows,), draws (S,) give (S, rows);
    0 when the parameter or the basis is absent (as under the assumption)."""
    if basis is None or name not in params:
        return 0.0
    value = np.asarray(params[name], dtype=float)
    return value.reshape(-1)[0] * basis if value.size == 1 else value.reshape(-1, 1) * basis


def curvature_shift(design: Design | None, params: dict):
    """The curvature relaxation's shift of the covariates' effect per row."""
    return _times_basis(curvature_basis(design), params, CURVATURE)


def shape_basis(design: Design | None) -> np.ndarray | None:
    """Per row: the sum of the standardised numeric covariates; None without any."""
    numeric = numeric_names(design)
    if not numeric:
        return None
    return np.sum([design.matrix[:, design.spans[name][0]] for name in numeric], axis=0)


def shape_shift(design: Design | None, params: dict):
    """The shape relaxation's shift of the log curve shape per row."""
    return _times_basis(shape_basis(design), params, SHAPE_SLOPE)


def bands(design: Design, name: str) -> tuple[np.ndarray, np.ndarray]:
    """Each row's band of a numeric covariate (at most :data:`BANDS`, by quantile) and each band's
    mean standardised value."""
    start = design.spans[name][0]
    z = design.matrix[:, start]
    distinct = np.unique(z)
    if distinct.size <= BANDS:
        band = np.searchsorted(distinct, z)
    else:
        edges = np.quantile(z, np.linspace(0, 1, BANDS + 1)[1:-1])
        band = np.searchsorted(np.unique(edges), z, side="right")
    band = np.unique(band, return_inverse=True)[1]
    centres = np.bincount(band, weights=z) / np.bincount(band)
    return band, centres


def bend_contrast(centres: np.ndarray) -> np.ndarray:
    """Weights over bands that read a residual pattern's curvature: the bands' squared
    centres with their mean and linear trend removed, of unit length (0 with two bands)."""
    x = np.asarray(centres, dtype=float)
    if x.size < 3:
        return np.zeros_like(x)
    basis = np.column_stack([np.ones_like(x), x])
    q = x**2 - basis @ np.linalg.lstsq(basis, x**2, rcond=None)[0]
    norm = float(np.sqrt((q**2).sum()))
    return q / norm if norm > 0 else np.zeros_like(x)


def band_sums(band: np.ndarray, n_bands: int, *arrays) -> tuple:
    """Each array (S, rows) summed over the rows of each band: (S, bands) apiece."""
    onehot = (band[:, None] == np.arange(n_bands)[None, :]).astype(float)
    return tuple(np.asarray(a, dtype=float) @ onehot for a in arrays)


def bend(design: Design, observed_and_expected) -> np.ndarray:
    """The ``covariate_bend`` statistic, summed over numeric covariates.

    ``observed_and_expected(band, n_bands)`` returns, per draw, each band's
    observed outcomes, expected outcomes and variance (S, bands). Each band's
    standardised residual (observed - expected) / sqrt(variance) is read by
    :func:`bend_contrast`: negative when the bands at both ends see fewer
    outcomes than the middle (their times longer than the linear effect
    says), positive when they see more.
    """
    total = 0.0
    for name in numeric_names(design):
        band, centres = bands(design, name)
        o, e, v = observed_and_expected(band, centres.size)
        r = (o - e) / np.sqrt(np.maximum(v, 1e-9))
        total = total + r @ bend_contrast(centres)
    return np.asarray(total, dtype=float)


def trend_contrast(centres: np.ndarray) -> np.ndarray:
    """Weights over bands that read a straight trend: the centred band centres, of unit length."""
    x = np.asarray(centres, dtype=float) - np.mean(centres)
    norm = float(np.sqrt((x**2).sum()))
    return x / norm if norm > 0 else np.zeros_like(x)


def age_trend_spread(design: Design, band_slopes) -> np.ndarray:
    """The ``covariate_age_trend`` statistic, summed over numeric covariates.

    ``band_slopes(rows)`` returns, per draw, the slope of standardised
    residuals on log age over the rows (units or table rows) of one band.
    The bands' slopes are read by :func:`trend_contrast`: zero when the
    covariate shifts the timing alike at every age, positive when the bands
    high on the covariate see their outcomes come later against the curve's
    shape than the low ones (their time ratio grows with age), negative for
    the reverse.
    """
    total = 0.0
    for name in numeric_names(design):
        band, centres = bands(design, name)
        slopes = np.stack([band_slopes(np.flatnonzero(band == b)) for b in range(centres.size)], axis=-1)
        total = total + slopes @ trend_contrast(centres)
    return np.asarray(total, dtype=float)


def _is_numeric(column: pd.Series) -> bool:
    if pd.api.types.is_bool_dtype(column):
        return False
    if pd.api.types.is_numeric_dtype(column):
        return True
    filled = column.dropna()
    filled = filled[filled.astype(str).str.strip() != ""]
    if filled.empty:
        return False
    return float(pd.to_numeric(filled, errors="coerce").notna().mean()) > NUMERIC_SHARE


def constant_within(design: Design, table: pd.DataFrame, cohort: np.ndarray, labels: list[str]) -> None:
    """In cohort counts every covariate is one value per cohort; name the rows that disagree."""
    from workbench.cohorts import same_within_cohort

    for name in design.names:
        # Compared as the text of the table, so numbers and labels alike.
        values, texts = tables.label_column(table.assign(**{name: table[name].astype(str).str.strip()}), name)
        same_within_cohort(cohort, labels, values, name, texts)


# --- the story in PyMC ---------------------------------------------------------------------


def shifts(design: Design, prior, name: str, over: str | None = None):
    """The effect parameter ``name`` (dims ``covariate``) and its linear shift per row.

    With ``over`` (a model dimension, one effect per covariate and element
    of it: an outcome) the parameter has dims ``(over, covariate)`` and the
    shift is (rows, elements). Also records the effect per unit of each
    covariate on its interpretable scale: ``time_ratio`` (exp of the log
    timing shift) for ``time_effect``, ``odds_ratio`` for an effect on
    log-odds (``share_effect``, ``move_effect``).
    """
    import pymc as pm
    import pytensor.tensor as pt

    dims = DIM if over is None else (over, DIM)
    effect = prior(name, dims=dims)
    pm.Deterministic(RATIOS[name], pt.exp(effect / design.per_unit), dims=dims)
    return pt.dot(pt.constant(design.matrix), effect.T)


def _relaxed_term(prior, relax: str | None, parameter: str, basis):
    """``parameter x basis`` per row when ``relax`` names ``parameter``, else None. Without a
    numeric covariate nothing moves: the expansion is recorded at its null."""
    import pymc as pm
    import pytensor.tensor as pt

    if relax != parameter:
        return None
    if basis is None:
        pm.Deterministic(parameter, pt.zeros(()))
        return None
    return prior(parameter) * pt.constant(basis)


def bent(design: Design, prior, relax: str | None, shift, by_element: bool = False):
    """``shift`` (rows, or rows x elements when ``by_element``), bent by the ``covariate_form``
    relaxation when ``relax`` asks for it: one curvature for every element."""
    term = _relaxed_term(prior, relax, CURVATURE, curvature_basis(design))
    if term is None:
        return shift
    return shift + (term[:, None] if by_element else term)


def shaped(design: Design, prior, relax: str | None):
    """The shape relaxation's shift of the log curve shape per row, or None when not relaxed."""
    return _relaxed_term(prior, relax, SHAPE_SLOPE, shape_basis(design))


FORM_ADVICE = ("The effect of a numeric covariate is not the modelled straight line: add a transformed "
               "column (its log, its square, or bands as a label) to --set covariates=..., or ask what "
               "else changes along it.")
# The timing recipes' remedy when the time ratio differs between early and late ages.
AGE_ADVICE = (" When its time ratio differs between early and late ages, fit the groups it defines "
              "with their own shapes (bands as a group column with --set shape_by_group=true).")


def form_assumption(build_model, scale: str, statistic: Statistic, timing: Statistic | None = None) -> tuple:
    """``covariate_form``: each covariate's effect is a straight line on ``scale`` (and, with
    ``timing``, the statistic of its age pattern, the same at every age).

    Made only when the design has covariates; informed only by a numeric
    covariate with three values or more; relaxed by :data:`CURVATURE`
    (``build_model(..., relax=CURVATURE)`` adds it through :func:`bent`) and,
    with ``timing``, by :data:`SHAPE_SLOPE` (through :func:`shaped`), in an
    entry of the same key that carries the ``timing`` statistic.
    """
    from functools import partial

    statement = f"Each covariate's effect is as modelled: a straight line on {scale}" + (
        ", the same at every age." if timing is not None else ".")
    advice = FORM_ADVICE + (AGE_ADVICE if timing is not None else "")
    entries = [Assumption(
        key="covariate_form",
        statement=statement,
        statistic=statistic,
        relaxation=Relaxation(
            parameter=CURVATURE, build=partial(build_model, relax=CURVATURE),
            meaning=f"the covariates' shift of {scale} may bend, by a square term per numeric covariate",
            null=0.0, negligible=CURVATURE_NEGLIGIBLE, planted=CURVATURE_PLANTED,
        ),
        advice=advice,
        informed_by=form_to_check,
        made=has_covariates,
    )]
    if timing is not None:
        entries.append(Assumption(
            key="covariate_form",
            statement=statement,
            statistic=timing,
            relaxation=Relaxation(
                parameter=SHAPE_SLOPE, build=partial(build_model, relax=SHAPE_SLOPE),
                meaning="the covariates may also change the curve's shape, so that their time ratio "
                        "differs between early and late ages",
                null=0.0, negligible=SHAPE_NEGLIGIBLE, planted=SHAPE_PLANTED,
            ),
            advice=advice,
            informed_by=form_to_check,
            made=has_covariates,
        ))
    return tuple(entries)


def linear(design: Design, params: dict, name: str) -> np.ndarray:
    """The shift per row from a draw (or ``(S, effects)`` draws) of ``name``; 0 when absent."""
    if design is None or name not in params:
        return 0.0
    effect = np.asarray(params[name], dtype=float)
    return effect @ design.matrix.T if effect.ndim > 1 else design.matrix @ effect.reshape(-1)


def linear_by(design: Design, params: dict, name: str) -> np.ndarray:
    """The shift per row and element of an effect with one value per element and covariate.

    A draw (elements, effects) gives (rows, elements); ``(S, elements,
    effects)`` draws give (S, rows, elements); 0 when absent.
    """
    if design is None or name not in params:
        return 0.0
    effect = np.asarray(params[name], dtype=float)
    return np.einsum("re,...ke->...rk", design.matrix, effect)


def shift_shares(share: np.ndarray, shift: np.ndarray, against_open: bool) -> np.ndarray:
    """Outcome shares (..., K) moved by ``shift`` on the multinomial log-odds scale.

    ``against_open``: ``shift`` (..., K) moves each outcome's log-odds
    against the share that never ends (1 - the sum of the shares); else
    ``shift`` (..., K - 1) moves the later outcomes' log-odds against the
    first, and the shares add up as ``share`` does.
    """
    share = np.asarray(share, dtype=float)
    tiny = 1e-300
    if against_open:
        open_share = np.maximum(1.0 - share.sum(axis=-1, keepdims=True), tiny)
        eta = np.log(np.maximum(share, tiny)) - np.log(open_share) + shift
        eta = np.concatenate([eta, np.zeros(eta.shape[:-1] + (1,))], axis=-1)
        total = 1.0
    else:
        total = share.sum(axis=-1, keepdims=True)
        log_share = np.log(np.maximum(share, tiny))
        eta = log_share - log_share[..., :1]
        eta = eta + np.concatenate([np.zeros(np.shape(shift)[:-1] + (1,)), shift], axis=-1)
    eta = eta - eta.max(axis=-1, keepdims=True)
    parts = np.exp(eta) / np.exp(eta).sum(axis=-1, keepdims=True)
    return parts[..., :share.shape[-1]] * total


def on_model_scale(design: Design, per_unit_effects) -> np.ndarray:
    """Effects per unit of each covariate (log time or odds ratios) on the model's scale."""
    return np.asarray(per_unit_effects, dtype=float) * design.per_unit
