"""Helpers of the reliability tests: one small clean archive, the real pipeline, rows compared exactly.

The clean archive: 10 minutes at 10 Hz of the invented channels "a", "b" and the covariate
"temperature" (see :mod:`tests.support.archive_data`), five files of 2 minutes (windows 2i and 2i+1 in
file i), row groups of 400 rows (40 s). With 60-s windows it plans exactly 10 windows.
"""

from __future__ import annotations

import math
import os
import shutil
import textwrap
from typing import Dict, Iterable, List, Tuple

import pyarrow as pa
import pyarrow.dataset as ds

from pipelines import backfill
from tests.support.archive_data import T0, US, samples, wide_table, write_files

RATE = 10.0
MINUTES = 10
ROW_GROUP = 400
FILE_SECONDS = 120

CORRELATION_KEY = ("window_start", "channel_a", "channel_b")
INDICATOR_KEY = ("window_start", "subject", "indicator")


def clean_columns(seed: int = 21):
    return samples(MINUTES * 60, RATE, seed=seed)


def write_clean_archive(folder: str, columns=None, **parquet_options) -> List[str]:
    """The five clean files; returns their paths in time order."""
    columns = clean_columns() if columns is None else columns
    return write_files(folder, wide_table(columns), FILE_SECONDS, ROW_GROUP, **parquet_options)


def write_config(
    path: str,
    archive: str,
    name: str = "rel-asset",
    layout: str = "wide",
    names: str = '["a", "b"]',
    covariates: str = '["temperature"]',
    extra: str = "",
) -> str:
    text = f"""
    [asset]
    name = "{name}"
    [archive]
    path = "{archive}"
    layout = "{layout}"
    sample_rate_hz = {RATE}
    [channels]
    names = {names}
    covariates = {covariates}
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
    with open(path, "w") as handle:
        handle.write(textwrap.dedent(text) + textwrap.dedent(extra))
    return str(path)


def run_backfill(config_path: str, output: str, *flags: str) -> Dict[str, int]:
    shutil.rmtree(output, ignore_errors=True)
    return backfill.main(["--config", config_path, "--output", output, "--run_id", "reliability", *flags])


def read_table(output: str, table: str) -> pa.Table:
    folder = os.path.join(output, table)
    if not os.path.isdir(folder):
        return pa.table({})
    return ds.dataset(folder, partitioning="hive").to_table()


def canonical(value):
    """A value in a form where equal means bit-identical (NaN equals NaN, -0.0 differs from 0.0)."""
    if isinstance(value, float):
        return "nan" if math.isnan(value) else value.hex()
    if isinstance(value, (list, tuple)):
        return tuple(canonical(v) for v in value)
    return value


def rows_by_key(table: pa.Table, key: Tuple[str, ...]) -> Dict[tuple, tuple]:
    """Rows as {key: canonical row}, partition columns (asset, date) left out."""
    if table.num_rows == 0:
        return {}
    names = [n for n in table.column_names if n not in ("asset", "date")]
    out = {}
    for row in table.select(names).to_pylist():
        k = tuple(row[c] for c in key)
        assert k not in out, f"duplicate row {k}"
        out[k] = tuple((n, canonical(row[n])) for n in names)
    return out


def window_index(start) -> int:
    """Window number k of a window_start (datetime or microseconds) relative to the archive start."""
    us = start if isinstance(start, int) else int(round(start.timestamp() * US))
    return (us - T0) // (60 * US)


def per_window(rows: Dict[tuple, tuple]) -> Dict[int, Dict[tuple, tuple]]:
    out: Dict[int, Dict[tuple, tuple]] = {}
    for k, row in rows.items():
        out.setdefault(window_index(k[0]), {})[k[1:]] = row
    return out


def reject_rows(output: str) -> List[dict]:
    table = read_table(output, "rejects")
    return table.to_pylist() if table.num_rows else []


def whole_window_rejects(rejects: Iterable[dict]) -> Dict[int, str]:
    return {
        window_index(r["window_start"]): r["reason"]
        for r in rejects
        if r["subject"] == "*" and r["action"] == "rejected" and r["window_start"] is not None
    }


def windows_with_findings(rejects: Iterable[dict]) -> Dict[int, set]:
    out: Dict[int, set] = {}
    for r in rejects:
        if r["window_start"] is not None:
            out.setdefault(window_index(r["window_start"]), set()).add(r["reason"])
    return out
