"""Tiny invented sensor archives written by the tests (real Parquet files, both layouts).

Channels: "a" is a first-order autoregressive process, "b" is "a" delayed by ``delay`` samples plus
independent noise (so the a:b cross-correlation peaks at +delay / rate seconds), and
"temperature" is a slow covariate. All data are invented.
"""

from __future__ import annotations

import datetime as dt
import os
from typing import Dict, Optional, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from corrtransforms.config import parse_config

US = 1_000_000
#: 2024-03-04 00:00:00 UTC in microseconds (an arbitrary invented start)
T0 = int(dt.datetime(2024, 3, 4, tzinfo=dt.timezone.utc).timestamp()) * US


def samples(
    seconds: float,
    rate: float,
    seed: int = 0,
    start_us: int = T0,
    delay: int = 3,
    channels: Sequence[str] = ("a", "b"),
    covariate: bool = True,
) -> Dict[str, np.ndarray]:
    """Columns of a wide record: "time" (int64 us UTC) and one float64 array per channel."""
    rng = np.random.default_rng(seed)
    n = int(round(seconds * rate))
    drive = rng.standard_normal(n + delay)
    a = np.empty(n + delay)
    a[0] = drive[0]
    for i in range(1, n + delay):  # AR(1), phi = 0.8
        a[i] = 0.8 * a[i - 1] + drive[i]
    out = {"time": start_us + np.round(np.arange(n) * US / rate).astype(np.int64)}
    out[channels[0]] = a[delay:]
    if len(channels) > 1:
        out[channels[1]] = a[:n] + 0.3 * rng.standard_normal(n)
    for extra in channels[2:]:
        out[extra] = rng.standard_normal(n)
    if covariate:
        out["temperature"] = 20.0 + np.arange(n) / n
    return out


def wide_table(columns: Dict[str, np.ndarray], tz: Optional[str] = "UTC") -> pa.Table:
    data = {k: v for k, v in columns.items() if k != "time"}
    time = pa.array(columns["time"], pa.int64()).cast(pa.timestamp("us", tz))
    return pa.table({"time": time, **data})


def long_table(columns: Dict[str, np.ndarray], tz: Optional[str] = "UTC") -> pa.Table:
    names = [k for k in columns if k != "time"]
    n = len(columns["time"])
    times = np.repeat(columns["time"], len(names))
    channel = np.tile(np.array(names, dtype=object), n)
    value = np.column_stack([columns[k] for k in names]).reshape(-1)
    return pa.table(
        {
            "time": pa.array(times, pa.int64()).cast(pa.timestamp("us", tz)),
            "channel": pa.array(channel, pa.string()),
            "value": value,
        }
    )


def write_files(
    folder: str,
    table: pa.Table,
    file_seconds: float,
    row_group_size: int,
    hive: bool = False,
    prefix: str = "part",
    **kwargs,
) -> list:
    """Split ``table`` by time into files of ``file_seconds`` each; returns the paths."""
    os.makedirs(folder, exist_ok=True)
    times = table.column("time").cast(pa.int64()).to_numpy()
    if times.size == 0:
        return []
    edges = np.arange(times.min(), times.max() + 1, int(file_seconds * US))
    paths = []
    for i, lo in enumerate(edges):
        hi = lo + int(file_seconds * US)
        part = table.filter(pa.array((times >= lo) & (times < hi)))
        if part.num_rows == 0:
            continue
        stamp = dt.datetime(1970, 1, 1) + dt.timedelta(microseconds=int(lo))
        sub = os.path.join(folder, f"date={stamp.date().isoformat()}") if hive else folder
        os.makedirs(sub, exist_ok=True)
        path = os.path.join(sub, f"{prefix}-{stamp.strftime('%H%M%S')}-{i:03d}.parquet")
        pq.write_table(part, path, row_group_size=row_group_size, **kwargs)
        paths.append(path)
    return paths


