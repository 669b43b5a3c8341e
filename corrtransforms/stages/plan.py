"""Plan the reading of a Parquet archive from its footers: windows and bounded read tasks.

Planning reads only Parquet footers (file metadata): per file and row group the time range (from the
time column's statistics), the row count, and the columns present. It then cuts the time axis into
windows (on the epoch grid, or from each record's first sample) and groups consecutive windows into
read tasks whose decoded size stays near ``[reading] task_bytes``. A :class:`ReadTask` names files,
row groups, columns and windows; it is small and picklable, so only task descriptions ever travel
through a shuffle, never samples. Two exceptions read a time column, one row group at a time: a row
group without time statistics (``statistics_missing``), and with ``[windows] align = "records"`` a
row group whose statistics cannot rule out a pause inside it (:func:`may_hold_pause`).

This module is pure pyarrow/numpy. File access goes through an ``open_file(path)`` callable that
returns a binary, seekable file object (the Beam layer hands in
``apache_beam.io.filesystems.FileSystems.open``); :func:`open_local_file` serves local paths.

Time conventions (see :mod:`corrtransforms.timeutil`): every time is an integer count of
microseconds since the Unix epoch, UTC.
Naive (time-zone-less) timestamps in a file are local times of ``[archive] timezone``; calendar days
(of partitions, ``--start``/``--end`` and findings) are those of ``[asset] timezone`` (``config.timezone``).
"""

from __future__ import annotations

import bisect
import dataclasses
import datetime as _dt
import json
import math
import os
import re
from typing import Any, Callable, Dict, Iterable, List, Mapping, Optional, Sequence, Set, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from corrtransforms.config import RECORD_GAP_PERIODS, AssetConfig
from corrtransforms.rejects import WHOLE_FILE, Reject, iso_utc
from corrtransforms.stages.footer_index import IndexEntry, ListedFile
from corrtransforms.timeutil import (
    US_PER_S,
    FileTimePattern,
    compact_utc,
    compile_file_time_pattern,
    day_start_us,
    file_name_time_us,
    local_date,
    local_to_utc_us,
    timestamp_to_us,
)

_PARQUET_UNITS = {"milliseconds": "ms", "microseconds": "us", "nanoseconds": "ns"}
_HIVE_DATE = re.compile(r"(?:^|/)date=(\d{4}-\d{2}-\d{2})(?:/|$)")
_NAME_DATE = re.compile(r"(\d{4})-?(\d{2})-?(\d{2})")
#: bytes per decoded row and column: float64 samples and int64 microsecond times
_BYTES_PER_VALUE = 8
#: bytes per row of the long layout: time (8) + value (8) + channel code (4)
_BYTES_PER_LONG_ROW = 20

OpenFile = Callable[[str], Any]


def open_local_file(path: str):
    """Open a local file for binary reading (the default ``open_file``)."""
    return open(path, "rb")


# --------------------------------------------------------------------------------------------
# Footers


@dataclasses.dataclass(frozen=True)
class RowGroupSpan:
    """One row group: its index, row count, UTC time range and decoded size estimate.

    ``segments_us`` is filled only with ``[windows] align = "records"`` for a row group whose
    time column was read because it may hold a pause: its contiguous runs of samples as
    ``(first, last)`` UTC microseconds, when there is more than one (empty: one run).
    """

    index: int
    n_rows: int
    start_us: int
    end_us: int
    decoded_bytes: int
    segments_us: Tuple[Tuple[int, int], ...] = ()

    @property
    def runs_us(self) -> Tuple[Tuple[int, int], ...]:
        """The row group's contiguous runs of samples (one run unless ``segments_us`` says more)."""
        return self.segments_us or ((self.start_us, self.end_us),)


@dataclasses.dataclass(frozen=True)
class FileFooter:
    """What planning learned from one file's footer.

    Attributes
    ----------
    path : str
        The file's path or URL.
    time_naive : bool
        True when the time column has no time zone (local times of ``[archive] timezone``).
    row_groups : tuple of RowGroupSpan
        Row groups with at least one row, in file order.
    numeric_columns : tuple of str
        Numeric columns other than the time column (wide layout).
    other_columns : tuple of str
        Non-numeric columns other than the time column.
    long_channels : tuple of str
        Channel names present (long layout, only when ``[channels] names`` is not given).
    """

    path: str
    time_naive: bool
    row_groups: Tuple[RowGroupSpan, ...]
    numeric_columns: Tuple[str, ...] = ()
    other_columns: Tuple[str, ...] = ()
    long_channels: Tuple[str, ...] = ()

    @property
    def start_us(self) -> int:
        return min(rg.start_us for rg in self.row_groups)

    @property
    def end_us(self) -> int:
        return max(rg.end_us for rg in self.row_groups)


def _is_numeric(type_: pa.DataType) -> bool:
    return pa.types.is_integer(type_) or pa.types.is_floating(type_) or pa.types.is_decimal(type_)


