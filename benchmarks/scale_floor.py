"""The floor of the scale benchmark: what any correlation job on this archive must at least do.

    python -m benchmarks.scale_floor ARCHIVE [--max_lag_s 10] [--window_s 600]

Decodes exactly the columns the pipeline reads (time, the 8 channels, the covariate) of every row
group of every file, converts the channels to float64 once, and per 10-minute window computes one
real FFT per channel (length ``next_fast_len(n + L)``, so lags up to ``L`` do not wrap) and one
inverse FFT per channel pair (36 for 8 channels), keeping lags ``-L..L``. Nothing else: no
checks, no error metadata, no indicators, no output. A tight loop in one process.

Prints one line ``FLOOR windows=W samples=S checksum=C`` (the checksum keeps the work from being
optimised away and lets two runs be compared).
"""

from __future__ import annotations

import argparse

import numpy as np
import pyarrow.parquet as pq
import scipy.fft

from benchmarks.scale_archive import CHANNELS, COVARIATE, SAMPLE_RATE_HZ, archive_files


def run(archive: str, max_lag_s: float = 10.0, window_s: float = 600.0) -> dict:
    n = int(round(window_s * SAMPLE_RATE_HZ))
    L = int(round(max_lag_s * SAMPLE_RATE_HZ))
    size = scipy.fft.next_fast_len(n + L, real=True)
    c = len(CHANNELS)
    a_idx, b_idx = np.triu_indices(c)
    columns = ["time", *CHANNELS, COVARIATE]
    pending = np.zeros((c, 0))
    windows = samples = 0
    checksum = 0.0
    for path in archive_files(archive):
        table = pq.read_table(path, columns=columns)
        block = np.empty((c, table.num_rows))  # channels as contiguous rows
        for j, name in enumerate(CHANNELS):
            block[j] = table.column(name).to_numpy()
        _ = table.column("time").to_numpy()
        _ = table.column(COVARIATE).to_numpy()
        data = np.concatenate([pending, block], axis=1) if pending.shape[1] else block
        whole = data.shape[1] // n
        for w in range(whole):
            x = data[:, w * n : (w + 1) * n]
            spectra = scipy.fft.rfft(x, n=size, axis=-1)  # one transform per channel
            cross = np.conj(spectra[a_idx]) * spectra[b_idx]
            r = scipy.fft.irfft(cross, n=size, axis=-1)  # one inverse transform per pair
            lags = np.concatenate([r[:, -L:], r[:, : L + 1]], axis=1)
            checksum += float(lags.sum())
            windows += 1
            samples += n * c
        pending = data[:, whole * n :]
    return {"windows": windows, "samples": samples, "checksum": checksum}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("archive")
    parser.add_argument("--max_lag_s", type=float, default=10.0)
    parser.add_argument("--window_s", type=float, default=600.0)
    args = parser.parse_args(argv)
    out = run(args.archive, args.max_lag_s, args.window_s)
    print(f"FLOOR windows={out['windows']} samples={out['samples']} checksum={out['checksum']:.6e}")


if __name__ == "__main__":
    main()
