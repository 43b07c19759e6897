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
    """Cut every text of ``fig`` longer than :data:`MAX_FIGURE_TEXT` characters."""
    import matplotlib.text

    for text in fig.findobj(matplotlib.text.Text):
        content = text.get_text()
        if len(content) > MAX_FIGURE_TEXT:
            text.set_text(content[: MAX_FIGURE_TEXT - 1] + "…")


def to_data_uri(fig) -> str:
    """The figure as an inline PNG ``data:`` URI (long labels shortened)."""
    shorten_texts(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    plt.close(fig)
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def _figure(width=6.4, height=3.6):
    fig, ax = plt.subplots(figsize=(width, height))
    ax.spines[["top", "right"]].set_visible(False)
    return fig, ax


def predictive_by_covariate(x, observed, prior, posterior, xlabel: str, ylabel: str):
    """Observed values against the covariate with prior and posterior predictive bands.

    ``prior`` and ``posterior`` are draws with shape (S, n) on the same scale
    as ``observed`` (e.g. rates); either may be None.
    """
    fig, ax = _figure()
    order = np.argsort(x, kind="stable")
    xs = np.asarray(x)[order]
    for draws, colour, label in ((prior, PRIOR, "prior predictive 90%"),
                                 (posterior, FIT, "posterior predictive 90%")):
        if draws is None:
            continue
        lo, mid, hi = np.percentile(np.asarray(draws)[:, order], [5, 50, 95], axis=0)
        ax.fill_between(xs, lo, hi, color=colour, alpha=0.25, lw=0, label=label)
        if colour == FIT:
            ax.plot(xs, mid, color=colour, lw=1.5, label="posterior predictive median")
    ax.plot(xs, np.asarray(observed)[order], "o", color=INK, ms=4, label="observed")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.legend(frameon=False, fontsize=8)
    return fig


def statistic_check(observed, replicated, name: str, p_value: float):
    """Histogram of T(y_rep) with the observed T(y) marked."""
    fig, ax = _figure(5.2, 3.0)
    replicated = np.asarray(replicated, dtype=float)
    observed = np.asarray(observed, dtype=float)
    finite = replicated[np.isfinite(replicated)]
    ax.hist(finite, bins=40, color=FIT, alpha=0.6, label="replicated data")
    ax.axvline(np.nanmean(observed), color=INK, lw=2, label="observed data")
    ax.set_xlabel(name)
    ax.set_yticks([])
    ax.set_title(f"posterior predictive p = {p_value:.3g}", fontsize=9, loc="left")
    ax.legend(frameon=False, fontsize=8)
    return fig


def relaxation_posterior(draws, null: float, negligible: float, name: str):
    """Posterior of an expansion parameter with its null and negligible band."""
    fig, ax = _figure(5.2, 3.0)
    ax.hist(np.asarray(draws).ravel(), bins=50, color=FIT, alpha=0.6, density=True, label="posterior")
    ax.axvspan(null - negligible, null + negligible, color=FAINT, alpha=0.3, label="negligible")
    ax.axvline(null, color=INK, ls="--", lw=1.5, label=f"null ({null:g})")
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


def pareto_k(k: np.ndarray, threshold: float):
    fig, ax = _figure(6.0, 2.6)
    k = np.asarray(k)
    rows = np.arange(1, k.size + 1)
    bad = k > threshold
    ax.plot(rows[~bad], k[~bad], "o", ms=4, color=FIT, label="k below threshold")
    if bad.any():
        ax.plot(rows[bad], k[bad], "s", ms=5, color=ALERT, label="k above threshold")
    ax.axhline(threshold, color=INK, ls="--", lw=1)
    ax.set_xlabel("row")
    ax.set_ylabel("Pareto k")
    ax.legend(frameon=False, fontsize=8)
    return fig


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
