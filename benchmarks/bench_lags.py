"""Speed of the lag indicators of one window: the per-pair loop against the batched path.

Case (invented data, like the scale benchmark's): 8 channels at 100 Hz, 10-minute windows,
max lag 10 s (2001 lags), all 28 cross pairs. The channels see two lightly damped modes through
invented mode-shape ordinates (so the cross-correlation peaks sit at different lags, with
different half-widths for the Knapp-Carter error), two of them a broadband component 5 samples
apart, and each its own noise. Timings per cross pair, best of interleaved repeats:

- ``estimate_lag`` called once per pair (the per-pair loop, still what a failing batch falls
  back to) against one ``estimate_lags`` call over the window's pairs;
- the pair part of ``window_indicators_and_failures`` (the lag_s and peak_coef rows): per-pair
  ``_pair_rows`` against the batched estimates then the rows.

Each run also compares the two paths' numbers (largest relative difference, and whether every
field is bit-identical). Run: ``python -m benchmarks.bench_lags [--repeats N] [--windows N]``.
Prints timings and ratios; never asserts a time.
"""

from __future__ import annotations

import argparse

import numpy as np
from scipy import signal

from benchmarks.bench_correlation import _interleaved_best
from corrtransforms.config import parse_config
from corrtransforms.numerics.time_delay import estimate_lag, estimate_lags
from corrtransforms.records import WindowBlock
from corrtransforms.stages import indicators
from corrtransforms.stages.correlate import correlate_window

FS, WINDOW_S, MAX_LAG_S = 100.0, 600.0, 10.0
CHANNELS = tuple(f"acc{i}" for i in range(1, 9))
#: invented modes (frequency Hz, damping ratio) and mode-shape ordinates of each channel
MODES = ((3.1, 0.02), (7.0, 0.015))
SHAPES = np.array([[1.0, 0.3], [0.8, -0.6], [0.5, 1.0], [-0.4, 0.7], [0.9, 0.1], [0.2, -0.9], [0.1, 0.05], [0.1, 0.05]])
GROUND_DELAY = 5  # samples between the broadband component at acc7 and at acc8


def _resonator(freq_hz, damping):
    w = 2 * np.pi * freq_hz
    r = np.exp(-damping * w / FS)
    return [1.0], [1.0, -2 * r * np.cos(w * np.sqrt(1 - damping**2) / FS), r * r]


def invented_window(seed: int, weighting: str):
    """One correlated window (WindowCorrelation) of the invented structure and its config."""
    rng = np.random.default_rng(seed)
    n = int(WINDOW_S * FS)
    modal = np.column_stack([signal.lfilter(*_resonator(f, z), rng.standard_normal(n)) for f, z in MODES])
    modal /= modal.std(axis=0)
    ground = rng.standard_normal(n + GROUND_DELAY)
    data = modal @ SHAPES.T + 0.3 * rng.standard_normal((n, len(CHANNELS)))
    data[:, 6] += ground[GROUND_DELAY:]
    data[:, 7] += 0.8 * ground[:n]
    config = parse_config(
        {
            "asset": {"name": "bench"},
            "archive": {"path": "unused", "sample_rate_hz": FS},
            "channels": {"names": list(CHANNELS)},
            "windows": {"length_s": WINDOW_S},
            "correlation": {"max_lag_s": MAX_LAG_S, "weighting": weighting},
        }
    )
    block = WindowBlock(
        asset="bench",
        window_start_us=0,
        window_length_s=WINDOW_S,
        sample_rate_hz=FS,
        channels=CHANNELS,
        values=data,
        valid=np.ones_like(data, dtype=bool),
    )
    return correlate_window(block, config), config


def _inputs(wc, config, pairs):
    return [indicators._lag_inputs(wc, config, p) for p in pairs]


def per_pair_loop(wc, config, pairs):
    """``estimate_lag`` once per cross pair (the per-pair path)."""
    return [
        estimate_lag(
            p.coefficient,
            p.stderr,
            p.first_lag_s,
            p.lag_step_s,
            p.record_s,
            weighted_coefficient=w,
            weighting=weighting,
            auto_a=a,
            auto_b=b,
            max_lag_s=config.correlation.max_lag_s,
        )
        for p, (w, weighting, a, b) in zip(pairs, _inputs(wc, config, pairs))
    ]


