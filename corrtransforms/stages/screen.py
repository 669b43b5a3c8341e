"""Stationarity screening of one window: is the record (and each pair jointly) stationary?

Every time-average estimate of this project assumes that within a window the process is
stationary and ergodic. This module tests that assumption per window, the way Bendat & Piersol
describe it: split the record into ``M`` equal segments, compute a statistic per segment (mean
square, mean, or for a pair the mean cross-product) and test the sequence of segment statistics
for a trend or a change with distribution-free tests.

Tests per channel (each on the sequence of segment statistics, two-sided):

- reverse arrangements test on the segment mean squares (monotonic trend),
- runs test about the median on the segment mean squares (clustering, slow swings),
- variance outlier test on the segment mean squares: the largest (or smallest) segment mean
  square against the pooled others, with the segments' chi-square sampling distribution of
  ``nu`` effective degrees of freedom taken from the record's own auto-correlation
  (transient bursts or drop-outs, which rank tests for trend cannot see),
- reverse arrangements test on the segment means (drift or step of the mean).

Per cross pair: reverse arrangements and runs tests on the segment mean cross-products
(joint stationarity).

The p-values of a subject are combined with Bonferroni's inequality: ``p = min(1, k * min p_i)``
with ``k`` tests, so the probability that a stationary subject is flagged stays at or below
``alpha``. A pair is flagged when either of its channels or its own joint test is flagged.

Segments must be roughly independent: each segment is made at least :data:`INDEPENDENCE_FACTOR`
times longer than the record's memory time (the larger of the integral time scale and the
envelope decay time of its auto-correlation, with sharp spectral lines removed). When the window
is too short for the configured number of segments, fewer are used, down to
:data:`MINIMUM_SEGMENTS`; below that the subject gets the quality code
``"window_too_short_for_screening"`` and no flag.

Only numpy and scipy are used here; the Beam layer wires :func:`screen_window` into the
correlate stage.
"""
from __future__ import annotations

import dataclasses
import functools
import math
import os
from typing import Dict, Mapping, Optional, Tuple

import numpy as np
from scipy import fft as _fft
from scipy import stats as _stats

from corrtransforms.numerics.spectra import LINE_THRESHOLD, spectral_lines
from corrtransforms.numerics.timescales import integral_time_scale
from corrtransforms.records import IndicatorRow, quality_text
from corrtransforms.rejects import WHOLE_WINDOW, Reject, iso_utc

#: quality code of a subject whose screening test is significant at ``alpha``
QUALITY_NONSTATIONARY = "nonstationary"
#: quality code of a subject whose window cannot hold MINIMUM_SEGMENTS independent segments
QUALITY_TOO_SHORT = "window_too_short_for_screening"
#: quality code of a subject that could not be screened at all (no variation, no valid samples)
QUALITY_NOT_SCREENED = "not_screened_no_variation"

#: a segment must be at least this many times longer than the record's memory time
INDEPENDENCE_FACTOR = 10.0
#: fewest segments a test is run on (the smallest N of the published percentage-point tables)
MINIMUM_SEGMENTS = 10
#: a segment with a smaller fraction of valid samples is left out of the sequence
MIN_SEGMENT_COVERAGE = 0.5
#: number of tests combined (Bonferroni) for a channel and for a cross pair
CHANNEL_TESTS = 4
PAIR_TESTS = 2
INDICATOR = "stationarity_p"

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
        raise ValueError(f"convention = {convention!r}: must be one of "
                         + ", ".join(f'"{c}"' for c in PERCENTAGE_POINT_CONVENTIONS))
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
    N <= 90 (tests/test_stationarity.py).

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
    lower = cdf[min(total, int(math.ceil(statistic)))]                 # P[A_0 <= A]
    upper = cdf[min(total, int(math.ceil(total - statistic)))]         # P[A_0 >= A] by symmetry
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
            count = math.comb(n1 - 1, k) * math.comb(n2 - 1, k - 1) \
                + math.comb(n1 - 1, k - 1) * math.comb(n2 - 1, k)
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


# --------------------------------------------------------------------------------------------
# Segment statistics

@dataclasses.dataclass(frozen=True)
class SegmentStatistics:
    """Per-segment statistics of one record (or the cross-products of a pair).

    Attributes
    ----------
    segment_length : int
        Samples per segment; segment ``i`` spans samples ``i L .. (i + 1) L - 1`` and the last
        ``n - M L`` samples (fewer than M) are not used.
    valid_count : ndarray of int, shape (M,)
        Valid samples (both channels valid, for a pair) in each segment.
    mean : ndarray, shape (M,)
        Segment mean of the record (for a pair: of channel a).
    mean_square : ndarray, shape (M,)
        Segment mean square about the record's overall valid mean (for a pair: the segment mean
        cross-product of the two records about their means), NaN for a segment without samples.
    kurtosis : ndarray, shape (M,)
        Segment mean fourth power about the overall mean over the squared mean square (NaN for
        a pair).
    center : tuple of float
        The overall mean(s) removed.
    """

    segment_length: int
    valid_count: np.ndarray
    mean: np.ndarray
    mean_square: np.ndarray
    center: Tuple[float, ...]
    kurtosis: Optional[np.ndarray] = None

    @property
    def segments(self) -> int:
        return len(self.valid_count)


