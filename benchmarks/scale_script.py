"""The plain-script baseline of the scale benchmark: the job as a practitioner would write it.

    python -m benchmarks.scale_script ARCHIVE OUTPUT [--max_lag_s 10] [--window_s 600]

Reads each hourly file with pyarrow into pandas, cuts it into epoch-aligned 10-minute windows with
``pandas.Grouper``, and per window and channel pair calls ``scipy.signal.correlate(b, a,
method="fft")`` on the mean-removed channels, keeps lags ``-L..L`` (``0..L`` for an auto pair) and
normalises to the coefficient. The "simple indicators" come from the same functions: rms per
channel, correlation time (integral of the coefficient to its first zero) per channel, peak
coefficient and the lag at the peak per cross pair. Results are written per day as two Parquet
files (correlations with list<float32> coefficients, long-format indicators), like the pipeline's
tables but without error metadata, screening or shift detection.

Written to be reasonable, not slow: columns selected on read, one float64 conversion per window,
windows with missing samples skipped, memory bounded by one day of results.
"""

from __future__ import annotations

import argparse
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import scipy.signal

from benchmarks.scale_archive import CHANNELS, COVARIATE, SAMPLE_RATE_HZ, archive_files


def correlation_time(rho: np.ndarray, dt: float) -> float:
    """Trapezoid integral of an auto-correlation coefficient (lags 0..L) to its first zero."""
    below = np.flatnonzero(rho <= 0)
    end = below[0] if below.size else len(rho) - 1
    return float(np.trapezoid(rho[: end + 1], dx=dt))


def analyse(window: pd.DataFrame, max_lag: int, dt: float):
    x = window[list(CHANNELS)].to_numpy(dtype=np.float64)
    x = x - x.mean(axis=0)
    n = len(x)
    lags = scipy.signal.correlation_lags(n, n)
    keep = (lags >= -max_lag) & (lags <= max_lag)
    ms = (x * x).mean(axis=0)
    correlations, indicators = [], []
    for i, a in enumerate(CHANNELS):
        indicators.append((a, "rms", float(np.sqrt(ms[i]))))
        for j in range(i, len(CHANNELS)):
            b = CHANNELS[j]
            r = scipy.signal.correlate(x[:, j], x[:, i], mode="full", method="fft")[keep] / n
            rho = r / np.sqrt(ms[i] * ms[j])
            if i == j:
                rho = rho[max_lag:]
                indicators.append((a, "corr_time_s", correlation_time(rho, dt)))
            else:
                k = int(np.argmax(np.abs(rho)))
                indicators.append((f"{a}:{b}", "peak_coef", float(rho[k])))
                indicators.append((f"{a}:{b}", "lag_s", (k - max_lag) * dt))
            correlations.append((a, b, rho.astype(np.float32)))
    return correlations, indicators


def write_day(output: str, day: str, correlations: list, indicators: list) -> None:
    folder = os.path.join(output, f"date={day}")
    os.makedirs(folder, exist_ok=True)
    pq.write_table(
        pa.table(
            {
                "window_start": pa.array([r[0] for r in correlations], pa.timestamp("us", "UTC")),
                "channel_a": [r[1] for r in correlations],
                "channel_b": [r[2] for r in correlations],
                "coefficient": pa.array([r[3] for r in correlations], pa.list_(pa.float32())),
            }
        ),
        os.path.join(folder, "correlations.parquet"),
        compression="zstd",
    )
    pq.write_table(
        pa.table(
            {
                "window_start": pa.array([r[0] for r in indicators], pa.timestamp("us", "UTC")),
                "subject": [r[1] for r in indicators],
                "indicator": [r[2] for r in indicators],
                "value": [r[3] for r in indicators],
            }
        ),
        os.path.join(folder, "indicators.parquet"),
        compression="zstd",
    )


def run(archive: str, output: str, max_lag_s: float = 10.0, window_s: float = 600.0) -> dict:
    n = int(round(window_s * SAMPLE_RATE_HZ))
    max_lag = int(round(max_lag_s * SAMPLE_RATE_HZ))
    dt = 1.0 / SAMPLE_RATE_HZ
    day, correlations, indicators = None, [], []
    windows = skipped = 0
    for path in archive_files(archive):
        frame = pq.read_table(path, columns=["time", *CHANNELS, COVARIATE]).to_pandas().set_index("time")
        for start, window in frame.groupby(pd.Grouper(freq=f"{int(window_s)}s")):
            if len(window) != n or window[list(CHANNELS)].isna().any().any():
                skipped += 1
                continue
            this_day = start.date().isoformat()
            if day is not None and this_day != day:
                write_day(output, day, correlations, indicators)
                correlations, indicators = [], []
            day = this_day
            pairs, values = analyse(window, max_lag, dt)
            correlations.extend((start, a, b, rho) for a, b, rho in pairs)
            indicators.extend((start, s, name, v) for s, name, v in values)
            indicators.append((start, COVARIATE, "covariate_mean", float(window[COVARIATE].mean())))
            windows += 1
    if day is not None:
        write_day(output, day, correlations, indicators)
    return {"windows": windows, "skipped": skipped}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("archive")
    parser.add_argument("output")
    parser.add_argument("--max_lag_s", type=float, default=10.0)
    parser.add_argument("--window_s", type=float, default=600.0)
    args = parser.parse_args(argv)
    out = run(args.archive, args.output, args.max_lag_s, args.window_s)
    print(f"SCRIPT windows={out['windows']} skipped={out['skipped']}")


if __name__ == "__main__":
    main()
