"""Fitted cumulative curves at chosen covariate values, against the data at those values.

With covariates, one curve for "the" cohort says little: the fitted story is
a curve per unit. This figure draws the fitted cumulative share of each
outcome (posterior median and 90% band) at a few covariate values and, in
the same colour, the observed data nearest those values:

- a label covariate: one curve per level;
- a numeric covariate: curves at its lower quartile, median and upper
  quartile (over units, or over cohorts in the count layout), on the
  covariate's own scale;
- several covariates: every combination when there are at most
  :data:`MAX_CURVES`, else only the covariate whose values move the fitted
  curve most varies and the others sit at their means or reference levels.

Observed data: with one row per unit, the Kaplan-Meier estimate (one
outcome) or Aalen-Johansen estimate (several) of the units nearest each
value (:func:`workbench.units.product_limit`); with cohort counts, each
cohort's observed cumulative shares in the colour of the value it is
nearest, with the 90% interval of its replicated shares when the posterior
predictive draws are given.

References
----------
Aalen, O. O. and Johansen, S. (1978). An empirical transition matrix for
non-homogeneous Markov chains based on censored observations. Scand. J.
Statist. 5(3), 141-150.
Kaplan, E. L. and Meier, P. (1958). Nonparametric estimation from incomplete
observations. JASA 53(282), 457-481.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from workbench import covariates, curves, units
from workbench.recipe import Dataset
from workbench.wording import number

# More curves than this in one panel can no longer be told apart by colour.
MAX_CURVES = 6
# A numeric covariate is drawn at its quartiles.
QUARTILES = (0.25, 0.5, 0.75)
QUARTILE_WORDS = ("lower quartile", "median", "upper quartile")
# Fitted bands: the central 90% of the posterior curves, as in the report's other fits.
BAND = (5, 50, 95)
# Distinct in hue and in lightness (readable in greyscale print).
TONES = ("#1b6f8a", "#c0662b", "#4f8a2e", "#7a3f8f", "#b8912a", "#3b3b3b")


@dataclass(frozen=True)
class Setting:
    """One fitted curve: covariate values on their own scale, its legend text and
    the rows of the data nearest to it."""

    values: dict
    label: str
    rows: np.ndarray


def figure(data: Dataset, family: str, posterior: dict, ylabel: str, draws: int = 200,
           predictive: dict | None = None):
    """Fitted cumulative curves at chosen covariate values against the data there.

    One panel per group (at most four, one row each) and outcome (columns).
    Returns the matplotlib figure and its caption, which names the values.
    Fitted curves carry the gid ``fitted-curve``, the observed estimates of
    the unit layout ``observed-estimate``.
    """
    import matplotlib.pyplot as plt

    from workbench.report import plots

    design = data.extra["covariates"]
    outcomes = data.extra["outcomes"]
    k, n_groups = len(outcomes), len(data.labels["group"])
    groups = data.labels["group"][:4]
    grid = np.linspace(0.0, data["age"].max() * 1.05, 120)
    rel = grid / data.extra["age_ref"]
    chosen = {name: _chosen_values(design, data, name) for name in design.names}
    combinations = int(np.prod([len(v) for v in chosen.values()]))
    if combinations <= MAX_CURVES:
        varied, held = list(design.names), []
    else:
        sizes = {name: _spread(_cumulative(design, posterior, draws, family, rel, n_groups, k,
                                           [s.values for s in _settings(design, data, chosen, [name])]))
                 for name in design.names}
        varied = [max(sizes, key=sizes.get)]
        held = [n for n in design.names if n not in varied]
    settings = _settings(design, data, chosen, varied)
    fitted = _cumulative(design, posterior, draws, family, rel, n_groups, k, [s.values for s in settings])
    lo, mid, hi = np.percentile(fitted, BAND, axis=1)  # (settings, T, G, K)

    unit = units.is_units(data)
    observed_share = replicated = None
    if not unit:
        from workbench.cohorts import counts_of, cumulative_counts

        observed_share = counts_of(data) / data["exposed"][:, None]
        if predictive and "y" in predictive:
            y = np.asarray(predictive["y"], dtype=float)
            y = y.reshape(y.shape[0], len(data.labels["cohort"]), -1)
            replicated = cumulative_counts(data, y) / data["exposed"][None, :, None]
    fig, axes = plt.subplots(len(groups), k, figsize=(4.2 * k + 3.2, 3.4 * len(groups)), squeeze=False)
    dodge = (np.arange(len(settings)) - (len(settings) - 1) / 2) * 0.006 * grid[-1]
    outside = total = 0
    for g, j in itertools.product(range(len(groups)), range(k)):
        ax = axes[g][j]
        for i, setting in enumerate(settings):
            tone = TONES[i % len(TONES)]
            ax.fill_between(grid, lo[i, :, g, j], hi[i, :, g, j], color=tone, alpha=0.18, lw=0)
            ax.plot(grid, mid[i, :, g, j], color=tone, lw=1.7, label=setting.label, gid="fitted-curve")
            rows = setting.rows & (data["group"] == g)
            if not rows.any():
                continue
            if unit:
                at, incidence = units.product_limit(data["time"][rows], data["code"][rows],
                                                    data["entry"][rows], k)
                # The estimate holds from the last outcome to the band's last follow-up.
                end = max(float(data["time"][rows].max()), float(at[-1]) if at.size else 0.0)
                ax.step(np.concatenate([[0.0], at, [end]]),
                        np.concatenate([[0.0], incidence[:, j], incidence[-1:, j] if at.size else [0.0]]),
                        where="post", color=tone, lw=0.9, alpha=0.9, gid="observed-estimate")
            elif replicated is None:
                ax.plot(data["age"][rows], observed_share[rows, j], "o", ms=4, mfc="none", mec=tone, mew=0.9)
            else:
                out, shown = plots.predictive_intervals(ax, data["age"][rows] + dodge[i], observed_share[rows, j],
                                                        replicated[:, rows, j], colour=tone, labelled=False)
                outside, total = outside + out, total + shown
        ax.set_ylim(0, 1.02)
        ax.set_xlabel("time" if unit else "age")
        title = [groups[g]] if n_groups > 1 else []
        title += [outcomes[j]] if k > 1 else []
        ax.set_title(", ".join(title), fontsize=10)
        ax.spines[["top", "right"]].set_visible(False)
    for g in range(len(groups)):
        axes[g][0].set_ylabel(ylabel if k == 1 else "share ended that way")
    handles, _ = axes[0][-1].get_legend_handles_labels()
    if replicated is not None:
        handles += plots.interval_legend(outside, total)
    plots.outside_legend(axes[0][-1], handles=handles)
    fig.tight_layout()
    return fig, caption(design, chosen, varied, held, unit, k, replicated is not None)


def caption(design, chosen: dict, varied: list[str], held: list[str], unit: bool, k: int,
            intervals: bool) -> str:
    """What the figure shows, naming the covariate values on their own scale."""
    parts = []
    for name in varied:
        values = chosen[name]
        if design.is_label(name):
            levels = [f"{v} (reference)" if v == design.references[name] else str(v) for v, _ in values]
            some = len(values) < len(design.levels(name))
            which = (f"the reference and the {len(values) - 1} most common of {len(design.levels(name))} levels"
                     if some else "each level")
            parts.append(f"{name} at {which}: " + ", ".join(levels))
        else:
            parts.append(f"{name} at its " + ", ".join(f"{word} {number(v)}" for v, word in values))
    text = ("Fitted cumulative share (posterior median and 90% band) at chosen covariate values: "
            + "; ".join(parts) + ".")
    if held:
        fixed = [f"{n} at its reference level {design.references[n]}" if design.is_label(n)
                 else f"{n} at its mean {number(design.mean[design.spans[n][0]])}" for n in held]
        text += (f" All combinations would draw more than {MAX_CURVES} curves, so only {varied[0]} varies "
                 f"(its values move the fitted curve most), with " + " and ".join(fixed) + ".")
    banded = [n for n in varied if not design.is_label(n) and len(chosen[n]) > 1]
    nearest = " (" + "; ".join(f"{n}: {_band_words(chosen[n])}" for n in banded) + ")" if banded else ""
    if unit:
        estimate = "Kaplan-Meier" if k == 1 else "Aalen-Johansen"
        text += f" Steps: the {estimate} estimate of the units nearest each value{nearest}."
    else:
        text += f" Points: each cohort's observed cumulative share, coloured by the value it is nearest{nearest}"
        text += (", with the 90% interval of its replicated values, a point outside it marked ◆."
                 if intervals else ".")
    return text


# --- the settings and their curves -------------------------------------------------------------


def _per_design_row(data: Dataset) -> np.ndarray:
    """The rows that stand for the table's units: every unit, or one row per cohort of counts."""
    if units.is_units(data):
        return np.arange(data.rows)
    return np.unique(data["cohort"], return_index=True)[1]


