"""Reading back and summarising the output tables through Beam's FileSystems (no numerics).

Used by the launchers before and after a pipeline: the nightly run reads earlier state (or
indicators, to rebuild it), and every run rewrites the asset's episodes summary from its shifts
table. All access goes through :class:`apache_beam.io.filesystems.FileSystems`, so the output
folder may be any registered filesystem URL.
"""
from __future__ import annotations

import datetime as _dt
import json
import re
import time
import uuid
from typing import Callable, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from apache_beam.io.filesystems import CompressionTypes, FileSystems

from corrtransforms import tables

from corrtransforms.stages import summaries

from corrtransforms.stages import write as table_writer
from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.config import AssetConfig

_DATE = re.compile(r"/date=(\d{4}-\d{2}-\d{2})/")


def partition_files(output_dir: str, table: str, asset: str) -> List[tuple]:
    """(date, path) of every committed Parquet file of one table and asset, sorted."""
    pattern = FileSystems.join(output_dir, table, f"asset={asset}", "date=*", "*.parquet")
    try:
        matched = FileSystems.match([pattern])[0].metadata_list
    except Exception:  # noqa: BLE001 - nothing written yet matches nothing
        return []
    found = []
    for item in matched:
        m = _DATE.search(item.path.replace("\\", "/"))
        if m:
            found.append((m.group(1), item.path))
    return sorted(found)


def read_partitions(output_dir: str, table: str, asset: str, schema: pa.Schema,
                    before: Optional[_dt.date] = None, columns: Optional[Sequence[str]] = None,
                    keep: Optional[Callable[[pa.Table], pa.Table]] = None) -> pa.Table:
    """Concatenate the table's partitions of ``asset`` (only dates before ``before`` if given).

    ``columns`` reads only those columns; ``keep`` reduces the rows as each file is added (it is
    applied to what has been kept so far plus the new file), so memory holds what the caller
    needs, not the whole history. Every file is still opened: the I/O grows with the history.
    """
    schema = _selected(schema, columns)
    paths = [path for date, path in _partitions_before(output_dir, table, asset, before)]
    return _fold_files(paths, schema, columns, keep, [])


def _selected(schema: pa.Schema, columns: Optional[Sequence[str]]) -> pa.Schema:
    return schema if columns is None else pa.schema([schema.field(name) for name in columns])


def _partitions_before(output_dir: str, table: str, asset: str, before: Optional[_dt.date]) -> List[tuple]:
    return [(date, path) for date, path in partition_files(output_dir, table, asset)
            if before is None or _dt.date.fromisoformat(date) < before]


def _fold_files(paths: Sequence[str], schema: pa.Schema, columns: Optional[Sequence[str]],
                keep: Optional[Callable[[pa.Table], pa.Table]], pieces: List[pa.Table]) -> pa.Table:
    """Read ``paths`` in order onto ``pieces``, reducing with ``keep`` after each file if given."""
    pieces = list(pieces)
    for path in paths:
        with FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED) as handle:
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


def summary_path(output_dir: str, asset: str, name: str) -> str:
    """``DIR/_summaries/asset=NAME/<name>.parquet``."""
    return FileSystems.join(output_dir, SUMMARIES, f"asset={asset}", f"{name}.parquet")


def _load_summary(path: str, schema: pa.Schema):
    """(rows, covered file keys) of a summary file, or None when absent, unreadable or of
    another format or schema (the caller then reads every partition)."""
    try:
        if not FileSystems.exists(path):
            return None
        with FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED) as handle:
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


def _write_summary(path: str, table: pa.Table, covered: Sequence[str], provenance: Mapping[str, str]) -> None:
    store = BeamFiles()
    store.mkdirs(FileSystems.split(path)[0])
    temporary = f"{path}.{uuid.uuid4().hex}.tmp"
    metadata = {k.encode(): v.encode() for k, v in provenance.items()}
    metadata.update({_FORMAT_KEY: _SUMMARY_FORMAT.encode(), _COVERED_KEY: json.dumps(sorted(covered)).encode()})
    with store.create(temporary) as handle:
        pq.write_table(table.replace_schema_metadata(metadata), handle, compression="zstd",
                       use_compliant_nested_type=True)
    store.rename(temporary, path)


