"""What the report page needs from the output tables: the tables read through a store, per-asset
window accounting, reject counts and shift episodes, as plain Python values (tested without HTML).

The tables are Hive-partitioned Parquet (``TABLE/asset=NAME/date=YYYY-MM-DD/*.parquet``); each file
is opened through the store (:mod:`corrtransforms.report.files`) and handed to pyarrow, so the
output may lie on any Beam filesystem. The report reads only small tables (indicators and shifts
are a few rows per window); from the correlations table it reads the ``window_start`` column alone.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import posixpath
import re
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from corrtransforms.stages import summaries as stage_summaries

TABLES = ("correlations", "indicators", "shifts", "rejects", "state", "episodes", "mode_shapes")
_PARTITION = re.compile(r"/asset=([^/]+)/date=([^/]+)/[^/]+$")


# ----------------------------------------------------------------------------------------------
# Reading


@dataclasses.dataclass
class OutputTables:
    """The tables found under an output folder (None where the table is absent or empty)."""

    folder: str
    tables: Dict[str, Optional[pa.Table]]
    notes: Dict[str, str]

    def get(self, name: str) -> Optional[pa.Table]:
        return self.tables.get(name)


def table_files(store, output_dir: str, name: str) -> List[Tuple[str, str, str]]:
    """(asset, date, path) of every Parquet file of one table, sorted by path; names starting
    with ``.`` or ``_`` (temporary and hidden files) are skipped."""
    pattern = store.join(output_dir, name, "asset=*", "date=*", "*.parquet")
    found = []
    for path in store.match(pattern):
        normal = path.replace("\\", "/")
        m = _PARTITION.search(normal)
        if m and not posixpath.basename(normal).startswith((".", "_")):
            found.append((m.group(1), m.group(2), path))
    return found


def _read_file(store, path: str, columns: Optional[Sequence[str]]) -> pa.Table:
    with store.open(path) as handle:
        parquet = pq.ParquetFile(handle)
        names = parquet.schema_arrow.names
        wanted = None if columns is None else [c for c in columns if c in names]
        table = parquet.read(columns=wanted)
    return table.drop_columns([c for c in ("asset", "date") if c in table.column_names])


def read_table(store, output_dir: str, name: str, columns: Optional[Sequence[str]] = None) -> Optional[pa.Table]:
    """Read one output table (Hive ``asset=/date=`` partitions) through ``store``.

    Parameters
    ----------
    store : object
        The file access (:class:`corrtransforms.report.files.ReportFiles` or alike).
    output_dir : str
        The job's output folder or URL.
    name : str
        Table name (a sub-folder of ``output_dir``).
    columns : sequence of str, optional
        Columns to read; those absent from the files are skipped. None reads all columns.

    Returns
    -------
    pyarrow.Table or None
        None when the table has no file or no row. The partition columns ``asset`` and ``date``
        are strings; files whose schemas differ are unified (missing columns become nulls).
    """
    pieces = []
    for asset, date, path in table_files(store, output_dir, name):
        piece = _read_file(store, path, columns)
        pieces.append(
            piece.append_column("asset", pa.array([asset] * piece.num_rows, pa.string())).append_column(
                "date", pa.array([date] * piece.num_rows, pa.string())
            )
        )
    if not pieces:
        return None
    table = pa.concat_tables(pieces, promote_options="permissive")
    if columns is not None:
        table = table.select([c for c in columns if c in table.column_names])
    return table if table.num_rows else None


def read_output(output_dir: str, store) -> OutputTables:
    """Read every table the report uses; note which are missing."""
    tables: Dict[str, Optional[pa.Table]] = {}
    notes: Dict[str, str] = {}
    for name in TABLES:
        columns = ["asset", "date", "window_start"] if name == "correlations" else None
        try:
            tables[name] = read_table(store, output_dir, name, columns)
        except (pa.ArrowInvalid, OSError) as err:
            tables[name] = None
            notes[name] = f"could not be read ({err})"
            continue
        if tables[name] is None:
            present = store.holds_anything(store.join(output_dir, name))
            notes[name] = "present but empty" if present else "not present"
    return OutputTables(output_dir, tables, notes)


# ----------------------------------------------------------------------------------------------
# Summaries


def _column(table: pa.Table, name: str, default=None) -> list:
    if name in table.column_names:
        return table.column(name).to_pylist()
    return [default] * table.num_rows


def _us(column: pa.ChunkedArray) -> np.ndarray:
    """Timestamps as int64 microseconds since the epoch (nulls become the minimum int64)."""
    values = pc.cast(column, pa.timestamp("us", tz="UTC")).cast(pa.int64())
    return values.fill_null(np.iinfo(np.int64).min).to_numpy()


def _text_time(value) -> str:
    """A time as "YYYY-MM-DD HH:MM" in UTC (the page says all times are UTC)."""
    if value is None:
        return ""
    if isinstance(value, (int, np.integer)):
        value = _dt.datetime.fromtimestamp(int(value) / 1e6, tz=_dt.timezone.utc)
    return value.astimezone(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M")


def asset_summaries(output: OutputTables) -> List[Dict]:
    """Per asset: days, first/last window, windows computed, rejected and planned, rows.

    Windows computed are the distinct window starts of the correlations table (of the indicators
    table when there are no correlations); windows rejected are the distinct window starts of
    rejects rows with subject "*" and action "rejected"; planned = computed + rejected.
    """
    assets: set = set()
    for table in output.tables.values():
        if table is not None and "asset" in table.column_names:
            assets.update(a for a in table.column("asset").to_pylist() if a is not None)
    summaries = []
    for asset in sorted(assets):
        row = {"asset": asset}
        windows_table = output.get("correlations")
        windows_source = "correlations"
        if windows_table is None or not _has_asset(windows_table, asset):
            windows_table, windows_source = output.get("indicators"), "indicators"
        computed = np.array([], dtype=np.int64)
        if windows_table is not None and _has_asset(windows_table, asset):
            mine = _for_asset(windows_table, asset)
            computed = np.unique(_us(mine.column("window_start")))
        row["windows_computed"] = int(computed.size)
        row["windows_source"] = windows_source
        row["first_window"] = _text_time(int(computed[0])) if computed.size else ""
        row["last_window"] = _text_time(int(computed[-1])) if computed.size else ""
        rejected = 0
        rejects = output.get("rejects")
        if rejects is not None and _has_asset(rejects, asset):
            mine = _for_asset(rejects, asset)
            whole = pc.and_(pc.equal(mine.column("subject"), "*"), pc.equal(mine.column("action"), "rejected"))
            whole = pc.and_(whole, pc.is_valid(mine.column("window_start")))
            starts = _us(mine.filter(whole).column("window_start"))
            rejected = int(np.setdiff1d(np.unique(starts), computed).size)
        row["windows_rejected"] = rejected
        row["windows_planned"] = row["windows_computed"] + rejected
        days = set()
        for table in output.tables.values():
            if table is not None and "date" in table.column_names and _has_asset(table, asset):
                days.update(_for_asset(table, asset).column("date").to_pylist())
        row["days"] = len(days - {None})
        indicators = output.get("indicators")
        row["indicator_rows"] = _for_asset(indicators, asset).num_rows if indicators is not None else 0
        shifts = output.get("shifts")
        series = set()
        if shifts is not None and _has_asset(shifts, asset):
            mine = _for_asset(shifts, asset)
            series = set(zip(mine.column("subject").to_pylist(), mine.column("indicator").to_pylist()))
        row["monitored_series"] = len(series)
        state = output.get("state")
        row["state_through"] = ""
        if state is not None and _has_asset(state, asset):
            row["state_through"] = max(d for d in _for_asset(state, asset).column("date").to_pylist() if d)
        summaries.append(row)
    return summaries


def _has_asset(table: pa.Table, asset: str) -> bool:
    return "asset" in table.column_names and pc.any(pc.equal(table.column("asset"), asset)).as_py() is True


def _for_asset(table: Optional[pa.Table], asset: str) -> pa.Table:
    if table is None:
        return pa.table({})
    return table.filter(pc.equal(table.column("asset"), asset))


def reject_counts(output: OutputTables) -> List[Dict]:
    """Rejects grouped by asset, reason, action and stage: rows, distinct subjects, one detail.

    Sorted by asset, then by count (largest first), then reason.
    """
    rejects = output.get("rejects")
    if rejects is None:
        return []
    groups: Dict[Tuple, Dict] = {}
    for asset, stage, reason, action, subject, detail, source in zip(
        _column(rejects, "asset", ""),
        _column(rejects, "stage", ""),
        _column(rejects, "reason", ""),
        _column(rejects, "action", ""),
        _column(rejects, "subject", ""),
        _column(rejects, "detail", ""),
        _column(rejects, "source", ""),
    ):
        key = (asset or "", reason or "", action or "", stage or "")
        entry = groups.setdefault(
            key,
            {
                "asset": key[0],
                "reason": key[1],
                "action": key[2],
                "stage": key[3],
                "count": 0,
                "subjects": set(),
                "example": "",
            },
        )
        entry["count"] += 1
        entry["subjects"].add(subject or "")
        if not entry["example"]:
            entry["example"] = f"{source}: {detail}" if source else (detail or "")
    rows = list(groups.values())
    for row in rows:
        row["subjects"] = sorted(row["subjects"])
    rows.sort(key=lambda r: (r["asset"], -r["count"], r["reason"]))
    return rows


def _direction_sign(value) -> int:
    if value is None:
        return 0
    if isinstance(value, str):
        return {"up": 1, "+1": 1, "1": 1, "down": -1, "-1": -1}.get(value.strip().lower(), 0)
    return int(np.sign(value))


def episodes_from_shifts(shifts: pa.Table) -> List[Dict]:
    """Shift episodes of a shifts table as the page shows them: the package's one episodes
    algorithm (:func:`corrtransforms.stages.summaries.shift_episodes`), as dicts, open first.

    Parameters
    ----------
    shifts : pyarrow.Table
        Rows of the shifts table (with ``asset`` when read from the Hive folders).

    Returns
    -------
    list of dict
        The episodes table's columns (asset, subject, indicator, onset, first_alarm,
        last_window, status, direction, shift_size, shift_size_pct, peak_abs_z, detector,
        n_windows, unit); open episodes first, each group by onset.
    """
    return _episode_rows(stage_summaries.shift_episodes(shifts).to_pylist())


def _episode_rows(rows: List[Dict]) -> List[Dict]:
    """Episode rows with the page's conventions: direction as +1/-1/0, a status, NaN for a
    missing size or peak, an empty asset when the table had none; sorted open first."""
    out = []
    for row in rows:
        row.setdefault("asset", "")
        row["direction"] = _direction_sign(row.get("direction"))
        row["status"] = row.get("status") or "closed"
        row["detector"] = row.get("detector") or ""
        for key in ("shift_size", "peak_abs_z"):
            row[key] = float("nan") if row.get(key) is None else row[key]
        out.append(row)
    return _sort_episodes(out)


def _sort_episodes(episodes: List[Dict]) -> List[Dict]:
    far = _dt.datetime.max.replace(tzinfo=_dt.timezone.utc)
    return sorted(
        episodes, key=lambda e: (e["status"] != "open", e["onset"] or far, e["asset"], e["subject"], e["indicator"])
    )


def report_episodes(output: OutputTables) -> Tuple[List[Dict], str]:
    """Episodes from the episodes table when present, else derived from the shifts table.

    Returns the episodes (open first) and where they came from ("episodes", "shifts" or "").
    """
    table = output.get("episodes")
    if table is not None:
        return _episode_rows(table.to_pylist()), "episodes"
    shifts = output.get("shifts")
    if shifts is None:
        return [], ""
    return episodes_from_shifts(shifts), "shifts"


def series_baselines(output: OutputTables) -> Dict[Tuple[str, str, str], Dict]:
    """Per (asset, subject, indicator), from the series' latest state row: the baseline status
    ("accumulating", "fitted" or "too short": fitted on fewer windows than ``[baseline]
    min_windows``, quality code ``baseline_too_short``), the windows seen and the baseline level
    (``model_location``, the fitted median or intercept; None while accumulating)."""
    state = output.get("state")
    if state is None or not {"phase", "window_start", "subject", "indicator"} <= set(state.column_names):
        return {}
    starts = _us(state.column("window_start"))
    rows = zip(
        _column(state, "asset", ""),
        _column(state, "subject", ""),
        _column(state, "indicator", ""),
        starts,
        _column(state, "phase", ""),
        _column(state, "model_quality", ""),
        _column(state, "windows_seen"),
        _column(state, "model_location"),
    )
    found: Dict[Tuple[str, str, str], Dict] = {}
    for asset, subject, indicator, start, phase, quality, seen, location in rows:
        key = (asset, subject, indicator)
        if key in found and found[key]["start"] >= start:
            continue
        status = (
            "accumulating"
            if phase == "accumulating"
            else "too short"
            if "baseline_too_short" in str(quality or "")
            else "fitted"
        )
        level = None if phase == "accumulating" or location is None or not np.isfinite(location) else float(location)
        found[key] = {"start": start, "status": status, "windows_seen": seen, "level": level}
    return found


def shift_percent(shift_size, level) -> Optional[float]:
    """The shift size in % of the baseline level (None without a level or at a zero level)."""
    if shift_size is None or level is None or not np.isfinite(shift_size) or level == 0:
        return None
    return 100.0 * float(shift_size) / abs(level)


def fleet_overview(
    output: OutputTables, episodes: List[Dict], baselines: Dict[Tuple[str, str, str], Dict]
) -> List[Dict]:
    """One row per asset for the overview page of a fleet: the last day with windows and the
    windows computed on it (correlations table), the open episodes, the series still
    accumulating their baseline (latest state rows) and the last window's start (UTC)."""
    windows = output.get("correlations")
    rows = []
    for asset in sorted({a["asset"] for a in asset_summaries(output)}):
        row: Dict[str, Any] = {"asset": asset, "last_day": "", "windows_last_day": 0, "last_window": ""}
        if windows is not None and _has_asset(windows, asset):
            mine = _for_asset(windows, asset)
            dates = mine.column("date").to_pylist()
            starts = _us(mine.column("window_start"))
            last_day = max(d for d in dates if d)
            row["last_day"] = last_day
            row["windows_last_day"] = len({t for d, t in zip(dates, starts) if d == last_day})
            row["last_window"] = _text_time(int(starts.max()))
        row["open_episodes"] = sum(1 for e in episodes if e["asset"] == asset and e["status"] == "open")
        row["series_in_baseline"] = sum(
            1 for k, b in baselines.items() if k[0] == asset and b["status"] == "accumulating"
        )
        row["series"] = sum(1 for k in baselines if k[0] == asset)
        rows.append(row)
    return rows
