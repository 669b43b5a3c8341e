"""Trailing exponential mean of a covariate: the thermal inertia of a structure.

A deck's stiffness follows the temperature of its mass, which lags the air temperature; the
window mean of an air or surface sensor is then a poor covariate, and its exponentially weighted
trailing mean with the structure's time constant ``tau`` a better one (a first-order lag, the
response of a lumped thermal mass to the air temperature).

For windows at times ``t_i`` (starts, in time order) with window means ``x_i``::

    w_i = exp(-(t_i - t_prev) / tau)
    m_i = w_i m_prev + (1 - w_i) x_i

with ``t_prev`` and ``m_prev`` those of the previous window with a finite mean. The first
window, and a window more than :data:`RESTART_TAUS` time constants after the previous one,
restart the mean (``m_i = x_i``). A window without a finite mean gives NaN and leaves the
recursion as it was (the next window decays from the last finite one). The recursion is causal
and carries two numbers, so a nightly run continues it exactly from the previous night's
``(t_prev, m_prev)``.

With equal spacing the recursion is the first-order recursive filter
``m_i = a m_{i-1} + (1 - a) x_i``, ``a = exp(-dt / tau)``: the exact discretisation of
``tau dm/dt = x - m`` for a sample-and-hold input (Franklin, Powell & Workman 1998, Section 4.3
zero-order-hold equivalent, from memory).
"""

from __future__ import annotations

import math
from typing import NamedTuple, Optional

import numpy as np

#: a gap longer than this many time constants restarts the mean (the old value's weight would be
#: below exp(-5) = 0.7 %; common practice)
RESTART_TAUS = 5.0


class SmootherState(NamedTuple):
    """Last finite window of the recursion: its start (us) and the smoothed value (None: none yet)."""

    time_us: Optional[int] = None
    value: float = float("nan")


def exponential_trailing_mean(times_us, values, tau_s: float, state: Optional[SmootherState] = None):
    """Exponentially weighted trailing mean with time constant ``tau_s`` (see the module notes).

    Parameters
    ----------
    times_us : array_like of int
        Window starts, strictly increasing, after ``state.time_us``.
    values : array_like of float
        Window means (NaN where missing).
    tau_s : float
        Time constant in seconds (> 0).
    state : SmootherState, optional
        The recursion after the previous windows (None: none, the first window restarts it).

    Returns
    -------
    smoothed : ndarray
        ``m_i`` (NaN where ``x_i`` is not finite).
    state : SmootherState
        The recursion after the last finite window.

    Examples
    --------
    >>> m, s = exponential_trailing_mean([0, 3_600_000_000], [0.0, 1.0], 3600.0)
    >>> round(float(m[1]), 6), s.time_us
    (0.632121, 3600000000)
    """
    t = np.asarray(times_us, dtype=np.int64)
    x = np.asarray(values, dtype=float)
    if not tau_s > 0:
        raise ValueError(f"tau_s = {tau_s!r}: must be > 0")
    smoothed = np.full(x.size, np.nan)
    last_time, last_value = state if state is not None else SmootherState()
    for i in range(x.size):
        if not math.isfinite(x[i]):
            continue
        if last_time is None or (int(t[i]) - last_time) > RESTART_TAUS * tau_s * 1e6:
            last_value = float(x[i])
        else:
            weight = math.exp(-(int(t[i]) - last_time) / (tau_s * 1e6))
            last_value = weight * last_value + (1.0 - weight) * float(x[i])
        last_time = int(t[i])
        smoothed[i] = last_value
    return smoothed, SmootherState(last_time, last_value)