def path_date(path: str) -> Optional[str]:
    """The ``YYYY-MM-DD`` of a Hive ``date=`` folder in ``path``, else of a date in its file name."""
    norm = path.replace("\\", "/")
    hive = _HIVE_DATE.search(norm)
    if hive:
        return hive.group(1)
    found = _NAME_DATE.search(norm.rsplit("/", 1)[-1])
    if found:
        try:
            return _dt.date(int(found.group(1)), int(found.group(2)), int(found.group(3))).isoformat()
        except ValueError:
            return None
    return None


def _file_reject(
    config: AssetConfig,
    path: str,
    reason: str,
    detail: str,
    subject: str = WHOLE_FILE,
    date: Optional[str] = None,
    stage: str = "plan",
    action: Optional[str] = None,
) -> Reject:
    return Reject(
        stage=stage,
        source=path,
        subject=subject,
        reason=reason,
        detail=detail,
        asset=config.name,
        window_start_us=None,
        date=date or path_date(path),
        action=action,
    )


def _time_column_info(pf: pq.ParquetFile, time_column: str):
    """(parquet column index, unit of the stored integers, naive?) of the time column."""
    index = pf.schema_arrow.get_field_index(time_column)
    leaf = None
    for i in range(len(pf.schema)):
        if pf.schema.column(i).path == time_column:
            leaf = i
            break
    logical = json.loads(pf.schema.column(leaf).logical_type.to_json()) if leaf is not None else {}
    unit = _PARQUET_UNITS.get(logical.get("timeUnit", ""))
    naive = pf.schema_arrow.field(index).type.tz is None
    return leaf, unit, naive


def read_footer(
    path: str, config: AssetConfig, open_file: OpenFile = open_local_file
) -> Tuple[Optional[FileFooter], List[Reject]]:
    """Read one file's footer and summarise it for planning.

    Parameters
    ----------
    path : str
        File path or URL.
    config : AssetConfig
        The asset's configuration (layout, column names, time zone).
    open_file : callable
        ``open_file(path)`` returns a binary, seekable file object.

    Returns
    -------
    footer : FileFooter or None
        None when the file cannot be used at all.
    findings : list of Reject
        File-level findings (stage "plan"): ``empty_file``, ``unreadable_file``, ``no_rows``,
        ``missing_time_column``, ``time_column_not_timestamp``, ``missing_channel_column``,
        ``non_numeric_channel`` (long layout: value column), ``statistics_missing`` (repaired by
        reading the time column of the row groups concerned).

    Notes
    -----
    Row-group time ranges come from the time column's min/max statistics (raw integers in the
    stored unit). Where statistics are absent the time column of that row group is read, which is
    recorded as a repaired ``statistics_missing`` finding. The decoded size of a row group is
    estimated as rows x 8 bytes per column read (float64 samples, int64 times). Opening the file,
    decoding the footer and reading a column are the steps that can fail; each failure is one
    ``unreadable_file`` finding.
    """
    try:
        handle = open_file(path)
    except Exception as err:  # noqa: BLE001 - any opening error means unreadable
        return None, [_unreadable(config, path, err)]
    with handle:
        return _summarise_file(handle, path, config)


def _unreadable(config: AssetConfig, path: str, err: Exception) -> Reject:
    return _file_reject(config, path, "unreadable_file", f"{type(err).__name__}: {err}")


def _summarise_file(handle, path: str, config: AssetConfig) -> Tuple[Optional[FileFooter], List[Reject]]:
    """The steps of :func:`read_footer` on an open file: size, footer, schema, row groups."""
    archive = config.archive
    try:
        handle.seek(0, os.SEEK_END)
        empty = handle.tell() == 0
        handle.seek(0)
    except Exception as err:  # noqa: BLE001 - a file system that cannot seek the file
        return None, [_unreadable(config, path, err)]
    if empty:
        return None, [_file_reject(config, path, "empty_file", "0 bytes")]
    try:
        pf = pq.ParquetFile(handle, page_checksum_verification=True)
    except Exception as err:  # noqa: BLE001 - any decoding error means unreadable
        return None, [_unreadable(config, path, err)]
    problem = _schema_problem(pf, path, config)
    if problem is not None:
        return None, [problem]
    leaf, unit, naive = _time_column_info(pf, archive.time_column)
    schema = pf.schema_arrow
    numeric = tuple(n for n in schema.names if n != archive.time_column and _is_numeric(schema.field(n).type))
    other = tuple(n for n in schema.names if n != archive.time_column and n not in numeric)
    long_channels: Tuple[str, ...] = ()
    if archive.layout == "long":
        problem = _long_layout_problem(schema, numeric, path, config)
        if problem is not None:
            return None, [problem]
        row_bytes = _BYTES_PER_LONG_ROW
        if config.channels.names is None:
            try:
                column = pf.read(columns=[archive.channel_column]).column(0)
            except Exception as err:  # noqa: BLE001 - a channel column that cannot be decoded
                return None, [_unreadable(config, path, err)]
            long_channels = tuple(sorted(str(v) for v in column.unique().to_pylist() if v is not None))
    else:
        wanted = set(config.channels.names or numeric) | set(config.channels.covariates)
        row_bytes = _BYTES_PER_VALUE * (1 + len([n for n in numeric if n in wanted]))
    try:
        spans, missing_stats = _row_group_spans(pf, leaf, unit, naive, row_bytes, config)
    except Exception as err:  # noqa: BLE001 - a time column that cannot be decoded
        return None, [_unreadable(config, path, err)]
    if not spans:
        return None, [_file_reject(config, path, "no_rows", "no row group holds a timestamp")]
    footer = FileFooter(
        path=path,
        time_naive=naive,
        row_groups=tuple(spans),
        numeric_columns=numeric,
        other_columns=other,
        long_channels=long_channels,
    )
    findings: List[Reject] = []
    if missing_stats:
        findings.append(
            _file_reject(
                config,
                path,
                "statistics_missing",
                f"row groups {missing_stats}: no min/max statistics of {archive.time_column!r}; time column read",
                date=local_date(footer.start_us, config.timezone),
            )
        )
    return footer, findings


