"""Time-weighted window means of a covariate on its own clock against scipy's trapezoidal
integral of a dense linear interpolation, with gaps and coverage."""

import numpy as np
import pytest
from scipy import integrate

from corrtransforms.numerics.covariate_join import time_weighted_window_means

MINUTE_US = 60 * 10**6


def _dense_reference(t, x, lo, hi, max_gap_us):
    """Mean of np.interp over the covered part of [lo, hi) on a 1-second grid (scipy trapezoid)."""
    grid = np.arange(lo, hi + 1, 10**6, dtype=float)
    values = np.interp(grid, t, x)
    segment = np.searchsorted(t, 0.5 * (grid[:-1] + grid[1:]), side="right") - 1  # of each step's midpoint
    inside = (segment >= 0) & (segment < t.size - 1)
    mids = inside.copy()
    mids[inside] = (t[segment[inside] + 1] - t[segment[inside]]) <= max_gap_us
    seg = np.array([integrate.trapezoid(values[i : i + 2], grid[i : i + 2]) for i in np.flatnonzero(mids)])
    return seg.sum() / (mids.sum() * 1e6)


def test_a_weather_station_at_one_value_a_minute_gives_the_trapezoidal_means():
    rng = np.random.default_rng(51)
    t = (np.arange(0, 180) * MINUTE_US + rng.integers(-5, 5, 180) * 10**6).astype(np.int64)
    x = 10 + np.cumsum(rng.normal(0, 0.1, 180))
    starts = np.array([10, 37, 100], dtype=np.int64) * MINUTE_US + 17 * 10**6
    means, coverage = time_weighted_window_means(t, x, starts, 600.0, max_gap_s=180.0)
    for start, mean in zip(starts, means):
        assert mean == pytest.approx(_dense_reference(t, x, start, start + 600e6, 180e6), rel=1e-9)
    np.testing.assert_allclose(coverage, 1.0)


def test_gaps_are_not_interpolated_and_a_window_mostly_in_a_gap_has_no_mean():
    t = np.array([0, 1, 2, 3, 8, 9, 10, 30, 31], dtype=np.int64) * MINUTE_US  # gaps 3-8 and 10-30 min
    x = np.array([1.0, 1.0, 1.0, 1.0, 5.0, 5.0, 5.0, 9.0, 9.0])
    starts = np.array([0, 10], dtype=np.int64) * MINUTE_US
    means, coverage = time_weighted_window_means(t, x, starts, 600.0, max_gap_s=120.0)
    # first window: 3 minutes at 1 and 2 minutes at 5 covered of 10
    assert coverage[0] == pytest.approx(0.5) and means[0] == pytest.approx((3 * 1 + 2 * 5) / 5)
    assert coverage[1] == 0.0 and np.isnan(means[1])
    assert _dense_reference(t.astype(float), x, 0, 600e6, 120e6) == pytest.approx(means[0], rel=1e-9)