def _segment_layout(n_samples: int, segments: int) -> int:
    if segments < 1:
        raise ValueError(f"segments must be at least 1, got {segments}")
    length = n_samples // segments
    if length < 1:
        raise ValueError(f"{n_samples} samples cannot be split into {segments} segments")
    return length


def _as_record(values, valid):
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"values must be one-dimensional, got shape {x.shape}")
    m = np.isfinite(x) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(x))
    if m.shape != x.shape:
        raise ValueError(f"valid has shape {m.shape}, values {x.shape}")
    return np.where(m, x, 0.0), m


def segment_statistics(values, valid=None, segments: int = 20) -> SegmentStatistics:
    """Split a record into M equal segments; mean and mean square of each.

    Parameters
    ----------
    values : array_like, shape (n,)
        The record (samples where ``valid`` is False are ignored).
    valid : array_like of bool, shape (n,), optional
        Mask of valid samples; None means every finite sample.
    segments : int
        Number of segments ``M``.

    Returns
    -------
    SegmentStatistics

    Notes
    -----
    With ``x_bar`` the valid mean of the record and ``S_i`` the valid samples of segment ``i``:
    ``mean_i = (1/|S_i|) sum_{S_i} x``, ``mean_square_i = (1/|S_i|) sum_{S_i} (x - x_bar)^2``,
    the segment estimate of ``R_xx(0)`` of the mean-removed record.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 10.3 (test for stationarity:
    divide the record into equal intervals, compute a mean square value for each).
    """
    x, m = _as_record(values, valid)
    return _segment_statistics_of_record(x, m, segments)


def _segment_statistics_of_record(x: np.ndarray, m: np.ndarray, segments: int) -> SegmentStatistics:
    """:func:`segment_statistics` of a record already cleaned by :func:`_as_record`."""
    length = _segment_layout(len(x), segments)
    used = length * segments
    count = m[:used].reshape(segments, length).sum(axis=1)
    center = float(x[m].mean()) if m.any() else 0.0
    deviation = np.where(m, x - center, 0.0)[:used].reshape(segments, length)
    squared = deviation * deviation
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x[:used].reshape(segments, length).sum(axis=1) / count
        mean_square = squared.sum(axis=1) / count
        kurtosis = (squared * squared).sum(axis=1) / count / mean_square ** 2
    return SegmentStatistics(length, count, mean, mean_square, (center,), kurtosis)


def _segment_statistics_of_complete_rows(records: np.ndarray, segments: int) -> list:
    """:func:`_segment_statistics_of_record` of several complete records (rows) at once: the same
    sums along the same contiguous axis, so the same values."""
    rows, n = records.shape
    length = _segment_layout(n, segments)
    used = length * segments
    centers = records.mean(axis=1)
    pieces = records[:, :used].reshape(rows, segments, length)
    deviation = pieces - centers[:, None, None]
    squared = deviation * deviation
    count = np.full(segments, length)
    mean = pieces.sum(axis=2) / count
    mean_square = squared.sum(axis=2) / count
    squared *= squared
    kurtosis = squared.sum(axis=2) / count / mean_square ** 2
    return [SegmentStatistics(length, count.copy(), mean[r], mean_square[r], (float(centers[r]),), kurtosis[r])
            for r in range(rows)]


def segment_cross_products(values_a, values_b, valid_a=None, valid_b=None,
                           segments: int = 20) -> SegmentStatistics:
    """Segment mean cross-products of two records (joint stationarity).

    Parameters
    ----------
    values_a, values_b : array_like, shape (n,)
        The two records on the same sample grid.
    valid_a, valid_b : array_like of bool, shape (n,), optional
        Masks; a sample counts when it is valid in both records.
    segments : int
        Number of segments ``M``.

    Returns
    -------
    SegmentStatistics
        ``mean_square`` holds ``(1/|S_i|) sum_{S_i} (a - a_bar)(b - b_bar)``, the segment
        estimate of ``R_ab(0)``; ``mean`` holds the segment means of ``a``.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 10.3 (joint stationarity is
    tested on the segments' cross-products as on the mean squares).
    """
    a, ma = _as_record(values_a, valid_a)
    b, mb = _as_record(values_b, valid_b)
    if a.shape != b.shape:
        raise ValueError(f"records differ in length: {a.shape} and {b.shape}")
    return _cross_products_of_records(a, ma, b, mb, segments)


def _cross_products_of_records(a, ma, b, mb, segments: int) -> SegmentStatistics:
    """:func:`segment_cross_products` of two records already cleaned by :func:`_as_record`."""
    both = ma & mb
    length = _segment_layout(len(a), segments)
    used = length * segments
    count = both[:used].reshape(segments, length).sum(axis=1)
    center_a = float(a[both].mean()) if both.any() else 0.0
    center_b = float(b[both].mean()) if both.any() else 0.0
    product = np.where(both, (a - center_a) * (b - center_b), 0.0)[:used].reshape(segments, length)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(both, a, 0.0)[:used].reshape(segments, length).sum(axis=1) / count
        cross = product.sum(axis=1) / count
    return SegmentStatistics(length, count, mean, cross, (center_a, center_b),
                             np.full(segments, np.nan))