def _chosen_values(design, data: Dataset, name: str) -> list[tuple]:
    """(value, words) at which a covariate is drawn: its levels, or its quartiles."""
    values = design.values(name)[_per_design_row(data)]
    if design.is_label(name):
        levels = design.levels(name)
        if len(levels) > MAX_CURVES:
            counts = {level: int(np.sum(values == level)) for level in levels[1:]}
            common = sorted(counts, key=lambda level: -counts[level])[: MAX_CURVES - 1]
            levels = [levels[0]] + [level for level in levels[1:] if level in common]
        return [(level, "level") for level in levels]
    quartiles = np.quantile(values.astype(float), QUARTILES)
    out: list[tuple] = []
    for value, word in zip(quartiles, QUARTILE_WORDS):
        if out and np.isclose(value, out[-1][0]):  # a covariate with few distinct values
            out[-1] = (out[-1][0], f"{out[-1][1]} and {word}")
            continue
        out.append((float(value), word))
    return out


def _nearest(design, name: str, chosen: list[tuple]) -> np.ndarray:
    """Per row, the index of the chosen value it is nearest (labels: its own level)."""
    values = design.values(name)
    if design.is_label(name):
        keys = [v for v, _ in chosen]
        return np.asarray([keys.index(v) if v in keys else -1 for v in values])
    points = np.asarray([v for v, _ in chosen])
    return np.digitize(values.astype(float), (points[1:] + points[:-1]) / 2.0)


