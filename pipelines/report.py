"""Static report of a job's output folder: one index page and one trend picture per subject and
indicator.

Run ``python -m pipelines.report --output DIR``. It reads the output tables under ``DIR``
(``correlations``, ``indicators``, ``shifts``, ``rejects``, ``state`` and, when present,
``episodes``; Hive partitions ``asset=NAME/date=YYYY-MM-DD``) with :mod:`pyarrow.dataset` only and
writes ``DIR/report/index.html`` and ``DIR/report/plots/<asset>/<subject>__<indicator>.png``.

The index page lists, in this order: the open shift episodes, the assets with their windows
processed, the rejected, repaired and flagged input by reason, the closed episodes, and the trend
pictures. A table that is missing (for example no shifts yet) is named on the page; the rest of
the report is still written.

Each picture shows the indicator's value per window with its standard-error band; when the shifts
table holds the series, also the covariate-compensated expectation, the healthy band (expected
+/- 3 sqrt(resid_scale^2 + stderr^2), i.e. |z| <= 3), the baseline windows, the shifted windows and the estimated onsets, and
a lower panel with the standardised residual z.

The report reads only small tables (indicators and shifts are a few rows per window); from the
correlations table it reads the ``window_start`` column alone.
"""
from __future__ import annotations

import argparse
import dataclasses
import datetime as _dt
import html
import os
import re
import sys
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

CAUTION = ("Indicators and shift flags support, and never replace, inspection and judgement by "
           "qualified engineers under local codes and licensed practice.")
#: width of the healthy band drawn around the expectation, in residual scales (common practice:
#: the Shewhart three-sigma limits)
BAND_SCALES = 3.0
TABLES = ("correlations", "indicators", "shifts", "rejects", "state", "episodes")
_PARTITIONING = ds.partitioning(pa.schema([("asset", pa.string()), ("date", pa.string())]), flavor="hive")

# colours of the pictures (plain, high contrast, distinguishable in grey print)
INK = "#222222"
EXPECTED_COLOUR = "#1d4e89"
BAND_COLOUR = "#c9dcef"
STDERR_COLOUR = "#9a9a9a"
BASELINE_COLOUR = "#ececec"
SHIFTED_COLOUR = "#c0392b"
QUALITY_COLOUR = "#8a6d00"


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


def read_table(output_dir: str, name: str, columns: Optional[Sequence[str]] = None) -> Optional[pa.Table]:
    """Read one output table with :mod:`pyarrow.dataset` (Hive ``asset=/date=`` partitions).

    Parameters
    ----------
    output_dir : str
        The job's output folder.
    name : str
        Table name (a sub-folder of ``output_dir``).
    columns : sequence of str, optional
        Columns to read; those absent from the files are skipped. None reads all columns.

    Returns
    -------
    pyarrow.Table or None
        None when the folder is missing or holds no Parquet rows. The partition columns
        ``asset`` and ``date`` are strings.
    """
    path = os.path.join(output_dir, name)
    if not os.path.isdir(path):
        return None
    dataset = ds.dataset(path, format="parquet", partitioning=_PARTITIONING,
                         exclude_invalid_files=False, ignore_prefixes=[".", "_"])
    if not dataset.files:
        return None
    wanted = None if columns is None else [c for c in columns if c in dataset.schema.names]
    table = dataset.to_table(columns=wanted)
    return table if table.num_rows else None


def read_output(output_dir: str) -> OutputTables:
    """Read every table the report uses; note which are missing."""
    tables: Dict[str, Optional[pa.Table]] = {}
    notes: Dict[str, str] = {}
    for name in TABLES:
        columns = ["asset", "date", "window_start"] if name == "correlations" else None
        try:
            tables[name] = read_table(output_dir, name, columns)
        except (pa.ArrowInvalid, OSError) as err:
            tables[name] = None
            notes[name] = f"could not be read ({err})"
            continue
        if tables[name] is None:
            notes[name] = ("not present" if not os.path.isdir(os.path.join(output_dir, name))
                           else "present but empty")
    return OutputTables(output_dir, tables, notes)


