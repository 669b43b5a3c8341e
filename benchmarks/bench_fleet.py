"""A fleet run against one single run per asset in sequence: wall time and peak RSS.

    python -m benchmarks.bench_fleet [--assets 12] [--hours 24] [--workers 0|2] [--rate 5]
                                     [--skip-singles]

Asset i has 4 + (i mod 5) channels (4 to 8; invented data: an AR(1) channel, a delayed noisy
copy of it, independent noise channels and a slow temperature covariate, own seed per asset) in
hourly Parquet files over ``--hours`` (default one day), windows of 600 s at ``--rate`` Hz
(144 windows per day). ``--workers 2`` adds ``--direct_running_mode multi_processing
--direct_num_workers 2`` to every run. Each run is its own process (``python -m
pipelines.backfill``), so the peak RSS is that process's tree (``ru_maxrss`` of the children:
with workers it is the largest single process, the launcher or a worker). Prints a table;
asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import textwrap
import time

from tests.support.archive_data import samples, wide_table, write_files

WORK = os.path.join(os.path.dirname(os.path.abspath(__file__)), "_work", "fleet")


def _peak_rss_of(args):
    """Run in a fresh child that reports its own peak (RUSAGE_CHILDREN keeps the maximum so far)."""
    script = (
        "import resource, subprocess, sys;"
        f"subprocess.check_call([sys.executable, '-m', 'pipelines.backfill', *{args!r}], "
        "stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL);"
        "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)"
    )
    started = time.perf_counter()
    out = subprocess.check_output([sys.executable, "-c", script])
    return time.perf_counter() - started, int(out.strip()) / 1024.0


def channel_names(i: int):
    return ["a", "b"] + [f"n{k}" for k in range(2 + i % 5)]


def write_asset(work: str, fleet: str, i: int, hours: int, rate: float) -> None:
    name = f"asset-{i:02d}"
    names = channel_names(i)
    columns = samples(hours * 3600, rate, seed=100 + i, channels=names)
    write_files(os.path.join(work, "archives", name), wide_table(columns), 3600, 6000)
    text = f"""
    [asset]
    name = "{name}"
    [archive]
    path = "../archives/{name}"
    layout = "wide"
    sample_rate_hz = {rate}
    [channels]
    names = {names!r}
    covariates = ["temperature"]
    [windows]
    length_s = 600.0
    [correlation]
    max_lag_s = 10.0
    [baseline]
    windows = 24
    min_windows = 12
    """
    with open(os.path.join(fleet, f"{name}.toml"), "w") as handle:
        handle.write(textwrap.dedent(text).replace("'", '"'))


def main(argv=None):
    parser = argparse.ArgumentParser()
    parser.add_argument("--assets", type=int, default=12)
    parser.add_argument("--hours", type=int, default=24)
    parser.add_argument("--rate", type=float, default=5.0)
    parser.add_argument("--workers", type=int, default=0, help="0: in-process runner; N: N worker processes")
    parser.add_argument("--skip-singles", action="store_true", help="only the fleet run")
    args = parser.parse_args(argv)
    n = args.assets
    shutil.rmtree(WORK, ignore_errors=True)
    fleet = os.path.join(WORK, "fleet")
    os.makedirs(fleet)
    for i in range(n):
        write_asset(WORK, fleet, i, args.hours, args.rate)
    beam_flags = (
        ["--direct_running_mode", "multi_processing", "--direct_num_workers", str(args.workers)] if args.workers else []
    )
    singles = []
    if not args.skip_singles:
        for i in range(n):
            config = os.path.join(fleet, f"asset-{i:02d}.toml")
            output = os.path.join(WORK, "out_single")
            singles.append(_peak_rss_of(["--config", config, "--output", output, "--run_id", "s", *beam_flags]))
    fleet_wall, fleet_rss = _peak_rss_of(
        ["--config", fleet, "--output", os.path.join(WORK, "out_fleet"), "--run_id", "f", *beam_flags]
    )
    runner = f"{args.workers} worker processes" if args.workers else "in-process runner"
    print(f"{n} assets ({args.hours} h each, {args.rate:g} Hz, 4-8 channels, 600-s windows), {runner}")
    print(f"{'run':<28}{'wall s':>10}{'peak RSS MiB':>15}")
    if singles:
        single_wall = sum(w for w, _ in singles)
        single_rss = max(r for _, r in singles)
        print(f"{f'{n} single runs in sequence':<28}{single_wall:>10.1f}{single_rss:>15.0f}")
    print(f"{'one fleet run':<28}{fleet_wall:>10.1f}{fleet_rss:>15.0f}")
    if singles:
        print(f"{'ratio fleet / singles':<28}{fleet_wall / single_wall:>10.2f}{fleet_rss / single_rss:>15.2f}")


if __name__ == "__main__":
    main()