def _schema_problem(pf: pq.ParquetFile, path: str, config: AssetConfig) -> Optional[Reject]:
    """``no_rows``, ``missing_time_column`` or ``time_column_not_timestamp``, else None."""
    time_column = config.archive.time_column
    meta = pf.metadata
    if meta.num_rows == 0:
        return _file_reject(config, path, "no_rows", f"{meta.num_row_groups} row groups, 0 rows")
    names = pf.schema_arrow.names
    if time_column not in names:
        return _file_reject(
            config,
            path,
            "missing_time_column",
            f"no column {time_column!r}; columns: {', '.join(names)}",
            subject=time_column,
        )
    time_type = pf.schema_arrow.field(time_column).type
    if not pa.types.is_timestamp(time_type):
        return _file_reject(
            config,
            path,
            "time_column_not_timestamp",
            f"column {time_column!r} has type {time_type}",
            subject=time_column,
        )
    return None


def _long_layout_problem(
    schema: pa.Schema, numeric: Tuple[str, ...], path: str, config: AssetConfig
) -> Optional[Reject]:
    """Long layout: ``missing_channel_column`` or ``non_numeric_channel`` (value column), else None."""
    archive = config.archive
    for column in (archive.channel_column, archive.value_column):
        if column not in schema.names:
            return _file_reject(
                config,
                path,
                "missing_channel_column",
                f"long layout needs column {column!r}; columns: {', '.join(schema.names)}",
                subject=column,
            )
    if archive.value_column not in numeric:
        return _file_reject(
            config,
            path,
            "non_numeric_channel",
            f"value column {archive.value_column!r} has type {schema.field(archive.value_column).type}",
            subject=archive.value_column,
        )
    return None


def _row_group_spans(
    pf: pq.ParquetFile, leaf: Optional[int], unit: Optional[str], naive: bool, row_bytes: int, config: AssetConfig
) -> Tuple[List[RowGroupSpan], List[int]]:
    """Per non-empty row group its UTC time range, from statistics or (where they are absent)
    from its time column; also the indices of the row groups whose time column was read.

    With ``[windows] align = "records"`` the time column of a row group that may hold a pause
    (:func:`may_hold_pause`) is read too, and its contiguous runs are kept in ``segments_us``.
    """
    archive = config.archive
    records = config.windows.align == "records"
    meta = pf.metadata
    spans, missing_stats = [], []
    for i in range(meta.num_row_groups):
        rg = meta.row_group(i)
        if rg.num_rows == 0:
            continue
        column = rg.column(leaf)
        stats = column.statistics if column.is_stats_set else None
        times = None
        if stats is not None and stats.has_min_max and unit is not None and column.physical_type == "INT64":
            lo = int(timestamp_to_us(np.array([stats.min_raw]), unit)[0])
            hi = int(timestamp_to_us(np.array([stats.max_raw]), unit)[0])
        else:
            times = _row_group_times(pf, i, archive.time_column)
            if times.size == 0:
                continue
            lo, hi = int(times.min()), int(times.max())
            missing_stats.append(i)
        if naive:
            lo, hi = (int(v) for v in local_to_utc_us(np.array([lo, hi]), archive.timezone))
        segments: Tuple[Tuple[int, int], ...] = ()
        if records and may_hold_pause(lo, hi, rg.num_rows, config):
            if times is None:
                times = _row_group_times(pf, i, archive.time_column)
            utc = local_to_utc_us(times, archive.timezone) if naive else times
            runs = contiguous_runs(utc, record_gap_us(config))
            segments = runs if len(runs) > 1 else ()
        spans.append(RowGroupSpan(i, rg.num_rows, lo, hi, rg.num_rows * row_bytes, segments))
    return spans, missing_stats


def _row_group_times(pf: pq.ParquetFile, index: int, time_column: str) -> np.ndarray:
    """A row group's non-null timestamps in microseconds of its own clock (int64), read from the data."""
    times = pf.read_row_group(index, columns=[time_column]).column(0)
    times = times.cast(pa.timestamp("us", pf.schema_arrow.field(time_column).type.tz), safe=False)
    values = times.cast(pa.int64()).to_numpy(zero_copy_only=False)
    return values[~np.isnan(values)].astype(np.int64) if values.dtype.kind == "f" else values


# --------------------------------------------------------------------------------------------
# Records (contiguous runs of samples)


