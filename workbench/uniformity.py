"""Are calibration ranks uniform? Tests on plain NumPy arrays.

A calibration rank is an integer in ``0..L``: how many of ``L`` posterior
draws fall below the value that generated the data. When the model is coded
as its story says and the sampler is right, ranks are uniform on ``0..L``.

Two tests, both on the same ranks:

* the ECDF-difference test with simultaneous bands (Säilynoja et al. 2022):
  the empirical CDF of the fractional ranks is compared with the uniform CDF
  at ``K`` points, where ``K`` divides ``L + 1`` so that the discrete ranks
  are exactly uniform there; the band and its null distribution come from
  ArviZ's simulation of the same statistic;
* Pearson's chi-square on ranks binned into equal bins (the fallback when
  too few replicates make the ECDF test coarse, and a second opinion).

:func:`departure` describes the shape of any departure with two z-scores:
a shift of the mean rank (the posterior sits beside the truth: bias) and an
excess or lack of extreme ranks (U shape: posterior too narrow; hump: too
wide).

References
----------
Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
discrete uniformity and its applications in goodness-of-fit evaluation and
multiple sample comparison. Statistics and Computing 32, 32.
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
Validating Bayesian inference algorithms with simulation-based calibration.
arXiv:1804.06788 (rank histograms and the shapes of their departures).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from functools import lru_cache

import numpy as np
from scipy import stats
from scipy.special import bdtr

# Draws of the null statistic behind every ECDF p-value and band; the Monte
# Carlo error of a p-value near 0.01 is then about 0.0016 (sqrt(p(1-p)/S)).
NULL_SIMULATIONS = 4000
# Fixed seed of that null simulation: the same ranks always give the same p.
NULL_SEED = 20221
# Probability inside the simultaneous band drawn on plots (common practice).
BAND_LEVEL = 0.95
# Pearson's chi-square is trusted when every bin expects at least five ranks
# (Cochran's rule, common practice).
MIN_EXPECTED_PER_BIN = 5


@dataclass(frozen=True)
class UniformityTest:
    """The verdict-free numbers of one uniformity check.

    p_value         the ECDF test's p-value (the chi-square one when the ECDF
                    test cannot run)
    ecdf_p_value    ECDF-difference test with simultaneous bands
    ecdf_points     K, the number of points where the ECDF is compared
    chi2, chi2_p_value, chi2_bins
                    Pearson's chi-square on binned ranks (None when too few)
    shift_z         z-score of the mean fractional rank against 1/2
    spread_z        z-score of the share of ranks in the outer half
    shape           ``"slope"``, ``"u_shape"`` or ``"hump"``: the larger of the two departures
    direction       ``"true_above"``/``"true_below"`` (slope: the generating
                    value sits above/below the posterior), ``"too_narrow"`` (U
                    shape) or ``"too_wide"`` (hump)
    n               number of ranks
    """

    p_value: float
    ecdf_p_value: float | None
    ecdf_points: int
    chi2: float | None
    chi2_p_value: float | None
    chi2_bins: int
    shift_z: float
    spread_z: float
    shape: str
    direction: str
    n: int

    def to_dict(self) -> dict:
        return asdict(self)


def rank_uniformity(ranks, L: int) -> UniformityTest:
    """Test ranks in ``0..L`` for discrete uniformity.

    Parameters
    ----------
    ranks : array-like of int
        One rank per replicate.
    L : int
        Number of posterior draws each rank was taken among.

    Returns
    -------
    UniformityTest

    References
    ----------
    Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
    discrete uniformity and its applications in goodness-of-fit evaluation and
    multiple sample comparison. Statistics and Computing 32, 32.
    """
    ranks = _checked(ranks, L)
    n = ranks.size
    ecdf_p, points = ecdf_test(ranks, L)
    chi = chi_square_test(ranks, L)
    shift_z, spread_z, shape, direction = departure(ranks, L)
    p = ecdf_p if ecdf_p is not None else (chi[1] if chi else 1.0)
    return UniformityTest(
        p_value=float(p),
        ecdf_p_value=ecdf_p,
        ecdf_points=points,
        chi2=chi[0] if chi else None,
        chi2_p_value=chi[1] if chi else None,
        chi2_bins=chi[2] if chi else 0,
        shift_z=shift_z,
        spread_z=spread_z,
        shape=shape,
        direction=direction,
        n=n,
    )


def _checked(ranks, L: int) -> np.ndarray:
    ranks = np.asarray(ranks)
    if ranks.ndim != 1:
        raise ValueError(f"ranks: expected a 1-d array; found shape {ranks.shape}")
    if ranks.size and (ranks.min() < 0 or ranks.max() > L):
        raise ValueError(f"ranks: expected integers in 0..{L}; found {ranks.min()}..{ranks.max()}")
    return ranks.astype(np.int64)


def _divisors(m: int) -> list[int]:
    return [d for d in range(1, m + 1) if m % d == 0]


def ecdf_points(L: int, n: int) -> int:
    """K: the largest divisor of ``L + 1`` not above ``n``.

    At ``z_k = k/K`` the ECDF of discrete uniform ranks has exactly the law of
    a continuous uniform sample's ECDF, so the continuous band applies.
    """
    return max(d for d in _divisors(L + 1) if d <= max(n, 1))


def ecdf_counts(ranks, L: int, K: int) -> tuple[np.ndarray, np.ndarray]:
    """Evaluation points ``z_k = k/K`` (k = 1..K-1) and how many ranks have
    fractional rank ``(r + 1)/(L + 1) <= z_k``."""
    z = np.arange(1, K) / K
    cuts = np.arange(1, K) * ((L + 1) // K)
    counts = np.searchsorted(np.sort(ranks), cuts, side="left")
    return z, counts


def _tail_probability(counts, n: int, z) -> float:
    """Smallest two-sided pointwise binomial tail probability over the points
    (the statistic whose null law sets the simultaneous band)."""
    lower = bdtr(counts, n, z)
    upper = stats.binom.sf(counts - 1, n, z)  # P(X >= count), precise in the tail
    return float(2.0 * min(np.min(lower), np.min(upper)))


@lru_cache(maxsize=64)
def _null_tail_probabilities(n: int, K: int) -> np.ndarray:
    """Sorted draws of :func:`_tail_probability` under uniformity (ArviZ's simulation)."""
    from arviz_stats.ecdf_utils import simulate_confidence_bands

    z = np.arange(1, K) / K
    rng = np.random.default_rng(NULL_SEED)
    levels = np.linspace(0.0, 1.0, NULL_SIMULATIONS)
    # Asking for every order statistic of ArviZ's simulated band levels
    # returns its whole null sample, sorted.
    gamma = simulate_confidence_bands(n, 1, z, levels, NULL_SIMULATIONS, rng)
    return np.sort(1.0 - np.asarray(gamma))


def ecdf_test(ranks, L: int) -> tuple[float | None, int]:
    """p-value of the ECDF-difference test with simultaneous bands, and K.

    The p-value is the share of null simulations at least as extreme, capped
    by the union bound ``K * s`` (``s``: the observed smallest pointwise tail
    probability), which stays valid far beyond the simulations' resolution.
    None when fewer than two points can be compared.

    References
    ----------
    Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
    discrete uniformity and its applications in goodness-of-fit evaluation and
    multiple sample comparison. Statistics and Computing 32, 32.
    """
    ranks = _checked(ranks, L)
    n = ranks.size
    K = ecdf_points(L, n)
    if n < 2 or K < 2:
        return None, K
    z, counts = ecdf_counts(ranks, L, K)
    observed = _tail_probability(counts, n, z)
    null = _null_tail_probabilities(n, K)
    as_extreme = np.searchsorted(null, observed, side="right")
    p_sim = (1 + as_extreme) / (null.size + 1)
    return float(min(p_sim, K * observed, 1.0)), K


def simultaneous_band(n: int, L: int, level: float = BAND_LEVEL):
    """Points ``z``, and the lower and upper ECDF values of the simultaneous band.

    Under uniformity the whole ECDF of ``n`` ranks stays inside the band with
    probability ``level``.
    """
    from arviz_stats.ecdf_utils import get_pointwise_confidence_band

    K = ecdf_points(L, n)
    z = np.arange(1, K) / K
    if n < 2 or K < 2:
        return z, z.copy(), z.copy()
    gamma = 1.0 - np.quantile(_null_tail_probabilities(n, K), 1.0 - level)
    lower, upper = get_pointwise_confidence_band(gamma, n, z)
    return z, lower, upper


def chi_square_test(ranks, L: int) -> tuple[float, float, int] | None:
    """Pearson's chi-square on ranks in equal bins: (statistic, p-value, bins).

    Bins: the largest divisor of ``L + 1`` that leaves every bin at least
    :data:`MIN_EXPECTED_PER_BIN` expected ranks; None when not even two bins do.
    """
    ranks = _checked(ranks, L)
    n = ranks.size
    fits = [d for d in _divisors(L + 1) if d >= 2 and n / d >= MIN_EXPECTED_PER_BIN]
    if not fits:
        return None
    bins = max(fits)
    observed = np.bincount(ranks // ((L + 1) // bins), minlength=bins)
    result = stats.chisquare(observed)
    return float(result.statistic), float(result.pvalue), bins


def departure(ranks, L: int) -> tuple[float, float, str, str]:
    """Shape of a departure from uniformity: (shift_z, spread_z, shape, direction).

    ``shift_z`` compares the mean mid-rank ``(r + 1/2)/(L + 1)`` with 1/2:
    positive when the generating values sit above most posterior draws.
    ``spread_z`` compares the share of ranks in the outer half (the lowest and
    highest quarters) with its uniform share: positive for a U shape (the
    posterior is too narrow), negative for a hump (too wide).
    """
    ranks = _checked(ranks, L)
    n = max(ranks.size, 1)
    m = L + 1
    mid = (ranks + 0.5) / m
    var_mid = (m * m - 1) / (12.0 * m * m)
    shift_z = float((mid.mean() - 0.5) / np.sqrt(var_mid / n)) if ranks.size else 0.0
    quarter = m // 4
    outer_share0 = 2 * quarter / m
    outer = (ranks < quarter) | (ranks >= m - quarter)
    if ranks.size and 0 < outer_share0 < 1:
        sd = np.sqrt(outer_share0 * (1 - outer_share0) / n)
        spread_z = float((outer.mean() - outer_share0) / sd)
    else:
        spread_z = 0.0
    if abs(shift_z) >= abs(spread_z):
        shape, direction = "slope", ("true_above" if shift_z > 0 else "true_below")
    elif spread_z > 0:
        shape, direction = "u_shape", "too_narrow"
    else:
        shape, direction = "hump", "too_wide"
    return shift_z, spread_z, shape, direction
