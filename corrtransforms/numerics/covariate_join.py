"""Time-weighted window means of a covariate sampled on its own clock (a weather station at one
value a minute, or irregularly), for joining covariates kept in other archives to the windows.

The covariate is taken as linear between consecutive samples that are at most ``max_gap_s``
apart; a longer interval is a gap and contributes nothing. A window's mean is the integral of
that piecewise-linear signal over the covered part of ``[start, start + length)`` divided by
the covered duration (trapezoidal rule, exact for the piecewise-linear signal); a window whose
covered fraction is below ``min_coverage`` has no mean (NaN, ``covariate_missing`` downstream).
Samples just outside a window take part through the interpolated values at its edges.

Groundwork of ``[[covariate_sources]]`` (docs/compensation.md); numpy only.
"""

from __future__ import annotations

from typing import Tuple

import numpy as np


def time_weighted_window_means(
    sample_times_us, values, window_starts_us, length_s: float, max_gap_s: float, min_coverage: float = 0.5
) -> Tuple[np.ndarray, np.ndarray]:
    """Mean of the piecewise-linear covariate over each window, and the covered fraction.

    Parameters
    ----------
    sample_times_us : array_like of int
        Sample times, strictly increasing (non-finite values are dropped first).
    values : array_like of float
        Covariate samples.
    window_starts_us : array_like of int
        Window starts.
    length_s : float
        Window length.
    max_gap_s : float
        Longest interval between samples that is interpolated.
    min_coverage : float
        Smallest covered fraction of a window for a mean.

    Returns
    -------
    means : ndarray
        Time-weighted means (NaN below ``min_coverage``).
    coverage : ndarray
        Covered fraction of each window.

    Examples
    --------
    >>> m, c = time_weighted_window_means([0, 60_000_000], [0.0, 6.0], [0], 60.0, 120.0)
    >>> float(m[0]), float(c[0])
    (3.0, 1.0)
    """
    t = np.asarray(sample_times_us, dtype=np.int64)
    x = np.asarray(values, dtype=float)
    keep = np.isfinite(x)
    t, x = t[keep], x[keep]
    starts = np.asarray(window_starts_us, dtype=np.int64)
    length_us = length_s * 1e6
    means = np.full(starts.size, np.nan)
    coverage = np.zeros(starts.size)
    if t.size < 2:
        return means, coverage
    if np.any(np.diff(t) <= 0):
        raise ValueError("sample_times_us must be strictly increasing")
    for i, start in enumerate(starts):
        means[i], coverage[i] = _window_mean(t, x, float(start), float(start) + length_us, max_gap_s * 1e6)
    means[coverage < min_coverage] = np.nan
    return means, coverage


def _window_mean(t, x, lo: float, hi: float, max_gap_us: float) -> Tuple[float, float]:
    """Integral over the interpolated segments that overlap ``[lo, hi)``, per covered time."""
    first = max(int(np.searchsorted(t, lo, side="right")) - 1, 0)
    last = min(int(np.searchsorted(t, hi, side="left")), t.size - 1)
    seg_t0, seg_t1 = t[first:last].astype(float), t[first + 1 : last + 1].astype(float)
    seg_x0, seg_x1 = x[first:last], x[first + 1 : last + 1]
    usable = (seg_t1 - seg_t0) <= max_gap_us
    a = np.clip(seg_t0, lo, hi)
    b = np.clip(seg_t1, lo, hi)
    usable &= b > a
    if not usable.any():
        return float("nan"), 0.0
    slope = (seg_x1 - seg_x0) / (seg_t1 - seg_t0)
    xa = seg_x0 + slope * (a - seg_t0)
    xb = seg_x0 + slope * (b - seg_t0)
    covered = float(np.sum((b - a)[usable]))
    integral = float(np.sum((0.5 * (xa + xb) * (b - a))[usable]))
    return integral / covered, covered / (hi - lo)
