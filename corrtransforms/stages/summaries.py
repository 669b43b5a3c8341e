"""Summaries of the output tables: reading partitions back, reducing them, and the alarm episodes.

Used by the launchers before and after a pipeline (the nightly run reads the latest state of
each series, or the indicators to rebuild it; every run rewrites the asset's episodes table from
its shifts table) and by the report.

- :func:`partition_files`, :func:`read_partitions`: the committed Parquet files of one table and
  asset, and their rows (optionally only some columns, only dates before a day, reduced file by
  file with a ``keep`` function);
- :func:`summarize_partitions`: :func:`read_partitions` with ``keep``, opening only the files its
  last read-back summary (``DIR/_summaries/asset=NAME/``) did not cover;
- reductions: :func:`latest_states` (what a resumed run needs) and :func:`episode_evidence`
  (what decides the episodes);
- :func:`shift_episodes`: one row per alarm episode of a shifts table, and
  :func:`write_episodes`, which rewrites ``DIR/episodes/asset=NAME/episodes.parquet``.

All file access goes through a store (:class:`corrtransforms.stages.write.LocalFiles`, or
:class:`corrtransforms.beam.filesystems.BeamFiles` over Beam's FileSystems for any registered
scheme), so this module stays pure pyarrow; :mod:`corrtransforms.beam.output_tables` binds it to
Beam's FileSystems.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import posixpath
import re
from typing import Any, Callable, Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from corrtransforms import tables
from corrtransforms.config import AssetConfig
from corrtransforms.stages import write as table_writer
from corrtransforms.stages.state import SHIFTED

_DATE = re.compile(r"/date=(\d{4}-\d{2}-\d{2})/")


def partition_files(store, output_dir: str, table: str, asset: str) -> List[tuple]:
    """(date, path) of every committed Parquet file of one table and asset, sorted."""
    pattern = store.join(output_dir, table, f"asset={asset}", "date=*", "*.parquet")
    try:
        matched = store.match(pattern)
    except Exception:  # noqa: BLE001 - nothing written yet matches nothing
        return []
    found = []
    for path in matched:
        m = _DATE.search(path.replace("\\", "/"))
        if m:
            found.append((m.group(1), path))
    return sorted(found)


def read_partitions(
    store,
    output_dir: str,
    table: str,
    asset: str,
    schema: pa.Schema,
    before: Optional[_dt.date] = None,
    columns: Optional[Sequence[str]] = None,
    keep: Optional[Callable[[pa.Table], pa.Table]] = None,
) -> pa.Table:
    """Concatenate the table's partitions of ``asset`` (only dates before ``before`` if given).

    ``columns`` reads only those columns; ``keep`` reduces the rows as each file is added (it is
    applied to what has been kept so far plus the new file), so memory holds what the caller
    needs, not the whole history. Every file is still opened: the I/O grows with the history.
    """
    schema = _selected(schema, columns)
    paths = [path for date, path in _partitions_before(store, output_dir, table, asset, before)]
    return _fold_files(store, paths, schema, columns, keep, [])


def read_file(store, path: str, schema: pa.Schema) -> pa.Table:
    """One committed partition file, conformed to ``schema`` (columns added to the schema since
    the file was written come back as nulls, :data:`corrtransforms.tables.ADDED_COLUMNS`)."""
    return _fold_files(store, [path], schema, None, None, [])


def partition_files_before(store, output_dir: str, table: str, asset: str, before: Optional[_dt.date]) -> List[str]:
    """Paths of the table's committed files of ``asset`` dated before ``before`` (all if None)."""
    return [path for _, path in _partitions_before(store, output_dir, table, asset, before)]


def _selected(schema: pa.Schema, columns: Optional[Sequence[str]]) -> pa.Schema:
    return schema if columns is None else pa.schema([schema.field(name) for name in columns])