def _settings(design, data: Dataset, chosen: dict, varied: list[str]) -> list[Setting]:
    nearest = {name: _nearest(design, name, chosen[name]) for name in varied}
    out = []
    for combination in itertools.product(*(range(len(chosen[n])) for n in varied)):
        values, words = {}, []
        rows = np.ones(data.rows, dtype=bool)
        for name, i in zip(varied, combination):
            value, word = chosen[name][i]
            values[name] = value
            shown = value if design.is_label(name) else f"{number(value)} ({word})"
            words.append(f"{name} {shown}")
            rows &= nearest[name] == i
        out.append(Setting(values, ", ".join(words), rows))
    return out


def _cumulative(design, posterior: dict, draws: int, family: str, rel: np.ndarray, groups: int,
                k: int, values: list[dict]) -> np.ndarray:
    """Posterior cumulative share of each outcome at each setting, (settings, S, T, G, K).

    The reference unit's timing scale moves by ``exp(x'time_effect)`` and its
    shares by ``x'share_effect`` on their log-odds scale
    (:func:`workbench.covariates.shift_shares`) for each setting's design row x.
    """
    from workbench.cohorts import curve_draws

    pick, scale, shape, share, power = curve_draws(posterior, groups, k, draws)
    s = np.asarray(posterior["scale_group"]).shape[0]
    effects = len(design.effects)
    time_effect = np.asarray(posterior.get("time_effect", np.zeros((s, effects))), dtype=float)
    time_effect = time_effect.reshape(s, -1, effects)[pick]
    share_effect = posterior.get("share_effect")
    out = []
    for setting in values:
        x = design.row(setting)
        scale_x = scale * np.exp(time_effect @ x)[:, None, :]
        share_x = share
        if share_effect is not None:
            moved = np.asarray(share_effect, dtype=float).reshape(s, -1, effects)[pick] @ x
            # As many moved log-odds as outcomes: against the share that never ends.
            share_x = covariates.shift_shares(share, moved, against_open=moved.shape[-1] == k)
        f = curves.cdf(family, rel[None, :, None, None], scale_x[:, None], shape[:, None])
        out.append(share_x[:, None, None, :] * f ** power[:, None, None, None])
    return np.stack(out)


def _spread(cumulative: np.ndarray) -> float:
    """How far a covariate's values move the fitted curve: the largest gap between medians."""
    median = np.median(cumulative, axis=1)
    return float((median.max(axis=0) - median.min(axis=0)).max())


def _band_words(chosen: list[tuple]) -> str:
    points = np.asarray([v for v, _ in chosen])
    cuts = [number(c) for c in (points[1:] + points[:-1]) / 2.0]
    return ", ".join([f"below {cuts[0]}"] + [f"{a} to {b}" for a, b in zip(cuts, cuts[1:])]
                     + [f"{cuts[-1]} and above"])
