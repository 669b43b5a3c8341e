"""Per-window cost of the analysis stages (no Beam): screening, correlation, indicators.

    python -m benchmarks.bench_window [--channels 8 16 32] [--repeats 5] [--profile]

One invented window per channel count, built like the scale benchmark's (benchmarks/bench_lags.py:
two lightly damped modes seen through invented mode-shape ordinates, a ground-borne broadband
component between the last two channels, each channel its own noise): 100 Hz, 10-minute windows,
max lag 10 s, all pairs, the scale job's two single-channel modes and stationarity screening.
It times, best of interleaved repeats:

- ``screen``: :func:`corrtransforms.stages.screen.screen_window` alone;
- ``correlate``: :func:`corrtransforms.stages.correlate.correlate_window` alone (all pairs with
  error metadata, modes);
- ``analyse``: :func:`corrtransforms.stages.analyse.analyse_window` (what the correlate transform
  runs: screening, then correlation of one window; each takes its own transforms, see
  docs/performance.md);
- ``indicators``: :func:`corrtransforms.stages.indicators.window_indicators` of its result;
- ``floor``: one rFFT per channel at ``next_fast_len(n + L)`` and one inverse per pair.

``--precision float32 float64`` times each window with both ``[correlation] transform_precision``
values side by side (default: float32 only, the configuration's default). ``--profile`` prints a
pyinstrument profile of ``analyse`` + ``indicators`` on the last row's window. Prints timings and
ratios; never asserts a time.
"""

from __future__ import annotations

import argparse
import dataclasses
import os

import numpy as np
import scipy.fft
from scipy import signal

from benchmarks.bench_correlation import _interleaved_best
from benchmarks.scale_archive import config_text
from corrtransforms.config import parse_config, tomllib
from corrtransforms.records import WindowBlock
from corrtransforms.stages.analyse import analyse_window
from corrtransforms.stages.correlate import correlate_window
from corrtransforms.stages.indicators import window_indicators
from corrtransforms.stages.screen import screen_window

FS, WINDOW_S, MAX_LAG_S = 100.0, 600.0, 10.0
MODES = ((3.1, 0.02), (7.0, 0.015))
GROUND_DELAY = 5


def _resonator(freq_hz, damping):
    w = 2 * np.pi * freq_hz
    r = np.exp(-damping * w / FS)
    return [1.0], [1.0, -2 * r * np.cos(w * np.sqrt(1 - damping**2) / FS), r * r]


def invented_block(n_channels: int, seed: int = 0):
    """One invented window of ``n_channels`` channels and the scale job's configuration for it."""
    rng = np.random.default_rng(seed)
    n = int(WINDOW_S * FS)
    names = tuple(f"acc{i}" for i in range(1, n_channels + 1))
    shapes = rng.uniform(-1.0, 1.0, size=(n_channels, len(MODES)))
    modal = np.column_stack([signal.lfilter(*_resonator(f, z), rng.standard_normal(n)) for f, z in MODES])
    modal /= modal.std(axis=0)
    ground = rng.standard_normal(n + GROUND_DELAY)
    data = modal @ shapes.T + 0.3 * rng.standard_normal((n, n_channels))
    data[:, -2] += ground[GROUND_DELAY:]
    data[:, -1] += 0.8 * ground[:n]
    raw = tomllib.loads(config_text("unused"))
    raw["channels"] = {"names": list(names)}
    config = parse_config(raw)
    block = WindowBlock(
        asset="bench",
        window_start_us=0,
        window_length_s=WINDOW_S,
        sample_rate_hz=FS,
        channels=names,
        values=data.astype(np.float32).astype(float),
        valid=np.ones_like(data, dtype=bool),
    )
    return block, config


def archive_blocks(config_path: str, count: int):
    """The first ``count`` windows of a scale-benchmark archive (benchmarks/_work/<days>d/asset.toml)."""
    from corrtransforms.config import load_config
    from corrtransforms.stages.plan import list_local_archive, plan_archive
    from corrtransforms.stages.read import read_task

    config = load_config(config_path)
    plan = plan_archive(list_local_archive(config.archive.path), config)
    blocks = []
    for task in plan.tasks:
        blocks.extend(read_task(task, config)[0])
        if len(blocks) >= count:
            break
    return blocks[:count], config