def _partitions_before(store, output_dir: str, table: str, asset: str, before: Optional[_dt.date]) -> List[tuple]:
    return [
        (date, path)
        for date, path in partition_files(store, output_dir, table, asset)
        if before is None or _dt.date.fromisoformat(date) < before
    ]


def _fold_files(
    store,
    paths: Sequence[str],
    schema: pa.Schema,
    columns: Optional[Sequence[str]],
    keep: Optional[Callable[[pa.Table], pa.Table]],
    pieces: List[pa.Table],
) -> pa.Table:
    """Read ``paths`` in order onto ``pieces``, reducing with ``keep`` after each file if given."""
    pieces = list(pieces)
    for path in paths:
        with store.open(path) as handle:
            read = pq.read_table(handle, columns=None if columns is None else list(columns))
        piece = table_writer.conform(read, schema)
        if keep is None:
            pieces.append(piece)
        else:
            pieces = [keep(pa.concat_tables(pieces + [piece]))]
    return pa.concat_tables(pieces) if pieces else schema.empty_table()


#: folder of the read-back summaries under the output root (derived data, safe to delete)
SUMMARIES = "_summaries"
_SUMMARY_FORMAT = "1"
_COVERED_KEY = b"corrtransforms.summary.covered"
_FORMAT_KEY = b"corrtransforms.summary.format"


def summary_folder(store, output_dir: str, asset: str) -> str:
    """``DIR/_summaries/asset=NAME``."""
    return store.join(output_dir, SUMMARIES, f"asset={asset}")


def summary_path(store, output_dir: str, asset: str, name: str) -> str:
    """``DIR/_summaries/asset=NAME/<name>.parquet``."""
    return store.join(summary_folder(store, output_dir, asset), f"{name}.parquet")


def _load_summary(store, path: str, schema: pa.Schema):
    """(rows, covered file keys) of a summary file, or None when absent, unreadable or of
    another format or schema (the caller then reads every partition)."""
    try:
        if not store.exists(path):
            return None
        with store.open(path) as handle:
            table = pq.read_table(handle)
        metadata = table.schema.metadata or {}
        if metadata.get(_FORMAT_KEY) != _SUMMARY_FORMAT.encode():
            return None
        covered = frozenset(json.loads(metadata[_COVERED_KEY].decode()))
        table = table.replace_schema_metadata(None)
        if not table.schema.equals(schema):
            return None
        return table, covered
    except Exception:  # noqa: BLE001 - a damaged summary is rebuilt from the partitions
        return None


def _write_summary(
    store,
    output_dir: str,
    folder: str,
    path: str,
    table: pa.Table,
    covered: Sequence[str],
    provenance: Mapping[str, str],
) -> None:
    store.mkdirs(folder)
    metadata = {k.encode(): v.encode() for k, v in provenance.items()}
    metadata.update({_FORMAT_KEY: _SUMMARY_FORMAT.encode(), _COVERED_KEY: json.dumps(sorted(covered)).encode()})
    run_id = provenance.get(table_writer.META_PREFIX + "run_id", "")
    temporary = table_writer.temporary_path(store, output_dir, run_id, posixpath.basename(path.replace("\\", "/")))
    table_writer.write_parquet_in_place(store, path, table.replace_schema_metadata(metadata), temporary)