# ----------------------------------------------------------------------------------------------
# Summaries (plain Python values, tested without HTML)


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
    assets = set()
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
            _column(rejects, "asset", ""), _column(rejects, "stage", ""), _column(rejects, "reason", ""),
            _column(rejects, "action", ""), _column(rejects, "subject", ""), _column(rejects, "detail", ""),
            _column(rejects, "source", "")):
        key = (asset or "", reason or "", action or "", stage or "")
        entry = groups.setdefault(key, {"asset": key[0], "reason": key[1], "action": key[2], "stage": key[3],
                                        "count": 0, "subjects": set(), "example": ""})
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
    """Shift episodes: maximal runs of consecutive windows in state "shifted" per series.

    Parameters
    ----------
    shifts : pyarrow.Table
        Rows of the shifts table (with ``asset``).

    Returns
    -------
    list of dict
        asset, subject, indicator, status ("open" when the run reaches the series' last window,
        else "closed"), onset (the latest onset estimate in the run), first_alarm, last_window,
        direction (+1/-1), shift_size (at the run's last window), peak_abs_z, detector (the
        detectors that signalled), n_windows, unit. Open episodes first, each group by onset.
    """
    starts = _us(shifts.column("window_start"))
    order = np.lexsort((starts, np.array(_column(shifts, "indicator", ""), dtype=object).astype(str),
                        np.array(_column(shifts, "subject", ""), dtype=object).astype(str),
                        np.array(_column(shifts, "asset", ""), dtype=object).astype(str)))
    table = shifts.take(pa.array(order))
    starts = starts[order]
    assets, subjects, indicators = (_column(table, c, "") for c in ("asset", "subject", "indicator"))
    states, onsets = _column(table, "state", ""), _column(table, "onset")
    directions, sizes, zs = _column(table, "direction"), _column(table, "shift_size"), _column(table, "z")
    detectors, units = _column(table, "detector"), _column(table, "unit", "")
    episodes: List[Dict] = []
    current: Optional[Dict] = None
    for i in range(table.num_rows):
        series = (assets[i], subjects[i], indicators[i])
        new_series = i == 0 or series != (assets[i - 1], subjects[i - 1], indicators[i - 1])
        if new_series and current is not None:
            current["status"] = "open"  # the run reached the previous series' last window
            current = None
        if states[i] == "shifted":
            if current is None:
                current = {"asset": series[0], "subject": series[1], "indicator": series[2],
                           "first_alarm": int(starts[i]), "onset": None, "detectors": set(),
                           "peak_abs_z": float("nan"), "n_windows": 0, "status": "closed"}
                episodes.append(current)
            current["last_window"] = int(starts[i])
            current["n_windows"] += 1
            if onsets[i] is not None:
                current["onset"] = onsets[i]
            if directions[i] is not None and _direction_sign(directions[i]) != 0:
                current["direction"] = _direction_sign(directions[i])
            if sizes[i] is not None and np.isfinite(sizes[i]):
                current["shift_size"] = float(sizes[i])
            if zs[i] is not None and np.isfinite(zs[i]):
                current["peak_abs_z"] = float(np.nanmax([current["peak_abs_z"], abs(zs[i])]))
            if detectors[i]:
                current["detectors"].update(str(detectors[i]).split("+"))
            current["unit"] = units[i] or ""
        else:
            current = None  # the run ended before the series' last window: closed
    if current is not None:
        current["status"] = "open"
    for e in episodes:
        e.setdefault("direction", 0)
        e.setdefault("shift_size", float("nan"))
        e["detector"] = "+".join(sorted(e.pop("detectors")))
        e["onset"] = e["onset"] if e["onset"] is not None else _dt.datetime.fromtimestamp(
            e["first_alarm"] / 1e6, tz=_dt.timezone.utc)
        e["first_alarm"] = _dt.datetime.fromtimestamp(e["first_alarm"] / 1e6, tz=_dt.timezone.utc)
        e["last_window"] = _dt.datetime.fromtimestamp(e["last_window"] / 1e6, tz=_dt.timezone.utc)
    return _sort_episodes(episodes)