def make_config(
    archive: str,
    rate: float = 10.0,
    layout: str = "wide",
    length_s: float = 60.0,
    max_lag_s: float = 2.0,
    names=("a", "b"),
    covariates=("temperature",),
    timezone: str = "UTC",
    task_bytes: int = 2**16,
    extra: Optional[dict] = None,
    **windows,
):
    raw = {
        "asset": {"name": "test-asset"},
        "archive": {"path": archive, "layout": layout, "sample_rate_hz": rate, "timezone": timezone},
        "channels": {"covariates": list(covariates)},
        "windows": {"length_s": length_s, **windows},
        "correlation": {"max_lag_s": max_lag_s},
        "reading": {"task_bytes": task_bytes},
    }
    if names is not None:
        raw["channels"]["names"] = list(names)
    for section, values in (extra or {}).items():
        raw.setdefault(section, {}).update(values)
    return parse_config(raw)


def window_rows(columns: Dict[str, np.ndarray], k: int, length_s: float = 60.0, start_us: int = T0) -> np.ndarray:
    """Boolean mask of the rows in window k (window k starts at start_us + k * length)."""
    t = columns["time"]
    lo = start_us + int(k * length_s * US)
    return (t >= lo) & (t < lo + int(length_s * US))


def bad_wide_archive(folder: str, rate: float = 10.0, seed: int = 7) -> Dict[str, object]:
    """A 22-minute wide archive (60-s windows 0..21, files of 5 min, row groups of 40 s) in which
    most windows carry one kind of bad input, plus bad files. Returns what each window should give.

    Per window k: 1 NaN/inf run (repaired), 2 a 33 % gap (rejected), 3 equal duplicates (repaired),
    4 conflicting duplicates (rejected), 5 unordered rows (repaired), 6 jitter within tolerance
    (repaired), 7 flat channel b (b rejected), 8 clipped channel a (flagged), 10-11 a second file
    holding the same span (repaired), 13 sample rate 12 Hz (rejected), 15 some samples 0.4 period
    off the grid (dropped), 16-17 a file without channel b (b rejected), 18-21 statistics missing.
    """
    rng = np.random.default_rng(seed)
    cols = samples(22 * 60, rate, seed=seed)
    _damage_samples(cols, rng, US / rate)
    table = _damage_rows(cols, rng)
    _write_bad_wide_files(folder, table, rng, rate)
    return {
        "computed": sorted(set(range(22)) - {2, 4, 13}) + [40],
        "rejected": {2: "insufficient_coverage", 4: "conflicting_duplicates", 13: "sample_rate_mismatch"},
        "findings": {
            1: ["nonfinite_values"],
            3: ["duplicate_timestamps"],
            5: ["unordered_timestamps"],
            6: ["off_grid_timestamps"],
            7: ["flat_channel"],
            8: ["clipped_channel"],
            10: ["overlapping_files"],
            11: ["overlapping_files"],
            15: ["jitter_beyond_tolerance"],
            16: ["insufficient_coverage"],
            17: ["insufficient_coverage"],
            40: ["insufficient_coverage"],
        },
        "file_findings": {
            "wide-empty.parquet": "empty_file",
            "wide-corrupt.parquet": "unreadable_file",
            "wide-renamed-time.parquet": "missing_time_column",
            "wide-no-rows.parquet": "no_rows",
            "wide-string-time.parquet": "time_column_not_timestamp",
            "wide-03b-no-b.parquet": "missing_channel_column",
            "wide-text-b.parquet": "non_numeric_channel",
            "wide-04.parquet": "statistics_missing",
        },
        "columns": cols,
    }


