"""Execute one read task: decode its row groups once and assemble one block per planned window.

:func:`read_windows` is the whole read stage for one :class:`~corrtransforms.stages.plan.ReadTask`.
It reads only the task's row groups and columns, converts Arrow to numpy once per task, sorts rows
when needed, then for each planned window snaps the samples onto the nominal grid and checks them.
Every planned window yields exactly one :class:`~corrtransforms.records.WindowBlock` or one
whole-window :class:`~corrtransforms.rejects.Reject` (subject ``"*"``, action ``"rejected"``),
so windows planned = blocks + whole-window rejects, exactly. Repairs and flags become further
Reject records (actions ``"repaired"`` / ``"flagged"``) or per-channel rejects (subject = channel).

Pure pyarrow/numpy: files are opened through an ``open_file(path)`` callable.
"""

from __future__ import annotations

import collections
import dataclasses
from typing import Dict, Iterator, List, NamedTuple, Optional, Tuple, Union

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from corrtransforms.config import AssetConfig
from corrtransforms.records import WindowBlock
from corrtransforms.rejects import WHOLE_FILE, WHOLE_WINDOW, Reject, iso_utc
from corrtransforms.stages.plan import OpenFile, ReadTask, open_local_file, window_grid
from corrtransforms.timeutil import local_date, local_to_utc_us

#: relative difference between the median sample interval and the nominal one above which a
#: window is rejected as "sample_rate_mismatch" (common practice: 1 %)
RATE_TOLERANCE = 0.01
#: a timestamp further than this fraction of a period from its grid point counts as off-grid
#: (reported as repaired); closer ones are rounding noise of the stored time unit (common practice)
OFF_GRID_NOISE = 0.01
#: an extreme value must occur at least this often before it counts towards clipping
MIN_CLIP_REPEATS = 2


class _LostRows(NamedTuple):
    """Rows of one row group that were (partly) not used; every window they overlap is reported."""

    first_us: int
    last_us: int
    path: str
    row_groups: Tuple[int, ...]
    names: Tuple[str, ...]
    reason: str
    detail: str


@dataclasses.dataclass
class _TaskData:
    """The task's decoded rows, time-sorted.

    Attributes
    ----------
    times : ndarray of int64
        UTC microseconds of every row.
    file_index : ndarray of int32
        Index into ``files`` of the file each row came from.
    values : ndarray, shape (rows, columns)
        Wide: one column per channel and covariate; long: the value column.
    absent : ndarray of bool, shape (files, columns)
        Wide: the columns a file does not hold.
    channel_codes : ndarray of int32 or None
        Long layout: index of each row's channel in ``channels + covariates`` (-1: not wanted).
    unordered_times : ndarray of int64
        Timestamps that followed a later one in their file (sorted).
    files : list of str
        The files that contributed rows.
    lost : list of _LostRows
        Row groups whose rows were (partly) not used.
    """

    times: np.ndarray
    file_index: np.ndarray
    values: np.ndarray
    absent: np.ndarray
    channel_codes: Optional[np.ndarray]
    unordered_times: np.ndarray
    files: List[str]
    lost: List[_LostRows] = dataclasses.field(default_factory=list)


@dataclasses.dataclass
class _PieceRows:
    """The usable rows of one file piece: its kept row groups (file order) as one table."""

    path: str
    table: pa.Table
    naive: bool
    #: wide layout: per task column, True when the file does not hold it
    absent: List[bool]


def _file_finding(config: AssetConfig, path: str, reason: str, detail: str, date: str) -> Reject:
    """A finding of the read stage about a file (subject ``"*"``), dated by the task's first window."""
    return Reject(
        stage="read", source=path, subject=WHOLE_FILE, reason=reason, detail=detail, asset=config.name, date=date
    )


def _time_to_us(column: pa.ChunkedArray) -> Tuple[pa.Array, bool]:
    type_ = column.type
    naive = type_.tz is None
    cast = column.cast(pa.timestamp("us", None if naive else "UTC"), safe=False)
    return cast.cast(pa.int64()), naive


def _read_piece(handle, piece) -> Tuple[List[Tuple[int, Optional[pa.Table]]], List[Tuple[int, str]]]:
    """Decode a piece's row groups, verifying page checksums where the file stores them.

    Returns ``[(row group, table)]`` and ``[(row group, error text)]`` for the row groups that
    failed: one corrupt row group costs only its own rows.
    """
    parquet = pq.ParquetFile(handle, page_checksum_verification=True)
    try:
        whole = parquet.read_row_groups(list(piece.row_groups), columns=list(piece.columns))
    except Exception:  # noqa: BLE001 - retried row group by row group below
        whole = None
    if whole is not None:
        counts = [parquet.metadata.row_group(i).num_rows for i in piece.row_groups]
        if sum(counts) == whole.num_rows:
            offsets = np.concatenate([[0], np.cumsum(counts)])
            return [(rg, whole.slice(int(offsets[j]), counts[j])) for j, rg in enumerate(piece.row_groups)], []
    done, failed = [], []
    for rg in piece.row_groups:
        try:
            done.append((rg, parquet.read_row_group(rg, columns=list(piece.columns))))
        except Exception as err:  # noqa: BLE001 - reported per row group
            failed.append((rg, f"{type(err).__name__}: {err}"))
    return done, failed


