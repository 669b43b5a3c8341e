"""Speed of the correlation core against per-pair scipy.signal.correlate(method="fft").

Case: 8 channels, a 10-minute window at 100 Hz (60 000 samples), max lag 10 s, all 36 pairs
(8 autos + 28 cross pairs). Three timings from the same run, best of several interleaved repeats:

- ``correlate_window``: what the pipeline runs per window: spectra, every pair, the Bartlett
  per-lag stderr, PSD, bandwidth, tone search, validity checks and the PairCorrelation records;
- ``correlate_block``: the estimator alone (R, coefficient, pair counts);
- per pair ``scipy.signal.correlate(b, a, method="fft")`` on the demeaned channels, cut to the
  same lags, divided by n (the correlation alone, no error metadata).

Run: ``python -m benchmarks.bench_correlation [--repeats N] [--gaps]``. Prints a table and the
ratios; never asserts a time.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import scipy.signal

from corrtransforms.config import parse_config
from corrtransforms.numerics.correlation import correlate_block
from corrtransforms.records import WindowBlock
from corrtransforms.stages.correlate import correlate_window

FS, MINUTES, CHANNELS, MAX_LAG_S = 100.0, 10, 8, 10.0


def _interleaved_best(funcs, repeats):
    """Best time of each function, the functions run in turn in every repeat (so a busy
    machine slows all of them alike)."""
    best = [float("inf")] * len(funcs)
    for _ in range(repeats):
        for i, func in enumerate(funcs):
            start = time.perf_counter()
            func()
            best[i] = min(best[i], time.perf_counter() - start)
    return best


def _scipy_per_pair(x, L):
    n = x.shape[0]
    centred = x - x.mean(axis=0)
    lags = scipy.signal.correlation_lags(n, n)
    keep = (lags >= -L) & (lags <= L)
    out = []
    for a in range(x.shape[1]):
        for b in range(a, x.shape[1]):
            full = scipy.signal.correlate(centred[:, b], centred[:, a], mode="full", method="fft")
            out.append(full[keep] / n)
    return out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=10)
    parser.add_argument("--gaps", action="store_true", help="mask 2 %% of samples (masked estimator)")
    args = parser.parse_args(argv)

    rng = np.random.default_rng(2024)
    n = int(MINUTES * 60 * FS)
    L = int(MAX_LAG_S * FS)
    x = rng.standard_normal((n, CHANNELS))
    x = scipy.signal.lfilter([1.0], [1.0, -0.9], x, axis=0)  # coloured, like a sensor record
    valid = np.ones_like(x, dtype=bool)
    if args.gaps:
        valid &= rng.random(x.shape) > 0.02
    names = tuple(f"ch{i}" for i in range(CHANNELS))
    block = WindowBlock(
        asset="bench",
        window_start_us=0,
        window_length_s=MINUTES * 60.0,
        sample_rate_hz=FS,
        channels=names,
        values=np.where(valid, x, 0.0),
        valid=valid,
    )
    config = parse_config(
        {
            "asset": {"name": "bench"},
            "archive": {"path": "unused", "sample_rate_hz": FS},
            "correlation": {"max_lag_s": MAX_LAG_S},
        }
    )

    ours_full, ours_core, theirs = _interleaved_best(
        [
            lambda: correlate_window(block, config),
            lambda: correlate_block(x, FS, MAX_LAG_S, pairs="all", valid=valid),
            lambda: _scipy_per_pair(x, L),
        ],
        args.repeats,
    )

    # same numbers (complete record only: scipy has no masked estimator)
    if not args.gaps:
        est = correlate_block(x, FS, MAX_LAG_S, pairs="all")
        ref = _scipy_per_pair(x, L)
        worst = max(np.max(np.abs(est.R[k] - ref[k])) for k in range(len(ref)))
        agreement = f"max |R_ours - R_scipy| = {worst:.2e}"
    else:
        agreement = "masked estimator (2 % gaps): no scipy equivalent, timing only"

    pairs = CHANNELS * (CHANNELS + 1) // 2
    print(
        f"{CHANNELS} channels, {n} samples ({MINUTES} min at {FS:g} Hz), max lag {MAX_LAG_S:g} s, "
        f"{pairs} pairs, best of {args.repeats}"
    )
    print(f"{'what':58s} {'time [ms]':>10s}")
    print(f"{'correlate_window (incl. stderr, bandwidth, checks, records)':58s} {1e3 * ours_full:10.1f}")
    print(f"{'correlate_block (estimator only)':58s} {1e3 * ours_core:10.1f}")
    print(f"{'scipy.signal.correlate(method=fft), per pair':58s} {1e3 * theirs:10.1f}")
    print(f"ratio scipy / correlate_window = {theirs / ours_full:.1f}x   (target >= 4x)")
    print(f"ratio scipy / correlate_block  = {theirs / ours_core:.1f}x")
    print(agreement)


if __name__ == "__main__":
    main()