def _with_precision(config, precision: str):
    """``config`` with ``[correlation] transform_precision = precision``."""
    correlation = dataclasses.replace(config.correlation, transform_precision=precision)
    return dataclasses.replace(config, correlation=correlation)


def _floor(block):
    x = np.ascontiguousarray(block.values.T)
    L = int(MAX_LAG_S * FS)
    size = scipy.fft.next_fast_len(x.shape[1] + L, real=True)
    spectra = scipy.fft.rfft(x - x.mean(axis=1, keepdims=True), size, axis=-1)
    c = len(x)
    for a in range(c):
        scipy.fft.irfft(np.conj(spectra[a]) * spectra[a:], size, axis=-1)


def _pipeline_screen(block, config):
    return screen_window(block, config.screening, "all")


def _timed(block, config, result):
    return [
        lambda: _pipeline_screen(block, config),
        lambda: correlate_window(block, config),
        lambda: analyse_window(block, config),
        lambda: window_indicators(result, config),
        lambda: _floor(block),
    ]


def _profile(block, config) -> None:
    from pyinstrument import Profiler

    profiler = Profiler(interval=0.0005)
    profiler.start()
    for _ in range(10):
        result, _ = analyse_window(block, config)
        window_indicators(result, config)
    profiler.stop()
    print(profiler.output_text(unicode=False, color=False, show_all=False))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--channels", type=int, nargs="+", default=[8, 16, 32])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--profile", action="store_true")
    parser.add_argument(
        "--archive", help="also time real windows of this scale-benchmark config (e.g. benchmarks/_work/1d/asset.toml)"
    )
    parser.add_argument("--windows", type=int, default=3, help="windows of --archive")
    parser.add_argument(
        "--precision",
        nargs="+",
        default=["float32"],
        choices=["float32", "float64"],
        help="[correlation] transform_precision of each row (both: side by side, float32 the default)",
    )
    args = parser.parse_args(argv)
    print(
        f"{FS:g} Hz, {WINDOW_S / 60:g}-minute windows, max lag {MAX_LAG_S:g} s, all pairs, two modes, "
        f"screening on; best of {args.repeats} interleaved repeats; load average {os.getloadavg()[0]:.2f}"
    )
    print(
        f"{'channels':>8} {'pairs':>5} {'transforms':>10} | {'screen':>7} {'correlate':>9} {'analyse':>8} "
        f"{'indicators':>10} "
        f"{'window':>7} {'floor':>6} | {'window/floor':>12}"
    )
    print(f"{'':>8} {'':>5} {'':>10} | {'[ms]':>7} {'[ms]':>9} {'[ms]':>8} {'[ms]':>10} {'[ms]':>7} {'[ms]':>6} |")
    cases = [(f"{c}", *invented_block(c)) for c in args.channels]
    if args.archive:
        blocks, archive_config = archive_blocks(args.archive, args.windows)
        cases += [(f"8 arch{k}", b, archive_config) for k, b in enumerate(blocks)]
    cases = [
        (label, block, _with_precision(config, precision), precision)
        for label, block, config in cases
        for precision in args.precision
    ]
    for label, block, config, precision in cases:
        count = len(block.channels)
        result, _ = analyse_window(block, config)
        assert result is not None
        screen, correlate, analyse, indicators, floor = _interleaved_best(_timed(block, config, result), args.repeats)
        window = analyse + indicators
        print(
            f"{label:>8} {count * (count + 1) // 2:5d} {precision:>10} | {1e3 * screen:7.1f} {1e3 * correlate:9.1f} "
            f"{1e3 * analyse:8.1f} {1e3 * indicators:10.1f} {1e3 * window:7.1f} {1e3 * floor:6.1f} | "
            f"{window / floor:12.2f}"
        )
    if args.profile:
        _profile(*cases[-1][1:3])


if __name__ == "__main__":
    main()
