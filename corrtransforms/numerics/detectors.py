"""Shift detectors (control charts) on standardised residuals.

The detectors run on the error-aware standardised residuals ``z`` of one indicator (see
:mod:`corrtransforms.stages.shifts`); in control ``z`` is close to N(0, 1).

- :func:`cusum_path`: two-sided tabular CUSUM (Page 1954), computed along the last axis without a
  Python loop from the closed-form solution of the Lindley recursion.
- :func:`cusum_run_lengths` / :func:`cusum_run_sums`: how long each CUSUM side has been above
  zero, for the onset estimate (the last time the statistic left zero) and the shift size.
- :func:`ewma_path` and :func:`ewma_limits`: EWMA chart (Roberts 1959) with the exact
  time-varying control limits.

Their average run lengths (integral equations, Markov chains, Siegmund's approximation,
simulation) are in :mod:`corrtransforms.numerics.arl`.

Only numpy and scipy are used.

References
----------
Page, E. S. (1954). Continuous inspection schemes. Biometrika 41, 100-115.
Roberts, S. W. (1959). Control chart tests based on geometric moving averages. Technometrics 1,
239-250.
Lucas, J. M. & Saccucci, M. S. (1990). Exponentially weighted moving average control schemes:
properties and enhancements. Technometrics 32, 1-12.
Montgomery, D. C. (2009). Introduction to Statistical Quality Control, 6th ed., Wiley, ch. 9.
"""

from __future__ import annotations

from typing import Tuple

import numpy as np
from scipy import signal as _signal

CHARTS = ("cusum", "ewma")


# --------------------------------------------------------------------------------------------
# Detector statistics


def _lindley(increments: np.ndarray, start) -> np.ndarray:
    """Solution of C_t = max(0, C_{t-1} + x_t) along the last axis, C_0 = start."""
    partial = np.cumsum(increments, axis=-1)
    start = np.asarray(start, dtype=float)[..., None]
    floor = np.minimum(-start, np.minimum.accumulate(partial, axis=-1))
    return np.maximum(partial - floor, 0.0)


def cusum_path(z, k: float, upper_start=0.0, lower_start=0.0) -> Tuple[np.ndarray, np.ndarray]:
    """Two-sided tabular CUSUM of standardised values along the last axis.

    Parameters
    ----------
    z : array_like
        Standardised values (in control N(0, 1)); time along the last axis.
    k : float
        Reference value (allowance) in standard deviations, usually half the shift to detect.
    upper_start, lower_start : float or array_like
        Statistics before the first value (0 for a fresh chart; the carried state otherwise);
        broadcast against ``z`` without its last axis.

    Returns
    -------
    upper, lower : ndarray
        ``C+_t`` and ``C-_t``, same shape as ``z``. A signal is ``C > h``.

    Notes
    -----
    ``C+_t = max(0, C+_{t-1} + z_t - k)``, ``C-_t = max(0, C-_{t-1} - z_t - k)``
    (Montgomery 2009, eqs. 9.2-9.3). The recursion is evaluated without a loop from its
    closed-form solution ``C_t = S_t - min(-C_0, min_{s<=t} S_s)`` with ``S_t`` the partial sums
    of the increments, so the statistic is exactly zero where the recursion resets.

    References
    ----------
    Page (1954); Montgomery (2009) Section 9.1.2.
    """
    z = np.asarray(z, dtype=float)
    return _lindley(z - k, upper_start), _lindley(-z - k, lower_start)


def cusum_run_lengths(statistic, start_count=0) -> np.ndarray:
    """Consecutive windows, ending at each t, with the CUSUM statistic above zero.

    Parameters
    ----------
    statistic : array_like
        One CUSUM side along the last axis (from :func:`cusum_path`).
    start_count : int or array_like
        Run length carried from before the first value (0 if the statistic was zero).

    Returns
    -------
    ndarray of int64
        ``N_t`` (0 where the statistic is zero). The estimated onset of a shift signalled at
        ``t`` is window ``t - N_t + 1``: the first window after the statistic last left zero.

    References
    ----------
    Montgomery (2009) Section 9.1.2 (the counters N+ and N-).
    """
    positive = np.asarray(statistic) > 0
    n = positive.shape[-1]
    index = np.arange(n)
    last_zero = np.maximum.accumulate(np.where(positive, -1, index), axis=-1)
    carried = np.asarray(start_count, dtype=np.int64)[..., None]
    lengths = np.where(last_zero < 0, index + 1 + carried, index - last_zero)
    return np.where(positive, lengths, 0).astype(np.int64)


def cusum_run_sums(values, run_lengths, start_sum=0.0) -> np.ndarray:
    """Sum of ``values`` over each current CUSUM run (1-D).

    Parameters
    ----------
    values : array_like
        Per-window quantity to sum (e.g. value - expected), 1-D.
    run_lengths : array_like
        From :func:`cusum_run_lengths` on the same windows.
    start_sum : float
        Sum carried for a run that started before the first value.

    Returns
    -------
    ndarray
        Sum over the windows of the run ending at t (0 where the run length is 0). Divided by the
        run length it is the shift-size estimate ``mu_hat - mu_0``, the value-unit form of
        Montgomery's ``sigma (K + C+/N+)`` (Montgomery 2009, eq. 9.4).
    """
    values = np.asarray(values, dtype=float)
    lengths = np.asarray(run_lengths, dtype=np.int64)
    index = np.arange(values.size)
    cumulative = np.concatenate(([0.0], np.cumsum(values)))
    first = index + 1 - lengths
    inside = first >= 0
    sums = np.where(
        inside, cumulative[index + 1] - cumulative[np.clip(first, 0, None)], cumulative[index + 1] + start_sum
    )
    return np.where(lengths > 0, sums, 0.0)


def ewma_path(z, smoothing: float, start=0.0) -> np.ndarray:
    """EWMA of standardised values along the last axis.

    Parameters
    ----------
    z : array_like
        Standardised values; time along the last axis.
    smoothing : float
        Weight lambda of the newest value, 0 < lambda <= 1.
    start : float or array_like
        EWMA before the first value (0 for a fresh chart).

    Returns
    -------
    ndarray
        ``w_t = lambda z_t + (1 - lambda) w_{t-1}``.

    References
    ----------
    Roberts (1959); Montgomery (2009) eq. 9.22.
    """
    z = np.asarray(z, dtype=float)
    start = np.asarray(start, dtype=float)
    initial = ((1.0 - smoothing) * np.broadcast_to(start, z.shape[:-1]))[..., None]
    out, _ = _signal.lfilter([smoothing], [1.0, smoothing - 1.0], z, axis=-1, zi=initial)
    return out


def ewma_limits(count, smoothing: float, width: float, exact: bool = True) -> np.ndarray:
    """Control limit of the EWMA of N(0, 1) values after ``count`` updates.

    Parameters
    ----------
    count : int or array_like
        Number of values the EWMA has taken in (1 for the first).
    smoothing : float
        lambda.
    width : float
        L, the limit in standard deviations of the EWMA.
    exact : bool
        True: the exact time-varying limit; False: its asymptote.

    Returns
    -------
    ndarray
        ``L sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2 count)))``; the chart signals when
        ``|w| >`` this.

    References
    ----------
    Montgomery (2009) eqs. 9.24-9.25; Lucas & Saccucci (1990).
    """
    count = np.asarray(count, dtype=float)
    factor = smoothing / (2.0 - smoothing)
    if exact:
        factor = factor * (1.0 - (1.0 - smoothing) ** (2.0 * count))
    return width * np.sqrt(factor)