def record_gap_us(config: AssetConfig) -> float:
    """The longest pause (microseconds) between two samples of one record: ``[windows]
    record_gap_s``, by default :data:`~corrtransforms.config.RECORD_GAP_PERIODS` sample intervals."""
    gap_s = config.windows.record_gap_s
    if gap_s is None:
        gap_s = RECORD_GAP_PERIODS / config.archive.sample_rate_hz
    return gap_s * US_PER_S


def may_hold_pause(start_us: int, end_us: int, n_rows: int, config: AssetConfig) -> bool:
    """True when a row group's statistics cannot rule out a pause inside it.

    Wide layout: ``n_rows`` samples without a pause span at most ``(n_rows - 1)`` sample intervals
    plus one record gap (jitter); a longer span may hide a pause. Long layout: the row count
    mixes channels and says nothing about the number of samples, so every row group may.
    """
    if config.archive.layout == "long":
        return True
    period_us = US_PER_S / config.archive.sample_rate_hz
    return end_us - start_us > (n_rows - 1) * period_us + record_gap_us(config)


def contiguous_runs(times_us: np.ndarray, gap_us: float) -> Tuple[Tuple[int, int], ...]:
    """(first, last) of each run of timestamps whose consecutive (sorted) spacings are at most ``gap_us``."""
    t = np.unique(np.asarray(times_us, dtype=np.int64))
    if t.size == 0:
        return ()
    breaks = np.flatnonzero(np.diff(t) > gap_us)
    firsts = np.concatenate([[0], breaks + 1])
    lasts = np.concatenate([breaks, [t.size - 1]])
    return tuple((int(t[a]), int(t[b])) for a, b in zip(firsts, lasts))


def find_records(footers: Sequence[FileFooter], config: AssetConfig) -> List[Tuple[int, int]]:
    """The archive's records as ``(first, last)`` UTC microseconds, in time order.

    Runs of samples from the footers (a row group is one run unless its time column showed
    pauses) are joined when the next one starts at most :func:`record_gap_us` after the end of
    the one before (overlapping runs, as of two files holding the same span, join too).
    """
    gap_us = record_gap_us(config)
    runs = sorted(run for footer in footers for rg in footer.row_groups for run in rg.runs_us)
    records: List[List[int]] = []
    for lo, hi in runs:
        if records and lo - records[-1][1] <= gap_us:
            records[-1][1] = max(records[-1][1], hi)
        else:
            records.append([lo, hi])
    return [(lo, hi) for lo, hi in records]


def record_window_starts(records: Sequence[Tuple[int, int]], config: AssetConfig) -> List[int]:
    """Window starts of ``[windows] align = "records"``: per record ``first + j * hop`` for every
    window that holds one of the record's samples (sorted, each once)."""
    _, hop_us, _, period_us = window_grid(config)
    starts: Set[int] = set()
    for first, last in records:
        count = math.floor((last + period_us / 2 - first) / hop_us) + 1
        starts.update(first + j * hop_us for j in range(count))
    return sorted(starts)


# --------------------------------------------------------------------------------------------
# Windows and read tasks


@dataclasses.dataclass(frozen=True)
class FilePiece:
    """The part of one file a read task decodes."""

    path: str
    row_groups: Tuple[int, ...]
    columns: Tuple[str, ...]
    time_naive: bool
    #: configured channels/covariates absent or non-numeric in this file (not read)
    absent: Tuple[str, ...] = ()
    start_us: int = 0
    decoded_bytes: int = 0
    #: (first, last) timestamp (UTC us) of each row group in ``row_groups``, from planning; the
    #: read stage checks the decoded rows against them and reports the windows of a lost row group
    row_group_spans_us: Tuple[Tuple[int, int], ...] = ()


@dataclasses.dataclass(frozen=True)
class ReadTask:
    """A small, picklable description of one unit of reading work.

    ``window_starts_us`` are the planned windows (UTC microseconds, on the epoch grid shifted by
    ``[windows] offset_s``, or at record starts with ``align = "records"``); every one
    yields a :class:`~corrtransforms.records.WindowBlock` or a whole-window reject.
    """

    asset: str
    task_id: str
    window_starts_us: Tuple[int, ...]
    channels: Tuple[str, ...]
    covariates: Tuple[str, ...]
    pieces: Tuple[FilePiece, ...]
    #: calendar dates (asset time zone) of the windows, for output partition bookkeeping
    dates: Tuple[str, ...] = ()

    @property
    def decoded_bytes(self) -> int:
        return sum(p.decoded_bytes for p in self.pieces)


@dataclasses.dataclass
class ArchivePlan:
    """Result of :func:`plan_reads`."""

    tasks: List[ReadTask]
    rejects: List[Reject]
    channels: Tuple[str, ...]
    covariates: Tuple[str, ...]
    #: calendar dates this run owns (output partitions it replaces)
    days: Tuple[str, ...]

    @property
    def windows_planned(self) -> int:
        return sum(len(t.window_starts_us) for t in self.tasks)


def window_grid(config: AssetConfig) -> Tuple[int, int, int, float]:
    """(length_us, hop_us, n_samples, sample_period_us) of the configured windows."""
    length_us = int(round(config.windows.length_s * US_PER_S))
    hop_us = int(round(config.windows.hop_s * US_PER_S))
    n_samples = int(round(config.windows.length_s * config.archive.sample_rate_hz))
    return length_us, hop_us, n_samples, US_PER_S / config.archive.sample_rate_hz


