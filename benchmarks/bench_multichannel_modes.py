"""Multi-channel modes: SSI-cov against ERA, time per window, and the coverage of the jackknife stderrs.

    python -m benchmarks.bench_multichannel_modes                # --compare and --timing
    python -m benchmarks.bench_multichannel_modes --coverage     # 400 windows, a few minutes
    python -m benchmarks.bench_multichannel_modes --stage        # the correlate stage without / with a mode
    python -m benchmarks.bench_multichannel_modes --coverage --stage-settings [--sub-records 16]
                                                                 # coverage through stages.modes itself

Prints tables; asserts nothing. Small dense SVDs are slow under a multithreaded BLAS on a busy
machine: run with ``OPENBLAS_NUM_THREADS=1`` (workers parallelise over windows anyway).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from corrtransforms.numerics.correlation import block_lag_sums, channel_spectra, correlate_block, resolve_pairs
from corrtransforms.numerics.mode_shapes import modal_assurance_criterion
from corrtransforms.numerics.mode_tracking import track_modes
from corrtransforms.numerics.mode_uncertainty import mode_uncertainty, window_sequence
from corrtransforms.numerics.multichannel_modes import METHODS, IdentifiedModes, correlation_sequence, identify_modes
from tests.support.multichannel_fixtures import chain_system, modal_system, simulate_records, true_modes


def _lag_arrays(record, fs, max_lag_s, n_segments):
    n, c = record.shape
    spectra = channel_spectra(record, fs, max_lag_s, segment_length=-(-n // n_segments))
    pairs = resolve_pairs("all", c)
    sums, counts = block_lag_sums(spectra, pairs)
    n_lags = spectra.max_lag + 1
    S = correlation_sequence(sums, pairs, range(c), range(c), n_lags)
    N = correlation_sequence(counts, pairs, range(c), range(c), n_lags)
    return S, N


def _subset(modes: IdentifiedModes, rows) -> IdentifiedModes:
    rows = np.asarray(rows)
    return IdentifiedModes(
        modes.freq_hz[rows],
        modes.damping[rows],
        modes.shapes[rows],
        modes.order[rows],
        modes.n_stable[rows],
        modes.block_rows,
        modes.lag_stride,
        modes.method,
        modes.block_columns,
    )


def compare_methods(n_windows: int, seed: int) -> None:
    """Six-mass chain, modes at 0.77 and 2.26 Hz in one band, windows of 1200 s at 20 Hz."""
    fs = 20.0
    A, B = chain_system([1.0] * 6, [400.0] * 6, [2.0, 0.6, 0.6, 0.6, 0.6, 1.2])
    truth = true_modes(A)
    records = simulate_records(A, B, fs, int(1200 * fs), np.random.default_rng(seed), n_windows, 6)
    rows = {m: [] for m in METHODS}
    for record in records:
        S, N = _lag_arrays(record, fs, 7.5, 32)
        seq = window_sequence(S, N)
        for method in METHODS:
            start = time.perf_counter()
            modes = identify_modes(seq, fs, (0.6, 2.6), method=method)
            elapsed = time.perf_counter() - start
            a = track_modes(truth.freq_hz[:2], truth.shapes[:2], modes.freq_hz, modes.shapes)
            if (a.candidate < 0).any():
                rows[method].append([np.nan] * 6 + [elapsed])
                continue
            f, z = modes.freq_hz[a.candidate], modes.damping[a.candidate]
            mac = np.diag(modal_assurance_criterion(modes.shapes[a.candidate], truth.shapes[:2]))
            rows[method].append(
                list(f / truth.freq_hz[:2] - 1) + list(z / truth.damping[:2] - 1) + list(mac) + [elapsed]
            )
    print(f"\nSSI-cov vs ERA: six-mass chain, {n_windows} windows of 1200 s at 20 Hz, band 0.6-2.6 Hz")
    print("method   found  median|df/f| (m1, m2)   rms dz/z (m1, m2)   min MAC (m1, m2)   ms/window")
    for method in METHODS:
        r = np.array(rows[method])
        ok = np.isfinite(r[:, 0])
        print(
            f"{method:8s} {ok.sum():3d}/{len(r)}  {np.median(np.abs(r[ok, 0])):.2e} {np.median(np.abs(r[ok, 1])):.2e}"
            f"     {np.sqrt(np.mean(r[ok, 2] ** 2)):.3f} {np.sqrt(np.mean(r[ok, 3] ** 2)):.3f}"
            f"         {r[ok, 4].min():.4f} {r[ok, 5].min():.4f}     {1e3 * np.median(r[:, 6]):.1f}"
        )


def timing(repeats: int, seed: int) -> None:
    """Eight channels, two modes in the band, 600 s at 50 Hz (the lags on a stride of 2)."""
    fs = 50.0
    A, B = chain_system([1.0] * 8, [400.0] * 8, [2.0] + [0.6] * 6 + [1.2])
    truth = true_modes(A)
    record = simulate_records(A, B, fs, int(600 * fs), np.random.default_rng(seed), 1, 8)[0]
    band = (0.45, 1.9)
    print(f"\nTime per window: 8 channels, 600 s at 50 Hz, modes {truth.freq_hz[:2].round(3)} Hz, band {band}")
    print(f"{'step':56s} ms (median of {repeats})")

    def clock(label, fn):
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            out = fn()
            times.append(time.perf_counter() - start)
        print(f"{label:56s} {1e3 * np.median(times):8.1f}")
        return out

    max_lag_s = 6.0
    clock("correlation stage's estimate (correlate_block, 36 pairs)", lambda: correlate_block(record, fs, max_lag_s))
    S, N = clock("sub-record lag sums (32 blocks) -> Lambda_k", lambda: _lag_arrays(record, fs, max_lag_s, 32))
    seq = window_sequence(S, N)
    for columns in (0, 6):
        label = "square Hankel" if columns == 0 else f"{columns} block columns"
        modes = clock(
            f"identify_modes, stride 2, {label}",
            lambda c=columns: identify_modes(seq, fs, band, lag_stride=2, block_columns=c),
        )
        a = track_modes(truth.freq_hz[:2], truth.shapes[:2], modes.freq_hz, modes.shapes)
        if (a.candidate < 0).any():
            print(f"   (modes not both found: {modes.freq_hz})")
            continue
        chosen = _subset(modes, a.candidate)
        u = clock(f"mode_uncertainty (32 replicates), {label}", lambda m=chosen: mode_uncertainty(S, N, fs, m))
        print(
            f"   block rows {modes.block_rows}, orders {chosen.order}, f {chosen.freq_hz.round(4)}"
            f" +/- {u.freq_stderr_hz.round(4)} (true {truth.freq_hz[:2].round(4)})"
        )


def coverage(n_windows: int, seed: int) -> None:
    """Three channels, modes at 2.0 and 3.0 Hz in the band (4.5 Hz outside), 300 s at 20 Hz."""
    fs = 20.0
    shapes = np.linalg.qr(np.array([[1.0, 1.0, 1.0], [1.0, 0.2, -1.0], [1.0, -1.2, 0.6]]).T)[0]
    A, B = modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], shapes)
    truth = true_modes(A)
    z, ratios, missed = [], [], 0
    for start in range(0, n_windows, 50):
        count = min(50, n_windows - start)
        records = simulate_records(A, B, fs, int(300 * fs), np.random.default_rng(seed + start), count, 3)
        for record in records:
            S, N = _lag_arrays(record, fs, 2.0, 32)
            modes = identify_modes(window_sequence(S, N), fs, (1.7, 3.3))
            a = track_modes(truth.freq_hz[:2], truth.shapes[:2], modes.freq_hz, modes.shapes)
            if (a.candidate < 0).any():
                missed += 1
                continue
            chosen = _subset(modes, a.candidate)
            u = mode_uncertainty(S, N, fs, chosen)
            err = np.concatenate([chosen.freq_hz - truth.freq_hz[:2], chosen.damping - truth.damping[:2]])
            se = np.concatenate([u.freq_stderr_hz, u.damping_stderr])
            z.append(err / se)
            ratios.append(np.concatenate([err, se]))
    z_arr, r_arr = np.array(z), np.array(ratios)
    print(f"\nCoverage of +/-1.96 stderr: {len(z_arr)} of {n_windows} windows (mode missing in {missed})")
    print("parameter        coverage   mean z   sd z   rms error / rms stderr")
    for k, name in enumerate(["freq 2.0 Hz", "freq 3.0 Hz", "damping 2.0 Hz", "damping 3.0 Hz"]):
        rms = np.sqrt(np.mean(r_arr[:, k] ** 2)) / np.sqrt(np.mean(r_arr[:, 4 + k] ** 2))
        inside = np.mean(np.abs(z_arr[:, k]) < 1.96)
        print(f"{name:16s} {inside:8.3f} {np.mean(z_arr[:, k]):8.2f} {np.std(z_arr[:, k]):6.2f} {rms:10.2f}")


def _truth_entries(truth, band, names, keep):
    """[[modes]] entries (one per true mode in ``keep``, all with ``band``) and their references
    from the truth, so the stage's tracking picks the true modes."""
    from corrtransforms.numerics.mode_shapes import largest_component, normalise_shape
    from corrtransforms.stages.mode_reference import ModeReference

    entries, references = [], {}
    for k in keep:
        name = f"mode{k}"
        entries.append({"name": name, "channels": list(names), "band_hz": list(band)})
        index = largest_component(truth.shapes[k])
        shape = normalise_shape(truth.shapes[k], index)
        references[name] = ModeReference(name, float(truth.freq_hz[k]), shape, index, 0)
    return entries, references