def _row_group_columns(table: pa.Table, piece, names, archive, wide: bool) -> Tuple[Dict[str, pa.Array], bool]:
    """The row group's columns as the task needs them, and whether its times were naive (raises on
    types that cannot be cast)."""
    times, naive = _time_to_us(table.column(archive.time_column))
    columns = {"time": times}
    if wide:
        for name in names:
            if name in piece.absent:
                columns[name] = pa.nulls(table.num_rows, pa.float64())
            else:
                column = table.column(name)
                # floats are converted once, straight into the task's array (see _load); other
                # types are cast here, which also rejects a column that is not numeric
                columns[name] = column if pa.types.is_floating(column.type) else column.cast(pa.float64())
    else:
        channel = table.column(archive.channel_column).cast(pa.string())
        columns["code"] = pc.fill_null(pc.index_in(channel, value_set=pa.array(list(names), pa.string())), -1)
        columns["value"] = table.column(archive.value_column).cast(pa.float64())
    return columns, naive


def _load(task: ReadTask, config: AssetConfig, open_file: OpenFile, findings: List[Reject]) -> _TaskData:
    """Decode the task's row groups into one set of numpy arrays (one conversion per column).

    Notes
    -----
    Every decoded row group is checked against planning: its non-null timestamps must span
    exactly the (first, last) range its footer statistics gave. A row group that fails to
    decode (including a page checksum mismatch) or disagrees with its statistics is not used
    (``decode_failed`` / ``statistics_mismatch``) and every window it overlaps gets a
    per-channel finding. Rows with a null timestamp are dropped (``null_timestamps``).
    """
    names = task.channels + task.covariates
    date = local_date(task.window_starts_us[0], config.timezone)
    pieces: List[_PieceRows] = []
    lost: List[_LostRows] = []
    for piece in task.pieces:
        rows = _piece_rows(task, piece, names, config, open_file, date, findings, lost)
        if rows is not None:
            pieces.append(rows)
    return _task_data(pieces, names, config, lost)


def _piece_rows(
    task: ReadTask,
    piece,
    names,
    config: AssetConfig,
    open_file: OpenFile,
    date: str,
    findings: List[Reject],
    lost: List[_LostRows],
) -> Optional[_PieceRows]:
    """Decode one piece and keep the row groups that pass their checks (None when none does).

    Findings go to ``findings`` (``null_timestamps``, ``statistics_mismatch``, ``decode_failed``,
    in that order) and the row groups concerned to ``lost``.
    """
    archive = config.archive
    wide = archive.layout == "wide"
    spans = dict(zip(piece.row_groups, piece.row_group_spans_us)) if piece.row_group_spans_us else {}
    whole_span = (
        min((s[0] for s in spans.values()), default=piece.start_us),
        max((s[1] for s in spans.values()), default=task.window_starts_us[-1] + 10**15),
    )
    read_names = tuple(n for n in names if (not wide) or n in piece.columns)
    try:
        with open_file(piece.path) as handle:
            decoded, failed = _read_piece(handle, piece)
    except Exception as err:  # noqa: BLE001 - reported, the task's other files still count
        decoded, failed = [], [(rg, f"{type(err).__name__}: {err}") for rg in piece.row_groups]
    kept: List[Tuple[pa.Table, bool]] = []
    for rg, table in decoded:
        try:
            columns, naive = _row_group_columns(table, piece, names, archive, wide)
        except Exception as err:  # noqa: BLE001 - a column that cannot be converted
            failed.append((rg, f"{type(err).__name__}: {err}"))
            continue
        lo, hi = spans.get(rg, whole_span)
        columns = _drop_null_times(columns, config, piece.path, rg, (lo, hi), read_names, date, findings, lost)
        if rg in spans and not _agrees_with_statistics(
            columns["time"], naive, spans[rg], config, piece.path, rg, read_names, date, findings, lost
        ):
            continue
        kept.append((pa.table(columns), naive))
    for rg, error in failed:
        findings.append(_file_finding(config, piece.path, "decode_failed", f"row group {rg}: {error}", date))
        lo, hi = spans.get(rg, whole_span)
        lost.append(
            _LostRows(
                lo,
                hi,
                piece.path,
                (rg,),
                read_names,
                "decode_failed",
                f"samples of {piece.path} row group {rg} could not be decoded (treated as gaps)",
            )
        )
    if not kept:
        return None
    # one table per piece (its row groups in file order), one naive flag per piece
    return _PieceRows(
        path=piece.path,
        table=pa.concat_tables([t for t, _ in kept]),
        naive=kept[0][1],
        absent=[name in piece.absent for name in names] if wide else [],
    )