def resolve_channels(footers: Sequence[FileFooter], config: AssetConfig) -> Tuple[str, ...]:
    """The correlated channels: ``[channels] names``, else every numeric column (wide) or channel
    value (long) seen in the archive, in order of first appearance over files sorted by path,
    excluding the time column and the covariates."""
    if config.channels.names is not None:
        return tuple(config.channels.names)
    skip = {config.archive.time_column, *config.channels.covariates}
    seen: Dict[str, None] = {}
    for footer in sorted(footers, key=lambda f: f.path):
        found = footer.long_channels if config.archive.layout == "long" else footer.numeric_columns
        for name in found:
            if name not in skip:
                seen.setdefault(name, None)
    return tuple(seen)


def missing_channels(footers: Sequence[FileFooter], config: AssetConfig) -> Dict[str, Tuple[str, ...]]:
    """Configured channels and covariates that no file's footer holds: a configuration error.

    Parameters
    ----------
    footers : sequence of FileFooter
        Summaries from :func:`read_footer` of every file a run lists.
    config : AssetConfig
        The asset's configuration.

    Returns
    -------
    dict
        ``{name: columns_found}`` for every name of ``[channels] names`` and ``covariates`` that is
        a numeric column (wide layout) or a channel value (long layout) of no file; ``columns_found``
        are the numeric columns (wide) or channel values (long) the files do hold, sorted, for the
        message. Empty when every name is found, when there are no footers, and in the long
        layout when the footers list no channel values (they are read only when ``[channels]
        names`` is omitted; a configured long-layout channel is then checked by the read stage).

    Examples
    --------
    A launcher stops before the pipeline starts::

        missing = missing_channels(footers, config)
        if missing:
            name, found = next(iter(missing.items()))
            raise ConfigError("[channels] names", name, "is in no file; columns found: " + ", ".join(found))
    """
    long = config.archive.layout == "long"
    found: Set[str] = set()
    for footer in footers:
        found.update(footer.long_channels if long else footer.numeric_columns)
    found.discard(config.archive.time_column)
    if not found:
        return {}
    wanted = tuple(config.channels.names or ()) + tuple(config.channels.covariates)
    columns = tuple(sorted(found))
    return {name: columns for name in wanted if name not in found}


@dataclasses.dataclass(frozen=True)
class _UsableFile:
    """A file this run reads: its footer, the columns to decode and the configured names it lacks."""

    footer: FileFooter
    columns: Tuple[str, ...]
    absent: Tuple[str, ...]


def plan_reads(
    footers: Sequence[FileFooter],
    footer_rejects: Sequence[Reject],
    config: AssetConfig,
    start: Optional[_dt.date] = None,
    end: Optional[_dt.date] = None,
    report_edges: Tuple[bool, bool] = (True, True),
) -> ArchivePlan:
    """Cut the archive's time axis into windows and group them into bounded read tasks.

    Parameters
    ----------
    footers : sequence of FileFooter
        Summaries from :func:`read_footer` (any order).
    footer_rejects : sequence of Reject
        Findings from :func:`read_footer`; their missing dates are filled in here.
    config : AssetConfig
        The asset's configuration.
    start, end : datetime.date, optional
        Restrict to windows whose start falls on these calendar days (inclusive) in the asset's
        time zone. None means unbounded.

    Returns
    -------
    ArchivePlan
        Tasks ordered by time, file-level rejects, resolved channels and the days owned.

    Notes
    -----
    With ``[windows] align = "epoch"`` window ``k`` covers ``[s, s + length)`` with
    ``s = offset_s + k * hop`` (fixed to the epoch, so a window is the same whichever files a run
    reads); with ``align = "records"`` the starts are ``first + j * hop`` of every record found
    from all footers (:func:`find_records`, :func:`record_window_starts`). A window holds the
    samples at ``t`` with ``s - T/2 <= t < s + length - T/2`` (T the sample period), and is
    planned when a row group's time range holds such a ``t``. Tasks take consecutive windows while
    the decoded size of the union of their row groups stays within ``[reading] task_bytes``; a window that needs no new
    row group always joins the current task, so a row group larger than a window is decoded once.
    A window is in exactly one task, with every row group of every file it overlaps.
    """
    tz = config.timezone
    channels = resolve_channels(footers, config)
    covariates = tuple(config.channels.covariates)
    lo_us = day_start_us(start, tz) if start else None
    hi_us = day_start_us(end + _dt.timedelta(days=1), tz) if end else None
    usable, rejects = _usable_files(footers, config, channels + covariates, reading_span(config, start, end))
    record_starts = (
        record_window_starts(find_records(footers, config), config) if config.windows.align == "records" else None
    )
    needs = _window_needs(usable, config, lo_us, hi_us, record_starts)
    sizes = {
        (f_index, rg.index): rg.decoded_bytes for f_index, file in enumerate(usable) for rg in file.footer.row_groups
    }
    groups = _group_windows(needs, sizes, config.reading.task_bytes)
    tasks = [_read_task(starts, rg_keys, usable, config, channels, covariates) for starts, rg_keys in groups]
    if start is not None and end is not None:
        days = tuple((start + _dt.timedelta(days=i)).isoformat() for i in range((end - start).days + 1))
    else:
        days = tuple(sorted({d for t in tasks for d in t.dates}))
    out_of_range = {footer.path for footer in footers} - {file.footer.path for file in usable}
    final = dated_findings(
        list(footer_rejects) + rejects, out_of_range, start, end, days[0] if days else None, report_edges
    )
    return ArchivePlan(tasks=tasks, rejects=final, channels=channels, covariates=covariates, days=days)


