"""Scale benchmark for long runs: state and memory against the baseline's length, the nightly job's
size against the history, and the bytes of every table against the raw samples.

    python -m benchmarks.long_run [--parts state job storage footers] [--days 101]

Parts (each prints its own table; nothing is asserted, the figures are for docs/performance.md):

``state``
    The invented footbridge archive (demo_data/generate.py), duty-cycled: one 10-minute record
    every 6 hours for ``--days`` days. Two backfills (``--commit_days 10``), identical but for the
    baseline: its first 10 days, and its first 60 days. Per table, the mean bytes written per day
    during and after the baseline, and the peak RSS of each backfill (its process's
    ``ru_maxrss``); then the ratios 60-day / 10-day.
``job``
    The nightly pipeline (as ``pipelines.nightly`` builds it) for the day after 10 and after
    100 days of history of the 10-day-baseline output, serialised as the runner receives it
    (``Pipeline.to_runner_api()``): its bytes, and the ratio.
``storage``
    A synthetic 16-channel 200 Hz asset, duty-cycled (one 10-minute record an hour for a day: 24
    windows), all 136 pairs, max lag 10 s, default settings: bytes of each output table against
    the raw float32 samples (and against the archive's own zstd files).
``footers``
    Footers a night opens on a flat archive (every hourly file of a year in one folder, footer-only
    files of one row each): with ``[archive] file_time_pattern``, and with the footer index
    after the first night (the planner's count of footers read).

Work files go to benchmarks/_work/long_run/ (git-ignored).
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import re
import shutil
import subprocess
import sys
import textwrap
from typing import Dict, List

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
WORK = os.path.join(REPO, "benchmarks", "_work", "long_run")
TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects")


def _folder_bytes(folder: str) -> int:
    total = 0
    for root, _, names in os.walk(folder):
        total += sum(os.path.getsize(os.path.join(root, n)) for n in names if n.endswith(".parquet"))
    return total


def bytes_per_day(output: str, asset: str) -> Dict[str, Dict[str, int]]:
    """table -> {date: bytes of that day's partition files}."""
    out: Dict[str, Dict[str, int]] = {}
    for table in TABLES:
        base = os.path.join(output, table, f"asset={asset}")
        days = {}
        if os.path.isdir(base):
            for name in sorted(os.listdir(base)):
                if name.startswith("date="):
                    days[name[5:]] = _folder_bytes(os.path.join(base, name))
        out[table] = days
    return out


def run_measured(command: List[str], log: str) -> int:
    """Run ``command`` (cwd = the checkout) and return its peak RSS in bytes (``ru_maxrss``)."""
    with open(log, "w") as handle:
        child = subprocess.Popen(command, cwd=REPO, stdout=handle, stderr=subprocess.STDOUT)
        _, status, usage = os.wait4(child.pid, 0)
    if status != 0:
        raise SystemExit(f"{' '.join(command)} failed (status {status}); see {log}")
    return int(usage.ru_maxrss) * 1024


# --------------------------------------------------------------------------------------------
# state


def _footbridge_config(archive: str, baseline_days: int) -> str:
    with open(os.path.join(REPO, "demo_data", "footbridge.toml"), encoding="utf-8") as handle:
        text = handle.read()
    end = dt.date(2025, 5, 1) + dt.timedelta(days=baseline_days - 1)
    text = text.replace('path = "archive"', f'path = "{archive}"')
    text = re.sub(r"end = 2025-05-10", f"end = {end.isoformat()}", text)
    return text.replace("min_windows = 30", "min_windows = 20")


def part_state(days: int) -> dict:
    from demo_data import generate

    folder = os.path.join(WORK, "state")
    archive = os.path.join(folder, "archive")
    marker = os.path.join(archive, f"_complete_{days}")
    if not os.path.exists(marker):
        shutil.rmtree(archive, ignore_errors=True)
        generate.write_archive(archive, days=days, every_hours=6)
        open(marker, "w").close()
    results = {}
    for baseline in (10, 60):
        config = os.path.join(folder, f"baseline{baseline}.toml")
        with open(config, "w", encoding="utf-8") as handle:
            handle.write(_footbridge_config(archive, baseline))
        output = os.path.join(folder, f"out{baseline}")
        shutil.rmtree(output, ignore_errors=True)
        command = [sys.executable, "-m", "pipelines.backfill", "--config", config, "--output", output]
        rss = run_measured(command + ["--commit_days", "10"], os.path.join(folder, f"backfill{baseline}.log"))
        per_day = bytes_per_day(output, "footbridge")
        end = (dt.date(2025, 5, 1) + dt.timedelta(days=baseline - 1)).isoformat()
        row = {"rss": rss}
        for table, by_day in per_day.items():
            during = [b for d, b in by_day.items() if d <= end]
            after = [b for d, b in by_day.items() if d > end]
            row[table] = (float(np.mean(during)) if during else 0.0, float(np.mean(after)) if after else 0.0)
        results[baseline] = row
    print(f"\nstate: {days} days, a 10-minute record every 6 hours (bytes per day, mean)")
    print(
        f"{'table':<16} {'10-d during':>12} {'60-d during':>12} {'ratio':>6} "
        f"{'10-d after':>11} {'60-d after':>11} {'ratio':>6}"
    )
    for table in TABLES:
        a, b = results[10][table], results[60][table]
        ratio_during = b[0] / a[0] if a[0] else float("nan")
        ratio_after = b[1] / a[1] if a[1] else float("nan")
        print(
            f"{table:<16} {a[0]:>12.0f} {b[0]:>12.0f} {ratio_during:>6.2f} "
            f"{a[1]:>11.0f} {b[1]:>11.0f} {ratio_after:>6.2f}"
        )
    print(
        f"{'peak RSS (MB)':<16} {results[10]['rss'] / 2**20:>12.0f} {results[60]['rss'] / 2**20:>12.0f} "
        f"{results[60]['rss'] / results[10]['rss']:>6.2f}"
    )
    return results


# --------------------------------------------------------------------------------------------
# job


def nightly_job_bytes(config_path: str, output: str, day: dt.date) -> int:
    """Bytes of the serialised nightly pipeline for ``day`` (what a runner is submitted)."""
    import apache_beam as beam

    from corrtransforms.launch import common

    config = common.load_job_config(config_path)
    resume = common.stored_state(output, config, day, "bench")
    p = beam.Pipeline()
    common.build_pipeline(p, config, output, day, day, "bench", resume)
    return len(p.to_runner_api().SerializeToString())


def part_job(days: int) -> None:
    folder = os.path.join(WORK, "state")
    output, config = os.path.join(folder, "out10"), os.path.join(folder, "baseline10.toml")
    if not os.path.isdir(output):
        part_state(days)
    first = dt.date(2025, 5, 1)
    sizes = {h: nightly_job_bytes(config, output, first + dt.timedelta(days=h)) for h in (10, min(100, days - 1))}
    (short, a), (long, b) = sorted(sizes.items())
    print("\njob: the serialised nightly pipeline (Pipeline.to_runner_api())")
    print(f"{'history (days)':<16} {short:>10} {long:>10} {'ratio':>6}")
    print(f"{'bytes':<16} {a:>10} {b:>10} {b / a:>6.3f}")


# --------------------------------------------------------------------------------------------
# storage


N16, FS16 = 16, 200.0


def write_16_channel_day(archive: str) -> int:
    """24 hourly files, each one 10-minute record of 16 float32 channels at 200 Hz: three
    lightly damped modes seen through invented shapes plus sensor noise. Returns the raw bytes
    of the samples (float32)."""
    from scipy import signal

    marker = os.path.join(archive, "_complete")
    n = int(600 * FS16)
    if os.path.exists(marker):
        return 24 * n * N16 * 4
    rng = np.random.default_rng(16)
    shapes = rng.normal(size=(N16, 3))
    modes = ((1.7, 0.015), (4.2, 0.02), (9.5, 0.01))
    start = dt.datetime(2025, 3, 3, tzinfo=dt.timezone.utc)
    for hour in range(24):
        modal = []
        for f, z in modes:
            w = 2 * np.pi * f
            r = np.exp(-z * w / FS16)
            a = [1.0, -2 * r * np.cos(w * np.sqrt(1 - z * z) / FS16), r * r]
            out = signal.lfilter([1.0], a, rng.standard_normal(n))
            modal.append(out / out.std())
        data = np.column_stack(modal) @ shapes.T + 0.3 * rng.standard_normal((n, N16))
        t0 = start + dt.timedelta(hours=hour)
        time = pa.array(int(t0.timestamp() * 1e6) + np.arange(n, dtype=np.int64) * 5000, pa.int64())
        columns = {"time": time.cast(pa.timestamp("us", "UTC"))}
        columns.update({f"ch{i + 1:02d}": data[:, i].astype(np.float32) for i in range(N16)})
        path = os.path.join(archive, f"date={t0.date().isoformat()}", f"{t0:%H}.parquet")
        os.makedirs(os.path.dirname(path), exist_ok=True)
        pq.write_table(pa.table(columns), path, compression="zstd", use_dictionary=False)
    open(marker, "w").close()
    return 24 * n * N16 * 4


def part_storage() -> None:
    folder = os.path.join(WORK, "storage16")
    archive = os.path.join(folder, "archive")
    raw = write_16_channel_day(archive)
    config = os.path.join(folder, "asset.toml")
    with open(config, "w", encoding="utf-8") as handle:
        handle.write(
            textwrap.dedent(
                f"""
                [asset]
                name = "mast16"
                [archive]
                path = "{archive}"
                sample_rate_hz = {FS16}
                [windows]
                length_s = 600.0
                [correlation]
                max_lag_s = 10.0
                [baseline]
                windows = 12
                min_windows = 10
                """
            )
        )
    output = os.path.join(folder, "out")
    shutil.rmtree(output, ignore_errors=True)
    rss = run_measured(
        [sys.executable, "-m", "pipelines.backfill", "--config", config, "--output", output],
        os.path.join(folder, "backfill.log"),
    )
    on_disk = _folder_bytes(archive)
    print(
        "\nstorage: 16 channels at 200 Hz, 24 windows of 10 min, 136 pairs, max lag 10 s "
        f"(peak RSS {rss / 2**20:.0f} MB)"
    )
    print(f"{'table':<16} {'bytes':>12} {'of raw float32':>15} {'of archive zstd':>16}")
    for table in TABLES:
        size = _folder_bytes(os.path.join(output, table))
        print(f"{table:<16} {size:>12} {size / raw:>14.1%} {size / on_disk:>15.1%}")
    print(f"{'raw samples':<16} {raw:>12}   archive files {on_disk} bytes")


# --------------------------------------------------------------------------------------------


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--parts", nargs="+", default=["state", "job", "storage", "footers"])
    parser.add_argument("--days", type=int, default=101)
    args = parser.parse_args(argv)
    os.makedirs(WORK, exist_ok=True)
    if "state" in args.parts:
        part_state(args.days)
    if "job" in args.parts:
        part_job(args.days)
    if "storage" in args.parts:
        part_storage()
    if "footers" in args.parts:
        part_footers()


def write_flat_year(archive: str) -> int:
    """A year of hourly files in one folder, ``unit_YYYYMMDD_HH.parquet``, each one row per
    minute of one channel at 1/60 Hz (the planner reads only footers; the windows are too short
    to be computed, which the run reports). Returns the file count."""
    marker = os.path.join(archive, "_complete")
    start = dt.datetime(2025, 1, 1, tzinfo=dt.timezone.utc)
    hours = 365 * 24
    if os.path.exists(marker):
        return hours
    os.makedirs(archive, exist_ok=True)
    minute = np.arange(60, dtype=np.int64) * 60_000_000
    for h in range(hours):
        t0 = start + dt.timedelta(hours=h)
        time = pa.array(int(t0.timestamp() * 1e6) + minute, pa.int64()).cast(pa.timestamp("us", "UTC"))
        table = pa.table({"time": time, "acc": np.zeros(60, np.float32)})
        pq.write_table(table, os.path.join(archive, f"unit_{t0:%Y%m%d_%H}.parquet"))
    open(marker, "w").close()
    return hours


def _footers_opened(log: str) -> int:
    with open(log, encoding="utf-8") as handle:
        found = re.findall(r"footers opened (\d+)", handle.read())
    return int(found[-1]) if found else -1


def part_footers() -> None:
    folder = os.path.join(WORK, "flat")
    archive = os.path.join(folder, "archive")
    files = write_flat_year(archive)
    base = f"""
        [asset]
        name = "flat"
        [archive]
        path = "{archive}"
        sample_rate_hz = {1 / 60}
        {{pattern}}
        [windows]
        length_s = 3600.0
        """
    rows = []
    variants = (
        ("pattern, span 24 h", "p24", 'file_time_pattern = "unit_%Y%m%d_%H.parquet"'),
        ("pattern, span 1 h", "p1", 'file_time_pattern = "unit_%Y%m%d_%H.parquet"\nfile_span_h = 1.0'),
        ("footer index", "index", ""),
    )
    for label, name, pattern in variants:
        config = os.path.join(folder, f"{name}.toml")
        with open(config, "w", encoding="utf-8") as handle:
            handle.write(textwrap.dedent(base).replace("{pattern}", pattern))
        output = os.path.join(folder, f"out_{name}")
        shutil.rmtree(output, ignore_errors=True)
        counts = []
        for day in ("2025-06-10", "2025-06-11"):
            log = os.path.join(folder, f"{name}_{day}.log")
            command = [sys.executable, "-m", "pipelines.backfill", "--config", config, "--output", output]
            with open(log, "w") as handle:
                subprocess.run(
                    command + ["--start", day, "--end", day], cwd=REPO, stdout=handle, stderr=subprocess.STDOUT
                )
            counts.append(_footers_opened(log))
        rows.append((label, counts))
    print(f"\nfooters: a night on a flat archive of {files} hourly files (one day's files: 24)")
    print(f"{'planner':<20} {'first night':>12} {'second night':>13}")
    for label, (first, second) in rows:
        print(f"{label:<20} {first:>12} {second:>13}")


if __name__ == "__main__":
    main()