def _drop_null_times(
    columns: Dict[str, pa.Array],
    config: AssetConfig,
    path: str,
    rg: int,
    span,
    read_names,
    date: str,
    findings: List[Reject],
    lost: List[_LostRows],
) -> Dict[str, pa.Array]:
    """The row group's columns without its rows that have no timestamp (``null_timestamps``)."""
    times = columns["time"]
    if not times.null_count:
        return columns
    findings.append(
        _file_finding(
            config,
            path,
            "null_timestamps",
            f"row group {rg}: {times.null_count} rows without a timestamp dropped",
            date,
        )
    )
    lost.append(
        _LostRows(
            span[0],
            span[1],
            path,
            (rg,),
            read_names,
            "null_timestamps",
            f"{times.null_count} rows of {path} row group {rg} have no timestamp and "
            "were not used; this window may have lost samples",
        )
    )
    keep = pc.is_valid(times)
    return {k: pc.filter(v, keep) for k, v in columns.items()}


def _agrees_with_statistics(
    times: pa.Array,
    naive: bool,
    span,
    config: AssetConfig,
    path: str,
    rg: int,
    read_names,
    date: str,
    findings: List[Reject],
    lost: List[_LostRows],
) -> bool:
    """True when the decoded timestamps span exactly the footer's (first, last); else the
    ``statistics_mismatch`` finding and lost rows are recorded."""
    t = times.to_numpy(zero_copy_only=False).astype(np.int64)
    if naive:
        t = local_to_utc_us(t, config.archive.timezone)
    if not t.size or (int(t.min()), int(t.max())) == tuple(span):
        return True
    lo, hi = min(int(t.min()), span[0]), max(int(t.max()), span[1])
    findings.append(
        _file_finding(
            config,
            path,
            "statistics_mismatch",
            f"row group {rg}: timestamps span {iso_utc(int(t.min()))} .. {iso_utc(int(t.max()))}, "
            f"statistics said {iso_utc(span[0])} .. {iso_utc(span[1])}; rows not used",
            date,
        )
    )
    lost.append(
        _LostRows(
            lo,
            hi,
            path,
            (rg,),
            read_names,
            "statistics_mismatch",
            f"samples of {path} row group {rg} were not used (its statistics are wrong)",
        )
    )
    return False


def _task_data(pieces: List[_PieceRows], names, config: AssetConfig, lost: List[_LostRows]) -> _TaskData:
    """Join the pieces' rows into the task's arrays: times in UTC, rows sorted by time."""
    wide = config.archive.layout == "wide"
    tables = [p.table for p in pieces]
    counts = [t.num_rows for t in tables]
    times = (
        np.concatenate([t.column("time").to_numpy().astype(np.int64) for t in tables])
        if tables
        else np.zeros(0, np.int64)
    )
    file_index = np.repeat(np.arange(len(tables), dtype=np.int32), counts)
    bounds = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    unordered = []
    for i, piece in enumerate(pieces):
        part = slice(bounds[i], bounds[i + 1])
        if piece.naive:
            times[part] = local_to_utc_us(times[part], config.archive.timezone)
        t = times[part]
        back = np.flatnonzero(np.diff(t) < 0)
        if back.size:
            unordered.append(t[back + 1])
    if wide:
        # one conversion per piece and column, written straight into the task's (rows, columns) array;
        # the pieces' float columns may differ in width, so the tables are not concatenated
        values = np.empty((int(bounds[-1]), len(names)))
        for i, table in enumerate(tables):
            for j, name in enumerate(names):
                values[bounds[i] : bounds[i + 1], j] = table.column(name).to_numpy()
        absent = np.array([p.absent for p in pieces], dtype=bool).reshape(len(tables), len(names))
        codes = None
    else:
        if tables:
            merged = pa.concat_tables(tables)
            values = merged.column("value").to_numpy(zero_copy_only=False).reshape(-1, 1)
            codes = merged.column("code").to_numpy(zero_copy_only=False).astype(np.int32)
        else:
            values, codes = np.zeros((0, 1)), np.zeros(0, np.int32)
        absent = np.zeros((len(tables), 1), dtype=bool)
    values = np.asarray(values, dtype=np.float64)
    if times.size and np.any(np.diff(times) < 0):
        order = np.argsort(times, kind="stable")
        times, file_index, values = times[order], file_index[order], values[order]
        if codes is not None:
            codes = codes[order]
    unordered_times = np.sort(np.concatenate(unordered)) if unordered else np.zeros(0, np.int64)
    return _TaskData(times, file_index, values, absent, codes, unordered_times, [p.path for p in pieces], lost)