def _usable_files(
    footers: Sequence[FileFooter],
    config: AssetConfig,
    names: Tuple[str, ...],
    span: Tuple[Optional[int], Optional[int]],
) -> Tuple[List[_UsableFile], List[Reject]]:
    """The files (sorted by path) whose samples reach ``span`` (:func:`reading_span`: the days
    and a window length on each side), with their columns, and the findings of configured
    channels a file lacks (wide layout)."""
    archive = config.archive
    rejects: List[Reject] = []
    usable: List[_UsableFile] = []
    for footer in sorted(footers, key=lambda f: f.path):
        in_range = span_may_hold(footer.start_us, footer.end_us, span)
        if archive.layout == "wide":
            absent = tuple(name for name in names if name not in footer.numeric_columns)
            if in_range:
                rejects.extend(_absent_channel_findings(footer, absent, config))
            columns = (archive.time_column,) + tuple(n for n in names if n not in absent)
        else:
            absent = ()
            columns = (archive.time_column, archive.channel_column, archive.value_column)
        if in_range:
            usable.append(_UsableFile(footer, columns, absent))
    return usable, rejects


def _absent_channel_findings(footer: FileFooter, absent: Sequence[str], config: AssetConfig) -> List[Reject]:
    """``non_numeric_channel`` or ``missing_channel_column`` per configured name a file lacks."""
    file_date = local_date(footer.start_us, config.timezone)
    found = []
    for name in absent:
        if name in footer.other_columns:
            found.append(
                _file_reject(
                    config,
                    footer.path,
                    "non_numeric_channel",
                    f"column {name!r} is not numeric",
                    subject=name,
                    date=file_date,
                )
            )
        else:
            found.append(
                _file_reject(
                    config, footer.path, "missing_channel_column", f"no column {name!r}", subject=name, date=file_date
                )
            )
    return found


def _window_needs(
    usable: Sequence[_UsableFile],
    config: AssetConfig,
    lo_us: Optional[int],
    hi_us: Optional[int],
    record_starts: Optional[Sequence[int]] = None,
) -> Dict[int, List[Tuple[int, int]]]:
    """Window start (UTC us) -> the (file, row group) keys whose time range holds one of its samples.

    The window starting at ``s`` holds the samples ``t`` with ``s - T/2 <= t < s + length - T/2``.
    Epoch alignment: ``s = offset + k * hop``; record alignment: ``s`` from ``record_starts``.
    """
    length_us, hop_us, _, period_us = window_grid(config)
    half_period = period_us / 2
    offset_us = int(round(config.windows.offset_s * US_PER_S))
    needs: Dict[int, List[Tuple[int, int]]] = {}
    for f_index, file in enumerate(usable):
        for rg in file.footer.row_groups:
            if record_starts is None:
                first = math.floor((rg.start_us - offset_us - length_us + half_period) / hop_us) + 1
                last = math.floor((rg.end_us - offset_us + half_period) / hop_us)
                starts: Sequence[int] = [offset_us + k * hop_us for k in range(first, last + 1)]
            else:
                # starts s with rg.start - length + T/2 < s <= rg.end + T/2
                a = bisect.bisect_right(record_starts, rg.start_us - length_us + half_period)
                b = bisect.bisect_right(record_starts, rg.end_us + half_period)
                starts = record_starts[a:b]
            for s in starts:
                if (lo_us is not None and s < lo_us) or (hi_us is not None and s >= hi_us):
                    continue
                needs.setdefault(s, []).append((f_index, rg.index))
    return needs


def _group_windows(
    needs: Dict[int, List[Tuple[int, int]]], sizes: Dict[Tuple[int, int], int], budget: int
) -> List[Tuple[List[int], Dict[Tuple[int, int], None]]]:
    """Consecutive windows grouped while the decoded size of their row groups' union stays within
    ``budget`` (a window that needs no new row group always joins): [(starts, row-group keys)]."""
    groups: List[Tuple[List[int], Dict[Tuple[int, int], None]]] = []
    for s in sorted(needs):
        wanted = needs[s]
        if groups:
            current_windows, current_groups = groups[-1]
            new = [g for g in wanted if g not in current_groups]
            total = sum(sizes[g] for g in current_groups) + sum(sizes[g] for g in new)
            if not new or total <= budget:
                current_windows.append(s)
                for g in new:
                    current_groups[g] = None
                continue
        groups.append(([s], dict.fromkeys(wanted)))
    return groups


