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


def samples(seconds: float, rate: float, seed: int = 0, start_us: int = T0, delay: int = 3,
            channels: Sequence[str] = ("a", "b"), covariate: bool = True) -> Dict[str, np.ndarray]:
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
    return pa.table({"time": pa.array(times, pa.int64()).cast(pa.timestamp("us", tz)),
                     "channel": pa.array(channel, pa.string()), "value": value})


def write_files(folder: str, table: pa.Table, file_seconds: float, row_group_size: int,
                hive: bool = False, prefix: str = "part", **kwargs) -> list:
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


def make_config(archive: str, rate: float = 10.0, layout: str = "wide", length_s: float = 60.0,
                max_lag_s: float = 2.0, names=("a", "b"), covariates=("temperature",),
                timezone: str = "UTC", task_bytes: int = 2**16, extra: Optional[dict] = None, **windows):
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