def summarize_partitions(
    store,
    output_dir: str,
    table: str,
    asset: str,
    schema: pa.Schema,
    keep: Callable[[pa.Table], pa.Table],
    name: str,
    before: Optional[_dt.date] = None,
    columns: Optional[Sequence[str]] = None,
    provenance: Optional[Mapping[str, str]] = None,
) -> pa.Table:
    """:func:`read_partitions` with ``keep``, opening only the files its last summary did not cover.

    Parameters
    ----------
    store : LocalFiles, BeamFiles or compatible
        File access (``join``, ``match``, ``open``, ``exists``, ``create``, ``rename``, ``mkdirs``).
    output_dir, table, asset, schema, before, columns
        As for :func:`read_partitions`.
    keep : callable
        The reduction; it must be decomposable: ``keep(concat(keep(A), B)) == keep(concat(A, B))``
        for any split of the rows, whatever their dates (true of "the latest row of each series"
        and of "shifted rows plus each series' latest row").
    name : str
        The summary's name (one per reduction): ``DIR/_summaries/asset=NAME/<name>.parquet``.
    provenance : mapping, optional
        File metadata of the summary (:func:`corrtransforms.stages.write.provenance_metadata`).

    Returns
    -------
    pyarrow.Table
        The rows of ``read_partitions(..., keep=keep)``, sorted by their scalar columns (so the
        result does not depend on which files a summary already covered).

    Notes
    -----
    The summary holds the reduced rows and the keys (``date/file name``) of the partition files
    they were reduced from. Part-file names are a digest of their rows, so a covered key that is
    still listed is a file with the same rows. When every covered key is still listed (and, with
    ``before``, dated before it), the summary is folded with the files it does not cover; when a
    covered file has gone (a partition rewritten with other rows, or deleted), the summary is
    ignored and every file is read. The refreshed summary is written back (temporary name, then
    rename). A nightly run thus opens one summary and one day's files, not the whole history;
    the listing itself is one ``match`` of the table's partitions.
    """
    schema = _selected(schema, columns)
    files = _partitions_before(store, output_dir, table, asset, before)
    keys = {f"{date}/{path.replace(chr(92), '/').rsplit('/', 1)[-1]}": path for date, path in files}
    path = summary_path(store, output_dir, asset, name)
    loaded = _load_summary(store, path, schema)
    pieces: List[pa.Table] = []
    todo = list(keys)
    if loaded is not None and loaded[1] <= keys.keys():
        pieces = [loaded[0]]
        todo = [k for k in keys if k not in loaded[1]]
    result = _fold_files(store, [keys[k] for k in sorted(todo)], schema, columns, keep, pieces)
    result = result.sort_by([(c, "ascending") for c in table_writer.sort_columns(result)])
    if todo or loaded is None or loaded[1] != keys.keys():
        _write_summary(
            store, output_dir, summary_folder(store, output_dir, asset), path, result, list(keys), provenance or {}
        )
    return result


def last_row_of_each_series(table: pa.Table) -> np.ndarray:
    """Boolean mask of the latest row (by window_start) of each (subject, indicator) in ``table``."""
    mask = np.zeros(table.num_rows, dtype=bool)
    if table.num_rows == 0:
        return mask
    starts = table.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    latest: Dict[Tuple[str, str], int] = {}
    for i, key in enumerate(zip(table.column("subject").to_pylist(), table.column("indicator").to_pylist())):
        if key not in latest or starts[i] >= starts[latest[key]]:
            latest[key] = i
    mask[list(latest.values())] = True
    return mask


def latest_states(states: pa.Table) -> pa.Table:
    """Only the latest state row of each series (what a resumed run can use)."""
    return states.filter(pa.array(last_row_of_each_series(states)))


#: name of the read-back summary of the latest state per series
LATEST_STATE = "latest_state"
#: name of the read-back summary of the episode evidence
EPISODE_EVIDENCE = "episode_evidence"

#: the shifts columns the episodes summary is built from
EPISODE_COLUMNS = (
    "window_start",
    "subject",
    "indicator",
    "first_alarm",
    "onset",
    "state",
    "direction",
    "expected",
    "shift_size",
    "z",
    "detector",
    "unit",
)


def episode_evidence(shifts: pa.Table) -> pa.Table:
    """The rows of a shifts table that decide its episodes: every shifted row, and the latest row
    of each series (which says whether an episode is still open). The summary of the reduced
    table equals that of the whole table."""
    shifted = pc.equal(shifts.column("state"), "shifted").to_numpy(zero_copy_only=False)
    return shifts.filter(pa.array(shifted | last_row_of_each_series(shifts)))