def _circular_phase(x: np.ndarray) -> float:
    """Mean fractional grid offset of positions ``x`` (in periods), in [-0.5, 0.5)."""
    angle = 2 * np.pi * (x - np.floor(x))
    mean = np.mean(np.cos(angle)) + 1j * np.mean(np.sin(angle))
    if abs(mean) < 1e-9:
        return 0.0
    phase = np.angle(mean) / (2 * np.pi)
    return float((phase + 0.5) % 1.0 - 0.5)


class _Assembly:
    """Grid values and the counts found while snapping one group of rows (all columns at once)."""

    def __init__(self, n_samples: int, n_columns: int):
        self.grid = np.zeros((n_samples, n_columns))
        self.valid = np.zeros((n_samples, n_columns), dtype=bool)
        self.off_grid = 0
        self.beyond_tolerance = 0
        self.duplicates = 0
        self.overlap_duplicates = 0
        self.conflicts = 0
        self.conflict_files: set = set()
        self.nonfinite = np.zeros(n_columns, dtype=np.int64)
        self.kept_rows = np.zeros(0, dtype=np.int64)


def _median_interval(times: np.ndarray) -> float:
    """Median spacing of the distinct timestamps (the rows are time-sorted: the spacings of the
    distinct values are the non-zero differences, no sort needed)."""
    steps = np.diff(times)
    if steps.size and steps.min() < 0:  # not sorted after all: the general way
        steps = np.diff(np.unique(times))
    else:
        steps = steps[steps != 0]
    if steps.size < 2:
        return float("nan")
    return float(np.median(steps))


def _assemble(
    times: np.ndarray,
    values: np.ndarray,
    file_index: np.ndarray,
    absent: np.ndarray,
    start_us: int,
    n_samples: int,
    period_us: float,
    tolerance: float,
) -> _Assembly:
    """Snap rows (already time-sorted) onto the window's grid.

    Notes
    -----
    Position in periods ``x = (t - start) / period``; the common phase ``phi`` of the group is the
    circular mean of ``x mod 1`` (a logger whose clock is offset from the epoch by a fraction of a
    period keeps its samples); grid index ``i = round(x - phi)``; residual ``x - phi - i``. Rows
    with ``|residual| > tolerance`` are dropped (treated as gaps). Rows on the same grid index
    are duplicates: equal values (NaN counts as missing) are merged, different values conflict.
    """
    out = _Assembly(n_samples, values.shape[1])
    if times.size == 0:
        return out
    x = (times - start_us) / period_us
    phase = _circular_phase(x)
    shifted = x - phase
    index = np.rint(shifted).astype(np.int64)
    residual = np.abs(shifted - index)
    inside = (index >= 0) & (index < n_samples)
    beyond = inside & (residual > tolerance)
    out.beyond_tolerance = int(beyond.sum())
    keep = inside & ~beyond
    out.off_grid = int((keep & (residual > OFF_GRID_NOISE)).sum())
    rows = np.flatnonzero(keep)
    index = index[rows]
    if rows.size > 1 and np.any(np.diff(index) < 0):
        order = np.argsort(index, kind="stable")
        rows, index = rows[order], index[order]
    vals = values[rows].copy()
    present = ~absent[file_index[rows]] if absent.size else np.ones_like(vals, dtype=bool)
    vals[~present] = np.nan
    same = np.flatnonzero(np.diff(index) == 0)
    if same.size:
        # merge runs of equal grid index into their first row
        first = np.ones(rows.size, dtype=bool)
        first[same + 1] = False
        group = np.cumsum(first) - 1
        head = np.flatnonzero(first)
        for i in same + 1:
            h = head[group[i]]
            a, b = vals[h], vals[i]
            both = ~np.isnan(a) & ~np.isnan(b)
            if np.any(a[both] != b[both]):
                out.conflicts += 1
                out.conflict_files.update((int(file_index[rows[h]]), int(file_index[rows[i]])))
            elif file_index[rows[h]] != file_index[rows[i]]:
                out.overlap_duplicates += 1
            else:
                out.duplicates += 1
            fill = np.isnan(a) & ~np.isnan(b)
            a[fill] = b[fill]
            present[h] |= present[i]
        rows, index, vals, present = rows[first], index[first], vals[first], present[first]
    finite = np.isfinite(vals)
    out.nonfinite = (present & ~finite).sum(axis=0)
    out.grid[index] = np.where(finite, vals, 0.0)
    out.valid[index] = finite
    out.kept_rows = rows
    return out