def stage_coverage(n_windows: int, seed: int, sub_records: int) -> None:
    """Coverage through ``stages.modes.window_multichannel_modes`` (its Hankel size, stride,
    lags, sub-records), entries referenced to the true modes."""
    from corrtransforms.config import parse_config
    from corrtransforms.records import WindowBlock
    from corrtransforms.stages.modes import window_multichannel_modes

    shapes3 = np.linalg.qr(np.array([[1.0, 1.0, 1.0], [1.0, 0.2, -1.0], [1.0, -1.2, 0.6]]).T)[0]
    cases = [
        ("3 ch, 20 Hz, 300 s, max_lag 2 s", modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], shapes3), 3, 20.0,
         300, 2.0, (1.7, 3.3)),
        ("8 ch chain, 50 Hz, 600 s, max_lag 6 s", chain_system([1.0] * 8, [400.0] * 8, [2.0] + [0.6] * 6 + [1.2]), 8,
         50.0, 600, 6.0, (0.45, 1.9)),
    ]  # fmt: skip
    print(f"\nCoverage of +/-1.96 stderr through the stage, K = {sub_records} sub-records")
    print(
        "case                                   mode      windows  freq cov  damp cov  rms err/se f  rms err/se d"
        "  damping held (jackknife_records_short)"
    )
    for label, (A, B), c, fs, seconds, max_lag_s, band in cases:
        truth = true_modes(A)
        keep = [k for k in range(len(truth.freq_hz)) if band[0] < truth.freq_hz[k] < band[1]]
        names = tuple(f"ch{k}" for k in range(c))
        entries, references = _truth_entries(truth, band, names, keep)
        config = parse_config(
            {
                "asset": {"name": "bench"},
                "archive": {"path": "unused", "sample_rate_hz": fs},
                "channels": {"names": list(names)},
                "windows": {"length_s": float(seconds)},
                "correlation": {"max_lag_s": max_lag_s, "pairs": "auto"},
                "modes": entries,
            }
        )
        errors = {k: [] for k in keep}
        for start in range(0, n_windows, 50):
            count = min(50, n_windows - start)
            records = simulate_records(A, B, fs, int(seconds * fs), np.random.default_rng(seed + start), count, c)
            for record in records:
                block = WindowBlock("b", 0, float(seconds), fs, names, record, np.ones(record.shape, bool), {}, {})
                found = window_multichannel_modes(block, config, references=references, sub_records=sub_records)
                for k, m in zip(keep, found):
                    if np.isfinite(m.freq_stderr_hz) and np.isfinite(m.damping_stderr):
                        errors[k].append(
                            (
                                m.freq_hz - truth.freq_hz[k],
                                m.freq_stderr_hz,
                                m.damping - truth.damping[k],
                                m.damping_stderr,
                                "jackknife_records_short" in m.damping_quality,
                            )
                        )
        for k in keep:
            e = np.array(errors[k])
            cov_f, cov_d = np.mean(np.abs(e[:, 0] / e[:, 1]) < 1.96), np.mean(np.abs(e[:, 2] / e[:, 3]) < 1.96)
            rms_f = np.sqrt(np.mean(e[:, 0] ** 2) / np.mean(e[:, 1] ** 2))
            rms_d = np.sqrt(np.mean(e[:, 2] ** 2) / np.mean(e[:, 3] ** 2))
            print(
                f"{label:38s} {truth.freq_hz[k]:5.3f} Hz {len(e):5d}    {cov_f:6.3f}    {cov_d:6.3f}"
                f"     {rms_f:8.2f}      {rms_d:8.2f}        {np.mean(e[:, 4]):.3f}"
            )


