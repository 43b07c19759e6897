"""Figures of a check run, as matplotlib Figures.

Each function draws numbers the checks already hold; none of them judges.
:func:`to_data_uri` turns a figure into an inline PNG so the report stays one
self-contained file.
"""

from __future__ import annotations

import base64
import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from workbench.wording import number  # noqa: E402

# Our palette: ink for data, a muted teal for fitted bands, amber for the
# prior, and a red-brown for divergences; readable in greyscale print.
INK = "#1d2433"
FIT = "#2a7f7a"
PRIOR = "#c58b1c"
ALERT = "#a23b2a"
FAINT = "#9aa3ad"


# Figures label things with user text (group names, outcome columns); a label
# longer than this has no room in a figure, and the report's tables keep it whole.
MAX_FIGURE_TEXT = 60


def literal_text():
    """Context in which new figures show text as written: no mathtext between
    dollar signs (an unknown command there would abort the drawing).

    Example
    -------
    >>> with literal_text():
    ...     fig, ax = plt.subplots(); ax.set_title("$5 & $\\undefined$")
    """
    return matplotlib.rc_context({"text.parse_math": False})


def shorten_texts(fig) -> None:
    """Cut every line of a text of ``fig`` longer than :data:`MAX_FIGURE_TEXT` characters."""
    import matplotlib.text

    for text in fig.findobj(matplotlib.text.Text):
        lines = text.get_text().split("\n")
        if any(len(line) > MAX_FIGURE_TEXT for line in lines):
            text.set_text("\n".join(line if len(line) <= MAX_FIGURE_TEXT
                                     else line[: MAX_FIGURE_TEXT - 1] + "…" for line in lines))


def wrap_text(text: str, width: int = MAX_FIGURE_TEXT) -> str:
    """``text`` broken into lines of at most ``width`` characters where it can be.

    Lines break after a space or a ``:`` (design labels such as
    ``timing-curve:family=weibull`` have no spaces); a piece longer than
    ``width`` on its own stays whole for :func:`shorten_texts` to cut.
    """
    import re

    lines, line = [], ""
    for piece in re.findall(r"[^ :]*(?:[ :]|$)", text):
        if line and len(line + piece.rstrip()) > width:
            lines.append(line.rstrip())
            line = ""
        line += piece
    lines.append(line.rstrip())
    return "\n".join(x for x in lines if x)


# Tick labels closer than this (pixels at the report's resolution) read as one.
TICK_GAP_PX = 2.0
# Thinning named ticks stops here: every k-th label up to this k, then numbers only.
MAX_TICK_THINNING = 50


def _shown_tick_labels(axis) -> list:
    """The tick labels of ``axis`` that are drawn (inside the view, with text)."""
    low, high = sorted(axis.get_view_interval())
    slack = (high - low) * 1e-9
    return [label for loc, label in zip(axis.get_majorticklocs(), axis.get_majorticklabels())
            if low - slack <= loc <= high + slack and label.get_visible() and label.get_text()]


def _touching(labels, renderer, along: int) -> list[tuple[str, str]]:
    """Neighbouring labels (along axis 0: x, 1: y) closer than :data:`TICK_GAP_PX`."""
    boxes = sorted(((label.get_window_extent(renderer), label.get_text()) for label in labels),
                   key=lambda b: b[0].get_points()[0][along])
    return [(ta, tb) for (a, ta), (b, tb) in zip(boxes, boxes[1:])
            if a.get_points()[1][along] + TICK_GAP_PX > b.get_points()[0][along]]


def _drawn(fig):
    """The renderer of ``fig`` after drawing it (a figure made without pyplot gets a raster canvas)."""
    if not hasattr(fig.canvas, "get_renderer"):
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        FigureCanvasAgg(fig)
    fig.canvas.draw()
    return fig.canvas.get_renderer()


def overlapping_tick_labels(fig) -> list[tuple[str, str]]:
    """Pairs of neighbouring tick labels of ``fig`` that touch or overlap when drawn."""
    renderer = _drawn(fig)
    return [pair for ax in fig.axes for along, axis in enumerate((ax.xaxis, ax.yaxis))
            for pair in _touching(_shown_tick_labels(axis), renderer, along)]


