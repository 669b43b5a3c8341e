"""12 small assets as one fleet run against 12 single runs in sequence: wall time and peak RSS.

    python -m benchmarks.bench_fleet [--assets 12]

Each asset is the reliability tests' clean archive (10 minutes at 10 Hz, 2 channels, 10 windows
of 60 s) with its own seed. Each run is its own process (``python -m pipelines.backfill``), so
the peak RSS is that process's (``resource.getrusage(RUSAGE_CHILDREN)`` after it ends). Prints
a table; asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import time

from tests.support.reliability_data import clean_columns, write_clean_archive, write_config

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


def main(argv=None):
    parser = argparse.ArgumentParser()
    parser.add_argument("--assets", type=int, default=12)
    n = parser.parse_args(argv).assets
    shutil.rmtree(WORK, ignore_errors=True)
    fleet = os.path.join(WORK, "fleet")
    os.makedirs(fleet)
    for i in range(n):
        name = f"asset-{i:02d}"
        write_clean_archive(os.path.join(WORK, "archives", name), columns=clean_columns(seed=100 + i))
        write_config(os.path.join(fleet, f"{name}.toml"), f"../archives/{name}", name=name)
    singles = []
    for i in range(n):
        config = os.path.join(fleet, f"asset-{i:02d}.toml")
        singles.append(
            _peak_rss_of(["--config", config, "--output", os.path.join(WORK, "out_single"), "--run_id", "s"])
        )
    fleet_wall, fleet_rss = _peak_rss_of(
        ["--config", fleet, "--output", os.path.join(WORK, "out_fleet"), "--run_id", "f"]
    )
    single_wall = sum(w for w, _ in singles)
    single_rss = max(r for _, r in singles)
    print(f"{n} assets (10 windows each, 10 Hz, 2 channels)")
    print(f"{'run':<28}{'wall s':>10}{'peak RSS MiB':>15}")
    print(f"{'12 single runs in sequence':<28}{single_wall:>10.1f}{single_rss:>15.0f}")
    print(f"{'one fleet run':<28}{fleet_wall:>10.1f}{fleet_rss:>15.0f}")
    print(f"{'ratio fleet / singles':<28}{fleet_wall / single_wall:>10.2f}{fleet_rss / single_rss:>15.2f}")


if __name__ == "__main__":
    main()
