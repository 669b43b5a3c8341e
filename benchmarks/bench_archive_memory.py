"""Memory and throughput of the backfill on synthetic archives of 1 and 4 days (not a test).

    python -m benchmarks.bench_archive_memory [--days 1 4] [--rate 100] [--channels 8]

Writes an invented wide archive (hourly files, float32 samples of independent noise, a slow
temperature covariate) per length under benchmarks/_work/, runs ``python -m pipelines.backfill`` on
each under ``/usr/bin/time -v`` and prints peak resident memory, wall time, samples per second and
the ratio of peak memory between the longest and the shortest archive (memory must not grow with
archive length: the target is a ratio within 1.2).
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import re
import subprocess
import sys
import textwrap

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

HERE = os.path.dirname(os.path.abspath(__file__))
START = dt.datetime(2024, 5, 6, tzinfo=dt.timezone.utc)


def write_archive(folder: str, days: int, rate: float, channels: int, seed: int = 0) -> int:
    """Hourly Parquet files in Hive date folders; returns the number of samples (rows x channels)."""
    marker = os.path.join(folder, "_complete")
    per_hour = int(3600 * rate)
    total = days * 24 * per_hour * channels
    if os.path.exists(marker):
        return total
    rng = np.random.default_rng(seed)
    names = [f"ch{i}" for i in range(channels)]
    for hour in range(days * 24):
        start = START + dt.timedelta(hours=hour)
        sub = os.path.join(folder, f"date={start.date().isoformat()}")
        os.makedirs(sub, exist_ok=True)
        t0 = int(start.timestamp() * 1_000_000)
        time = pa.array(t0 + np.round(np.arange(per_hour) * 1e6 / rate).astype(np.int64)).cast(
            pa.timestamp("us", "UTC")
        )
        data = rng.standard_normal((per_hour, channels), dtype=np.float32)
        columns = {
            "time": time,
            **{n: data[:, i] for i, n in enumerate(names)},
            "temperature": np.full(per_hour, 15.0 + hour / 24, np.float32),
        }
        pq.write_table(
            pa.table(columns),
            os.path.join(sub, f"{start.strftime('%H')}.parquet"),
            row_group_size=per_hour // 4,
            compression="zstd",
        )
    open(marker, "w").close()
    return total


def run(days: int, args) -> dict:
    work = os.path.join(HERE, "_work", f"{days}d")
    archive = os.path.join(work, "archive")
    samples = write_archive(archive, days, args.rate, args.channels)
    config = os.path.join(work, "asset.toml")
    with open(config, "w") as handle:
        handle.write(
            textwrap.dedent(f"""
            [asset]
            name = "bench"
            [archive]
            path = "archive"
            sample_rate_hz = {args.rate}
            [channels]
            covariates = ["temperature"]
            [windows]
            length_s = 600.0
            [correlation]
            max_lag_s = {args.max_lag_s}
            """)
        )
    output = os.path.join(work, "out")
    command = [
        "/usr/bin/time",
        "-v",
        sys.executable,
        "-m",
        "pipelines.backfill",
        "--config",
        config,
        "--output",
        output,
    ]
    done = subprocess.run(command, capture_output=True, text=True, cwd=os.path.dirname(HERE))
    if done.returncode != 0:
        raise RuntimeError(done.stderr[-3000:])
    rss_kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", done.stderr).group(1))
    wall = re.search(r"Elapsed \(wall clock\) time \(h:mm:ss or m:ss\): ([\d:.]+)", done.stderr).group(1)
    seconds = sum(float(x) * 60**i for i, x in enumerate(reversed(wall.split(":"))))
    summary = done.stdout.strip().splitlines()[0] if done.stdout.strip() else ""
    return {
        "days": days,
        "samples": samples,
        "rss_mb": rss_kb / 1024,
        "seconds": seconds,
        "samples_per_s": samples / seconds,
        "summary": summary,
    }


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, nargs="+", default=[1, 4])
    parser.add_argument("--rate", type=float, default=100.0)
    parser.add_argument("--channels", type=int, default=8)
    parser.add_argument("--max_lag_s", type=float, default=10.0)
    args = parser.parse_args(argv)
    results = [run(d, args) for d in args.days]
    for r in results:
        print(
            f"{r['days']} day(s): {r['samples']:,} samples, peak RSS {r['rss_mb']:.0f} MB, "
            f"{r['seconds']:.0f} s, {r['samples_per_s']:,.0f} samples/s  [{r['summary']}]"
        )
    if len(results) > 1:
        ratio = results[-1]["rss_mb"] / results[0]["rss_mb"]
        print(f"peak RSS ratio {results[-1]['days']} d / {results[0]['days']} d = {ratio:.2f} (target <= 1.20)")


if __name__ == "__main__":
    main()