def _channel_checks(grid: np.ndarray, valid: np.ndarray, n_channels: int):
    """Per channel: (coverage, valid samples, max, min, clip fraction) of the valid samples.

    A complete window (every sample valid) is checked on all channels at once; the values are
    those of :func:`_clip_fraction` on each column.
    """
    if valid[:, :n_channels].all():
        size = grid.shape[0]
        if size == 0:
            return [(float("nan"), 0, float("nan"), float("nan"), 0.0)] * n_channels
        columns = np.ascontiguousarray(grid[:, :n_channels].T)  # one copy: reductions along rows are fast
        high, low = columns.max(axis=1), columns.min(axis=1)
        at_high = np.count_nonzero(columns == high[:, None], axis=1)
        at_low = np.count_nonzero(columns == low[:, None], axis=1)
        return [
            (1.0, size, float(high[c]), float(low[c]), _extreme_fraction(at_high[c], at_low[c], size))
            for c in range(n_channels)
        ]
    checks = []
    for c in range(n_channels):
        column = grid[valid[:, c], c]
        coverage = float(valid[:, c].mean()) if valid.shape[0] else float("nan")
        if column.size:
            checks.append((coverage, column.size, float(column.max()), float(column.min()), _clip_fraction(column)))
        else:
            checks.append((coverage, 0, float("nan"), float("nan"), 0.0))
    return checks


def _clip_fraction(column: np.ndarray) -> float:
    if column.size == 0:
        return 0.0
    return _extreme_fraction(
        int(np.count_nonzero(column == column.max())), int(np.count_nonzero(column == column.min())), column.size
    )


def _extreme_fraction(at_high: int, at_low: int, size: int) -> float:
    """Fraction of samples at the maximum or minimum, counting an extreme only when it repeats
    (a flat column has both at once; it is rejected before the fraction is used)."""
    return ((at_high if at_high >= MIN_CLIP_REPEATS else 0) + (at_low if at_low >= MIN_CLIP_REPEATS else 0)) / size


@dataclasses.dataclass
class _SnappedWindow:
    """One window's samples on its grid (all channels and covariates) and what snapping found.

    ``totals`` counts ``off_grid``, ``beyond``, ``duplicates``, ``overlaps`` and ``conflicts``;
    ``conflict_files`` indexes ``_TaskData.files``; ``sources`` names the files of the window.
    """

    grid: np.ndarray
    valid: np.ndarray
    nonfinite: np.ndarray
    totals: collections.Counter
    conflict_files: set
    covariate_sums: np.ndarray
    covariate_counts: np.ndarray
    sources: Tuple[str, ...]


def _window(task: ReadTask, data: _TaskData, config: AssetConfig, start_us: int) -> List[Union[WindowBlock, Reject]]:
    """Assemble one window: a block plus findings, or findings ending in a whole-window reject."""
    _, _, n_samples, period_us = window_grid(config)
    lo = int(np.searchsorted(data.times, start_us - 0.5 * period_us, side="left"))
    hi = int(np.searchsorted(data.times, start_us + (n_samples - 0.5) * period_us, side="left"))
    times = data.times[lo:hi]
    if times.size == 0:
        return [Reject.for_window(config.name, start_us, "read", "insufficient_coverage", "no samples in the window")]
    file_ids = np.flatnonzero(np.bincount(data.file_index[lo:hi]))
    sources = tuple(data.files[i] for i in file_ids)
    if _complete_on_grid(data, times, file_ids, start_us, n_samples, period_us):
        return _checked_block(task, data, config, start_us, _grid_in_place(data.values[lo:hi], sources))
    n_columns = len(task.channels + task.covariates)
    groups = _assembly_groups(data, lo, hi, n_columns)
    mismatch = _rate_mismatch(times, groups, period_us, config, start_us, sources)
    if mismatch is not None:
        return [mismatch]
    snapped = _snapped_grid(data, lo, hi, groups, n_columns, start_us, config, sources)
    return _checked_block(task, data, config, start_us, snapped)


