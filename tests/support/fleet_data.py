"""Shared pieces of the fleet tests: a two-asset fleet folder (``_defaults.toml``, north, south)
over the reliability tests' clean archive, one or more days of it, and table comparisons per asset.

Each day of an asset's archive is the clean archive (10 minutes at 10 Hz, 10 windows of 60 s)
with its own seed, starting at midnight UTC of that day (day 0 is 2024-03-04).
"""

from __future__ import annotations

import datetime as dt
import os
import textwrap
from typing import Dict, Optional, Sequence

import pyarrow.dataset as ds

from tests.support.archive_data import T0, US, samples, wide_table, write_files
from tests.support.output_tables import SORT_KEYS, _nan_equal
from tests.support.reliability_data import FILE_SECONDS, MINUTES, RATE, ROW_GROUP, write_clean_archive

TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects")
FIRST_DAY = dt.date(2024, 3, 4)
DAY_US = 86_400 * US

DEFAULTS = f"""
[archive]
layout = "wide"
sample_rate_hz = {RATE}
[channels]
names = ["a", "b"]
covariates = ["temperature"]
[windows]
length_s = 60.0
[correlation]
max_lag_s = 2.0
[baseline]
windows = 4
min_windows = 2
[reading]
task_bytes = 65536
"""

#: south's own keys: a longer baseline and a false-alarm budget (h and L chosen from it)
SOUTH_EXTRA = "[baseline]\nwindows = 5\n[shifts]\nfalse_alarms_per_year = 1.0\n"

#: the seed of each asset's first day (later days add 100 per day)
SEEDS = {"north": 21, "south": 5}


def asset_text(name: str, archive: str, extra: str = "") -> str:
    return textwrap.dedent(f"""
    [asset]
    name = "{name}"
    [archive]
    path = "{archive}"
    """) + textwrap.dedent(extra)


def write_days(folder: str, seed: int, days: int) -> None:
    """``days`` consecutive days of the clean archive (day 0 exactly the reliability tests' one)."""
    if days == 1:
        write_clean_archive(folder, columns=samples(MINUTES * 60, RATE, seed=seed))
        return
    for day in range(days):
        columns = samples(MINUTES * 60, RATE, seed=seed + 100 * day, start_us=T0 + day * DAY_US)
        write_files(folder, wide_table(columns), FILE_SECONDS, ROW_GROUP, prefix=f"day{day}")


def write_fleet(root: str, days: int = 1, extra: Optional[Dict[str, str]] = None, length_s: float = 60.0) -> str:
    """Archives under ``root/archives/NAME`` and the fleet folder ``root/fleet``; returns the folder.

    ``length_s`` is the defaults' ``[windows] length_s``. At 60 s every window of this archive
    has fewer than 100 effective samples (AR(1) with phi = 0.8 at 10 Hz: T_I = 0.45 s, so
    T / (2 T_I) = 67), a holding code: no window enters a baseline sample and no series fits
    (model_n = 0). 120-s windows (133 effective samples) let the baselines fit.
    """
    extra = {"south": SOUTH_EXTRA, **(extra or {})}
    fleet = os.path.join(root, "fleet")
    os.makedirs(fleet, exist_ok=True)
    with open(os.path.join(fleet, "_defaults.toml"), "w") as handle:
        handle.write(DEFAULTS.replace("length_s = 60.0", f"length_s = {float(length_s)}"))
    for name, seed in SEEDS.items():
        write_days(os.path.join(root, "archives", name), seed, days)
        with open(os.path.join(fleet, f"{name}.toml"), "w") as handle:
            handle.write(asset_text(name, f"../archives/{name}", extra.get(name, "")))
    return fleet


def asset_table(output: str, table: str, asset: str, days: Optional[Sequence[str]] = None):
    """One asset's table sorted by its key (None when it has no partition), optionally only some days."""
    folder = os.path.join(str(output), table, f"asset={asset}")
    if not os.path.isdir(folder):
        return None
    found = ds.dataset(folder, format="parquet", partitioning="hive").to_table()
    if days is not None:
        keep = [str(d) in days for d in found.column("date").to_pylist()]
        found = found.filter(keep)
    return found.sort_by([(k, "ascending") for k in SORT_KEYS[table]]).to_pydict()


def assert_same_asset(got: str, expected: str, asset: str, tables=TABLES, days=None) -> None:
    """Every table of ``asset`` holds the same rows in both outputs (file metadata, where the run
    id lives, is not compared)."""
    for table in tables:
        a, b = asset_table(got, table, asset, days), asset_table(expected, table, asset, days)
        assert (a is None) == (b is None), (asset, table)
        if a is None:
            continue
        assert a.keys() == b.keys(), (asset, table)
        assert len(next(iter(a.values()))) > 0 or table in ("rejects", "shifts", "baseline_sample"), (asset, table)
        for column in a:
            assert a[column] == b[column] or _nan_equal(a[column], b[column]), (asset, table, column)