def _damage_samples(cols: Dict[str, np.ndarray], rng, period: float) -> None:
    """In place: the faults of :func:`bad_wide_archive` that change values or times, not rows."""

    def rows(k):
        return np.flatnonzero(window_rows(cols, k))

    # 1: NaN and inf run in a
    r = rows(1)
    cols["a"][r[100:120]] = np.nan
    cols["a"][r[200:205]] = np.inf
    # 6: jitter within tolerance (+-0.1 period)
    r = rows(6)
    cols["time"][r] += np.round(rng.uniform(-0.1, 0.1, r.size) * period).astype(np.int64)
    # 7: channel b dead
    cols["b"][rows(7)] = 0.125
    # 8: channel a clipped at +-1.5
    r = rows(8)
    cols["a"][r] = np.clip(cols["a"][r], -1.5, 1.5)
    # 15: 30 samples 0.4 period late
    r = rows(15)
    cols["time"][r[50:80]] += int(0.4 * period)


def _damage_rows(cols: Dict[str, np.ndarray], rng) -> Dict[str, np.ndarray]:
    """The rows of :func:`bad_wide_archive`: a gap, duplicates, an unordered stretch, 12-Hz samples."""

    def rows(k):
        return np.flatnonzero(window_rows(cols, k))

    keep = np.ones(cols["time"].size, dtype=bool)
    # 2: 33 % gap
    keep[rows(2)[100:300]] = False
    order = np.arange(cols["time"].size)[keep]
    # 3: 10 equal duplicates; 4: one conflicting duplicate
    dup_equal = rows(3)[10:20]
    dup_conflict = rows(4)[30:31]
    order = np.sort(np.concatenate([order, dup_equal, dup_conflict]), kind="stable")
    table = {k: v[order].copy() for k, v in cols.items()}
    conflict_at = np.flatnonzero(order == dup_conflict[0])[1]
    table["a"][conflict_at] += 1.0
    # 5: unordered rows in window 5 (reverse a stretch)
    r5 = np.flatnonzero(window_rows(table, 5))
    stretch = r5[100:160]
    for k in table:
        table[k][stretch] = table[k][stretch[::-1]]
    # 13: replace window 13 by 12 Hz samples
    r13 = window_rows(table, 13)
    lo = T0 + 13 * 60 * US
    t12 = lo + np.round(np.arange(int(60 * 12)) * US / 12).astype(np.int64)
    extra = {
        "time": t12,
        "a": rng.standard_normal(t12.size),
        "b": rng.standard_normal(t12.size),
        "temperature": np.full(t12.size, 20.5),
    }
    before = np.flatnonzero(~r13 & (table["time"] < lo))
    after = np.flatnonzero(~r13 & (table["time"] >= lo))
    # window 5's unordered stretch stays as it is: rows keep their order, window 13 is swapped
    return {k: np.concatenate([v[before], extra[k], v[after]]) for k, v in table.items()}