def batched(wc, config, pairs):
    """One ``estimate_lags`` call over the window's cross pairs."""
    inputs = _inputs(wc, config, pairs)
    weighted = [w for w, _, _, _ in inputs]
    return estimate_lags(
        np.array([p.coefficient for p in pairs]),
        np.array([p.stderr for p in pairs]),
        pairs[0].first_lag_s,
        pairs[0].lag_step_s,
        [p.record_s for p in pairs],
        weighted_coefficient=weighted,
        weighting=config.correlation.weighting,
        auto_a=[a for _, _, a, _ in inputs],
        auto_b=[b for _, _, _, b in inputs],
        max_lag_s=config.correlation.max_lag_s,
    )


def rows_per_pair(wc, config, pairs):
    return [r for p in pairs for r in indicators._pair_rows(wc, config, p, lambda subject: ())]


def rows_batched(wc, config, pairs):
    estimates = indicators._batched_lag_estimates(wc, config, pairs)
    return [r for p, e in zip(pairs, estimates) for r in indicators._pair_rows(wc, config, p, lambda s: (), e)]


def _agreement(before, after):
    worst, identical = 0.0, True
    for x, y in zip(before, after):
        identical &= x.quality == y.quality
        for u, v in zip(x[:5], y[:5]):
            if np.isnan(u) or np.isnan(v):
                identical &= bool(np.isnan(u) and np.isnan(v))
            elif u != v:
                identical = False
                worst = max(worst, abs(u - v) / max(abs(u), 1e-300))
    return worst, identical


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--windows", type=int, default=3)
    args = parser.parse_args(argv)
    print(
        f"{len(CHANNELS)} channels at {FS:g} Hz, {WINDOW_S / 60:g}-minute windows, max lag {MAX_LAG_S:g} s "
        f"({int(2 * MAX_LAG_S * FS) + 1} lags), best of {args.repeats} interleaved repeats, "
        f"{args.windows} invented windows per weighting"
    )
    print(
        f"{'weighting':9s} {'window':>6s} {'pairs':>5s} | {'estimate_lag loop':>17s} {'estimate_lags':>13s} "
        f"{'ratio':>6s} | {'rows per pair':>13s} {'rows batched':>12s} {'ratio':>6s} | agreement"
    )
    print(
        f"{'':9s} {'':>6s} {'':>5s} | {'[ms/pair]':>17s} {'[ms/pair]':>13s} {'':>6s} | {'[ms/pair]':>13s} "
        f"{'[ms/pair]':>12s}"
    )
    totals = {}
    for weighting in ("none", "phat"):
        for seed in range(args.windows):
            wc, config = invented_window(seed, weighting)
            pairs = [p for p in wc.pairs if not p.is_auto]
            loop, batch, rows_loop, rows_batch = _interleaved_best(
                [
                    lambda: per_pair_loop(wc, config, pairs),
                    lambda: batched(wc, config, pairs),
                    lambda: rows_per_pair(wc, config, pairs),
                    lambda: rows_batched(wc, config, pairs),
                ],
                args.repeats,
            )
            worst, identical = _agreement(per_pair_loop(wc, config, pairs), batched(wc, config, pairs))
            same_rows = rows_per_pair(wc, config, pairs) == rows_batched(wc, config, pairs)
            m = len(pairs)
            totals.setdefault(weighting, []).append((loop / m, batch / m, rows_loop / m, rows_batch / m))
            print(
                f"{weighting:9s} {seed:6d} {m:5d} | {1e3 * loop / m:17.3f} {1e3 * batch / m:13.3f} "
                f"{loop / batch:5.1f}x | {1e3 * rows_loop / m:13.3f} {1e3 * rows_batch / m:12.3f} "
                f"{rows_loop / rows_batch:5.1f}x | "
                + ("bit-identical" if identical else f"max rel diff {worst:.1e}")
                + ("" if same_rows else "; ROWS DIFFER")
            )
    for weighting, values in totals.items():
        loop, batch, rows_loop, rows_batch = np.mean(values, axis=0)
        per_day = 144 * 28
        print(
            f"{weighting}: mean {1e3 * rows_loop:.3f} -> {1e3 * rows_batch:.3f} ms per pair "
            f"({rows_loop / rows_batch:.1f}x); one day (144 windows x 28 cross pairs): "
            f"{rows_loop * per_day:.2f} s -> {rows_batch * per_day:.2f} s"
        )


if __name__ == "__main__":
    main()
