"""Memory and time of one day's ``[[covariate_sources]]`` join, against the source's length.

An invented weather station (wide layout, one file per day, row groups of one hour) of 7 and
of 60 days, at one value a minute and at one value a second; the join of one day in the middle
(``stages.covariate_sources.join_day``: 144 windows of 10 minutes) with every footer already
read, as the Beam step runs it. Printed: the bytes decoded for the day, the peak of Python
allocations during the join (tracemalloc), the time, and the ratio of the 60-day source to the
7-day one (1.0 means the element's memory does not grow with the archive).

Run: ``python -m benchmarks.bench_covariate_sources``. Prints a table; never asserts.
"""

from __future__ import annotations

import datetime as dt
import os
import tempfile
import time
import tracemalloc

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from corrtransforms.config import parse_config
from corrtransforms.stages import covariate_sources as sources
from corrtransforms.stages.plan import list_local_archive
from corrtransforms.timeutil import day_start_us

FIRST = dt.date(2025, 1, 1)


def _write(folder: str, days: int, step_s: int) -> None:
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(3)
    per_day = 86400 // step_s
    for d in range(days):
        t = day_start_us(FIRST + dt.timedelta(days=d), "UTC") + step_s * 1_000_000 * np.arange(per_day, dtype=np.int64)
        table = pa.table(
            {
                "time": pa.array(t, pa.timestamp("us", "UTC")),
                "air_temp": 5 + rng.standard_normal(per_day),
                "humidity": 60 + rng.standard_normal(per_day),
            }
        )
        pq.write_table(table, os.path.join(folder, f"{d:03d}.parquet"), row_group_size=per_day // 24)


def _measure(folder: str, days: int) -> tuple:
    config = parse_config(
        {
            "asset": {"name": "bench"},
            "archive": {"path": "unused", "sample_rate_hz": 20.0},
            "covariate_sources": [{"path": folder, "names": ["air_temp"], "max_gap_s": 300.0}],
        }
    )
    footers = [(0, sources.read_source_footer(p, config, 0)[0]) for p in list_local_archive(folder)]
    day = FIRST + dt.timedelta(days=days // 2)
    starts = [day_start_us(day, "UTC") + k * 600_000_000 for k in range(144)]
    tracemalloc.start()
    began = time.perf_counter()
    joined = sources.join_day(day.isoformat(), starts, footers, config)
    elapsed = time.perf_counter() - began
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return joined.decoded_bytes[0], peak, elapsed


def main() -> None:
    print(f"{'rate':>10} {'days':>5} {'decoded MiB':>12} {'peak MiB':>9} {'time ms':>8} {'peak ratio':>11}")
    with tempfile.TemporaryDirectory() as root:
        for label, step_s in (("1/min", 60), ("1/s", 1)):
            first_peak = None
            for days in (7, 60):
                folder = os.path.join(root, f"{step_s}-{days}")
                _write(folder, days, step_s)
                decoded, peak, elapsed = _measure(folder, days)
                first_peak = first_peak or peak
                print(
                    f"{label:>10} {days:>5} {decoded / 2**20:>12.3f} {peak / 2**20:>9.3f} "
                    f"{elapsed * 1e3:>8.1f} {peak / first_peak:>11.2f}"
                )


if __name__ == "__main__":
    main()