def _stage_config(channels, fs, max_lag_s, band, modes):
    from corrtransforms.config import parse_config

    entries = [{"name": "m", "channels": list(channels), "band_hz": list(band)}] if modes else []
    return parse_config(
        {
            "asset": {"name": "bench"},
            "archive": {"path": "unused", "sample_rate_hz": fs},
            "channels": {"names": list(channels)},
            "windows": {"length_s": 600.0},
            "correlation": {"max_lag_s": max_lag_s},
            "modes": entries,
        }
    )


def stage_cost(repeats: int, seed: int) -> None:
    """The correlate stage (analyse_window: screening, all pairs) of one window without and with
    one multi-channel [[modes]] entry over every channel: the settings of stages/modes."""
    from corrtransforms.records import WindowBlock
    from corrtransforms.stages.analyse import analyse_window

    cases = [
        ("3 channels, 20 Hz, 300 s, max_lag 2 s, band 1.7-3.3 Hz", 3, 20.0, 300, 2.0, (1.7, 3.3)),
        ("5 channels, 25 Hz, 600 s, max_lag 30 s, band 2.0-2.9 Hz", 5, 25.0, 600, 30.0, (2.0, 2.9)),
        ("8 channels, 50 Hz, 600 s, max_lag 6 s, band 0.45-1.9 Hz", 8, 50.0, 600, 6.0, (0.45, 1.9)),
    ]
    print("\nCorrelate stage per window without / with one multi-channel mode (ms, median of", repeats, ")")
    print(f"{'case':58s} {'without':>8s} {'with':>8s} {'ratio':>6s}  mode found (Hz)")
    for label, c, fs, seconds, max_lag_s, band in cases:
        A, B = chain_system([1.0] * c, [400.0] * c, [2.0] + [0.6] * (c - 2) + [1.2])
        record = simulate_records(A, B, fs, int(seconds * fs), np.random.default_rng(seed), 1, c)[0]
        names = tuple(f"ch{k}" for k in range(c))
        block = WindowBlock("bench", 0, float(seconds), fs, names, record, np.ones(record.shape, bool), {}, {})
        times, found = [], None
        for modes in (False, True):
            config = _stage_config(names, fs, max_lag_s, band, modes)
            runs = []
            for _ in range(repeats):
                start = time.perf_counter()
                result, _ = analyse_window(block, config)
                runs.append(time.perf_counter() - start)
            times.append(np.median(runs))
            if modes and result is not None:
                found = result.multichannel_modes[0].freq_hz
        truth = true_modes(A).freq_hz
        inside = truth[(truth > band[0]) & (truth < band[1])].round(3)
        print(
            f"{label:58s} {1e3 * times[0]:8.1f} {1e3 * times[1]:8.1f} {times[1] / times[0]:6.2f}"
            f"  {found:.3f} (true in band {inside})"
        )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--coverage", action="store_true", help="run the Monte Carlo calibration only")
    parser.add_argument("--stage", action="store_true", help="the correlate stage without / with a mode only")
    parser.add_argument("--windows", type=int, default=None)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--stage-settings", action="store_true", help="--coverage through stages.modes")
    parser.add_argument("--sub-records", type=int, default=32, help="sub-records K of --stage-settings")
    args = parser.parse_args()
    if args.coverage and args.stage_settings:
        stage_coverage(args.windows or 400, args.seed, args.sub_records)
        return
    if args.coverage:
        coverage(args.windows or 400, args.seed)
        return
    if args.stage:
        stage_cost(args.repeats, args.seed)
        return
    compare_methods(args.windows or 40, args.seed)
    timing(args.repeats, args.seed)


if __name__ == "__main__":
    main()