# --------------------------------------------------------------------------------------------
# Memory of the record: how long must a segment be?

@dataclasses.dataclass(frozen=True)
class CorrelationTimeScales:
    """Time scales of a record's auto-correlation, for the segment-independence rule.

    Attributes
    ----------
    integral_time_s : float
        Integral of the auto-correlation coefficient from lag 0 to its first zero crossing.
    envelope_decay_s : float
        Lag after which the envelope of the auto-correlation coefficient stays below 1/e.
    memory_s : float
        The larger of the two: the record's memory time.
    line_count : int
        Periodogram ordinates taken as sharp spectral lines (tones) and left out of both scales.
    degrees_of_freedom_per_sample : float
        Effective chi-square degrees of freedom of a mean square of a Gaussian record, per valid
        sample: ``1 / sum_{|k| <= K} rho_k^2`` (lines kept, ``K`` = three memory times).
    kurtosis : float
        Sample kurtosis of the whole mean-removed record (for information; the screening uses
        the median of the segments' kurtoses, which a short burst does not move).
    """

    integral_time_s: float
    envelope_decay_s: float
    memory_s: float
    line_count: int
    degrees_of_freedom_per_sample: float
    kurtosis: float


def correlation_time_scales(values, valid=None, sample_rate_hz: float = 1.0,
                            max_memory_s: Optional[float] = None) -> CorrelationTimeScales:
    """Integral time scale and envelope decay time of a record, from one FFT auto-correlation.

    Parameters
    ----------
    values : array_like, shape (n,)
        The record.
    valid : array_like of bool, shape (n,), optional
        Mask of valid samples; gaps are handled by normalising each lag by its weighted pair count.
    sample_rate_hz : float
        Sample rate ``fs`` in Hz.
    max_memory_s : float, optional
        Longest memory time of interest. When given, lags are only computed, and the envelope
        searched, up to three times it (the reach of the degrees-of-freedom sum), so the
        transform is ``n + 3 max_memory_s fs`` points long instead of ``2n``; a ``memory_s``
        above ``max_memory_s`` is then a lower bound. Screening passes
        :func:`screening_memory_limit_s`: a longer memory leaves fewer than
        :data:`MINIMUM_SEGMENTS` segments, so the record is not screened either way. (An
        oscillating coefficient whose ``|rho|`` stays below ``1/e`` over the whole searched
        stretch beyond ``max_memory_s`` yet peaks above it later would need a half period above
        eight times ``max_memory_s``; its integral time up to the first zero then already exceeds
        ``max_memory_s``.)

    Returns
    -------
    CorrelationTimeScales

    Notes
    -----
    The mean-removed record ``x`` is tapered with a Hann window ``w`` (gaps are zero weight);
    with ``X = FFT(w x)`` zero-padded to at least ``2n``, the auto-correlation is
    ``R(k) = IFFT(|X|^2)(k) / IFFT(|W|^2)(k)`` where ``W = FFT(w m)``. Sharp lines (ordinates
    above ``LINE_THRESHOLD`` times the local median over 25 frequency resolutions, with their
    leakage) are replaced by that median, because a deterministic tone never decorrelates
    but its contribution to segment mean squares barely fluctuates. From the line-free spectrum
    come ``rho(k) = R(k) / R(0)`` and two scales: the envelope decay time, the largest lag
    (searched up to ``n/4``) at which ``|rho|`` still reaches ``1/e`` -- the peaks of an
    oscillating ``rho`` trace its envelope, so for a mode ``exp(-zeta omega_n tau) cos(...)``
    this is ``1 / (zeta omega_n)`` to within half a period, and for ``exp(-tau / theta)`` it is
    ``theta``; and the integral time scale ``T_I = int_0^{tau_0} rho(tau) dtau`` up to the first
    zero ``tau_0`` (common practice for a finite record).

    For a Gaussian record the mean square over ``T`` seconds has variance
    ``(2/T) int R^2(tau) dtau`` (Bendat & Piersol Sect. 8.2), i.e. ``nu = n / sum_k rho_k^2``
    degrees of freedom over ``n`` samples.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 5.2 (correlation functions),
    Sect. 8.2 (mean square estimates and their random error); section numbers from memory.
    """
    x, m = _as_record(values, valid)
    result = _time_scales_of_rows(x[None, :], m[None, :], sample_rate_hz, max_memory_s)[0]
    if isinstance(result, ValueError):
        raise result
    return result


def screening_memory_limit_s(record_s: float, factor: float = INDEPENDENCE_FACTOR,
                             minimum: int = MINIMUM_SEGMENTS) -> float:
    """Longest memory time at which a record of ``record_s`` seconds can still be screened.

    A memory time above ``record_s / (factor * minimum)`` leaves fewer than ``minimum`` segments
    (:func:`segments_for_record`), so :func:`correlation_time_scales` needs no lags beyond
    three times it (it searches that far, so a memory above the limit is still seen as such).
    """
    return float(record_s) / (float(factor) * int(minimum))