def _sort_episodes(episodes: List[Dict]) -> List[Dict]:
    far = _dt.datetime.max.replace(tzinfo=_dt.timezone.utc)
    return sorted(episodes, key=lambda e: (e["status"] != "open", e["onset"] or far, e["asset"],
                                           e["subject"], e["indicator"]))


def shift_episodes(output: OutputTables) -> Tuple[List[Dict], str]:
    """Episodes from the episodes table when present, else derived from the shifts table.

    Returns the episodes (open first) and where they came from ("episodes", "shifts" or "").
    """
    table = output.get("episodes")
    if table is not None:
        rows = []
        for row in table.to_pylist():
            row.setdefault("asset", "")
            row["direction"] = _direction_sign(row.get("direction"))
            row["status"] = row.get("status") or "closed"
            for key in ("shift_size", "peak_abs_z"):
                row[key] = float("nan") if row.get(key) is None else row[key]
            rows.append(row)
        return _sort_episodes(rows), "episodes"
    shifts = output.get("shifts")
    if shifts is None:
        return [], ""
    return episodes_from_shifts(shifts), "shifts"


# ----------------------------------------------------------------------------------------------
# Pictures


def plot_file_name(subject: str, indicator: str) -> str:
    """File name of a series' picture: safe on every file system (":" of pairs becomes "--")."""
    safe = re.sub(r"[^A-Za-z0-9_.-]", "_", subject.replace(":", "--"))
    return f"{safe}__{re.sub(r'[^A-Za-z0-9_.-]', '_', indicator)}.png"


def _series_arrays(table: pa.Table, columns: Sequence[str]) -> Dict[str, np.ndarray]:
    out = {"time": _us(table.column("window_start"))}
    for name in columns:
        if name not in table.column_names:
            out[name] = np.full(table.num_rows, np.nan)
        elif pa.types.is_floating(table.schema.field(name).type) or pa.types.is_integer(table.schema.field(name).type):
            out[name] = pc.cast(table.column(name), pa.float64()).fill_null(np.nan).to_numpy()
        elif pa.types.is_timestamp(table.schema.field(name).type):
            out[name] = _us(table.column(name))
        else:
            out[name] = np.array([v if v is not None else "" for v in table.column(name).to_pylist()], dtype=object)
    order = np.argsort(out["time"], kind="stable")
    return {k: v[order] for k, v in out.items()}


def _as_datetimes(us: np.ndarray) -> np.ndarray:
    return us.astype("datetime64[us]")