def keep_tick_labels_apart(fig) -> None:
    """Thin the ticks of every axis whose labels would touch or overlap.

    Numeric axes get fewer ticks; named ticks (cohorts, stages) are turned
    upright first, then only every k-th name is shown.
    """
    from matplotlib.ticker import FixedLocator, MaxNLocator

    renderer = _drawn(fig)
    for ax in fig.axes:
        for along, axis in enumerate((ax.xaxis, ax.yaxis)):
            step, bins, named = 1, None, None
            while _touching(labels := _shown_tick_labels(axis), renderer, along):
                locator = axis.get_major_locator()
                if isinstance(locator, MaxNLocator):  # a linear axis: fewer round ticks
                    bins = min(bins or len(labels), len(labels)) - 1
                    if bins < 1:
                        break
                    axis.set_major_locator(MaxNLocator(nbins=bins, steps=[1, 2, 2.5, 5, 10]))
                elif not isinstance(locator, FixedLocator):
                    break
                elif along == 0 and labels[0].get_rotation() == 0:
                    axis.set_tick_params(labelrotation=90)
                elif step < MAX_TICK_THINNING:
                    if named is None:
                        named = (list(locator.locs), [label.get_text() for label in axis.get_majorticklabels()])
                    step += 1
                    axis.set_ticks(named[0][::step], named[1][::step])
                else:
                    break
                fig.canvas.draw()


