"""Speed of shift detection: the vectorised detectors against a plain Python recursion, and one
series' throughput through :func:`corrtransforms.stages.shifts.detect_shifts`.

Cases (invented data):

- CUSUM + EWMA statistics of 50 000 z values: :func:`detectors.cusum_path` /
  :func:`detectors.ewma_path` vs the literal per-window loop;
- ARL simulation, 10 000 chains, k = 0.5, h = 5: vectorised over chains and time blocks;
- one year of 10-minute windows (52 560) of one indicator, baseline of 30 days by dates with one
  covariate: backfill (day by day, as nightly) and the per-window cost of the baseline phase.

Run: ``python -m benchmarks.bench_shifts``. Prints timings and ratios; never asserts a time.
"""

from __future__ import annotations

import time

import numpy as np

from corrtransforms.config import parse_config
from corrtransforms.numerics import arl, detectors
from corrtransforms.stages import shifts as shift_series


def _best(fn, repeats=3):
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def _loop(z, k, smoothing):
    upper = lower = w = 0.0
    out = np.empty((3, z.size))
    for i, value in enumerate(z):
        upper = max(0.0, upper + value - k)
        lower = max(0.0, lower - value - k)
        w = smoothing * value + (1 - smoothing) * w
        out[:, i] = upper, lower, w
    return out


def main():
    rng = np.random.default_rng(0)
    z = rng.standard_normal(50_000)
    vectorised = _best(lambda: (detectors.cusum_path(z, 0.5), detectors.ewma_path(z, 0.2)))
    loop = _best(lambda: _loop(z, 0.5, 0.2), repeats=1)
    print(
        f"statistics of 50 000 windows: vectorised {vectorised * 1e3:.2f} ms, loop {loop * 1e3:.1f} ms, "
        f"ratio {loop / vectorised:.0f}x"
    )

    start = time.perf_counter()
    run_lengths = arl.simulate_run_lengths("cusum", n_chains=10_000, rng=rng, h=5.0)
    elapsed = time.perf_counter() - start
    print(
        f"ARL simulation, 10 000 chains (mean {run_lengths.mean():.0f}): {elapsed:.2f} s, "
        f"{run_lengths.sum() / elapsed / 1e6:.1f} M chart steps/s"
    )

    config = parse_config(
        {
            "asset": {"name": "bench"},
            "archive": {"path": "x", "sample_rate_hz": 50.0},
            "channels": {"covariates": ["temperature"]},
            "baseline": {"start": "2023-01-01", "end": "2023-01-30"},
        }
    )
    n = 365 * 144
    times = 1_672_531_200_000_000 + np.arange(n, dtype=np.int64) * 600_000_000
    temperature = 10 + 8 * np.sin(2 * np.pi * np.arange(n) / 144) + rng.normal(0, 1, n)
    values = 2.0 - 0.003 * temperature + rng.normal(0, 0.005, n)
    stderr = np.full(n, 0.004)
    start = time.perf_counter()
    table, states = shift_series.detect_shifts(
        times,
        values,
        stderr,
        None,
        {"temperature": temperature},
        config,
        subject="deck",
        indicator="mode_freq_hz",
        unit="Hz",
    )
    elapsed = time.perf_counter() - start
    baseline_windows = 30 * 144
    start = time.perf_counter()
    shift_series.detect_shifts(
        times[:baseline_windows],
        values[:baseline_windows],
        stderr[:baseline_windows],
        None,
        {"temperature": temperature[:baseline_windows]},
        config,
    )
    baseline_elapsed = time.perf_counter() - start
    after = elapsed - baseline_elapsed
    print(
        f"one series, {n} windows, {len(states)} days: {elapsed:.2f} s "
        f"(baseline phase {baseline_windows} windows: {baseline_elapsed:.2f} s, "
        f"{baseline_elapsed / baseline_windows * 1e6:.0f} us/window; "
        f"after it: {after / (n - baseline_windows) * 1e6:.1f} us/window; "
        f"ratio {baseline_elapsed / baseline_windows / (after / (n - baseline_windows)):.0f}x)"
    )


if __name__ == "__main__":
    main()