def _grid_in_place(view: np.ndarray, sources: Tuple[str, ...]) -> _SnappedWindow:
    """The window of rows that already are its grid points in order (see :func:`_complete_on_grid`).

    The snapping of :func:`_snapped_grid` would keep every row as it is (phase 0, residual 0, no
    duplicates), so the decoded rows are used in place, without the copies of the general path.
    """
    valid = np.isfinite(view)
    if valid.all():
        grid = view
        nonfinite = np.zeros(view.shape[1], dtype=np.int64)
        covariate_counts = np.full(view.shape[1], view.shape[0], dtype=np.int64)
    else:
        grid = np.where(valid, view, 0.0)
        nonfinite = (~valid).sum(axis=0)
        covariate_counts = valid.sum(axis=0)
    # all columns summed together, as in the general path (a single column alone would be
    # summed pairwise, not row by row, and its mean would differ in the last bit)
    covariate_sums = grid.sum(axis=0)
    return _SnappedWindow(
        grid, valid, nonfinite, collections.Counter(), set(), covariate_sums, covariate_counts, sources
    )


def _assembly_groups(data: _TaskData, lo: int, hi: int, n_columns: int) -> List[Tuple[List[int], np.ndarray]]:
    """(columns, rows relative to ``lo``) snapped together: all columns at once (wide layout)
    or one channel at a time (long layout)."""
    if data.channel_codes is None:
        return [(list(range(n_columns)), np.arange(hi - lo))]
    codes = data.channel_codes[lo:hi]
    return [([c], np.flatnonzero(codes == c)) for c in range(n_columns)]


def _rate_mismatch(
    times: np.ndarray, groups, period_us: float, config: AssetConfig, start_us: int, sources: Tuple[str, ...]
) -> Optional[Reject]:
    """The ``sample_rate_mismatch`` reject when the groups' median sample interval differs from the
    nominal one by more than :data:`RATE_TOLERANCE`, else None."""
    intervals = [_median_interval(times[rows]) for _, rows in groups if rows.size >= 3]
    intervals = [v for v in intervals if np.isfinite(v)]
    if not intervals:
        return None
    median = float(np.median(intervals))
    if abs(median / period_us - 1.0) <= RATE_TOLERANCE:
        return None
    return Reject.for_window(
        config.name,
        start_us,
        "read",
        "sample_rate_mismatch",
        f"median sample interval {median / 1e6:.6g} s ({1e6 / median:.6g} Hz) vs nominal "
        f"{config.archive.sample_rate_hz:g} Hz; files: {', '.join(sources)}",
    )


def _snapped_grid(
    data: _TaskData,
    lo: int,
    hi: int,
    groups,
    n_columns: int,
    start_us: int,
    config: AssetConfig,
    sources: Tuple[str, ...],
) -> _SnappedWindow:
    """Snap each group's rows onto the window's grid (:func:`_assemble`) and add up the counts."""
    _, _, n_samples, period_us = window_grid(config)
    times, file_index, rows_values = data.times[lo:hi], data.file_index[lo:hi], data.values[lo:hi]
    out = _SnappedWindow(
        np.zeros((n_samples, n_columns)),
        np.zeros((n_samples, n_columns), dtype=bool),
        np.zeros(n_columns, dtype=np.int64),
        collections.Counter(),
        set(),
        np.zeros(n_columns),
        np.zeros(n_columns, dtype=np.int64),
        sources,
    )
    for columns, rows in groups:
        values = rows_values[rows] if data.channel_codes is None else rows_values[rows][:, :1]
        absent = data.absent[:, columns] if data.channel_codes is None else np.zeros((len(data.files), 1), bool)
        part = _assemble(
            times[rows], values, file_index[rows], absent, start_us, n_samples, period_us, config.reading.grid_tolerance
        )
        out.grid[:, columns] = part.grid
        out.valid[:, columns] = part.valid
        out.nonfinite[columns] += part.nonfinite
        out.totals.update(
            off_grid=part.off_grid,
            beyond=part.beyond_tolerance,
            duplicates=part.duplicates,
            overlaps=part.overlap_duplicates,
            conflicts=part.conflicts,
        )
        out.conflict_files |= part.conflict_files
        out.covariate_sums[columns] += np.where(part.valid, part.grid, 0.0).sum(axis=0)
        out.covariate_counts[columns] += part.valid.sum(axis=0)
    return out


def _complete_on_grid(
    data: _TaskData, times: np.ndarray, file_ids: np.ndarray, start_us: int, n_samples: int, period_us: float
) -> bool:
    """True when a wide window's rows are exactly its grid points, each once, from files that
    hold every column (integer sample period in microseconds)."""
    if data.channel_codes is not None or times.size != n_samples or period_us != int(period_us):
        return False
    if int(times[0]) != start_us or not np.all(np.diff(times) == int(period_us)):
        return False
    return not (data.absent.size and data.absent[file_ids].any())