def to_data_uri(fig) -> str:
    """The figure as an inline PNG ``data:`` URI (long labels shortened, ticks kept apart)."""
    shorten_texts(fig)
    keep_tick_labels_apart(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _figure(width=6.4, height=3.6):
    fig, ax = plt.subplots(figsize=(width, height))
    ax.spines[["top", "right"]].set_visible(False)
    return fig, ax


# Each observed point is drawn with the central 90% interval of its own
# replicated values, the same level as the fitted bands (common practice:
# Gabry et al. 2019 draw 90% intervals in their predictive plots).
INTERVAL = 0.9


def interval_of(replicated, level: float = INTERVAL) -> tuple[np.ndarray, np.ndarray]:
    """The central ``level`` interval of replicated values (S, n) per point: (low, high)."""
    tail = 50.0 * (1.0 - level)
    low, high = np.nanpercentile(np.asarray(replicated, dtype=float), [tail, 100.0 - tail], axis=0)
    return low, high


def predictive_intervals(ax, x, observed, replicated, colour=INK, labelled: bool = True,
                         level: float = INTERVAL) -> tuple[int, int]:
    """Each observed point with its own posterior predictive interval; points outside marked.

    ``replicated`` holds draws (S, n) on the scale of ``observed`` (n,). The
    interval is a whisker behind its point; a point outside it is drawn as
    a filled diamond in the alert colour. Returns (points outside, points).
    Artists carry the gids ``predictive-interval``, ``observed-inside`` and
    ``observed-outside``; ``labelled`` gives them legend entries (a figure
    that calls this several times adds :func:`interval_legend` once instead).

    References
    ----------
    Gabry, J., Simpson, D., Vehtari, A., Betancourt, M. and Gelman, A.
    (2019). Visualization in Bayesian workflow. JRSS A 182(2), 389-402
    (predictive intervals per observation).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(observed, dtype=float)
    low, high = interval_of(replicated, level)
    shown = np.isfinite(y) & np.isfinite(low) & np.isfinite(high)
    outside = shown & ((y < low) | (y > high))
    inside = shown & ~outside
    words = interval_words(int(outside.sum()), int(shown.sum()), level) if labelled else (None,) * 3
    ax.vlines(x[shown], low[shown], high[shown], color=colour, lw=1.0, alpha=0.55, label=words[0],
              gid="predictive-interval")
    ax.plot(x[inside], y[inside], "o", ms=4, mfc="white", mec=colour, mew=1.1, label=words[1],
            gid="observed-inside")
    ax.plot(x[outside], y[outside], "D", ms=5, color=ALERT, label=words[2], gid="observed-outside")
    return int(outside.sum()), int(shown.sum())


def interval_words(outside: int, total: int, level: float = INTERVAL) -> tuple[str, str, str]:
    """Legend words of :func:`predictive_intervals`: whisker, point inside, point outside."""
    return (f"{level:.0%} predictive interval of each point", "observed",
            f"outside its interval ({outside} of {total})")


def interval_legend(outside: int, total: int, colour=INK, level: float = INTERVAL) -> list:
    """Legend handles for figures that draw :func:`predictive_intervals` several times."""
    from matplotlib.lines import Line2D

    whisker, point, marked = interval_words(outside, total, level)
    return [Line2D([], [], color=colour, lw=1.0, alpha=0.55, marker="|", ms=10, ls="none", label=whisker),
            Line2D([], [], marker="o", ms=4, mfc="white", mec=colour, ls="none", label=point),
            Line2D([], [], marker="D", ms=5, color=ALERT, ls="none", label=marked)]


def predictive_by_covariate(x, observed, prior, posterior, xlabel: str, ylabel: str, fitted=None):
    """Observed values against the covariate: each with its posterior predictive interval.

    ``prior`` and ``posterior`` are predictive draws (S, n) on the scale of
    ``observed`` (e.g. rates); either may be None. The prior's 90% band is
    shaded; the band of ``fitted`` draws (S, n) of the expected value, when
    given, else of the posterior predictive, joins the points; every point
    carries the interval of its own replicated values (:func:`predictive_intervals`).
    """
    fig, ax = _figure()
    order = np.argsort(x, kind="stable")
    xs = np.asarray(x, dtype=float)[order]
    if prior is not None:
        lo, hi = interval_of(np.asarray(prior)[:, order])
        ax.fill_between(xs, lo, hi, color=PRIOR, alpha=0.2, lw=0, label=f"prior predictive {INTERVAL:.0%}")
    curve = fitted if fitted is not None else posterior
    if curve is not None:
        curve = np.asarray(curve, dtype=float)[:, order]
        lo, hi = interval_of(curve)
        what = "fitted" if fitted is not None else "posterior predictive"
        ax.fill_between(xs, lo, hi, color=FIT, alpha=0.25, lw=0, label=f"{what} {INTERVAL:.0%}")
        ax.plot(xs, np.nanmedian(curve, axis=0), color=FIT, lw=1.5, label=f"{what} median")
    if posterior is not None:
        predictive_intervals(ax, xs, np.asarray(observed)[order], np.asarray(posterior)[:, order])
    else:
        ax.plot(xs, np.asarray(observed)[order], "o", color=INK, ms=4, label="observed")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    outside_legend(ax)
    return fig


def outside_legend(ax, fontsize: float = 8, **kwargs):
    """The legend beside the axes (right), never over the data."""
    return ax.legend(frameon=False, fontsize=fontsize, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                     borderaxespad=0.0, **kwargs)


# The histogram of a statistic spans its replicated values within Tukey's
# far-out fences (3 interquartile ranges beyond the quartiles; Tukey 1977,
# Exploratory Data Analysis): a few extreme replicates (one failure at a
# distance where success is all but certain) would otherwise squeeze the
# rest into one bar. Values beyond are counted on the figure.
FENCE_IQR = 3.0


def statistic_range(replicated: np.ndarray, observed: float) -> tuple[float, float]:
    """The axis of a statistic's histogram: replicated values within the far-out fences, and the observed."""
    q1, q3 = np.percentile(replicated, [25, 75])
    spread = q3 - q1
    low, high = float(replicated.min()), float(replicated.max())
    if spread > 0:
        low, high = max(low, q1 - FENCE_IQR * spread), min(high, q3 + FENCE_IQR * spread)
    if np.isfinite(observed):
        low, high = min(low, observed), max(high, observed)
    if high <= low:
        low, high = low - 0.5, high + 0.5
    return low, high


def statistic_check(observed, replicated, name: str, p_value: float):
    """Histogram of T(y_rep) with the observed T(y) marked, over a range robust to outliers.

    The axis is that of :func:`statistic_range`; how many replicated values
    lie beyond it, and how far, is written under the title.
    """
    fig, ax = _figure(5.2, 3.0)
    replicated = np.asarray(replicated, dtype=float)
    finite = replicated[np.isfinite(replicated)]
    value = float(np.nanmean(np.asarray(observed, dtype=float)))
    title = f"posterior predictive p = {p_value:.3g}"
    if finite.size:
        low, high = statistic_range(finite, value)
        ax.hist(finite, bins=40, range=(low, high), color=FIT, alpha=0.6, label="replicated data")
        for side, beyond, end in (("below", finite[finite < low], np.min), ("above", finite[finite > high], np.max)):
            if beyond.size:
                title += (f"\n{beyond.size} of {finite.size} replicated values {side} the axis "
                          f"(to {number(end(beyond))})")
    ax.axvline(value, color=INK, lw=2, label="observed data")
    ax.set_xlabel(name)
    ax.set_yticks([])
    ax.set_title(title, fontsize=8, loc="left")
    ax.legend(frameon=False, fontsize=8)
    return fig


def relaxation_posterior(draws, null: float, negligible: float, name: str,
                         support: tuple[float, float] = (-np.inf, np.inf)):
    """Posterior of an expansion parameter with its null and negligible band.

    The histogram of the draws and the band stay inside the parameter's
    ``support`` (a share or a scale cannot be negative), and the axis starts
    at a finite bound the draws come close to.
    """
    fig, ax = _figure(5.2, 3.0)
    values = np.asarray(draws, dtype=float).ravel()
    values = values[np.isfinite(values)]
    lower, upper = support
    band = (max(null - negligible, lower), min(null + negligible, upper))
    low = min(values.min(), band[0]) if values.size else band[0]
    high = max(values.max(), band[1]) if values.size else band[1]
    ax.hist(values, bins=50, range=(max(values.min(), lower), min(values.max(), upper)) if values.size else None,
            color=FIT, alpha=0.6, density=True, label="posterior")
    ax.axvspan(*band, color=FAINT, alpha=0.3, label="negligible")
    ax.axvline(null, color=INK, ls="--", lw=1.5, label=f"null ({null:g})")
    pad = 0.03 * (high - low)
    ax.set_xlim(max(low - pad, lower), min(high + pad, upper))
    ax.set_xlabel(name)
    ax.set_yticks([])
    ax.legend(frameon=False, fontsize=8)
    return fig


def rank_plot(posterior: dict[str, np.ndarray], names: list[str]):
    """Rank histograms per chain (uniform when chains agree); one panel per parameter."""
    names = names[:6]
    fig, axes = plt.subplots(len(names), 1, figsize=(6.4, 1.5 * len(names) + 0.4), squeeze=False)
    for ax, name in zip(axes[:, 0], names):
        values = np.asarray(posterior[name])  # (chain, draw)
        chains, draws = values.shape
        ranks = values.ravel().argsort(kind="stable").argsort(kind="stable").reshape(chains, draws)
        bins = np.linspace(0, chains * draws, 21)
        for c in range(chains):
            counts, _ = np.histogram(ranks[c], bins=bins)
            ax.step(bins[:-1], counts, where="post", lw=1.2, label=f"chain {c + 1}")
        ax.axhline(draws / 20, color=FAINT, ls=":", lw=1)
        ax.set_ylabel(name, fontsize=8)
        ax.set_yticks([])
        ax.spines[["top", "right"]].set_visible(False)
    axes[0, 0].legend(frameon=False, fontsize=7, ncol=4)
    axes[-1, 0].set_xlabel("rank of draw among all chains")
    fig.tight_layout()
    return fig


def pair_plot(posterior: dict[str, np.ndarray], names: list[str], divergent: np.ndarray):
    """Scatter of each pair of (up to four) parameters, divergent draws marked."""
    names = names[:4]
    k = len(names)
    if k < 2:
        fig, ax = _figure(5.2, 3.0)
        v = np.asarray(posterior[names[0]]).ravel()
        ax.hist(v, bins=50, color=FIT, alpha=0.6)
        if divergent.any():
            ax.plot(v[divergent], np.zeros(divergent.sum()), "x", color=ALERT, label="divergent")
            ax.legend(frameon=False, fontsize=8)
        ax.set_xlabel(names[0])
        return fig
    fig, axes = plt.subplots(k - 1, k - 1, figsize=(2.2 * (k - 1) + 1, 2.2 * (k - 1) + 0.5), squeeze=False)
    for i in range(1, k):
        for j in range(k - 1):
            ax = axes[i - 1, j]
            if j >= i:
                ax.axis("off")
                continue
            x = np.asarray(posterior[names[j]]).ravel()
            y = np.asarray(posterior[names[i]]).ravel()
            ax.plot(x[~divergent], y[~divergent], ".", ms=1.5, color=FIT, alpha=0.4)
            if divergent.any():
                ax.plot(x[divergent], y[divergent], "x", ms=4, color=ALERT)
            if i == k - 1:
                ax.set_xlabel(names[j], fontsize=8)
            if j == 0:
                ax.set_ylabel(names[i], fontsize=8)
            ax.tick_params(labelsize=7)
    fig.suptitle("posterior draws (x: divergent)", fontsize=9, x=0.02, ha="left")
    fig.tight_layout()
    return fig


# Named ticks on the Pareto k plot while this many terms or fewer; beyond,
# the terms are numbered and the names stay in the report's text.
MAX_NAMED_TERMS = 40


def pareto_k(k: np.ndarray, threshold: float, unit: str = "row", names: list[str] | None = None):
    """Pareto k of each PSIS-LOO term against the threshold.

    ``unit`` says what one term leaves out (``row``, ``cohort``, ``distance``,
    ``step``) and ``names`` are the terms' labels in the table's words; they
    become the ticks while they fit (:func:`keep_tick_labels_apart` thins them).
    """
    fig, ax = _figure(6.0, 2.8)
    k = np.asarray(k, dtype=float)
    terms = np.arange(1, k.size + 1)
    bad = k > threshold
    ax.plot(terms[~bad], k[~bad], "o", ms=4, color=FIT, label="k below threshold")
    if bad.any():
        ax.plot(terms[bad], k[bad], "s", ms=5, color=ALERT, label="k above threshold")
    ax.axhline(threshold, color=INK, ls="--", lw=1, label=f"threshold {threshold:.2f}")
    plural = unit if unit.endswith("s") else unit + "s"
    if names and len(names) == k.size and k.size <= MAX_NAMED_TERMS:
        ax.set_xticks(terms, [_without_unit(n, unit) for n in names], fontsize=7)
        ax.set_xlabel(f"{unit} left out ({k.size} {plural})")
    else:
        ax.set_xlabel(f"{unit} left out, numbered from 1 ({k.size} {plural})")
    ax.set_ylabel("Pareto k")
    outside_legend(ax)
    return fig


def _without_unit(name: str, unit: str) -> str:
    """``cohort c02`` on an axis already titled cohort: ``c02``."""
    return name[len(unit) + 1:] if name.startswith(unit + " ") else name


def loo_pit(numbers: dict, name: str):
    """LOO-PIT ECDF minus the uniform CDF, with its simultaneous band.

    ``numbers`` are those of :func:`workbench.checks.loo.loo_pit_numbers`
    for one observed variable.
    """
    x = np.asarray(numbers["points"])
    ecdf, lower, upper = (np.asarray(numbers[k]) for k in ("ecdf", "lower", "upper"))
    fig, ax = plt.subplots(figsize=(5.2, 3.0))
    ax.fill_between(x, lower - x, upper - x, step="post", color=FIT, alpha=0.18, linewidth=0,
                    label=f"{numbers['level']:.0%} simultaneous band")
    ax.axhline(0.0, color=FAINT, linewidth=0.8)
    ax.step(x, ecdf - x, where="post", color=ALERT if numbers["outside"] else INK, linewidth=1.4,
            label="LOO-PIT ECDF − uniform")
    ax.set_xlim(0, 1)
    ax.set_xlabel(f"LOO-PIT of {name}", fontsize=8)
    ax.set_ylabel("ECDF difference", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=7, frameon=False, loc="lower left")
    fig.tight_layout()
    return fig