def write_episodes(store, output_dir: str, config: AssetConfig, run_id: str) -> int:
    """Rewrite ``episodes/asset=NAME/episodes.parquet`` from the asset's whole shifts table.

    The summary is derived data: it is rebuilt after every run (written to a temporary name and
    renamed into place) from the episode evidence of the whole shifts table, which
    :func:`summarize_partitions` keeps up to date by reading only the files it has not seen.
    Returns the number of episodes.
    """
    metadata = table_writer.provenance_metadata(config, run_id)
    evidence = summarize_partitions(
        store,
        output_dir,
        "shifts",
        config.name,
        tables.SHIFTS,
        episode_evidence,
        EPISODE_EVIDENCE,
        columns=EPISODE_COLUMNS,
        provenance=metadata,
    )
    episodes = shift_episodes(evidence)
    folder = store.join(output_dir, "episodes", f"asset={config.name}")
    store.mkdirs(folder)
    final = store.join(folder, "episodes.parquet")
    temporary = table_writer.temporary_path(store, output_dir, run_id, f"episodes-{config.name}")
    episodes = episodes.replace_schema_metadata(
        {**(episodes.schema.metadata or {}), **{k.encode(): v.encode() for k, v in metadata.items()}}
    )
    table_writer.write_parquet_in_place(store, final, episodes, temporary)
    return episodes.num_rows


def shift_episodes(shifts: pa.Table) -> pa.Table:
    """Alarm summary: one row per subject, indicator and episode of shifted windows.

    The one episodes algorithm of the package: the ``episodes`` table (:func:`write_episodes`)
    and the report both call it, on a shifts table read back in any way.

    Parameters
    ----------
    shifts : pyarrow.Table
        Rows with the SHIFTS columns (any number of series and days, any order). An ``asset``
        column, as read from the Hive folders, is kept as the first key when present; other
        extra columns (``date``) are ignored. A reduced table (:func:`episode_evidence`: every
        shifted row plus each series' latest row) gives the same result as the whole table.

    Returns
    -------
    pyarrow.Table
        :data:`corrtransforms.tables.EPISODES` (plus ``asset`` when given), sorted by keys and
        first alarm. An episode is identified by its ``first_alarm`` (carried in every shifted
        row), so a table holding only the latest days, or only the shifted rows, still groups
        correctly; windows in between need not be present. ``onset`` is the earliest onset of
        the episode's rows (what ``min(onset)`` over its shifted rows gives), ``direction`` and
        ``shift_size`` the estimates at its last shifted window, ``shift_size_pct`` that size in
        % of the window's ``expected`` level (NaN when the level is zero or unknown);
        ``status`` is ``"open"`` when the series' last row in the table is still in the episode.
    """
    keys = (["asset"] if "asset" in shifts.column_names else []) + ["subject", "indicator"]
    schema = episodes_schema("asset" in keys)
    if shifts.num_rows == 0:
        return schema.empty_table()
    columns = _episode_columns(shifts, keys)
    series_last, episodes = _collect_episodes(columns, keys)
    return _episodes_table(schema, keys, columns, series_last, episodes)


def episodes_schema(with_asset: bool) -> pa.Schema:
    """:data:`corrtransforms.tables.EPISODES`, with a leading ``asset`` column if asked."""
    schema = tables.EPISODES
    if with_asset:
        schema = schema.insert(0, pa.field("asset", pa.string(), nullable=False))
    return schema


def _episode_columns(shifts: pa.Table, keys: Sequence[str]) -> Dict[str, Any]:
    """The columns the episodes are built from, converted once (times as integer us)."""
    columns: Dict[str, Any] = {name: shifts.column(name).to_pylist() for name in keys}
    columns["window_start"] = shifts.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    for name in ("first_alarm", "onset"):
        columns[name] = shifts.column(name).cast(pa.int64()).to_pylist()
    for name in ("state", "direction", "expected", "shift_size", "z", "detector", "unit"):
        columns[name] = shifts.column(name).to_pylist()
    return columns