def _checked_block(
    task: ReadTask, data: _TaskData, config: AssetConfig, start_us: int, window: _SnappedWindow
) -> List[Union[WindowBlock, Reject]]:
    """Findings, channel checks and the block of an assembled window grid."""
    totals = window.totals
    if totals["conflicts"]:
        files = ", ".join(sorted(data.files[i] for i in window.conflict_files))
        return [
            Reject.for_window(
                config.name,
                start_us,
                "read",
                "conflicting_duplicates",
                f"{totals['conflicts']} grid points hold different values at equal timestamps; files: {files}",
            )
        ]
    out: List[Union[WindowBlock, Reject]] = list(_repair_findings(task, data, config, start_us, window))
    kept, failures, quality, flags = _channel_verdicts(task, config, start_us, window)
    out.extend(flags)
    if not kept:
        reasons = collections.Counter(reason for reason, _ in failures.values())
        reason = max(sorted(reasons), key=lambda r: reasons[r])
        detail = "no channel left: " + "; ".join(f"{n}: {r} ({d})" for n, (r, d) in failures.items())
        out.append(Reject.for_window(config.name, start_us, "read", reason, detail))
        return out
    for name, (reason, detail) in failures.items():
        out.append(Reject.for_window(config.name, start_us, "read", reason, detail, subject=name))
    covariates = _covariate_means(task, config, start_us, window, out)
    out.append(
        WindowBlock(
            asset=config.name,
            window_start_us=int(start_us),
            window_length_s=config.windows.length_s,
            sample_rate_hz=config.archive.sample_rate_hz,
            channels=tuple(task.channels[c] for c in kept),
            values=np.ascontiguousarray(window.grid[:, kept]),
            valid=np.ascontiguousarray(window.valid[:, kept]),
            covariates=covariates,
            channel_quality=quality,
            sources=window.sources,
        )
    )
    return out


def _repair_findings(
    task: ReadTask, data: _TaskData, config: AssetConfig, start_us: int, window: _SnappedWindow
) -> List[Reject]:
    """The repaired findings of a window: sorted, deduplicated, snapped, dropped and NaN samples."""
    _, _, n_samples, period_us = window_grid(config)
    totals, sources = window.totals, window.sources
    found = []

    def note(reason, detail, subject=WHOLE_WINDOW):
        found.append(Reject.for_window(config.name, start_us, "read", reason, detail, subject=subject))

    window_lo, window_hi = start_us - 0.5 * period_us, start_us + (n_samples - 0.5) * period_us
    unordered = int(np.count_nonzero((data.unordered_times >= window_lo) & (data.unordered_times < window_hi)))
    if unordered:
        note("unordered_timestamps", f"{unordered} rows out of time order in {', '.join(sources)}; sorted")
    if totals["duplicates"]:
        note("duplicate_timestamps", f"{totals['duplicates']} duplicated samples with equal values dropped")
    if totals["overlaps"]:
        note(
            "overlapping_files",
            f"{totals['overlaps']} samples held by more than one of {', '.join(sources)}; kept once",
        )
    if totals["off_grid"]:
        note(
            "off_grid_timestamps",
            f"{totals['off_grid']} timestamps more than {OFF_GRID_NOISE:g} of a period off the grid; snapped",
        )
    if totals["beyond"]:
        note(
            "jitter_beyond_tolerance",
            f"{totals['beyond']} samples further than {config.reading.grid_tolerance:g} of a period from the "
            "grid dropped (treated as gaps)",
        )
    for c, name in enumerate(task.channels):
        if window.nonfinite[c]:
            note("nonfinite_values", f"{int(window.nonfinite[c])} NaN, inf or null samples treated as gaps", name)
    return found


def _channel_verdicts(task: ReadTask, config: AssetConfig, start_us: int, window: _SnappedWindow):
    """Per channel: kept, rejected (coverage, flat) or kept and flagged (clipped).

    Returns
    -------
    kept : list of int
        Indices of the channels kept, in order.
    failures : dict
        Channel -> (reason, detail) of the channels rejected in this window.
    quality : dict
        Channel -> quality codes of kept channels.
    flags : list of Reject
        ``clipped_channel`` findings, in channel order.
    """
    kept: List[int] = []
    failures: Dict[str, Tuple[str, str]] = {}
    quality: Dict[str, Tuple[str, ...]] = {}
    flags: List[Reject] = []
    min_coverage = config.windows.min_coverage
    checks = _channel_checks(window.grid, window.valid, len(task.channels))
    for c, (coverage, size, high, low, fraction) in enumerate(checks):
        name = task.channels[c]
        if coverage < min_coverage:
            failures[name] = ("insufficient_coverage", f"coverage {coverage:.4f} < min_coverage {min_coverage:g}")
            continue
        if size and high == low:
            failures[name] = ("flat_channel", f"all {size} valid samples equal {low:g}")
            continue
        if fraction >= config.reading.clip_fraction:
            quality[name] = ("clipped",)
            flags.append(
                Reject.for_window(
                    config.name,
                    start_us,
                    "read",
                    "clipped_channel",
                    f"{fraction:.4f} of samples at the extreme values "
                    f"[{low:g}, {high:g}] (clip_fraction {config.reading.clip_fraction:g})",
                    subject=name,
                )
            )
        kept.append(c)
    return kept, failures, quality, flags


