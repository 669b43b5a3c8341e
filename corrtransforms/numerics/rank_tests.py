"""Distribution-free tests of a sequence for a trend or a change: the stationarity tests.

- reverse arrangements test (:func:`reverse_arrangements_test`): monotonic trend, exact null
  distribution (Mahonian numbers), percentage points as tabulated by Bendat & Piersol;
- runs test about the median (:func:`runs_test`): clustering, slow swings, exact (Mood 1940)
  or normal approximation;
- variance outlier test (:func:`variance_outlier_test`): the most extreme of a set of mean
  squares against the pooled others (Cochran 1941, written with the F distribution).

Arrays in, results out (numpy and scipy only); the screening stage runs them on segment
statistics (:mod:`corrtransforms.numerics.segments`).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from typing import Tuple

import numpy as np
from scipy import stats as _stats

RUNS_METHODS = ("exact", "normal")


# --------------------------------------------------------------------------------------------
# Reverse arrangements test


def reverse_arrangements(sequence) -> float:
    """Number of reverse arrangements (inversions) of a sequence.

    Parameters
    ----------
    sequence : array_like, shape (N,)
        The values ``x_1 .. x_N`` in time order.

    Returns
    -------
    float
        ``A = sum_{i<j} h_ij`` with ``h_ij = 1`` if ``x_i > x_j``; a tie counts 1/2 (Kendall's
        convention). An integer for a sequence without ties.

    Notes
    -----
    ``A`` is the number of discordant pairs between the sequence and its time index, so
    Kendall's tau of (index, x) is ``1 - 4 A / (N (N - 1))`` for a sequence without ties.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Wiley 2010, Sect. 4.5.2
    (reverse arrangements test; section number from memory).
    M. G. Kendall, Rank Correlation Methods, Griffin 1948, Ch. 1 and 4.
    """
    x = np.asarray(sequence, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"sequence must be one-dimensional, got shape {x.shape}")
    later = np.triu(np.ones((len(x), len(x)), dtype=bool), k=1)
    greater = (x[:, None] > x[None, :]) & later
    ties = (x[:, None] == x[None, :]) & later
    return float(greater.sum() + 0.5 * ties.sum())


@functools.lru_cache(maxsize=256)
def _reverse_arrangements_pmf(n: int) -> np.ndarray:
    pmf = np.ones(1)
    for k in range(2, n + 1):
        # inserting the k-th element adds 0 .. k-1 inversions with equal probability 1/k:
        # p_k(a) = (1/k) sum_{j=0}^{k-1} p_{k-1}(a - j), evaluated with a running sum
        cumulative = np.concatenate(([0.0], np.cumsum(pmf)))
        size = len(pmf) + k - 1
        upper = np.minimum(np.arange(size) + 1, len(pmf))
        lower = np.maximum(np.arange(size) - k + 1, 0)
        pmf = (cumulative[upper] - cumulative[lower]) / k
    pmf = np.clip(pmf, 0.0, None)
    pmf.setflags(write=False)
    return pmf


def reverse_arrangements_distribution(n: int) -> np.ndarray:
    """Exact null distribution of the number of reverse arrangements of N values.

    Parameters
    ----------
    n : int
        Length of the sequence, ``n >= 1``.

    Returns
    -------
    ndarray, shape (n (n - 1) / 2 + 1,)
        ``P[A = a]`` for ``a = 0 .. n (n - 1) / 2`` (read-only).

    Notes
    -----
    Under the null hypothesis (independent, identically distributed values) every one of the
    ``N!`` orderings is equally likely, so ``A`` is the inversion count of a random permutation.
    Its counts are the Mahonian numbers, with generating function
    ``prod_{k=1}^{N} (1 + q + ... + q^{k-1})``; the recursion multiplies by one factor per
    step. Mean ``N (N - 1) / 4``, variance ``N (2N + 5) (N - 1) / 72``.

    References
    ----------
    M. G. Kendall, Rank Correlation Methods, Griffin 1948, Ch. 4 (distribution of the number of
    inversions; recurrence relation).
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2, Eq. (4.54)-(4.55) for the
    mean and variance (equation numbers from memory).
    """
    n = int(n)
    if n < 1:
        raise ValueError(f"n must be at least 1, got {n}")
    return _reverse_arrangements_pmf(n)


def reverse_arrangements_moments(n: int) -> Tuple[float, float]:
    """Mean ``N (N - 1) / 4`` and variance ``N (2N + 5) (N - 1) / 72`` of the inversion count."""
    return n * (n - 1) / 4.0, n * (2 * n + 5) * (n - 1) / 72.0


PERCENTAGE_POINT_CONVENTIONS = ("nearest", "conservative")


def _percentage_point(pmf: np.ndarray, alpha: float, convention: str) -> int:
    if convention not in PERCENTAGE_POINT_CONVENTIONS:
        raise ValueError(
            f"convention = {convention!r}: must be one of " + ", ".join(f'"{c}"' for c in PERCENTAGE_POINT_CONVENTIONS)
        )
    if not 0 < alpha < 1:
        raise ValueError(f"alpha = {alpha!r}: must be in (0, 1)")
    exceed = 1.0 - np.cumsum(pmf)  # P[X > x]
    if convention == "nearest":
        return int(np.argmin(np.abs(exceed - alpha)))
    if alpha < 0.5:
        return int(np.argmax(exceed <= alpha + 1e-12))
    return int(np.nonzero(exceed >= alpha - 1e-12)[0][-1])


def reverse_arrangements_percentage_point(n: int, alpha: float, convention: str = "nearest") -> int:
    """Percentage point ``A_{N; alpha}`` of the reverse arrangements distribution.

    Parameters
    ----------
    n : int
        Length of the sequence.
    alpha : float
        Upper-tail probability in (0, 1).
    convention : {"nearest", "conservative"}
        ``"nearest"``: the ``a`` whose ``P[A > a]`` is nearest to ``alpha``. ``"conservative"``:
        for ``alpha < 0.5`` the smallest ``a`` with ``P[A > a] <= alpha``, otherwise the
        largest ``a`` with ``P[A > a] >= alpha`` (a test using these points never exceeds its
        nominal level).

    Returns
    -------
    int

    Notes
    -----
    Bendat & Piersol tabulate ``A_{N; alpha}`` with ``P[A > A_{N; alpha}] = alpha`` for
    ``alpha`` in {0.99, 0.975, 0.95, 0.05, 0.025, 0.01}; a two-sided test at level ``alpha``
    accepts stationarity when ``A_{N; 1 - alpha/2} < A <= A_{N; alpha/2}``. The entries of that
    table agree with the ``"nearest"`` points of the exact distribution within one count for
    N <= 90 (tests/stages/test_screen.py).

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Appendix A, table of percentage points
    of the reverse arrangement distribution.
    """
    return _percentage_point(reverse_arrangements_distribution(n), alpha, convention)


@dataclasses.dataclass(frozen=True)
class TrendTestResult:
    """Result of a test on a sequence: the statistic, its null mean and variance, the p-value."""

    statistic: float
    mean: float
    variance: float
    p_value: float
    n: int


def reverse_arrangements_test(sequence) -> TrendTestResult:
    """Two-sided reverse arrangements test for a trend, with the exact p-value.

    Parameters
    ----------
    sequence : array_like, shape (N,)
        Segment statistics in time order (N >= 2).

    Returns
    -------
    TrendTestResult
        ``statistic`` is the number of reverse arrangements ``A``; ``p_value`` is
        ``min(1, 2 min(P[A_0 <= A], P[A_0 >= A]))`` under the exact null distribution.

    Notes
    -----
    The null distribution is symmetric about ``N (N - 1) / 4``, so the upper tail is read from
    the lower tail of the mirrored count, which keeps small p-values accurate. With ties the
    half-integer statistic is rounded away from the centre (a conservative p-value).

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 and Sect. 10.3
    (test for stationarity; section numbers from memory). M. G. Kendall, Rank Correlation
    Methods, Ch. 4.
    """
    x = np.asarray(sequence, dtype=float)
    n = len(x)
    if n < 2:
        raise ValueError(f"the reverse arrangements test needs at least 2 values, got {n}")
    statistic = reverse_arrangements(x)
    pmf = reverse_arrangements_distribution(n)
    cdf = np.cumsum(pmf)
    total = len(pmf) - 1
    lower = cdf[min(total, int(math.ceil(statistic)))]  # P[A_0 <= A]
    upper = cdf[min(total, int(math.ceil(total - statistic)))]  # P[A_0 >= A] by symmetry
    mean, variance = reverse_arrangements_moments(n)
    return TrendTestResult(statistic, mean, variance, float(min(1.0, 2.0 * min(lower, upper))), n)


# --------------------------------------------------------------------------------------------
# Runs test


def runs_about_median(sequence) -> Tuple[int, int, int]:
    """Runs of a sequence about its median.

    Parameters
    ----------
    sequence : array_like, shape (N,)

    Returns
    -------
    runs, n_above, n_below : int
        Number of runs (maximal blocks of consecutive values on the same side of the median),
        and the counts above and below. Values equal to the median are left out.
    """
    x = np.asarray(sequence, dtype=float)
    median = np.median(x)
    side = np.sign(x - median)
    side = side[side != 0]
    if len(side) == 0:
        return 0, 0, 0
    runs = 1 + int(np.count_nonzero(side[1:] != side[:-1]))
    return runs, int(np.count_nonzero(side > 0)), int(np.count_nonzero(side < 0))


def runs_distribution(n_above: int, n_below: int) -> np.ndarray:
    """Exact null distribution of the number of runs of two kinds.

    Parameters
    ----------
    n_above, n_below : int
        Counts of the two kinds (both >= 1).

    Returns
    -------
    ndarray, shape (n_above + n_below + 1,)
        ``P[R = r]`` for ``r = 0 .. n_above + n_below`` (zero where impossible).

    Notes
    -----
    With every arrangement of ``n1`` and ``n2`` symbols equally likely,

    ``P[R = 2k] = 2 C(n1-1, k-1) C(n2-1, k-1) / C(n1+n2, n1)``,
    ``P[R = 2k+1] = [C(n1-1, k) C(n2-1, k-1) + C(n1-1, k-1) C(n2-1, k)] / C(n1+n2, n1)``,

    with mean ``2 n1 n2 / (n1 + n2) + 1`` and variance
    ``2 n1 n2 (2 n1 n2 - n1 - n2) / ((n1 + n2)^2 (n1 + n2 - 1))``.

    References
    ----------
    A. M. Mood, The distribution theory of runs, Ann. Math. Statist. 11 (1940) 367-392.
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 (run test) and
    Appendix A, table of percentage points of the run distribution.
    """
    n1, n2 = int(n_above), int(n_below)
    if n1 < 1 or n2 < 1:
        raise ValueError(f"both counts must be at least 1, got {n1} and {n2}")
    total = math.comb(n1 + n2, n1)
    pmf = np.zeros(n1 + n2 + 1)
    for r in range(2, n1 + n2 + 1):
        k, odd = divmod(r, 2)
        if odd:
            count = math.comb(n1 - 1, k) * math.comb(n2 - 1, k - 1) + math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k)
        else:
            count = 2 * math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k - 1)
        pmf[r] = count / total
    return pmf


def runs_moments(n_above: int, n_below: int) -> Tuple[float, float]:
    """Null mean and variance of the number of runs (Mood 1940; Bendat & Piersol Sect. 4.5.2)."""
    n1, n2 = float(n_above), float(n_below)
    n = n1 + n2
    return 2.0 * n1 * n2 / n + 1.0, 2.0 * n1 * n2 * (2.0 * n1 * n2 - n) / (n * n * (n - 1.0))


def runs_percentage_point(n_each: int, alpha: float, convention: str = "conservative") -> int:
    """Percentage point ``r_{n; alpha}`` (``P[R > r] = alpha``) of the runs distribution.

    ``n_each`` values lie on each side of the median (``N = 2 n_each`` values); ``convention``
    as in :func:`reverse_arrangements_percentage_point`. Bendat & Piersol, Random Data,
    Appendix A, tabulate these points for ``n_each`` = 5 .. 100.
    """
    return _percentage_point(runs_distribution(n_each, n_each), alpha, convention)


def runs_test(sequence, method: str = "exact", continuity_correction: bool = True) -> TrendTestResult:
    """Two-sided runs test about the median.

    Parameters
    ----------
    sequence : array_like, shape (N,)
        Segment statistics in time order.
    method : {"exact", "normal"}
        ``"exact"`` (the default) sums the exact null distribution of :func:`runs_distribution`:
        ``p = min(1, 2 min(P[R_0 <= R], P[R_0 >= R]))``. ``"normal"`` uses
        ``z = (R - mean) / sd`` with the moments of :func:`runs_moments`.
    continuity_correction : bool
        For ``"normal"``: shrink ``|R - mean|`` by 1/2 (ignored for ``"exact"``).

    Returns
    -------
    TrendTestResult
        ``statistic`` is the number of runs; ``p_value`` is 1 when one side is empty.

    Notes
    -----
    The exact distribution is the default: the screened sequences are short (10 to 200
    segments) where the distribution is coarse and the normal approximation is off in the tails
    that decide a test at ``alpha / 4``, and it costs a few hundred integer products.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 (run test).
    A. M. Mood, Ann. Math. Statist. 11 (1940) 367-392 (distribution and moments).
    """
    if method not in RUNS_METHODS:
        raise ValueError(f"method = {method!r}: must be one of " + ", ".join(f'"{m}"' for m in RUNS_METHODS))
    runs, n1, n2 = runs_about_median(sequence)
    if n1 == 0 or n2 == 0:
        return TrendTestResult(float(runs), float("nan"), float("nan"), 1.0, n1 + n2)
    mean, variance = runs_moments(n1, n2)
    if method == "exact":
        cdf = np.cumsum(runs_distribution(n1, n2))
        lower = cdf[runs]
        upper = 1.0 - (cdf[runs - 1] if runs >= 1 else 0.0)
        p_value = min(1.0, 2.0 * min(lower, upper))
    else:
        deviation = abs(runs - mean)
        if continuity_correction:
            deviation = max(0.0, deviation - 0.5)
        p_value = float(2.0 * _stats.norm.sf(deviation / math.sqrt(variance))) if variance > 0 else 1.0
    return TrendTestResult(float(runs), mean, variance, float(min(1.0, max(0.0, p_value))), n1 + n2)


# --------------------------------------------------------------------------------------------
# Variance outlier test (bursts and drop-outs)


@dataclasses.dataclass(frozen=True)
class OutlierTestResult:
    """Most extreme segment: its index, its variance ratio to the pooled others, the p-value."""

    index: int
    variance_ratio: float
    p_value: float
    n: int


def variance_outlier_test(mean_squares, degrees_of_freedom) -> OutlierTestResult:
    """Two-sided test of the most extreme segment mean square against the pooled others.

    Parameters
    ----------
    mean_squares : array_like, shape (M,)
        Segment mean squares (positive).
    degrees_of_freedom : array_like, shape (M,) or float
        Effective degrees of freedom ``nu_i`` of each segment mean square: under the null
        hypothesis ``nu_i ms_i / sigma^2`` is chi-square with ``nu_i`` degrees of freedom.

    Returns
    -------
    OutlierTestResult

    Notes
    -----
    For each segment ``F_i = ms_i / s_i^2`` with ``s_i^2 = sum_{j != i} nu_j ms_j /
    sum_{j != i} nu_j`` follows ``F(nu_i, sum_{j != i} nu_j)``. The two-sided p-value of
    segment ``i`` is ``2 min(P[F > F_i], P[F < F_i])`` and the test's p-value is
    ``min(1, M min_i p_i)`` (Bonferroni over the segments). This is Cochran's test of the largest
    variance as a fraction of their total, written with the F distribution, extended to the
    smallest variance and to unequal degrees of freedom.

    References
    ----------
    W. G. Cochran, The distribution of the largest of a set of estimated variances as a fraction
    of their total, Annals of Eugenics 11 (1941) 47-52.
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 8.2.1 (chi-square sampling
    distribution of a mean square estimate, Eq. 8.x; number from memory).
    """
    ms = np.asarray(mean_squares, dtype=float)
    nu = np.broadcast_to(np.asarray(degrees_of_freedom, dtype=float), ms.shape).astype(float)
    m = len(ms)
    if m < 2:
        raise ValueError(f"the outlier test needs at least 2 segments, got {m}")
    if np.any(ms < 0) or np.any(nu <= 0):
        raise ValueError("mean squares must be >= 0 and degrees of freedom > 0")
    weighted = nu * ms
    others_nu = nu.sum() - nu
    pooled_others = (weighted.sum() - weighted) / others_nu
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = ms / pooled_others
    ratio = np.where(np.isfinite(ratio), ratio, np.inf)
    upper = _stats.f.sf(ratio, nu, others_nu)
    lower = _stats.f.cdf(ratio, nu, others_nu)
    p_each = 2.0 * np.minimum(upper, lower)
    index = int(np.argmin(p_each))
    return OutlierTestResult(index, float(ratio[index]), float(min(1.0, m * p_each[index])), m)
