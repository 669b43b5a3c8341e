"""How many independent read tasks an archive splits into, and what smaller tasks cost (not a test).

    python -m benchmarks.bench_read_tasks [--hours 6] [--budgets-mib 64 32 16 8 4 1]

Read tasks are the unit of parallelism of the job: planning groups consecutive windows into tasks
of at most ``[reading] task_bytes`` of decoded samples, and only task descriptions travel through
the Reshuffle. This script

1. counts the tasks the real planner (:func:`corrtransforms.stages.plan.plan_reads`) makes for
   - the benchmark archive of ``bench_archive_memory`` (8 channels and a temperature covariate at
     100 Hz, hourly files of 4 row groups, 10-minute windows), 1 day and 30 days, and
   - the demo archive (35 days, a 10-minute 25 Hz record every 2 hours, 2 row groups per file),
   for several budgets. The footers are real: one file of each layout is written and its footer
   read, then repeated at the archive's other start times (planning reads nothing else).
   "decode factor" is the decoded bytes of all tasks over the archive's: a row group that two
   tasks need is decoded by both.
2. measures the read stage in-process (no Beam) on ``--hours`` real hourly files of the benchmark
   layout for each budget, as seconds per archive hour and the ratio to the default budget: the
   per-task overhead of small tasks on one machine.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import os
import shutil
import statistics
import tempfile
import time
from typing import Dict, List, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from corrtransforms.config import ReadingConfig, parse_config
from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages import read as window_read

MIB = 2**20
DEFAULT_BUDGET = ReadingConfig().task_bytes
START = dt.datetime(2024, 5, 6, tzinfo=dt.timezone.utc)
US = 1_000_000


def bench_config(archive: str, budget: int, rate: float = 100.0):
    return parse_config(
        {
            "asset": {"name": "bench"},
            "archive": {"path": archive, "sample_rate_hz": rate},
            "channels": {"covariates": ["temperature"]},
            "windows": {"length_s": 600.0},
            "correlation": {"max_lag_s": 10.0},
            "reading": {"task_bytes": budget},
        }
    )


def write_bench_hour(path: str, start: dt.datetime, rate: float = 100.0, channels: int = 8, seed: int = 0) -> None:
    """One hourly file of the benchmark layout (as benchmarks/bench_archive_memory.py writes)."""
    per_hour = int(3600 * rate)
    rng = np.random.default_rng(seed)
    t0 = int(start.timestamp() * US)
    time_column = pa.array(t0 + np.round(np.arange(per_hour) * 1e6 / rate).astype(np.int64)).cast(
        pa.timestamp("us", "UTC")
    )
    data = rng.standard_normal((per_hour, channels), dtype=np.float32)
    columns = {
        "time": time_column,
        **{f"ch{i}": data[:, i] for i in range(channels)},
        "temperature": np.full(per_hour, 15.0, np.float32),
    }
    os.makedirs(os.path.dirname(path), exist_ok=True)
    pq.write_table(pa.table(columns), path, row_group_size=per_hour // 4, compression="zstd")


def shifted(footer: archive_plan.FileFooter, path: str, shift_us: int) -> archive_plan.FileFooter:
    spans = tuple(
        dataclasses.replace(rg, start_us=rg.start_us + shift_us, end_us=rg.end_us + shift_us)
        for rg in footer.row_groups
    )
    return dataclasses.replace(footer, path=path, row_groups=spans)


def plan_summary(footers, config) -> Dict[str, float]:
    plan = archive_plan.plan_reads(footers, [], config)
    archive_bytes = sum(rg.decoded_bytes for f in footers for rg in f.row_groups)
    sizes = [t.decoded_bytes for t in plan.tasks]
    windows = [len(t.window_starts_us) for t in plan.tasks]
    return {
        "tasks": len(plan.tasks),
        "windows": sum(windows),
        "windows_per_task": statistics.mean(windows),
        "mean_task_mib": statistics.mean(sizes) / MIB,
        "max_task_mib": max(sizes) / MIB,
        "decode_factor": sum(sizes) / archive_bytes,
    }


def bench_footers(folder: str, hours: int) -> List[archive_plan.FileFooter]:
    path = os.path.join(folder, "template.parquet")
    write_bench_hour(path, START)
    footer, findings = archive_plan.read_footer(path, bench_config(folder, DEFAULT_BUDGET))
    assert footer is not None and not findings, findings
    return [shifted(footer, f"{folder}/h{h:05d}.parquet", h * 3600 * US) for h in range(hours)]


def demo_footers(folder: str) -> List[archive_plan.FileFooter]:
    from demo_data import generate

    starts = generate.record_starts(generate.DEFAULT_DAYS, generate.DEFAULT_EVERY_HOURS)
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(folder, "record.parquet")
    table = generate.record_table(starts[0])
    pq.write_table(
        table, path, compression="zstd", row_group_size=len(table) // 2, use_dictionary=False, write_statistics=True
    )
    config = demo_config(folder, DEFAULT_BUDGET)
    footer, findings = archive_plan.read_footer(path, config)
    assert footer is not None and not findings, findings
    first = int(starts[0].timestamp() * US)
    return [
        shifted(footer, f"{folder}/r{i:04d}.parquet", int(s.timestamp() * US) - first) for i, s in enumerate(starts)
    ]


def demo_config(folder: str, budget: int):
    import tomllib

    from demo_data import generate

    text = open(os.path.join(os.path.dirname(generate.__file__), "footbridge.toml"), encoding="utf-8").read()
    raw = tomllib.loads(text)
    raw["archive"]["path"] = folder
    raw["reading"] = {"task_bytes": budget}
    return parse_config(raw)


def read_stage_seconds(folder: str, budget: int) -> Dict[str, float]:
    config = bench_config(folder, budget)
    paths = archive_plan.list_local_archive(folder)
    plan = archive_plan.plan_archive(paths, config)
    began = time.perf_counter()
    windows = 0
    for task in plan.tasks:
        blocks, rejects = window_read.read_task(task, config)
        windows += len(blocks)
        assert not [r for r in rejects if r.rejects_whole_window], rejects[:3]
    return {"tasks": len(plan.tasks), "windows": windows, "seconds": time.perf_counter() - began}


def main(argv: Sequence[str] = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.bench_read_tasks")
    parser.add_argument("--hours", type=int, default=6, help="hours of real files for the timing (default 6)")
    parser.add_argument("--budgets-mib", type=float, nargs="+", default=[64, 32, 16, 8, 4, 1])
    parser.add_argument("--repeats", type=int, default=2, help="timing repeats, best kept (default 2)")
    args = parser.parse_args(argv)
    budgets = [int(b * MIB) for b in args.budgets_mib]
    work = tempfile.mkdtemp(prefix="bench-read-tasks-")
    try:
        print("Read tasks planned (real planner, real footers repeated over the archive)")
        print(
            f"{'archive':<36}{'budget MiB':>11}{'tasks':>8}{'windows':>9}{'win/task':>10}"
            f"{'mean MiB':>10}{'max MiB':>9}{'decode x':>10}"
        )
        day = bench_footers(os.path.join(work, "bench"), 24)
        month = bench_footers(os.path.join(work, "bench"), 24 * 30)
        demo = demo_footers(os.path.join(work, "demo"))
        for name, footers, make in (
            ("benchmark 8 ch 100 Hz, 1 day", day, bench_config),
            ("benchmark 8 ch 100 Hz, 30 days", month, bench_config),
            ("demo, 35 days (420 records)", demo, demo_config),
        ):
            for budget in budgets:
                s = plan_summary(footers, make(os.path.join(work, "x"), budget))
                mark = " (default)" if budget == DEFAULT_BUDGET else ""
                print(
                    f"{name:<36}{budget / MIB:>11g}{s['tasks']:>8}{s['windows']:>9}{s['windows_per_task']:>10.1f}"
                    f"{s['mean_task_mib']:>10.1f}{s['max_task_mib']:>9.1f}{s['decode_factor']:>10.2f}{mark}"
                )

        folder = os.path.join(work, "timed")
        for h in range(args.hours):
            write_bench_hour(os.path.join(folder, f"{h:02d}.parquet"), START + dt.timedelta(hours=h), seed=h)
        print(f"\nRead stage in-process on {args.hours} real hours of the benchmark layout (best of {args.repeats})")
        print(f"{'budget MiB':>11}{'tasks':>8}{'windows':>9}{'s / hour':>10}{'ratio to default':>18}")
        results = {}
        for budget in budgets:
            runs = [read_stage_seconds(folder, budget) for _ in range(args.repeats)]
            results[budget] = min(runs, key=lambda r: r["seconds"])
        reference = results.get(DEFAULT_BUDGET, next(iter(results.values())))["seconds"]
        for budget, r in results.items():
            print(
                f"{budget / MIB:>11g}{r['tasks']:>8}{r['windows']:>9}{r['seconds'] / args.hours:>10.3f}"
                f"{r['seconds'] / reference:>18.2f}"
            )
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