def summarize_partitions(output_dir: str, table: str, asset: str, schema: pa.Schema,
                         keep: Callable[[pa.Table], pa.Table], name: str,
                         before: Optional[_dt.date] = None,
                         columns: Optional[Sequence[str]] = None,
                         provenance: Optional[Mapping[str, str]] = None) -> pa.Table:
    """:func:`read_partitions` with ``keep``, opening only the files its last summary did not cover.

    Parameters
    ----------
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
    files = _partitions_before(output_dir, table, asset, before)
    keys = {f"{date}/{path.replace(chr(92), '/').rsplit('/', 1)[-1]}": path for date, path in files}
    path = summary_path(output_dir, asset, name)
    loaded = _load_summary(path, schema)
    pieces: List[pa.Table] = []
    todo = list(keys)
    if loaded is not None and loaded[1] <= keys.keys():
        pieces = [loaded[0]]
        todo = [k for k in keys if k not in loaded[1]]
    result = _fold_files([keys[k] for k in sorted(todo)], schema, columns, keep, pieces)
    result = result.sort_by([(c, "ascending") for c in table_writer.sort_columns(result)])
    if todo or loaded is None or loaded[1] != keys.keys():
        _write_summary(path, result, list(keys), provenance or {})
    return result


def remove_stale_temporary(output_dir: str, current_run_id: str, older_than_s: float,
                           now_s: Optional[float] = None) -> List[Tuple[str, float]]:
    """Delete the ``DIR/_temporary/<run id>/`` folders of runs that stopped writing long ago.

    Parameters
    ----------
    output_dir : str
        The output root (any registered filesystem).
    current_run_id : str
        This run's id; its folder is never touched.
    older_than_s : float
        A folder whose newest file was last written more than this many seconds ago belongs to a
        run that died (a running job keeps writing part files); <= 0 removes nothing.
    now_s : float, optional
        The current time, seconds since the epoch (default: the clock).

    Returns
    -------
    list of (run id, age in seconds)
        The folders removed.

    Notes
    -----
    A killed run leaves its temporary files behind (readers never see them, but they take
    space). The age comes from the filesystem's modification times of the files below each run
    folder, so it works on object stores too. A run that is still active writes part files as
    it goes; one that has written nothing for ``older_than_s`` is taken as dead. The default of
    the launchers (24 hours) is common practice, not derived: longer than any pause between two
    part files of a running job.
    """
    if not older_than_s > 0:
        return []
    root = FileSystems.join(output_dir, table_writer.TEMPORARY)
    try:
        matched = FileSystems.match([FileSystems.join(root, "**")])[0].metadata_list
    except Exception:  # noqa: BLE001 - no temporary folder: nothing to remove
        return []
    prefix = root.replace("\\", "/").rstrip("/") + "/"
    newest: dict = {}
    for item in matched:
        path = item.path.replace("\\", "/")
        if not path.startswith(prefix):
            continue
        run = path[len(prefix):].split("/", 1)[0]
        updated = float(getattr(item, "last_updated_in_seconds", 0.0) or 0.0)
        newest[run] = max(newest.get(run, 0.0), updated)
    now_s = time.time() if now_s is None else float(now_s)
    removed = []
    store = BeamFiles()
    for run, updated in sorted(newest.items()):
        age = now_s - updated
        if run == current_run_id or not updated or age <= older_than_s:
            continue
        store.delete_tree(FileSystems.join(root, run))
        removed.append((run, age))
    return removed


def last_row_of_each_series(table: pa.Table) -> np.ndarray:
    """Boolean mask of the latest row (by window_start) of each (subject, indicator) in ``table``."""
    mask = np.zeros(table.num_rows, dtype=bool)
    if table.num_rows == 0:
        return mask
    starts = table.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    latest = {}
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
EPISODE_COLUMNS = ("window_start", "subject", "indicator", "first_alarm", "onset", "state", "direction",
                   "shift_size", "z", "detector", "unit")


def episode_evidence(shifts: pa.Table) -> pa.Table:
    """The rows of a shifts table that decide its episodes: every shifted row, and the latest row
    of each series (which says whether an episode is still open). The summary of the reduced
    table equals that of the whole table."""
    shifted = pc.equal(shifts.column("state"), "shifted").to_numpy(zero_copy_only=False)
    return shifts.filter(pa.array(shifted | last_row_of_each_series(shifts)))


def write_episodes(output_dir: str, config: AssetConfig, run_id: str) -> int:
    """Rewrite ``episodes/asset=NAME/episodes.parquet`` from the asset's whole shifts table.

    The summary is derived data: it is rebuilt after every run (written to a temporary name and
    renamed into place) from the episode evidence of the whole shifts table, which
    :func:`summarize_partitions` keeps up to date by reading only the files it has not seen.
    Returns the number of episodes.
    """
    metadata = table_writer.provenance_metadata(config, run_id)
    evidence = summarize_partitions(output_dir, "shifts", config.name, tables.SHIFTS, episode_evidence,
                                    EPISODE_EVIDENCE, columns=EPISODE_COLUMNS, provenance=metadata)
    episodes = summaries.shift_episodes(evidence)
    store = BeamFiles()
    folder = store.join(output_dir, "episodes", f"asset={config.name}")
    store.mkdirs(folder)
    final = store.join(folder, "episodes.parquet")
    temporary = store.join(folder, f"_episodes-{run_id}.tmp")
    episodes = episodes.replace_schema_metadata({**(episodes.schema.metadata or {}),
                                                 **{k.encode(): v.encode() for k, v in metadata.items()}})
    with store.create(temporary) as handle:
        pq.write_table(episodes, handle, compression="zstd", use_compliant_nested_type=True)
    store.rename(temporary, final)
    return episodes.num_rows
