"""The trailing exponential mean of a covariate against scipy's recursive filter and the
formula written out, with restarts after long gaps and continuation from a carried state."""

import math

import numpy as np
import pytest
from scipy import signal

from corrtransforms.numerics.covariate_smoothing import RESTART_TAUS, SmootherState, exponential_trailing_mean

HOUR_US = 3600 * 10**6


def test_equal_spacing_is_the_first_order_recursive_filter_of_scipy():
    # m_i = a m_{i-1} + (1 - a) x_i with a = exp(-dt / tau), started at m_0 = x_0: scipy.signal.lfilter
    # with b = [1 - a], a = [1, -a] and the initial condition zi = a x_0 (Oppenheim & Schafer,
    # direct form; the filter's state after a virtual m_{-1} = x_0)
    x = np.random.default_rng(41).normal(10, 3, 500)
    times = np.arange(500, dtype=np.int64) * HOUR_US // 6  # 10-minute windows
    tau_s = 6 * 3600.0
    smoothed, state = exponential_trailing_mean(times, x, tau_s)
    a = math.exp(-600.0 / tau_s)
    reference, _ = signal.lfilter([1 - a], [1, -a], x, zi=[a * x[0]])
    np.testing.assert_allclose(smoothed, reference, rtol=1e-12)
    assert state == SmootherState(int(times[-1]), smoothed[-1])


def test_uneven_spacing_gaps_restarts_and_missing_windows_follow_the_formula():
    gap_h = 6 * RESTART_TAUS + 1  # just over 5 time constants of 6 h
    times = (np.array([0, 1, 3, 4, 4 + gap_h, 5 + gap_h]) * HOUR_US).astype(np.int64)
    x = np.array([1.0, 3.0, np.nan, 5.0, 7.0, 9.0])
    smoothed, state = exponential_trailing_mean(times, x, 6 * 3600.0)
    w = [math.exp(-1 / 6), math.exp(-3 / 6)]
    m1 = w[0] * 1.0 + (1 - w[0]) * 3.0
    m3 = w[1] * m1 + (1 - w[1]) * 5.0  # dt from the last finite window (hour 1) to hour 4
    m5 = w[0] * 7.0 + (1 - w[0]) * 9.0  # restarted after the gap of 31 h > 5 tau
    np.testing.assert_allclose(smoothed, [1.0, m1, np.nan, m3, 7.0, m5], rtol=1e-14)
    assert state.time_us == int(times[-1])


def test_a_carried_state_continues_the_recursion_exactly():
    rng = np.random.default_rng(42)
    times = np.cumsum(rng.integers(5, 30, 300)).astype(np.int64) * 60 * 10**6
    x = rng.normal(0, 1, 300)
    whole, _ = exponential_trailing_mean(times, x, 7200.0)
    first, state = exponential_trailing_mean(times[:123], x[:123], 7200.0)
    second, _ = exponential_trailing_mean(times[123:], x[123:], 7200.0, state)
    assert np.array_equal(np.concatenate([first, second]), whole)
    with pytest.raises(ValueError, match="tau_s"):
        exponential_trailing_mean(times, x, 0.0)