def _break_gaps(time_us: np.ndarray, *arrays: np.ndarray):
    """Insert a NaN point into each array where the spacing exceeds 3 times the median spacing, so
    lines and bands are not drawn across missing days. Returns (datetimes, *arrays)."""
    if time_us.size < 3:
        return (_as_datetimes(time_us),) + tuple(arrays)
    spacing = np.diff(time_us)
    gaps = np.flatnonzero(spacing > 3 * np.median(spacing)) + 1
    time_out = np.insert(time_us, gaps, time_us[gaps - 1] + spacing[gaps - 1] // 2)
    return (_as_datetimes(time_out),) + tuple(np.insert(a.astype(float), gaps, np.nan) for a in arrays)


def plot_series(path: str, asset: str, subject: str, indicator: str, values: pa.Table,
                shifts: Optional[pa.Table]) -> None:
    """Write one trend picture (PNG) for a subject and indicator.

    Parameters
    ----------
    path : str
        PNG file to write.
    asset, subject, indicator : str
        Names for the title.
    values : pyarrow.Table
        The series' indicators rows (window_start, value, stderr, unit, quality).
    shifts : pyarrow.Table or None
        The series' shifts rows (window_start, value, stderr, expected, resid_scale, z, state,
        onset), or None when the series is not monitored.

    Notes
    -----
    The healthy band is ``expected +/- 3 sqrt(resid_scale^2 + stderr^2)``, the values with
    ``|z| <= 3`` (three-sigma limits, common practice for control charts, Shewhart 1931), where
    ``resid_scale`` is the baseline residual scale net of the windows' own error and ``stderr``
    the window's record-length error; the error band of each value is
    ``value +/- stderr``. The lower panel shows ``z = (value - expected) / sqrt(resid_scale^2 +
    stderr^2)`` as written by the shift detector.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.dates as mdates
    import matplotlib.pyplot as plt

    v = _series_arrays(values, ["value", "stderr", "unit", "quality"])
    unit = next((u for u in v["unit"] if u), "")
    monitored = shifts is not None and shifts.num_rows > 0
    if monitored:
        fig, (ax, az) = plt.subplots(2, 1, figsize=(10, 6.0), sharex=True,
                                     gridspec_kw={"height_ratios": [3, 1.2], "hspace": 0.08})
    else:
        fig, ax = plt.subplots(1, 1, figsize=(10, 4.2))
        az = None
    time = _as_datetimes(v["time"])
    value, stderr = v["value"], v["stderr"]
    finite = np.isfinite(value)
    handles = []

    if monitored:
        s = _series_arrays(shifts, ["expected", "resid_scale", "z", "state", "onset", "value", "stderr"])
        stime = _as_datetimes(s["time"])
        baseline = s["state"] == "baseline"
        if baseline.any():
            first, last = stime[baseline][0], stime[baseline][-1]
            handles.append(ax.axvspan(first, last, color=BASELINE_COLOUR, zorder=0, label="baseline windows"))
            az.axvspan(first, last, color=BASELINE_COLOUR, zorder=0)
        spread = np.sqrt(s["resid_scale"] ** 2 + np.where(np.isfinite(s["stderr"]), s["stderr"], 0.0) ** 2)
        band = np.isfinite(s["expected"]) & np.isfinite(spread)
        if band.any():
            gap_time, expected, low, high = _break_gaps(
                s["time"], s["expected"], np.where(band, s["expected"] - BAND_SCALES * spread, np.nan),
                np.where(band, s["expected"] + BAND_SCALES * spread, np.nan))
            handles.append(ax.fill_between(
                gap_time, low, high, color=BAND_COLOUR, linewidth=0, zorder=1,
                label=f"healthy band: |z| \u2264 {BAND_SCALES:g}"))
            handles.append(ax.plot(gap_time, expected, color=EXPECTED_COLOUR, linewidth=1.2, zorder=3,
                                   label="expected (covariate-compensated)")[0])
        shifted = s["state"] == "shifted"
        if shifted.any():
            handles.append(ax.scatter(stime[shifted], s["value"][shifted], s=26, marker="D",
                                      color=SHIFTED_COLOUR, zorder=5, label="shifted window"))
            onsets = np.unique(s["onset"][shifted & (s["onset"] != np.iinfo(np.int64).min)])
            for k, onset in enumerate(onsets):
                line = ax.axvline(_as_datetimes(np.array([onset]))[0], color=SHIFTED_COLOUR, linestyle="--",
                                  linewidth=1.0, zorder=4, label="estimated onset" if k == 0 else None)
                az.axvline(_as_datetimes(np.array([onset]))[0], color=SHIFTED_COLOUR, linestyle="--", linewidth=1.0)
                if k == 0:
                    handles.append(line)
        zfinite = np.isfinite(s["z"])
        az.axhline(0.0, color=INK, linewidth=0.6)
        for level in (-BAND_SCALES, BAND_SCALES):
            az.axhline(level, color=EXPECTED_COLOUR, linewidth=0.8, linestyle=":")
        az.plot(stime[zfinite & ~shifted], s["z"][zfinite & ~shifted], ".", color=INK, markersize=3)
        az.plot(stime[zfinite & shifted], s["z"][zfinite & shifted], "D", color=SHIFTED_COLOUR, markersize=3.5)
        az.set_ylabel("z")
        zlim = np.nanpercentile(np.abs(s["z"][zfinite]), 99.5) if zfinite.any() else BAND_SCALES
        az.set_ylim(-max(zlim, 4.0) * 1.1, max(zlim, 4.0) * 1.1)
        az.grid(True, color="#dddddd", linewidth=0.5)

    band_ok = finite & np.isfinite(stderr)
    if band_ok.any():
        gap_time, low, high = _break_gaps(v["time"][finite], np.where(band_ok, value - stderr, np.nan)[finite],
                                          np.where(band_ok, value + stderr, np.nan)[finite])
        handles.append(ax.fill_between(gap_time, low, high, color=STDERR_COLOUR, alpha=0.45, linewidth=0,
                                       zorder=2, label="value \u00b1 standard error"))
    ok = np.array([q in ("", "ok") for q in v["quality"]], dtype=bool)
    gap_time, line = _break_gaps(v["time"][finite], value[finite])
    ax.plot(gap_time, line, color=INK, linewidth=0.5, alpha=0.5, zorder=2)
    handles.append(ax.scatter(time[finite & ok], value[finite & ok], s=7, color=INK, zorder=4, label="value"))
    if (finite & ~ok).any():
        codes: Dict[str, int] = {}
        for text in v["quality"][finite & ~ok]:
            for code in str(text).split(";"):
                codes[code] = codes.get(code, 0) + 1
        common = sorted(codes, key=lambda c: (-codes[c], c))
        label = "value with quality code (" + ", ".join(common[:2]) + (", ..." if len(common) > 2 else "") + ")"
        handles.append(ax.scatter(time[finite & ~ok], value[finite & ~ok], s=14, facecolors="none",
                                  edgecolors=QUALITY_COLOUR, linewidths=0.7, zorder=4, label=label))
    if finite.any():
        low, high = np.nanpercentile(value[finite], [0.5, 99.5])
        pad = 0.15 * (high - low) if high > low else max(abs(high) * 0.05, 1e-12)
        ax.set_ylim(low - pad, high + pad)
    else:
        ax.text(0.5, 0.5, "no finite values", transform=ax.transAxes, ha="center", va="center", color=INK)

    ax.set_title(f"{asset} \u2014 {subject} \u2014 {indicator}", loc="left", fontsize=12, color=INK)
    shifted_count = int((shifts.column("state").to_numpy(zero_copy_only=False) == "shifted").sum()) if monitored else 0
    ax.set_title(f"{int(finite.sum())} windows" + (f", {shifted_count} shifted" if monitored else ", not monitored"),
                 loc="right", fontsize=9, color="#555555")
    ax.set_ylabel(f"{indicator} [{unit}]" if unit else indicator)
    ax.grid(True, color="#dddddd", linewidth=0.5)
    legend = [h for h in handles if not str(h.get_label()).startswith("_")]
    fig.legend(handles=legend, loc="lower center", fontsize=8, frameon=False, ncol=4,
               bbox_to_anchor=(0.5, 0.0))
    bottom = az if az is not None else ax
    locator = mdates.AutoDateLocator()
    bottom.xaxis.set_major_locator(locator)
    bottom.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
    bottom.set_xlabel("window start (UTC)")
    for a in (ax, az):
        if a is not None:
            for side in ("top", "right"):
                a.spines[side].set_visible(False)
    rows_of_legend = (len(legend) + 3) // 4
    fig.subplots_adjust(left=0.08, right=0.98, top=0.93, bottom=0.1 + 0.045 * rows_of_legend)
    fig.savefig(path, dpi=100)
    plt.close(fig)


def write_plots(output: OutputTables, report_dir: str) -> List[Dict]:
    """One PNG per asset, subject and indicator of the indicators table; returns their entries."""
    indicators = output.get("indicators")
    if indicators is None:
        return []
    shifts = output.get("shifts")
    keys = sorted(set(zip(_column(indicators, "asset", ""), _column(indicators, "subject", ""),
                          _column(indicators, "indicator", ""))))
    shift_keys = set()
    if shifts is not None:
        shift_keys = set(zip(_column(shifts, "asset", ""), _column(shifts, "subject", ""),
                             _column(shifts, "indicator", "")))
    entries = []
    for asset, subject, indicator in keys:
        mask = pc.and_(pc.and_(pc.equal(indicators.column("asset"), asset),
                               pc.equal(indicators.column("subject"), subject)),
                       pc.equal(indicators.column("indicator"), indicator))
        series_shifts = None
        if (asset, subject, indicator) in shift_keys:
            smask = pc.and_(pc.and_(pc.equal(shifts.column("asset"), asset),
                                    pc.equal(shifts.column("subject"), subject)),
                            pc.equal(shifts.column("indicator"), indicator))
            series_shifts = shifts.filter(smask)
        relative = os.path.join("plots", re.sub(r"[^A-Za-z0-9_.-]", "_", asset), plot_file_name(subject, indicator))
        target = os.path.join(report_dir, relative)
        os.makedirs(os.path.dirname(target), exist_ok=True)
        plot_series(target, asset, subject, indicator, indicators.filter(mask), series_shifts)
        entries.append({"asset": asset, "subject": subject, "indicator": indicator,
                        "path": relative.replace(os.sep, "/"), "monitored": series_shifts is not None})
    return entries


# ----------------------------------------------------------------------------------------------
# The page

_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #222;
       margin: 1.5rem auto; max-width: 74rem; padding: 0 1rem; line-height: 1.4; }
h1 { font-size: 1.5rem; margin-bottom: 0.2rem; }
h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 2px solid #1d4e89; padding-bottom: 0.2rem; }
h3 { font-size: 1rem; margin-top: 1.2rem; }
p.meta { color: #555; margin-top: 0; }
p.caution { border-left: 4px solid #8a6d00; background: #fbf6e6; padding: 0.5rem 0.8rem; }
p.note { color: #555; font-style: italic; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #c8c8c8; padding: 0.25rem 0.55rem; text-align: left; vertical-align: top; }
th { background: #eef2f7; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
td.time { white-space: nowrap; }
table.episodes { font-size: 0.85rem; }
table.episodes td, table.episodes th { padding: 0.2rem 0.4rem; }
div.wide { overflow-x: auto; }
tr.open td { background: #fdecea; }
.up::before { content: "\\2191\\00a0"; } .down::before { content: "\\2193\\00a0"; }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(30rem, 1fr)); gap: 1rem; }
figure { margin: 0; } figure img { width: 100%; border: 1px solid #ddd; }
figcaption { font-size: 0.85rem; color: #444; }
"""


def _e(value) -> str:
    return html.escape("" if value is None else str(value))


def _number(value, digits=4) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return ""
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    return f"{value:.{digits}g}"


def _episode_rows(episodes: List[Dict], plots: Dict[Tuple[str, str, str], str]) -> List[str]:
    rows = []
    for e in episodes:
        direction = {1: '<span class="up">up</span>', -1: '<span class="down">down</span>'}.get(e["direction"], "")
        plot = plots.get((e["asset"], e["subject"], e["indicator"]))
        link = f'<a href="{_e(plot)}">picture</a>' if plot else ""
        size = _number(e.get("shift_size"), 3)
        rows.append(
            f'<tr class="{_e(e["status"])}"><td>{_e(e["asset"])}</td>'
            f'<td>{_e(e["subject"])}</td><td>{_e(e["indicator"])}</td><td>{direction}</td>'
            f'<td class="time">{_e(_text_time(e.get("onset")))}</td>'
            f'<td class="time">{_e(_text_time(e.get("first_alarm")))}</td>'
            f'<td class="time">{_e(_text_time(e.get("last_window")))}</td><td class="num">{_e(e.get("n_windows"))}</td>'
            f'<td class="num">{_e(size)} {_e(e.get("unit") or "")}</td>'
            f'<td class="num">{_e(_number(e.get("peak_abs_z"), 3))}</td><td>{_e(e.get("detector") or "")}</td>'
            f'<td>{link}</td></tr>')
    return rows


_EPISODE_HEAD = ("<tr><th>asset</th><th>subject</th><th>indicator</th><th>direction</th>"
                 "<th>estimated onset</th><th>first alarm</th><th>last shifted</th><th>windows</th>"
                 "<th>shift size</th><th>peak |z|</th><th>detector</th><th></th></tr>")


def render_index(output: OutputTables, assets: List[Dict], rejects: List[Dict], episodes: List[Dict],
                 episode_source: str, plots: List[Dict], generated: str) -> str:
    """The index page as an HTML string (open episodes first, then assets, rejects, closed
    episodes, pictures, and the tables found)."""
    plot_index = {(p["asset"], p["subject"], p["indicator"]): p["path"] for p in plots}
    open_episodes = [e for e in episodes if e["status"] == "open"]
    closed = [e for e in episodes if e["status"] != "open"]
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             "<title>corrtransforms report</title>", f"<style>{_CSS}</style></head><body>",
             "<h1>Correlation indicators and shifts</h1>",
             f'<p class="meta">Output folder <code>{_e(os.path.abspath(output.folder))}</code>; '
             f"report written {_e(generated)}. All times UTC.</p>",
             f'<p class="caution"><strong>Caution.</strong> {_e(CAUTION)}</p>']

    parts.append(f'<h2 id="open">Open shift episodes ({len(open_episodes)})</h2>')
    if output.get("shifts") is None and output.get("episodes") is None:
        parts.append('<p class="note">No shifts table was found: shift detection has not run on this '
                     "output yet, so there are no episodes to list.</p>")
    elif not open_episodes:
        parts.append("<p>No series is in state shifted at its latest window.</p>")
    else:
        parts.append("<p>Series whose latest window is still in state shifted, earliest onset first.</p>")
        parts.append("<div class=\"wide\"><table class=\"episodes\">" + _EPISODE_HEAD
                     + "".join(_episode_rows(open_episodes, plot_index)) + "</table></div>")

    parts.append('<h2 id="assets">Assets and windows processed</h2>')
    if not assets:
        parts.append('<p class="note">No output tables with rows were found in this folder.</p>')
    else:
        parts.append("<table><tr><th>asset</th><th>days</th><th>first window</th><th>last window</th>"
                     "<th>windows planned</th><th>windows computed</th><th>windows rejected</th>"
                     "<th>indicator rows</th><th>monitored series</th><th>detector state through</th></tr>")
        for a in assets:
            parts.append(
                f'<tr><td>{_e(a["asset"])}</td><td class="num">{a["days"]}</td><td>{_e(a["first_window"])}</td>'
                f'<td>{_e(a["last_window"])}</td><td class="num">{a["windows_planned"]}</td>'
                f'<td class="num">{a["windows_computed"]}</td><td class="num">{a["windows_rejected"]}</td>'
                f'<td class="num">{a["indicator_rows"]}</td><td class="num">{a["monitored_series"]}</td>'
                f'<td>{_e(a["state_through"])}</td></tr>')
        parts.append("</table>")
        parts.append("<p>Windows computed have correlation rows; windows rejected produced none (their "
                     "reasons are below); planned = computed + rejected.</p>")

    parts.append('<h2 id="rejects">Rejected, repaired and flagged input by reason</h2>')
    if output.get("rejects") is None:
        parts.append(f'<p class="note">No rejects table was found ({_e(output.notes.get("rejects", ""))}).</p>')
    else:
        parts.append("<table><tr><th>asset</th><th>reason</th><th>action</th><th>stage</th><th>rows</th>"
                     "<th>subjects</th><th>example</th></tr>")
        for r in rejects:
            subjects = ", ".join(r["subjects"][:6]) + (f" and {len(r['subjects']) - 6} more" if len(r["subjects"]) > 6 else "")
            parts.append(
                f'<tr><td>{_e(r["asset"])}</td><td><code>{_e(r["reason"])}</code></td><td>{_e(r["action"])}</td>'
                f'<td>{_e(r["stage"])}</td><td class="num">{r["count"]}</td><td>{_e(subjects)}</td>'
                f'<td>{_e(r["example"][:160])}</td></tr>')
        parts.append("</table>")

    parts.append(f'<h2 id="closed">Closed shift episodes ({len(closed)})</h2>')
    if closed:
        parts.append("<div class=\"wide\"><table class=\"episodes\">" + _EPISODE_HEAD
                     + "".join(_episode_rows(closed, plot_index)) + "</table></div>")
    else:
        parts.append("<p>None.</p>")
    if episode_source == "shifts":
        parts.append('<p class="note">Episodes are runs of consecutive windows in state shifted, '
                     "derived from the shifts table.</p>")

    parts.append('<h2 id="trends">Trends per subject and indicator</h2>')
    if output.get("indicators") is None:
        parts.append(f'<p class="note">No indicators table was found ({_e(output.notes.get("indicators", ""))}); '
                     "there is nothing to plot.</p>")
    else:
        if output.get("shifts") is None:
            parts.append('<p class="note">No shifts table was found: the pictures show the indicator values '
                         "and their standard errors only, without expectation, healthy band or shift marks.</p>")
        parts.append("<p>Grey band: value \u00b1 standard error. Where a series is monitored: blue line, the "
                     "covariate-compensated expectation; light blue band, the healthy band where |z| \u2264 3 (expected \u00b1 3 \u221a(residual scale\u00b2 + standard error\u00b2)); "
                     "grey background, the baseline windows; red diamonds, shifted windows; dashed red line, "
                     "the estimated onset; lower panel, the standardised residual z.</p>")
        for asset in sorted({p["asset"] for p in plots}):
            mine = [p for p in plots if p["asset"] == asset]
            mine.sort(key=lambda p: (not p["monitored"], p["subject"], p["indicator"]))
            parts.append(f"<h3>{_e(asset)}</h3>")
            parts.append('<div class="grid">')
            for p in mine:
                label = f'{p["subject"]} \u2014 {p["indicator"]}' + ("" if p["monitored"] else " (not monitored)")
                parts.append(f'<figure><a href="{_e(p["path"])}"><img src="{_e(p["path"])}" alt="{_e(label)}" '
                             f'loading="lazy"></a><figcaption>{_e(label)}</figcaption></figure>')
            parts.append("</div>")

    parts.append('<h2 id="tables">Tables read</h2><table><tr><th>table</th><th>rows</th><th>note</th></tr>')
    for name in TABLES:
        table = output.get(name)
        rows = "" if table is None else str(table.num_rows)
        note = output.notes.get(name, "")
        if name == "episodes" and table is None:
            note = (note + "; episodes derived from the shifts table") if output.get("shifts") is not None else note
        parts.append(f"<tr><td>{_e(name)}</td><td class=\"num\">{rows}</td><td>{_e(note)}</td></tr>")
    parts.append("</table>")
    parts.append(f'<p class="caution">{_e(CAUTION)}</p>')
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def write_report(output_dir: str, report_dir: Optional[str] = None) -> str:
    """Read the tables under ``output_dir`` and write the report; return the index page's path."""
    report_dir = report_dir or os.path.join(output_dir, "report")
    os.makedirs(report_dir, exist_ok=True)
    output = read_output(output_dir)
    assets = asset_summaries(output)
    rejects = reject_counts(output)
    episodes, source = shift_episodes(output)
    plots = write_plots(output, report_dir)
    generated = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    page = render_index(output, assets, rejects, episodes, source, plots, generated)
    index = os.path.join(report_dir, "index.html")
    with open(index, "w", encoding="utf-8") as handle:
        handle.write(page)
    return index


def main(argv: Optional[Sequence[str]] = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m pipelines.report",
        description="Write DIR/report/index.html and one PNG per subject and indicator from the output tables.")
    parser.add_argument("--output", required=True, help="the job's output folder (DIR)")
    parser.add_argument("--report-dir", default=None, help="where to write the report (default DIR/report)")
    args, unknown = parser.parse_known_args(argv)
    if unknown:
        print(f"report: ignoring options meant for Beam jobs: {' '.join(unknown)}", file=sys.stderr)
    if not os.path.isdir(args.output):
        print(f"report: --output {args.output!r} is not a folder", file=sys.stderr)
        return 2
    index = write_report(args.output, args.report_dir)
    print(f"report written to {index}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