def _write_bad_wide_files(folder: str, table: Dict[str, np.ndarray], rng, rate: float) -> None:
    """The files of :func:`bad_wide_archive`: 5-minute files, a split file, an overlap, bad files."""
    os.makedirs(folder, exist_ok=True)
    full = wide_table(table)
    times = table["time"]
    paths = []
    for f in range(5):  # files of 5 minutes; minutes 20-21 in the last
        lo_f, hi_f = T0 + f * 300 * US, T0 + (f + 1) * 300 * US
        mask = (times >= lo_f) & (times < hi_f)
        part = full.filter(pa.array(mask))
        if part.num_rows == 0:
            continue
        path = os.path.join(folder, f"wide-{f:02d}.parquet")
        pq.write_table(part, path, row_group_size=400, write_statistics=(f != 4))
        paths.append(path)
    # windows 16-17: split out of file 03 into a file without b
    part3 = pq.read_table(os.path.join(folder, "wide-03.parquet"))
    t3 = part3.column("time").cast(pa.int64()).to_numpy()
    in_1617 = (t3 >= T0 + 16 * 60 * US) & (t3 < T0 + 18 * 60 * US)
    pq.write_table(part3.filter(pa.array(~in_1617)), os.path.join(folder, "wide-03.parquet"), row_group_size=400)
    pq.write_table(
        part3.filter(pa.array(in_1617)).drop_columns(["b"]),
        os.path.join(folder, "wide-03b-no-b.parquet"),
        row_group_size=400,
    )
    # windows 10-11 also in a second file (identical samples)
    both = full.filter(pa.array((times >= T0 + 10 * 60 * US) & (times < T0 + 12 * 60 * US)))
    pq.write_table(both, os.path.join(folder, "wide-overlap.parquet"), row_group_size=400)
    # bad files
    open(os.path.join(folder, "wide-empty.parquet"), "wb").close()
    with open(os.path.join(folder, "wide-corrupt.parquet"), "wb") as handle:
        handle.write(rng.bytes(5000))
    renamed = wide_table(samples(60, rate, seed=1, start_us=T0 + 30 * 60 * US)).rename_columns(
        ["timestamp", "a", "b", "temperature"]
    )
    pq.write_table(renamed, os.path.join(folder, "wide-renamed-time.parquet"))
    text = wide_table(samples(60, rate, seed=2, start_us=T0 + 40 * 60 * US))
    text = text.set_column(2, "b", pa.array([f"{v:.3f}" for v in text.column("b").to_pylist()]))
    pq.write_table(text, os.path.join(folder, "wide-text-b.parquet"))
    pq.write_table(wide_table(samples(60, rate, seed=3)).slice(0, 0), os.path.join(folder, "wide-no-rows.parquet"))
    string_time = pa.table({"time": pa.array(["2024-03-04T00:00:00"] * 5), "a": np.zeros(5), "b": np.zeros(5)})
    pq.write_table(string_time, os.path.join(folder, "wide-string-time.parquet"))


def duty_cycled_records(
    n_records: int = 4,
    rate: float = 25.0,
    record_s: float = 600.0,
    first_offset_s: float = 180.0,
    every_s: float = 7200.0,
) -> list:
    """Columns of duty-cycled records: ``record_s`` of samples starting ``first_offset_s`` after
    T0 and then every ``every_s`` (by default 10-minute records at hh:03:00 every 2 hours)."""
    return [
        samples(record_s, rate, seed=100 + r, start_us=T0 + int((first_offset_s + r * every_s) * US))
        for r in range(n_records)
    ]


def write_duty_cycled_archive(
    folder: str, records: list, one_file: bool = False, row_group_size: int = 5000, layout: str = "wide"
) -> list:
    """One file per record (or all records in one file); returns the paths."""
    os.makedirs(folder, exist_ok=True)
    tables = [(wide_table if layout == "wide" else long_table)(r) for r in records]
    if one_file:
        tables = [pa.concat_tables(tables)]
    paths = []
    for i, table in enumerate(tables):
        path = os.path.join(folder, f"record-{i:02d}.parquet")
        pq.write_table(table, path, row_group_size=row_group_size)
        paths.append(path)
    return paths


#: the names of the hourly files of :func:`write_hourly_archive`: flat, and in Hive date= folders
FLAT_NAME = "site_%Y%m%d_%H%M.parquet"
HIVE_NAME = "date=%Y-%m-%d/%H%M.parquet"


def write_hourly_archive(
    folder: str,
    days: int,
    name: str = FLAT_NAME,
    seconds: float = 60.0,
    rate: float = 4.0,
    start_us: int = T0,
) -> list:
    """One file per hour for ``days`` days from ``start_us``, each holding ``seconds`` of samples
    from the top of its hour (seeded by the hour, so a flat and a Hive copy hold the same data);
    ``name`` is a strftime pattern of the file's path below ``folder``. Returns the paths."""
    paths = []
    for hour in range(days * 24):
        begin = start_us + hour * 3600 * US
        stamp = dt.datetime(1970, 1, 1) + dt.timedelta(microseconds=begin)
        path = os.path.join(folder, stamp.strftime(name))
        os.makedirs(os.path.dirname(path), exist_ok=True)
        pq.write_table(wide_table(samples(seconds, rate, seed=hour, start_us=begin)), path)
        paths.append(path)
    return paths