def _read_task(
    starts: Sequence[int],
    rg_keys: Iterable[Tuple[int, int]],
    usable: Sequence[_UsableFile],
    config: AssetConfig,
    channels: Tuple[str, ...],
    covariates: Tuple[str, ...],
) -> ReadTask:
    """The task of one group of windows: one piece per file, files in time order."""
    by_file: Dict[int, List[int]] = {}
    for f_index, rg_index in rg_keys:
        by_file.setdefault(f_index, []).append(rg_index)
    pieces = []
    for f_index in sorted(by_file, key=lambda i: (usable[i].footer.start_us, usable[i].footer.path)):
        file = usable[f_index]
        rgs = tuple(sorted(by_file[f_index]))
        spans = [rg for rg in file.footer.row_groups if rg.index in rgs]
        pieces.append(
            FilePiece(
                path=file.footer.path,
                row_groups=rgs,
                columns=file.columns,
                time_naive=file.footer.time_naive,
                absent=file.absent,
                start_us=min(s.start_us for s in spans),
                decoded_bytes=sum(s.decoded_bytes for s in spans),
                row_group_spans_us=tuple((s.start_us, s.end_us) for s in spans),
            )
        )
    starts = tuple(starts)
    return ReadTask(
        asset=config.name,
        task_id=compact_utc(starts[0]),
        window_starts_us=starts,
        channels=channels,
        covariates=covariates,
        pieces=tuple(pieces),
        dates=tuple(sorted({local_date(s, config.timezone) for s in starts})),
    )


def dated_findings(
    findings: Sequence[Reject],
    out_of_range: set,
    start: Optional[_dt.date],
    end: Optional[_dt.date],
    first_day: Optional[str],
    report_edges: Tuple[bool, bool] = (True, True),
) -> List[Reject]:
    """File-level findings of the files this run reads, each dated inside the run's days.

    A finding dated before ``start`` (after ``end``), or without a date, is moved onto the run's
    first (last) day. ``report_edges`` = (False, ...) / (..., False) leaves those to the chunk
    before / after this one (a backfill's day chunks): each finding is then written by exactly
    one chunk, as one run over all the days writes it once.
    """
    before_ok, after_ok = report_edges
    final: List[Reject] = []
    for finding in findings:
        if finding.source in out_of_range:
            continue  # a file this run does not read: its findings belong to another run
        date = finding.date
        if date is not None and not _near_range(date, start, end):
            continue
        if not before_ok and (date is None or (start is not None and date < start.isoformat())):
            continue  # an earlier chunk of the same backfill reports it
        if not after_ok and date is not None and end is not None and date > end.isoformat():
            continue
        if date is None:
            date = start.isoformat() if start else (first_day or "1970-01-01")
        if start is not None and date < start.isoformat():
            date = start.isoformat()
        if end is not None and date > end.isoformat():
            date = end.isoformat()
        final.append(dataclasses.replace(finding, date=date))
    return final


def _near_range(date: str, start: Optional[_dt.date], end: Optional[_dt.date]) -> bool:
    day = _dt.date.fromisoformat(date)
    if start is not None and day < start - _dt.timedelta(days=1):
        return False
    if end is not None and day > end + _dt.timedelta(days=1):
        return False
    return True


def expand_archive_path(path: str) -> str:
    """The file pattern planning lists: a folder becomes every file below it (``folder/**``)."""
    if any(c in path for c in "*?["):
        return path
    return path.rstrip("/") + "/**"


def is_hidden(path: str, root: str = "") -> bool:
    """True for files in hidden or underscore folders/names below ``root`` (skipped when listing)."""
    relative = path[len(root) :] if root and path.startswith(root) else path.rsplit("/", 1)[-1]
    return any(part.startswith((".", "_")) for part in relative.replace("\\", "/").split("/") if part)


def in_day_range(path: str, start: Optional[_dt.date], end: Optional[_dt.date]) -> bool:
    """False when a Hive ``date=`` folder in ``path`` lies more than a day outside [start, end]."""
    hive = _HIVE_DATE.search(path.replace("\\", "/"))
    return True if not hive else _near_range(hive.group(1), start, end)


# --------------------------------------------------------------------------------------------
# Which files a run opens: date= folders, the start times in the names, the footer index


def reading_span(
    config: AssetConfig, start: Optional[_dt.date], end: Optional[_dt.date]
) -> Tuple[Optional[int], Optional[int]]:
    """``[first, stop)``: UTC microseconds a file must reach for :func:`plan_reads` to use it
    for windows starting on the days ``start``..``end`` (asset time zone, inclusive); None for an
    open end.

    The days run from local midnight ``lo`` to local midnight ``hi``; a file is used when its
    samples reach ``[lo - length, hi + length)`` (one window length on each side: a window that
    starts before midnight and a window that crosses it). This is the one rule both for the
    files planning uses and for the files a run may leave unopened (:func:`choose_files`), so
    not opening a file changes neither the tasks nor the file findings of the plan.
    """
    length_us = window_grid(config)[0]
    lo_us = day_start_us(start, config.timezone) if start else None
    hi_us = day_start_us(end + _dt.timedelta(days=1), config.timezone) if end else None
    return (None if lo_us is None else lo_us - length_us), (None if hi_us is None else hi_us + length_us)