def _collect_episodes(columns: Mapping[str, Any], keys: Sequence[str]):
    """Per series its latest window; per (series, first alarm) the episode's evidence.

    Returns
    -------
    series_last : dict series -> latest window start (us)
    episodes : dict (series..., first_alarm) -> dict
        ``first``/``last`` window, ``n`` shifted windows, ``peak`` |z|, ``detectors`` seen, the
        ``unit``, the earliest ``onset`` and ``i``, the row of the last shifted window (its
        direction and size are the episode's).
    """
    start, state, first_alarm = columns["window_start"], columns["state"], columns["first_alarm"]
    z, detector, unit, onset = columns["z"], columns["detector"], columns["unit"], columns["onset"]
    series_last: Dict[tuple, int] = {}
    episodes: Dict[tuple, Dict[str, Any]] = {}
    for i in range(len(start)):
        series = tuple(columns[name][i] for name in keys)
        series_last[series] = max(series_last.get(series, start[i]), start[i])
        if state[i] != SHIFTED or first_alarm[i] is None:
            continue
        key = series + (first_alarm[i],)
        e = episodes.get(key)
        if e is None:
            e = episodes[key] = {
                "last": start[i],
                "first": start[i],
                "n": 0,
                "peak": float("nan"),
                "detectors": set(),
                "unit": unit[i],
                "i": i,
                "onset": None,
            }
        e["n"] += 1
        if onset[i] is not None and (e["onset"] is None or onset[i] < e["onset"]):
            e["onset"] = onset[i]
        if start[i] >= e["last"]:
            e["last"], e["i"] = start[i], i
        if z[i] is not None and math.isfinite(z[i]) and not (abs(z[i]) <= e["peak"]):
            e["peak"] = abs(z[i])
        if detector[i]:
            e["detectors"].update(detector[i].split("+"))
    return series_last, episodes


def _episodes_table(
    schema: pa.Schema,
    keys: Sequence[str],
    columns: Mapping[str, Any],
    series_last: Mapping[tuple, int],
    episodes: Mapping[tuple, Dict[str, Any]],
) -> pa.Table:
    """One row per episode, sorted by series and first alarm."""
    out: Dict[str, List[Any]] = {name: [] for name in schema.names}
    for key in sorted(episodes, key=lambda k: tuple("" if v is None else v for v in k)):
        e = episodes[key]
        i = e["i"]
        series = key[:-1]
        for name, value in zip(keys, series):
            out[name].append(value)
        out["onset"].append(e["onset"])
        out["first_alarm"].append(key[-1])
        out["last_window"].append(int(e["last"]))
        out["status"].append("open" if series_last[series] == e["last"] else "closed")
        out["direction"].append(columns["direction"][i])
        out["shift_size"].append(columns["shift_size"][i])
        out["peak_abs_z"].append(e["peak"])
        out["detector"].append("+".join(d for d in ("cusum", "ewma") if d in e["detectors"]) or None)
        out["n_windows"].append(e["n"])
        out["unit"].append(e["unit"])
        out["shift_size_pct"].append(_percent_of_level(columns["shift_size"][i], columns["expected"][i]))
    arrays = []
    for field in schema:
        values = out[field.name]
        if pa.types.is_timestamp(field.type):
            arrays.append(pa.array(values, type=pa.int64()).cast(field.type))
        else:
            arrays.append(pa.array(values, type=field.type))
    return pa.Table.from_arrays(arrays, schema=schema)


def _percent_of_level(size, level) -> float:
    """``100 * size / |level|``: a shift in % of the baseline level (NaN when either is missing
    or the level is zero)."""
    if size is None or level is None or not (math.isfinite(size) and math.isfinite(level)) or level == 0:
        return float("nan")
    return 100.0 * size / abs(level)