def _lag_limits(n: int, fs: float, max_memory_s: Optional[float]) -> Tuple[int, int, int]:
    """Transform length, last lag computed and last lag of the envelope search for ``n`` samples."""
    if max_memory_s is None:
        return _fft.next_fast_len(2 * n), n // 2, max(1, n // 4)
    limit = int(math.ceil(max_memory_s * fs)) + 1
    max_lag = max(1, min(n // 2, 3 * limit + 1))
    return _fft.next_fast_len(n + max_lag + 1), max_lag, max(1, min(n // 4, max_lag))


def _time_scales_of_rows(x: np.ndarray, m: np.ndarray, sample_rate_hz: float,
                         max_memory_s: Optional[float] = None):
    """:func:`correlation_time_scales` of several records at once (rows of ``x``, masks ``m``).

    ``x`` holds the records with 0 at invalid samples (as :func:`_as_record` returns them). The
    transforms of all rows are done in one call each, and the taper's own transform once when
    every row has the same mask. Returns, per row, a CorrelationTimeScales or the ValueError
    that :func:`correlation_time_scales` raises for it.
    """
    fs = float(sample_rate_hz)
    c, n = x.shape
    out: list = [None] * c
    counts_valid = m.sum(axis=1)
    ok = np.flatnonzero((counts_valid >= 8) if n >= 8 else np.zeros(c, bool))
    for i in range(c):
        if i not in ok:
            out[i] = ValueError("a record needs at least 8 valid samples")
    if not len(ok):
        return out
    # moments of all rows at once (x is 0 at invalid samples)
    count = counts_valid[ok].astype(float)
    centers = x[ok].sum(axis=1) / count
    deviation = x[ok] - centers[:, None]
    masks = m[ok]
    complete = masks.all(axis=1)
    if not complete.all():
        deviation[~masks] = 0.0
    squared = deviation * deviation
    second_all = squared.sum(axis=1) / count
    fourth_all = np.einsum("ij,ij->i", squared, squared) / count
    keep = []
    for k, i in enumerate(ok):
        if not second_all[k] > 0:
            out[i] = ValueError("the record does not vary")
        else:
            keep.append(k)
    if not keep:
        return out
    rows = [int(ok[k]) for k in keep]
    kurtoses = [float(fourth_all[k] / second_all[k] ** 2) for k in keep]
    if len(keep) < len(ok):
        deviation, masks = deviation[keep], masks[keep]
    same_mask = bool(np.all(masks == masks[:1]))
    hann = np.hanning(n + 2)[1:-1]
    taper = hann * (masks[:1] if same_mask else masks)
    size, max_lag, search = _lag_limits(n, fs, max_memory_s)
    deviation *= taper
    spectrum = _fft.rfft(deviation, size, axis=-1, workers=transform_workers())
    power = spectrum.real ** 2 + spectrum.imag ** 2
    if same_mask and masks[0].all():
        counts = _complete_taper_counts(n, size, max_lag)  # the same for every complete record
    else:
        counts = _taper_counts(taper, size, max_lag)

    # sharp spectral lines: far above the local median (the spectrum is mirrored at zero and
    # Nyquist frequency, so the median near the ends sees real neighbours); widen by the Hann
    # main lobe
    bins_per_resolution = size / n
    median_width = int(2 * round(12 * bins_per_resolution) + 1)
    reach = int(math.ceil(3 * bins_per_resolution))
    lines = np.zeros(power.shape, dtype=bool)
    clean_rows = []
    for k in range(len(rows)):
        found, local_at_lines = spectral_lines(power[k], median_width, LINE_THRESHOLD, reach)
        lines[k] = found
        if found.any():
            clean = power[k].copy()
            clean[found] = local_at_lines
            clean_rows.append((k, clean))
    # rows without a line: the clean spectrum is the spectrum itself (no second transform)
    with_lines = [k for k, _ in clean_rows]
    stacked = np.concatenate([power, np.stack([row for _, row in clean_rows])]) if clean_rows else power
    both = _fft.irfft(stacked, size, axis=-1, workers=transform_workers())[:, :max_lag + 1]
    full = both[:len(rows)] / counts
    clean_correlation = full.copy()
    if with_lines:
        clean_correlation[with_lines] = both[len(rows):] / (counts if counts.shape[0] == 1 else counts[with_lines])
    for k, i in enumerate(rows):
        out[i] = _time_scales_from_correlation(full[k] / full[k, 0],
                                               clean_correlation[k] / clean_correlation[k, 0],
                                               search, max_lag, fs, int(lines[k].sum()), kurtoses[k])
    return out


#: environment variable: threads for screening's batched transforms (default 1)
TRANSFORM_WORKERS_ENV = "CORRTRANSFORMS_TRANSFORM_THREADS"


def transform_workers() -> int:
    """Threads for the batched 2n-point transforms of screening.

    Returns
    -------
    int
        ``CORRTRANSFORMS_TRANSFORM_THREADS`` when set to a positive integer, else 1.

    Notes
    -----
    scipy's pocketfft runs the rows of a batched transform on several threads; each row's
    transform is computed exactly as with one thread, so results are bit-identical. Worth it
    only when a worker process has idle cores (the in-process local runner on a multi-core
    machine); with one worker process per core it only adds contention.
    """
    try:
        value = int(os.environ.get(TRANSFORM_WORKERS_ENV, "1"))
    except ValueError:
        return 1
    return max(1, value)


def _taper_counts(taper: np.ndarray, size: int, max_lag: int) -> np.ndarray:
    """Lag products of the taper(s) (rows), lags 0..max_lag, floored at 1e-12 of lag 0."""
    weight_spectrum = _fft.rfft(taper, size, axis=-1)
    counts = _fft.irfft(weight_spectrum.real ** 2 + weight_spectrum.imag ** 2, size, axis=-1)
    return np.maximum(counts[:, :max_lag + 1], 1e-12 * counts[:, :1])


@functools.lru_cache(maxsize=4)
def _complete_taper_counts(n: int, size: int, max_lag: int) -> np.ndarray:
    """:func:`_taper_counts` of the Hann taper of a complete record of ``n`` samples (cached,
    read-only: every complete window of a job has the same one)."""
    counts = _taper_counts(np.hanning(n + 2)[1:-1][None, :], size, max_lag)
    counts.setflags(write=False)
    return counts


def _time_scales_from_correlation(rho_full, rho, search, max_lag, fs, line_count, kurtosis):
    integral = integral_time_scale(rho, 1.0)  # in samples
    magnitude = np.abs(rho[:search + 1])
    above = np.nonzero(magnitude >= 1.0 / math.e)[0]
    last = int(above[-1])
    if last >= search:
        decay = float(search)
    else:
        drop = magnitude[last] - magnitude[last + 1]
        decay = last + ((magnitude[last] - 1.0 / math.e) / drop if drop > 0 else 0.0)
    memory_samples = max(integral, decay)

    reach = int(min(max_lag, max(1, math.ceil(3 * memory_samples))))
    sum_rho_squared = float(rho_full[0] ** 2 + 2.0 * np.sum(rho_full[1:reach + 1] ** 2))
    per_sample = 1.0 / sum_rho_squared
    return CorrelationTimeScales(integral / fs, decay / fs, memory_samples / fs, line_count,
                                 per_sample, kurtosis)


def segments_for_record(record_s: float, memory_s: float, requested: int,
                        factor: float = INDEPENDENCE_FACTOR, minimum: int = MINIMUM_SEGMENTS) -> int:
    """Number of segments a window can hold under the independence rule (0 if too short).

    Parameters
    ----------
    record_s : float
        Window length in seconds.
    memory_s : float
        Memory time of the record (:attr:`CorrelationTimeScales.memory_s`).
    requested : int
        Configured number of segments (``[screening] segments``).
    factor : float
        Each segment must be at least ``factor * memory_s`` long.
    minimum : int
        Fewest segments a test is run on.

    Returns
    -------
    int
        ``min(requested, floor(record_s / (factor * memory_s)))``, or 0 when that is below
        ``minimum``.

    Notes
    -----
    For an exponentially decaying correlation envelope of time constant ``theta``, adjacent
    segment mean squares of length ``T`` are correlated by about ``theta / (4 T)``, i.e. 0.025 at
    the default factor 10 (derivation in docs/stationarity.md).
    """
    if memory_s <= 0:
        possible = requested
    else:
        possible = int(math.floor(record_s / (factor * memory_s) + 1e-9))
    count = min(int(requested), possible)
    return count if count >= minimum else 0


# --------------------------------------------------------------------------------------------
# Screening one window

@dataclasses.dataclass(frozen=True)
class SubjectScreening:
    """Screening result of one channel or one cross pair ``"a:b"``.

    ``p_value`` is the Bonferroni-combined p of the subject's own tests (NaN when not screened);
    ``flagged`` also includes, for a pair, the flags of its two channels.
    """

    subject: str
    segments: int
    segment_s: float
    memory_s: float
    p_value: float
    flagged: bool
    quality: Tuple[str, ...]
    #: p-value of each test by name, e.g. {"reverse_arrangements_mean_square": 0.4, ...}
    test_p_values: Mapping[str, float] = dataclasses.field(default_factory=dict)
    #: statistic of each test by name (reverse arrangements A, runs R, variance ratio F)
    test_statistics: Mapping[str, float] = dataclasses.field(default_factory=dict)


@dataclasses.dataclass(frozen=True)
class WindowScreening:
    """Screening of one window: indicator rows, quality codes, and whether to exclude it.

    Attributes
    ----------
    window_start_us : int
        Window start, microseconds since the epoch (UTC).
    subjects : mapping of str to SubjectScreening
        Per channel and per cross pair ``"a:b"``.
    indicators : tuple of IndicatorRow
        ``stationarity_p`` per subject (value NaN and a quality code when not screened).
    subject_quality : mapping of str to tuple of str
        Quality codes per subject, to merge into the correlation and indicator rows
        (``"nonstationary"``, ``"window_too_short_for_screening"``, ``"not_screened_no_variation"``).
    excluded : bool
        True when ``[screening] action = "exclude"`` and any subject is flagged: the window's
        rows must not be written nor feed baselines or detectors.
    rejects : tuple of Reject
        One ``nonstationary_window`` reject for the whole window when excluded.
    """

    window_start_us: int
    subjects: Mapping[str, SubjectScreening]
    indicators: Tuple[IndicatorRow, ...]
    subject_quality: Mapping[str, Tuple[str, ...]]
    excluded: bool
    rejects: Tuple[Reject, ...]

    @property
    def flagged_subjects(self) -> Tuple[str, ...]:
        return tuple(s for s, r in self.subjects.items() if r.flagged)


def _usable(statistics: SegmentStatistics) -> np.ndarray:
    return (statistics.valid_count >= MIN_SEGMENT_COVERAGE * statistics.segment_length) \
        & np.isfinite(statistics.mean_square)


def _not_screened(subject, code, memory_s=float("nan")) -> SubjectScreening:
    return SubjectScreening(subject, 0, float("nan"), memory_s, float("nan"), False, (code,))


def screen_channel(values, valid, sample_rate_hz: float, segments: int = 20, alpha: float = 0.05,
                   subject: str = "") -> SubjectScreening:
    """Screen one record for stationarity (four tests, Bonferroni-combined).

    Parameters
    ----------
    values, valid : array_like, shape (n,)
        The record and its mask of valid samples.
    sample_rate_hz : float
        Sample rate in Hz.
    segments : int
        Requested number of segments ``M`` (reduced by the independence rule).
    alpha : float
        Significance level of the combined two-sided test.
    subject : str
        Name carried into the result.

    Returns
    -------
    SubjectScreening
        Tests (keys of ``test_p_values``): ``reverse_arrangements_mean_square``,
        ``runs_mean_square``, ``variance_outlier_mean_square``, ``reverse_arrangements_mean``;
        ``p_value = min(1, 4 min p)``; flagged when ``p_value <= alpha``.

    Notes
    -----
    See the module docstring and docs/stationarity.md for the choice of tests. The segment means
    get no runs test: for a record without power at zero frequency (an accelerometer) adjacent
    segment means are negatively correlated (about -1/2), which makes a runs test on them reject
    far too often, while the reverse arrangements test only becomes conservative.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 and 10.3.
    """
    x, m = _as_record(values, valid)
    if not _enough_to_screen(m):
        return _not_screened(subject, QUALITY_NOT_SCREENED)
    try:
        scales = correlation_time_scales(x, m, sample_rate_hz,
                                         screening_memory_limit_s(len(x) / float(sample_rate_hz)))
    except ValueError:
        return _not_screened(subject, QUALITY_NOT_SCREENED)
    return _screen_record(x, m, sample_rate_hz, segments, alpha, subject, scales)


def _enough_to_screen(m: np.ndarray) -> bool:
    return int(m.sum()) >= max(8, 2 * MINIMUM_SEGMENTS)


def _screen_record(x, m, sample_rate_hz: float, segments: int, alpha: float, subject: str,
                   scales: CorrelationTimeScales, stats: Optional[SegmentStatistics] = None) -> SubjectScreening:
    """The tests of :func:`screen_channel` on a cleaned record whose time scales are known
    (``stats``: its segment statistics for the segment count the independence rule gives, when
    already computed)."""
    record_s = len(x) / float(sample_rate_hz)
    count = segments_for_record(record_s, scales.memory_s, segments)
    if count == 0:
        return _not_screened(subject, QUALITY_TOO_SHORT, scales.memory_s)
    if stats is None:
        stats = _segment_statistics_of_record(x, m, count)
    usable = _usable(stats)
    if usable.sum() < MINIMUM_SEGMENTS:
        return _not_screened(subject, QUALITY_TOO_SHORT, scales.memory_s)
    mean_square = stats.mean_square[usable]
    means = stats.mean[usable]
    # chi-square degrees of freedom of each segment mean square: Gaussian value, lowered by
    # 2 / (kurtosis - 1) for a heavy-tailed record (exact for independent samples); the median
    # of the segment kurtoses is not moved by a burst in one or two segments
    kurtosis = float(np.median(stats.kurtosis[usable]))
    dof = stats.valid_count[usable] * scales.degrees_of_freedom_per_sample \
        * 2.0 / (max(kurtosis, 3.0) - 1.0)
    ra_ms = reverse_arrangements_test(mean_square)
    runs_ms = runs_test(mean_square)
    ra_mean = reverse_arrangements_test(means)
    if np.all(mean_square > 0):
        outlier = variance_outlier_test(mean_square, dof)
    else:
        outlier = OutlierTestResult(int(np.argmin(mean_square)), 0.0, 0.0, len(mean_square))
    p_values = {
        "reverse_arrangements_mean_square": ra_ms.p_value,
        "runs_mean_square": runs_ms.p_value,
        "variance_outlier_mean_square": outlier.p_value,
        "reverse_arrangements_mean": ra_mean.p_value,
    }
    statistics = {
        "reverse_arrangements_mean_square": ra_ms.statistic,
        "runs_mean_square": runs_ms.statistic,
        "variance_outlier_mean_square": outlier.variance_ratio,
        "reverse_arrangements_mean": ra_mean.statistic,
    }
    p_value = min(1.0, CHANNEL_TESTS * min(p_values.values()))
    flagged = p_value <= alpha
    return SubjectScreening(subject, int(usable.sum()), stats.segment_length / float(sample_rate_hz),
                            scales.memory_s, p_value, flagged,
                            (QUALITY_NONSTATIONARY,) if flagged else (), p_values, statistics)


def screen_pair(values_a, valid_a, values_b, valid_b, sample_rate_hz: float, segments: int,
                alpha: float = 0.05, subject: str = "", memory_s: float = 0.0) -> SubjectScreening:
    """Joint stationarity test of a pair on its segment mean cross-products.

    Parameters
    ----------
    values_a, valid_a, values_b, valid_b : array_like, shape (n,)
        The two records and their masks.
    sample_rate_hz : float
        Sample rate in Hz.
    segments : int
        Number of segments, already reduced by the independence rule of both channels.
    alpha : float
        Significance level of the combined test.
    subject : str
        ``"a:b"``.
    memory_s : float
        Memory time carried into the result (the larger of the two channels').

    Returns
    -------
    SubjectScreening
        Tests ``reverse_arrangements_cross_product`` and ``runs_cross_product``;
        ``p_value = min(1, 2 min p)``. ``flagged`` here is the joint test only; the caller adds
        the channels' flags.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 10.3 (joint stationarity).
    """
    stats = segment_cross_products(values_a, values_b, valid_a, valid_b, segments)
    return _screen_cross_products(stats, sample_rate_hz, alpha, subject, memory_s)


def _screen_cross_products(stats: SegmentStatistics, sample_rate_hz: float, alpha: float, subject: str,
                           memory_s: float) -> SubjectScreening:
    """The tests of :func:`screen_pair` on the pair's segment cross-products."""
    usable = _usable(stats)
    if usable.sum() < MINIMUM_SEGMENTS:
        return _not_screened(subject, QUALITY_TOO_SHORT, memory_s)
    cross = stats.mean_square[usable]
    ra = reverse_arrangements_test(cross)
    runs = runs_test(cross)
    p_values = {"reverse_arrangements_cross_product": ra.p_value, "runs_cross_product": runs.p_value}
    p_value = min(1.0, PAIR_TESTS * min(p_values.values()))
    flagged = p_value <= alpha
    return SubjectScreening(subject, int(usable.sum()), stats.segment_length / float(sample_rate_hz),
                            memory_s, p_value, flagged, (QUALITY_NONSTATIONARY,) if flagged else (),
                            p_values,
                            {"reverse_arrangements_cross_product": ra.statistic,
                             "runs_cross_product": runs.statistic})


class _CompleteCrossProducts:
    """Segment cross-products of complete records (no missing sample), all pairs at once.

    For every segment count asked for, the mean-removed records are cut into segments once and
    the segment sums of every product ``(a - a_bar)(b - b_bar)`` come from one batched matrix
    product; the result for a pair equals :func:`segment_cross_products` (to rounding).
    """

    def __init__(self, records: np.ndarray, complete: np.ndarray):
        self._records = records
        self._complete = complete
        self._deviation = None
        self._by_count: Dict[int, Tuple[int, np.ndarray, np.ndarray, np.ndarray]] = {}

    def statistics(self, a: int, b: int, segments: int) -> SegmentStatistics:
        if self._deviation is None:
            self._centers = self._records.mean(axis=1)
            self._deviation = self._records - self._centers[:, None]
        if segments not in self._by_count:
            n = self._records.shape[1]
            length = _segment_layout(n, segments)
            used = length * segments
            pieces = self._deviation[:, :used].reshape(-1, segments, length).transpose(1, 0, 2)
            products = np.matmul(pieces, pieces.transpose(0, 2, 1)) / length  # (segments, c, c)
            means = self._records[:, :used].reshape(-1, segments, length).sum(axis=2) / length
            self._by_count[segments] = (length, np.full(segments, length), products, means)
        length, count, products, means = self._by_count[segments]
        return SegmentStatistics(length, count, means[a], products[:, a, b].copy(),
                                 (float(self._centers[a]), float(self._centers[b])), np.full(segments, np.nan))


def _pairs_of(block, pairs) -> Tuple[Tuple[str, ...], Tuple[Tuple[str, str], ...]]:
    names = tuple(block.channels)
    if pairs is None or pairs == "auto":
        return names, ()
    if pairs == "all":
        cross = tuple((names[i], names[j]) for i in range(len(names)) for j in range(i + 1, len(names)))
        return names, cross
    channels, cross = [], []
    for pair in pairs:
        a, b = pair
        for c in (a, b):
            if c not in names:
                raise ValueError(f"pair {tuple(pair)!r} names channel {c!r}, which the window does not "
                                 f"hold (channels: {', '.join(names)})")
            if c not in channels:
                channels.append(c)
        if a != b and (a, b) not in cross:
            cross.append((a, b))
    return tuple(channels), tuple(cross)


def screen_window(block, screening_config, pairs=None) -> WindowScreening:
    """Stationarity screening of one window: each channel, and each cross pair jointly.

    Parameters
    ----------
    block : corrtransforms.records.WindowBlock
        The window's samples and mask.
    screening_config : corrtransforms.config.ScreeningConfig
        ``enabled``, ``segments`` (M, default 20), ``alpha`` (default 0.05) and ``action``
        (``"flag"`` or ``"exclude"``).
    pairs : None, "auto", "all" or sequence of (a, b)
        The pairs being correlated; an auto pair ``(a, a)`` screens channel ``a``, a cross pair
        ``(a, b)`` screens both channels and the pair jointly. None or "auto": every channel of
        the block, no cross pairs.

    Returns
    -------
    WindowScreening
        With ``enabled = false``: no subjects, no rows, not excluded.

    Notes
    -----
    A channel is flagged when ``min(1, 4 min p_i) <= alpha`` over its four tests; a cross pair
    is flagged when its joint test ``min(1, 2 min p_i) <= alpha`` or either of its channels is
    flagged. The pair's ``stationarity_p`` row carries the joint test's p-value; its quality
    code carries the propagated flag. A subject whose window is too short for
    ``MINIMUM_SEGMENTS`` independent segments gets a NaN value and the quality code
    ``"window_too_short_for_screening"``, never a flag. A cross pair uses the smaller of its
    channels' segment counts.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 and 10.3.
    """
    start = int(block.window_start_us)
    if not screening_config.enabled:
        return WindowScreening(start, {}, (), {}, False, ())
    alpha = float(screening_config.alpha)
    channels, cross = _pairs_of(block, pairs)
    index = {name: i for i, name in enumerate(block.channels)}
    fs = float(block.sample_rate_hz)
    results: Dict[str, SubjectScreening] = {}
    # every channel cleaned once, as contiguous rows; the time scales of all channels at once
    values_rows = np.ascontiguousarray(np.asarray(block.values, dtype=float).T)
    valid_rows = np.ascontiguousarray(np.asarray(block.valid, dtype=bool).T)
    finite = np.isfinite(values_rows)
    if valid_rows.all() and finite.all():
        records = values_rows
    else:
        valid_rows = valid_rows & finite  # a new array: one channel's transpose is a view of the block
        records = np.where(valid_rows, values_rows, 0.0)
    eligible = [name for name in channels if _enough_to_screen(valid_rows[index[name]])]
    rows = [index[name] for name in eligible]
    limit = screening_memory_limit_s(block.n_samples / fs)
    scales = dict(zip(eligible, _time_scales_of_rows(records[rows], valid_rows[rows], fs, limit))) if rows else {}
    complete = valid_rows.all(axis=1)
    # segment statistics of the complete channels, batched by segment count
    by_count: Dict[int, list] = {}
    for name, found in scales.items():
        if not isinstance(found, ValueError) and complete[index[name]]:
            count = segments_for_record(block.n_samples / fs, found.memory_s, screening_config.segments)
            if count:
                by_count.setdefault(count, []).append(name)
    segment_stats: Dict[str, SegmentStatistics] = {}
    for count, names in by_count.items():
        stats_rows = _segment_statistics_of_complete_rows(records[[index[nm] for nm in names]], count)
        segment_stats.update(zip(names, stats_rows))
    for name in channels:
        i = index[name]
        found = scales.get(name)
        if found is None or isinstance(found, ValueError):
            results[name] = _not_screened(name, QUALITY_NOT_SCREENED)
        else:
            results[name] = _screen_record(records[i], valid_rows[i], fs, screening_config.segments, alpha,
                                           name, found, segment_stats.get(name))
    cross_products = _CompleteCrossProducts(records, complete)
    for a, b in cross:
        subject = f"{a}:{b}"
        ra, rb = results[a], results[b]
        memory = float(np.nanmax([ra.memory_s, rb.memory_s])) if not (
            math.isnan(ra.memory_s) and math.isnan(rb.memory_s)) else float("nan")
        if ra.segments == 0 or rb.segments == 0:
            code = QUALITY_NOT_SCREENED if QUALITY_NOT_SCREENED in ra.quality + rb.quality else QUALITY_TOO_SHORT
            joint = _not_screened(subject, code, memory)
        else:
            count = segments_for_record(block.n_samples / fs, memory, screening_config.segments)
            if count == 0:
                joint = _not_screened(subject, QUALITY_TOO_SHORT, memory)
            else:
                ia, ib = index[a], index[b]
                if complete[ia] and complete[ib]:
                    stats = cross_products.statistics(ia, ib, count)
                else:
                    stats = _cross_products_of_records(records[ia], valid_rows[ia], records[ib], valid_rows[ib],
                                                       count)
                joint = _screen_cross_products(stats, fs, alpha, subject, memory)
        flagged = joint.flagged or ra.flagged or rb.flagged
        quality = tuple(c for c in joint.quality if c != QUALITY_NONSTATIONARY)
        if flagged:
            quality = quality + (QUALITY_NONSTATIONARY,)
        results[subject] = dataclasses.replace(joint, flagged=flagged, quality=quality)

    rows = tuple(IndicatorRow(start, s, INDICATOR, float(r.p_value), float("nan"), "", quality_text(r.quality))
                 for s, r in results.items())
    subject_quality = {s: tuple(r.quality) for s, r in results.items()}
    flagged_subjects = [s for s, r in results.items() if r.flagged]
    excluded = screening_config.action == "exclude" and bool(flagged_subjects)
    rejects: Tuple[Reject, ...] = ()
    if excluded:
        detail = "; ".join(
            f"{s}: p={results[s].p_value:.3g} over {results[s].segments} segments of "
            f"{results[s].segment_s:.4g} s" for s in flagged_subjects)
        rejects = (Reject(stage="screen", source=iso_utc(start), subject=WHOLE_WINDOW,
                          reason="nonstationary_window",
                          detail=f"alpha={alpha:g}; flagged {detail}",
                          asset=block.asset, window_start_us=start),)
    return WindowScreening(start, results, rows, subject_quality, excluded, rejects)
