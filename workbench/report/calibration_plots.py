"""Figures of a simulation-based calibration, as matplotlib Figures.

* :func:`ecdf_difference_figure`: per quantity, the ECDF of the fractional
  ranks minus the uniform CDF, with the simultaneous band inside which the
  whole curve stays with probability 95% when the ranks are uniform.
* :func:`rank_histogram_figure`: per quantity, the rank histogram with the
  range each bar keeps 99% of the time under uniformity.

Both draw numbers the calibration already holds; neither judges.

References
----------
Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
discrete uniformity and its applications in goodness-of-fit evaluation and
multiple sample comparison. Statistics and Computing 32, 32.
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
Validating Bayesian inference algorithms with simulation-based calibration.
arXiv:1804.06788 (rank histograms with a binomial band).
"""

from __future__ import annotations

import functools
import math
import textwrap

import numpy as np
from matplotlib.figure import Figure
from scipy import stats

from workbench.report.plots import ALERT, FAINT, FIT, INK, literal_text, shorten_texts
from workbench.uniformity import BAND_LEVEL, ecdf_counts, ecdf_points, simultaneous_band
# The histogram band holds each bar 99% of the time (Talts et al. 2018 use 99%).
HISTOGRAM_BAND = 0.99
# Aim for about this many ranks per histogram bar so bars are not all noise.
RANKS_PER_BAR = 10
# Fewer bars than this say nothing a histogram should (two bars under a band
# covering the plot): below MIN_BARS * RANKS_PER_BAR replicates only the ECDF
# figure shows the ranks.
MIN_BARS = 5
COLUMNS = 3


def _literal(draw):
    """Quantity names are user text: draw them as written and cut long ones."""

    @functools.wraps(draw)
    def drawn(*args, **kwargs) -> Figure:
        with literal_text():
            fig = draw(*args, **kwargs)
        shorten_texts(fig)
        return fig

    return drawn


def _grid(count: int, columns: int, width: float = 3.2, height: float = 2.4):
    columns = max(1, min(columns, count))
    rows = max(1, math.ceil(count / columns))
    fig = Figure(figsize=(width * columns, height * rows), layout="constrained")
    axes = fig.subplots(rows, columns, squeeze=False).ravel()
    for ax in axes[count:]:
        ax.set_visible(False)
    for ax in axes:
        ax.spines[["top", "right"]].set_visible(False)
    return fig, axes[:count]


def _names(result, names):
    chosen = list(result.ranks) if names is None else [n for n in names if n in result.ranks]
    return chosen


@_literal
def ecdf_difference_figure(result, names=None, level: float = BAND_LEVEL,
                           columns: int = COLUMNS) -> Figure:
    """ECDF-difference plot with simultaneous bands, one panel per quantity.

    Parameters
    ----------
    result : workbench.calibration.CalibrationResult
    names : list of str, optional
        Quantities to draw (default: all, in the result's order).
    level : float, default 0.95
        Probability that uniform ranks keep the whole curve inside the band.
    columns : int, default 3
        Panels per row.

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
    discrete uniformity and its applications in goodness-of-fit evaluation
    and multiple sample comparison. Statistics and Computing 32, 32.
    """
    chosen = _names(result, names)
    if not chosen:
        return _empty("No successful calibration replicates to draw.")
    fig, axes = _grid(len(chosen), columns)
    L = result.L
    for ax, name in zip(axes, chosen):
        ranks = result.ranks[name]
        n = ranks.size
        K = ecdf_points(L, n)
        z, lower, upper = simultaneous_band(n, L, level)
        _, counts = ecdf_counts(ranks, L, K)
        ecdf = counts / max(n, 1)
        x = np.concatenate(([0.0], z, [1.0]))
        diff = np.concatenate(([0.0], ecdf - z, [0.0]))
        lo = np.concatenate(([0.0], lower - z, [0.0]))
        hi = np.concatenate(([0.0], upper - z, [0.0]))
        outside = bool(np.any(ecdf < lower) or np.any(ecdf > upper))
        ax.fill_between(x, lo, hi, step="post", color=FIT, alpha=0.18, linewidth=0,
                        label=f"{level:.0%} simultaneous band")
        ax.axhline(0.0, color=FAINT, linewidth=0.8)
        ax.step(x, diff, where="post", color=ALERT if outside else INK, linewidth=1.4,
                label="ECDF − uniform")
        test = result.tests.get(name)
        p = f"p = {test.p_value:.2g}" if test is not None else ""
        ax.set_title(f"{name}   {p}", fontsize=9, loc="left")
        ax.set_xlim(0, 1)
        ax.set_xlabel("fractional rank", fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0].set_ylabel("ECDF difference", fontsize=8)
    axes[0].legend(fontsize=7, frameon=False, loc="lower left")
    return fig


@_literal
def rank_histogram_figure(result, names=None, bins: int | None = None,
                          columns: int = COLUMNS) -> Figure:
    """Rank histograms with the 99% range of each bar under uniformity.

    Parameters
    ----------
    result : workbench.calibration.CalibrationResult
    names : list of str, optional
        Quantities to draw (default: all).
    bins : int, optional
        Bars per histogram; must divide ``L + 1``. By default the largest
        divisor giving about ten ranks per bar.
    columns : int, default 3
        Panels per row.

    Returns
    -------
    matplotlib.figure.Figure

    References
    ----------
    Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
    Validating Bayesian inference algorithms with simulation-based
    calibration. arXiv:1804.06788.
    """
    chosen = _names(result, names)
    if not chosen:
        return _empty("No successful calibration replicates to draw.")
    L = result.L
    n = len(result.replicates)
    if bins is None:
        fits = [d for d in range(2, L + 2) if (L + 1) % d == 0 and n / d >= RANKS_PER_BAR]
        bins = max(fits) if fits else 1
        if bins < MIN_BARS:
            return _empty(f"{n} replicates are too few for a rank histogram (about "
                          f"{RANKS_PER_BAR} per bar and at least {MIN_BARS} bars): the ECDF "
                          f"figure shows the ranks.")
    if (L + 1) % bins:
        raise ValueError(f"bins: expected a divisor of L + 1 = {L + 1}; found {bins}")
    fig, axes = _grid(len(chosen), columns)
    width = (L + 1) // bins
    expected = n / bins
    low, high = stats.binom.interval(HISTOGRAM_BAND, n, 1.0 / bins)
    for ax, name in zip(axes, chosen):
        counts = np.bincount(result.ranks[name] // width, minlength=bins)
        edges = np.arange(bins) * width
        colours = [ALERT if (c < low or c > high) else INK for c in counts]
        ax.bar(edges, counts, width=width, align="edge", color=colours, alpha=0.55,
               edgecolor="white", linewidth=0.5)
        # The band goes over the bars so its edges stay visible.
        ax.axhspan(low, high, color=FIT, alpha=0.25, linewidth=0, zorder=3)
        ax.axhline(expected, color=FIT, linewidth=0.9, zorder=4)
        ax.set_xlim(0, L + 1)
        ax.set_title(name, fontsize=9, loc="left")
        ax.set_xlabel(f"rank among {L} draws", fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0].set_ylabel("replicates", fontsize=8)
    return fig


def _empty(message: str) -> Figure:
    fig = Figure(figsize=(4, 1.2))
    ax = fig.subplots()
    ax.axis("off")
    ax.text(0.5, 0.5, textwrap.fill(message, 70), ha="center", va="center", fontsize=9, color=INK)
    return fig