def _covariate_means(
    task: ReadTask, config: AssetConfig, start_us: int, window: _SnappedWindow, out: List
) -> Dict[str, float]:
    """Mean of each covariate's valid grid samples (NaN, with a finding appended to ``out``, when none)."""
    n_channels = len(task.channels)
    covariates = {}
    for j, name in enumerate(task.covariates):
        c = n_channels + j
        count = window.covariate_counts[c]
        covariates[name] = float(window.covariate_sums[c] / count) if count else float("nan")
        if not count:
            out.append(
                Reject.for_window(
                    config.name,
                    start_us,
                    "read",
                    "insufficient_coverage",
                    "covariate without a valid sample in the window; its mean is missing (NaN)",
                    subject=name,
                )
            )
    return covariates


def read_windows(
    task: ReadTask, config: AssetConfig, open_file: OpenFile = open_local_file
) -> Iterator[Union[WindowBlock, Reject]]:
    """Read one task and yield, per planned window, its findings and then its block.

    Parameters
    ----------
    task : ReadTask
        From :func:`corrtransforms.stages.plan.plan_reads`.
    config : AssetConfig
        The asset's configuration (grid, tolerances, coverage, clipping).
    open_file : callable
        ``open_file(path)`` returns a binary, seekable file object.

    Yields
    ------
    WindowBlock or Reject
        For every planned window exactly one block or one whole-window reject, plus repaired,
        flagged and per-channel findings. File decoding failures come first (``decode_failed``).

    Notes
    -----
    Snapping: sample ``i`` of a window is the row with ``round((t - start) / T - phi) == i``
    (the grid is the window's own, from its start: windows off the epoch grid, with
    ``[windows] offset_s`` or ``align = "records"``, snap the same way),
    ``T = 1 / sample_rate_hz``, ``phi`` the group's mean grid phase; rows further than
    ``[reading] grid_tolerance * T`` from their grid point are gaps. Coverage of a channel is its
    fraction of valid grid points; below ``[windows] min_coverage`` the channel is rejected in that
    window, and the window when no channel is left. A channel whose valid samples are all equal is
    rejected as flat; one with at least ``[reading] clip_fraction`` of its samples at repeated
    extreme values is flagged "clipped". Covariates are the mean of their valid grid samples.

    The grid phase is the circular mean direction of the fractional positions,
    ``phi = arg(mean(exp(2 pi i x))) / (2 pi)``, robust to the wrap-around at whole periods.

    References
    ----------
    .. [1] K. V. Mardia and P. E. Jupp, *Directional Statistics*, Wiley, 2000, Sec. 2.2.1
       (sample mean direction; from memory).
    """
    findings: List[Reject] = []
    data = _load(task, config, open_file, findings)
    yield from findings
    for start_us in task.window_starts_us:
        yield from _lost_rows(task, data, config, int(start_us))
        yield from _window(task, data, config, int(start_us))


def _lost_rows(task: ReadTask, data: _TaskData, config: AssetConfig, start_us: int) -> List[Reject]:
    """Per-channel findings of a window that overlaps row groups whose rows were not used."""
    if not data.lost:
        return []
    _, _, n_samples, period_us = window_grid(config)
    window_lo, window_hi = start_us - 0.5 * period_us, start_us + (n_samples - 0.5) * period_us
    out: List[Reject] = []
    for lo, hi, _, _, names, reason, detail in data.lost:
        if hi < window_lo or lo >= window_hi:
            continue
        for name in names:
            if name in task.channels or name in task.covariates:
                out.append(
                    Reject.for_window(config.name, start_us, "read", reason, detail, subject=name, action="rejected")
                )
    return out


def read_task(
    task: ReadTask, config: AssetConfig, open_file: OpenFile = open_local_file
) -> Tuple[List[WindowBlock], List[Reject]]:
    """:func:`read_windows` collected into (blocks, rejects)."""
    blocks: List[WindowBlock] = []
    rejects: List[Reject] = []
    for item in read_windows(task, config, open_file):
        if isinstance(item, WindowBlock):
            blocks.append(item)
        else:
            rejects.append(item)
    return blocks, rejects