def span_may_hold(first_us: int, last_us: int, needed: Tuple[Optional[int], Optional[int]]) -> bool:
    """True when samples in ``[first_us, last_us]`` can lie in the span ``needed`` (``[first, stop)``)."""
    first, stop = needed
    return (stop is None or first_us < stop) and (first is None or last_us >= first)


def named_start_us(path: str, config: AssetConfig) -> Optional[int]:
    """The start time (UTC us) ``[archive] file_time_pattern`` reads from ``path``; None without a
    pattern or when the path does not match it."""
    text = config.archive.file_time_pattern
    if text is None:
        return None
    return file_name_time_us(_compiled_pattern(text), path, config.archive.timezone)


_PATTERNS: Dict[str, FileTimePattern] = {}


def _compiled_pattern(text: str) -> FileTimePattern:
    if text not in _PATTERNS:
        _PATTERNS[text] = compile_file_time_pattern(text)
    return _PATTERNS[text]


def may_hold_days(path: str, config: AssetConfig, start: Optional[_dt.date], end: Optional[_dt.date]) -> bool:
    """False when the path alone shows the file holds no sample of the days: its Hive ``date=``
    folder lies more than a day outside them (:func:`in_day_range`), or the start its name gives
    (``[archive] file_time_pattern``) plus ``[archive] file_span_h`` lies outside
    :func:`reading_span`. A name that does not match the pattern says nothing: True."""
    if not in_day_range(path, start, end):
        return False
    named = named_start_us(path, config)
    if named is None or (start is None and end is None):
        return True
    span_us = int(round(config.archive.file_span_h * 3600 * US_PER_S))
    return span_may_hold(named, named + span_us, reading_span(config, start, end))


@dataclasses.dataclass
class FileChoice:
    """Result of :func:`choose_files`: the files to open, the index entries of files known
    without opening them (kept in the next index), and counts of the files not opened."""

    open: List[ListedFile]
    carried: List[IndexEntry]
    skipped_by_name: int = 0
    skipped_by_index: int = 0


def choose_files(
    files: Sequence[ListedFile],
    config: AssetConfig,
    start: Optional[_dt.date],
    end: Optional[_dt.date],
    index: Optional[Mapping[str, IndexEntry]] = None,
) -> FileChoice:
    """The listed files whose footers this run must open.

    A file is not opened when its path shows it holds no sample of the days (:func:`may_hold_days`:
    ``date=`` folder, or the start time in its name), or when the footer index has an entry of the
    same size and modification time whose time range lies outside :func:`reading_span`.
    Every other file is opened: new and changed files, names that do not match the pattern,
    files the index does not know. Without ``start`` and ``end`` every file is opened.
    """
    index = index or {}
    needed = reading_span(config, start, end)
    choice = FileChoice(open=[], carried=[])
    for listed in files:
        entry = index.get(listed.path)
        known = entry if entry is not None and entry.describes(listed) else None
        if not may_hold_days(listed.path, config, start, end):
            choice.skipped_by_name += 1
        elif known is not None and not span_may_hold(known.start_us, known.end_us, needed):
            choice.skipped_by_index += 1
        else:
            choice.open.append(listed)
            continue
        if known is not None:
            choice.carried.append(known)
    return choice


def file_time_finding(footer: FileFooter, config: AssetConfig) -> Optional[Reject]:
    """``file_time_mismatch`` when a file's samples break what its name promises (none before
    the start its name gives, none more than ``[archive] file_span_h`` after it), else None."""
    named = named_start_us(footer.path, config)
    if named is None:
        return None
    span_us = int(round(config.archive.file_span_h * 3600 * US_PER_S))
    if named <= footer.start_us and footer.end_us <= named + span_us:
        return None
    return _file_reject(
        config,
        footer.path,
        "file_time_mismatch",
        f"samples {iso_utc(footer.start_us)} to {iso_utc(footer.end_us)}; the name gives the start "
        f"{iso_utc(named)} and [archive] file_span_h = {config.archive.file_span_h:g} allows samples until "
        f"{iso_utc(named + span_us)}: runs of other days may not open this file",
        date=local_date(footer.start_us, config.timezone),
    )


def plan_archive(
    paths: Iterable[str],
    config: AssetConfig,
    open_file: OpenFile = open_local_file,
    start: Optional[_dt.date] = None,
    end: Optional[_dt.date] = None,
) -> ArchivePlan:
    """Read every footer and plan (the whole planning stage in one call, without Beam)."""
    footers, findings = [], []
    for path in paths:
        if not may_hold_days(path, config, start, end):
            continue
        footer, found = read_footer(path, config, open_file)
        findings.extend(found)
        if footer is not None:
            footers.append(footer)
            mismatch = file_time_finding(footer, config)
            findings.extend([mismatch] if mismatch else [])
    return plan_reads(footers, findings, config, start, end)


def list_local_archive(path: str) -> List[str]:
    """Files of a local archive folder or glob, sorted, hidden ones skipped (for notebooks/tests)."""
    import glob

    pattern = expand_archive_path(path)
    root = path.rstrip("/") + "/" if pattern != path else ""
    found = [p for p in glob.glob(pattern, recursive=True) if os.path.isfile(p)]
    return sorted(p for p in found if not is_hidden(p, root))
