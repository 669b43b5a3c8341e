"""Summaries of the output tables: the alarm episodes of a shifts table.

:func:`shift_episodes` condenses rows of the shifts table into one row per alarm episode (the
``episodes`` table).
"""
from __future__ import annotations

import math
from typing import Any, Dict

import pyarrow as pa

from corrtransforms import tables
from corrtransforms.stages.state import SHIFTED


def shift_episodes(shifts: pa.Table) -> pa.Table:
    """Alarm summary: one row per subject, indicator and episode of consecutive shifted windows.

    Parameters
    ----------
    shifts : pyarrow.Table
        Rows of the SHIFTS schema (any number of series and days; an ``asset`` column, as read
        from the Hive folders, is kept as the first key when present).

    Returns
    -------
    pyarrow.Table
        :data:`corrtransforms.tables.EPISODES` (plus ``asset`` when given), sorted by keys and
        first alarm. An episode is identified by its ``first_alarm`` (carried in every shifted
        row), so a table holding only the latest days still groups correctly. ``onset``,
        ``direction`` and ``shift_size`` are the latest estimates (at the episode's last shifted
        window); ``status`` is ``"open"`` when the series' last row in the table is still in the
        episode.
    """
    has_asset = "asset" in shifts.column_names
    keys = (["asset"] if has_asset else []) + ["subject", "indicator"]
    schema = tables.EPISODES
    if has_asset:
        schema = schema.insert(0, pa.field("asset", pa.string(), nullable=False))
    if shifts.num_rows == 0:
        return schema.empty_table()
    columns = {name: shifts.column(name).to_pylist() for name in keys}
    start = shifts.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    first_alarm = shifts.column("first_alarm").cast(pa.int64()).to_pylist()
    onset = shifts.column("onset").cast(pa.int64()).to_pylist()
    state = shifts.column("state").to_pylist()
    direction = shifts.column("direction").to_pylist()
    size = shifts.column("shift_size").to_pylist()
    z = shifts.column("z").to_pylist()
    detector = shifts.column("detector").to_pylist()
    unit = shifts.column("unit").to_pylist()
    series_last: Dict[tuple, int] = {}
    episodes: Dict[tuple, Dict[str, Any]] = {}
    for i in range(shifts.num_rows):
        series = tuple(columns[name][i] for name in keys)
        series_last[series] = max(series_last.get(series, start[i]), start[i])
        if state[i] != SHIFTED or first_alarm[i] is None:
            continue
        key = series + (first_alarm[i],)
        e = episodes.get(key)
        if e is None:
            e = episodes[key] = {"last": start[i], "first": start[i], "n": 0, "peak": float("nan"),
                                 "detectors": set(), "unit": unit[i], "i": i}
        e["n"] += 1
        if start[i] >= e["last"]:
            e["last"], e["i"] = start[i], i
        if z[i] is not None and math.isfinite(z[i]) and not (abs(z[i]) <= e["peak"]):
            e["peak"] = abs(z[i])
        if detector[i]:
            e["detectors"].update(detector[i].split("+"))
    out = {name: [] for name in schema.names}
    for key in sorted(episodes, key=lambda k: tuple("" if v is None else v for v in k)):
        e = episodes[key]
        i = e["i"]
        series = key[:-1]
        for name, value in zip(keys, series):
            out[name].append(value)
        out["onset"].append(onset[i])
        out["first_alarm"].append(key[-1])
        out["last_window"].append(int(e["last"]))
        out["status"].append("open" if series_last[series] == e["last"] else "closed")
        out["direction"].append(direction[i])
        out["shift_size"].append(size[i])
        out["peak_abs_z"].append(e["peak"])
        out["detector"].append("+".join(d for d in ("cusum", "ewma") if d in e["detectors"]) or None)
        out["n_windows"].append(e["n"])
        out["unit"].append(e["unit"])
    arrays = []
    for field in schema:
        values = out[field.name]
        if pa.types.is_timestamp(field.type):
            arrays.append(pa.array(values, type=pa.int64()).cast(field.type))
        else:
            arrays.append(pa.array(values, type=field.type))
    return pa.Table.from_arrays(arrays, schema=schema)
