"""Write output tables as Hive-partitioned Parquet with write-then-commit semantics.

Layout: ``DIR/<table>/asset=NAME/date=YYYY-MM-DD/part-<first window start>-<digest>.parquet``.
The date of a row is the calendar date of its ``window_start`` in the asset's time zone (file-level
rejects carry their own date). Files are Parquet with zstd compression, spec-compliant nested list
names (``element``), ``timestamp[us, UTC]`` times, units in field metadata (from
:mod:`corrtransforms.tables`) and provenance in the file's key-value metadata.

Two steps, so a failed run leaves no half file and a rerun replaces exactly its days:

1. :func:`write_part` writes rows into ``DIR/_temporary/<run id>/...`` (invisible to readers:
   pyarrow.dataset skips names starting with ``_``; the folder is outside every table's folder).
   The final file name is a digest of the rows' key columns: deterministic for given rows.
2. :func:`commit_partition` merges one partition's part files into the partition's files (see
   below), moves them into place, checks each one arrived, and deletes every other file of that
   partition (stale shards of earlier runs).

The files of a partition are a function of its rows alone, never of how the runner split the
work into bundles or workers: a partition of at most :data:`FILE_CELLS` cells (rows plus list
elements) is one file; a larger one is one file per hour of ``window_start`` (the rows' *slot*,
:func:`split_by_slot`). Writers keep their part files per (date, slot), so the commit holds one
file's rows at a time: one partition when it is small, one hour of it when it is large.

File access goes through a small store interface (:class:`LocalFiles` here; the Beam layer
supplies one over ``apache_beam.io.filesystems.FileSystems``), so this module stays pure pyarrow.
"""

from __future__ import annotations

import glob
import hashlib
import io
import json
import os
import posixpath
import shutil
import uuid
from typing import Any, Dict, Iterable, List, Mapping, NamedTuple, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

import corrtransforms
from corrtransforms import storage_precision, tables
from corrtransforms.config import AssetConfig
from corrtransforms.rejects import Reject
from corrtransforms.timeutil import compact_utc, local_date

TEMPORARY = "_temporary"
SCHEMAS = {
    "correlations": tables.CORRELATIONS,
    "indicators": tables.INDICATORS,
    "rejects": tables.REJECTS,
    "shifts": tables.SHIFTS,
    "state": tables.STATE,
    "baseline_sample": tables.BASELINE_SAMPLE,
    "mode_shapes": tables.MODE_SHAPES,
}
#: rows of one Parquet row group in output files (common practice: tens of thousands of rows)
ROW_GROUP_ROWS = 50_000
#: cells (rows + list elements; about 4 bytes each in memory for the float32 lists) up to which a
#: partition is one file; above, one file per hour slot (8 Mi cells: about 32 MiB of list values;
#: common practice: files of tens of MiB)
FILE_CELLS = 8 * 2**20
#: length of the slot a large partition is split by (microseconds of ``window_start``)
SLOT_US = 3600 * 10**6
META_PREFIX = "corrtransforms."


class LocalFiles:
    """The store interface on the local file system (also the reference for other stores).

    Methods: ``join``, ``create`` (binary writable file, parents created), ``open`` (binary
    readable file), ``rename`` (replacing the destination), ``exists``, ``mkdirs`` (no error if
    present), ``list_files`` (files directly in a folder; empty if it does not exist), ``match``
    (files matching a glob pattern, sorted), ``delete`` (files), ``delete_tree``.
    """

    def join(self, *parts: str) -> str:
        return os.path.join(*parts)

    def create(self, path: str):
        os.makedirs(os.path.dirname(path), exist_ok=True)
        return open(path, "wb")

    def open(self, path: str):
        return open(path, "rb")

    def rename(self, source: str, destination: str) -> None:
        os.replace(source, destination)

    def exists(self, path: str) -> bool:
        return os.path.exists(path)

    def mkdirs(self, folder: str) -> None:
        os.makedirs(folder, exist_ok=True)

    def list_files(self, folder: str) -> List[str]:
        if not os.path.isdir(folder):
            return []
        return sorted(os.path.join(folder, n) for n in os.listdir(folder) if os.path.isfile(os.path.join(folder, n)))

    def match(self, pattern: str) -> List[str]:
        return sorted(p for p in glob.glob(pattern) if os.path.isfile(p))

    def delete(self, paths: Sequence[str]) -> None:
        for path in paths:
            os.remove(path)

    def delete_tree(self, folder: str) -> None:
        shutil.rmtree(folder, ignore_errors=True)

    def remove_empty_folder(self, folder: str) -> None:
        try:
            os.rmdir(folder)
        except OSError:
            pass


class PartFile(NamedTuple):
    """A part file written to the temporary area, waiting for its partition's commit."""

    table: str
    asset: str
    date: str
    temp_path: str
    name: str
    rows: int
    #: the hour slot of the rows (:func:`split_by_slot`); "" for rows without a window
    slot: str = ""
    #: rows plus list elements: the size the commit decides one file or one per slot by
    cells: int = 0


class CommitResult(NamedTuple):
    """What committing one partition did."""

    table: str
    asset: str
    date: str
    files: Tuple[str, ...]
    rows: int
    removed: Tuple[str, ...]


# --------------------------------------------------------------------------------------------
# Rows


def reject_date(reject: Reject, timezone: str) -> str:
    """Partition date of a finding: its own ``date``, else its window's local date."""
    if reject.date:
        return reject.date
    if reject.window_start_us is not None:
        return local_date(reject.window_start_us, timezone)
    raise ValueError(f"reject without date or window: {reject}")


def rejects_table(rejects: Sequence[Reject]) -> pa.Table:
    """Rejects as a table of schema :data:`corrtransforms.tables.REJECTS`."""
    columns = {
        name: [getattr(r, name) for r in rejects]
        for name in ("stage", "source", "subject", "reason", "detail", "action")
    }
    columns["window_start"] = [r.window_start_us for r in rejects]
    arrays = []
    for field in tables.REJECTS:
        values = columns[field.name]
        if field.name == "window_start":
            arrays.append(pa.array(values, pa.int64()).cast(field.type))
        else:
            arrays.append(pa.array(values, field.type))
    return pa.Table.from_arrays(arrays, schema=tables.REJECTS)


def split_by_date(table: pa.Table, timezone: str) -> Dict[str, pa.Table]:
    """Rows grouped by the local calendar date of their ``window_start``."""
    if table.num_rows == 0:
        return {}
    starts = table.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    unique, inverse = np.unique(starts, return_inverse=True)
    unique_dates = [local_date(int(u), timezone) for u in unique]
    if len(set(unique_dates)) == 1:  # the usual element: one window, or windows of one day
        return {unique_dates[0]: table}
    dates = np.array(unique_dates)[inverse.reshape(-1)]
    out = {}
    for date in sorted(set(dates.tolist())):
        out[date] = table.filter(pa.array(dates == date))
    return out


def split_by_slot(table: pa.Table) -> List[Tuple[str, pa.Table]]:
    """Rows grouped by their hour slot: ``window_start`` // :data:`SLOT_US` (zero-padded), "" for
    rows without a window start (file-level rejects) or tables without the column."""
    if table.num_rows == 0 or "window_start" not in table.column_names:
        return [("", table)]
    starts = table.column("window_start").cast(pa.int64()).fill_null(-1).to_numpy(zero_copy_only=False)
    slots = np.where(starts < 0, -1, starts // SLOT_US)
    unique = np.unique(slots)

    def name(slot: int) -> str:
        return "" if slot < 0 else f"{int(slot):08d}"

    if len(unique) == 1:
        return [(name(int(unique[0])), table)]
    return [(name(int(u)), table.filter(pa.array(slots == u))) for u in unique]


def cells(table: pa.Table) -> int:
    """Rows plus the elements of every list column (a deterministic size of the rows)."""
    import pyarrow.compute as pc

    total = table.num_rows
    for field in table.schema:
        if pa.types.is_list(field.type) or pa.types.is_large_list(field.type):
            counted = pc.sum(pc.list_value_length(table.column(field.name))).as_py()
            total += int(counted or 0)
    return total


def to_partitions(table_name: str, element: Any, config: AssetConfig) -> List[Tuple[str, pa.Table]]:
    """Convert one pipeline element into (date, rows) pieces of the named table.

    Accepted elements: a ``pyarrow.Table`` with the table's columns; for "rejects" a
    :class:`~corrtransforms.rejects.Reject` or a list of them; for "correlations" a
    :class:`~corrtransforms.records.WindowCorrelation` (converted with
    :func:`corrtransforms.stages.correlate.correlation_table`).
    """
    tz = config.timezone
    if isinstance(element, Reject):
        element = [element]
    if isinstance(element, list) and element and all(isinstance(e, Reject) for e in element):
        by_date: Dict[str, List[Reject]] = {}
        for r in element:
            by_date.setdefault(reject_date(r, tz), []).append(r)
        return [(d, rejects_table(rs)) for d, rs in sorted(by_date.items())]
    if not isinstance(element, pa.Table):
        from corrtransforms.records import WindowCorrelation

        if isinstance(element, WindowCorrelation):
            from corrtransforms.stages.correlate import correlation_table

            element = correlation_table([element])
        else:
            raise TypeError(f"cannot write {type(element).__name__} to table {table_name!r}")
    schema = SCHEMAS.get(table_name)
    if schema is not None:
        element = conform(element, schema)
    if table_name == "correlations" and config.correlation.storage == "compact":
        element = storage_precision.compact_correlations(element)
    return sorted(split_by_date(element, tz).items())


def conform(table: pa.Table, schema: pa.Schema) -> pa.Table:
    """Select and cast ``table``'s columns to ``schema`` (field metadata from the schema)."""
    missing = [f.name for f in schema if f.name not in table.column_names and f.name not in tables.ADDED_COLUMNS]
    if missing:
        raise ValueError(f"table lacks columns {missing}")
    columns = [
        table.column(f.name).cast(f.type) if f.name in table.column_names else pa.nulls(table.num_rows, f.type)
        for f in schema
    ]
    return pa.Table.from_arrays(columns, schema=schema)


# --------------------------------------------------------------------------------------------
# Files


def provenance_metadata(config: AssetConfig, run_id: str) -> Dict[str, str]:
    """File key-value metadata: package version, configuration digest and JSON, run id."""
    return {
        META_PREFIX + "version": corrtransforms.__version__,
        META_PREFIX + "config_digest": config.digest(),
        META_PREFIX + "run_id": run_id,
        META_PREFIX + "asset": config.name,
        META_PREFIX + "config": json.dumps(config.as_dict(), sort_keys=True),
    }


def partition_folder(store, output_dir: str, table_name: str, asset: str, date: str) -> str:
    return store.join(output_dir, table_name, f"asset={asset}", f"date={date}")


def sort_columns(table: pa.Table) -> List[str]:
    """The columns rows are sorted by when written: every column that is not a list or struct."""
    return [
        f.name
        for f in table.schema
        if not (pa.types.is_list(f.type) or pa.types.is_large_list(f.type) or pa.types.is_struct(f.type))
    ]


def part_file_name(table: pa.Table) -> str:
    """``part-<first window start>-<digest>.parquet``: a function of the rows alone.

    The digest is SHA-256 of the Arrow IPC stream of the sorted rows' scalar columns.
    """
    keys = table.select(sort_columns(table)).combine_chunks()
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, keys.schema.remove_metadata()) as writer:
        writer.write_table(keys.replace_schema_metadata(None))
    digest = hashlib.sha256(sink.getvalue()).hexdigest()[:16]
    first = "none"
    if "window_start" in table.column_names:
        starts = table.column("window_start").cast(pa.int64()).drop_null()
        if len(starts):
            first = compact_utc(int(np.min(starts.to_numpy())))
    return f"part-{first}-{digest}.parquet"


def _encodings(table_name: str) -> Dict[str, Any]:
    """Per-table Parquet encodings: BYTE_STREAM_SPLIT for the correlations' float lists.

    The split encoding stores each byte of the float32 values in its own stream, so the trailing
    zero bits of the compact storage (:mod:`corrtransforms.storage_precision`) compress well; it
    is lossless and read by every Parquet reader of the format's version 2.8 and later.
    """
    if table_name != "correlations":
        return {}
    others = [f.name for f in tables.CORRELATIONS if f.name not in storage_precision.LIST_COLUMNS]
    return {"use_dictionary": others, "use_byte_stream_split": storage_precision.parquet_column_paths()}


def write_part(
    store,
    output_dir: str,
    table_name: str,
    asset: str,
    date: str,
    table: pa.Table,
    run_id: str,
    metadata: Mapping[str, str],
    unique: str,
    slot: str = "",
) -> PartFile:
    """Write ``table`` (rows of one partition) to the run's temporary area.

    Parameters
    ----------
    store : LocalFiles or compatible
        File access.
    output_dir : str
        The output root ``DIR``.
    table_name, asset, date : str
        The partition.
    table : pyarrow.Table
        Rows; sorted here by their scalar columns so the file is a function of the rows.
    run_id : str
        The run's id (temporary folder name and provenance).
    metadata : mapping
        File key-value metadata (see :func:`provenance_metadata`).
    unique : str
        A token unique to this write attempt (retried attempts must not share temporary files).
    slot : str
        The rows' hour slot (:func:`split_by_slot`), kept for the commit.

    Returns
    -------
    PartFile
    """
    temp_folder = store.join(output_dir, TEMPORARY, run_id, table_name, f"asset={asset}", f"date={date}")
    return _write_sorted(store, temp_folder, table_name, asset, date, table, metadata, unique, slot)


def _write_sorted(
    store,
    temp_folder: str,
    table_name: str,
    asset: str,
    date: str,
    table: pa.Table,
    metadata: Mapping[str, str],
    unique: str,
    slot: str,
) -> PartFile:
    """Sort ``table`` by its scalar columns and write it as ``temp_folder/<part name>.<unique>``."""
    table = table.sort_by([(c, "ascending") for c in sort_columns(table)]).combine_chunks()
    name = part_file_name(table)
    temp = store.join(temp_folder, f"{name}.{unique}")
    merged = dict(table.schema.metadata or {})
    merged.update({k.encode(): v.encode() for k, v in metadata.items()})
    table = table.replace_schema_metadata(merged)
    with store.create(temp) as handle:
        pq.write_table(
            table,
            handle,
            compression="zstd",
            use_compliant_nested_type=True,
            coerce_timestamps="us",
            allow_truncated_timestamps=False,
            row_group_size=ROW_GROUP_ROWS,
            store_schema=True,
            **_encodings(table_name),
        )
    return PartFile(table_name, asset, date, temp, name, table.num_rows, slot, cells(table))


def merge_parts(store, parts: Sequence[PartFile]) -> PartFile:
    """One part file holding the rows of ``parts`` (distinct files of one partition), sorted.

    The result is the file :func:`write_part` writes for all those rows at once, byte for byte
    (the same sort, name, metadata and writer settings), so it does not depend on how the rows
    were split into parts. One part is returned as it is. The merged file goes beside the first
    part in the run's temporary area; the inputs stay there (a retried commit finds them) and go
    with the run's temporary folder.
    """
    parts = sorted(parts, key=lambda p: (p.name, p.temp_path))
    if len(parts) == 1:
        return parts[0]
    first = parts[0]
    pieces = []
    metadata: Dict[str, str] = {}
    for part in parts:
        with store.open(part.temp_path) as handle:
            piece = pq.read_table(handle)
        kept = {}
        for key, value in (piece.schema.metadata or {}).items():
            if key.startswith(META_PREFIX.encode()):
                metadata[key.decode()] = value.decode()
            elif key != b"ARROW:schema":
                kept[key] = value
        pieces.append(_arrow_list_names(piece).replace_schema_metadata(kept or None))
    table = pa.concat_tables(pieces)
    cut = max(first.temp_path.rfind("/"), first.temp_path.rfind("\\"))  # the folder of the temporary file
    folder = first.temp_path[:cut]
    return _write_sorted(store, folder, first.table, first.asset, first.date, table, metadata, "merged", first.slot)


def _arrow_list_names(table: pa.Table) -> pa.Table:
    """``table`` with its list columns' element fields named ``item`` again (Arrow's name, which
    the rows had before writing; the file stores Parquet's compliant name ``element``)."""
    fields = []
    for field in table.schema:
        if pa.types.is_list(field.type) and field.type.value_field.name != "item":
            field = field.with_type(pa.list_(field.type.value_field.with_name("item")))
        fields.append(field)
    schema = pa.schema(fields, metadata=table.schema.metadata)
    return table if schema.equals(table.schema, check_metadata=True) else table.cast(schema)


def partition_files_of(parts: Sequence[PartFile], max_cells: int = FILE_CELLS) -> List[List[PartFile]]:
    """The parts of one partition grouped by the file they go into: all in one when the
    partition holds at most ``max_cells`` cells, else one group per hour slot. A function of the
    rows (their total cells and slots), not of how they were split into parts."""
    if not parts:
        return []
    if sum(p.cells for p in parts) <= max_cells:
        return [list(parts)]
    by_slot: Dict[str, List[PartFile]] = {}
    for part in parts:
        by_slot.setdefault(part.slot, []).append(part)
    return [by_slot[s] for s in sorted(by_slot)]


def commit_partition(
    store,
    output_dir: str,
    table_name: str,
    asset: str,
    date: str,
    parts: Iterable[PartFile],
    max_cells: int = FILE_CELLS,
) -> CommitResult:
    """Merge a partition's part files into its files, move them into place and delete the
    partition's other files.

    Notes
    -----
    The part files are merged by :func:`partition_files_of` and :func:`merge_parts`: the files
    that appear depend on the rows only (one file, or one per hour slot above ``max_cells``).
    Each file appears atomically (a rename on local disks); new files are moved in before stale
    ones are deleted, so a reader during the commit may briefly see both, never neither. Every
    moved file is checked to exist afterwards: a rename that silently did nothing raises.
    """
    parts = sorted(parts, key=lambda p: (p.name, p.temp_path))
    for part in parts:
        if part.table != table_name or part.asset != asset or part.date != date:
            raise ValueError(f"part {part} does not belong to {table_name}/{asset}/{date}")
    distinct: Dict[str, PartFile] = {}
    for part in parts:  # the same rows written twice (the name is their digest): keep one copy
        distinct.setdefault(part.name, part)
    parts = [merge_parts(store, group) for group in partition_files_of(list(distinct.values()), max_cells)]
    folder = partition_folder(store, output_dir, table_name, asset, date)
    existing = store.list_files(folder)
    written: Dict[str, int] = {}
    if parts:
        store.mkdirs(folder)
    for part in parts:
        destination = store.join(folder, part.name)
        if part.name in written:  # two slots' files with the same rows cannot happen; keep one
            continue
        move_into_place(store, part.temp_path, destination)
        written[part.name] = part.rows
    stale = [p for p in existing if posixpath.basename(p.replace("\\", "/")) not in written]
    if stale:
        store.delete(stale)
    if not written and hasattr(store, "remove_empty_folder"):
        store.remove_empty_folder(folder)
    return CommitResult(table_name, asset, date, tuple(sorted(written)), sum(written.values()), tuple(sorted(stale)))


def move_into_place(store, temporary: str, destination: str) -> None:
    """Rename a finished temporary file onto its final name and check that it arrived.

    The one write-then-rename step of the package: part files at commit, the read-back summaries
    and the episodes table all appear this way, so a reader sees the old file or the new one,
    never half a file (a rename replaces atomically on local disks).

    Raises
    ------
    IOError
        The destination is not there after the rename (a filesystem whose rename silently did
        nothing).
    """
    store.rename(temporary, destination)
    if not store.exists(destination):
        raise OSError(f"commit of {destination} failed: the file is not there after the rename")


def temporary_path(store, output_dir: str, run_id: str, name: str) -> str:
    """A temporary file name for a derived file that is then moved into place: under the run's
    own ``DIR/_temporary/<run id>/`` (never beside the final file), so a run killed while writing
    leaves nothing in the tables or summaries; the run's cleanup (or the stale-run cleanup of a
    later run) removes it."""
    return store.join(output_dir, TEMPORARY, run_id or "unnamed-run", f"{name}.{uuid.uuid4().hex}.tmp")


def write_parquet_in_place(store, path: str, table: pa.Table, temporary: str) -> None:
    """Write ``table`` as one Parquet file (zstd, compliant nested names) to ``temporary``, then
    :func:`move_into_place` onto ``path`` (derived files that replace their previous version)."""
    with store.create(temporary) as handle:
        pq.write_table(table, handle, compression="zstd", use_compliant_nested_type=True)
    move_into_place(store, temporary, path)
    # a temporary_path() name: its run folder and _temporary go again when empty
    parts = temporary.replace("\\", "/").split("/")
    if hasattr(store, "remove_empty_folder") and TEMPORARY in parts[:-1]:
        run_folder = posixpath.dirname(temporary.replace("\\", "/"))
        store.remove_empty_folder(run_folder)
        store.remove_empty_folder(posixpath.dirname(run_folder))


def remove_temporary(store, output_dir: str, run_id: str) -> None:
    """Delete the run's temporary area (orphans of retried attempts included)."""
    store.delete_tree(store.join(output_dir, TEMPORARY, run_id))
    if hasattr(store, "remove_empty_folder"):
        store.remove_empty_folder(store.join(output_dir, TEMPORARY))


def write_tables(
    output_dir: str,
    config: AssetConfig,
    run_id: str,
    rows: Mapping[str, Iterable[Any]],
    days: Optional[Iterable[str]] = None,
    store=None,
) -> List[CommitResult]:
    """Write and commit whole tables in one process (notebooks, tests, small jobs).

    Parameters
    ----------
    output_dir : str
        Output root.
    config : AssetConfig
        Asset (name, time zone, provenance).
    run_id : str
        Id of this run.
    rows : mapping of table name to iterable of elements
        Elements as accepted by :func:`to_partitions`.
    days : iterable of str, optional
        Dates this run owns; their partitions are replaced even when they receive no rows.
        Partitions that receive rows are always owned.
    store : optional
        File access (default :class:`LocalFiles`).
    """
    store = store or LocalFiles()
    metadata = provenance_metadata(config, run_id)
    parts: Dict[Tuple[str, str], List[PartFile]] = {}
    owned = set(days or ())
    for table_name, elements in rows.items():
        pieces: Dict[Tuple[str, str], List[pa.Table]] = {}
        for element in elements:
            for date, table in to_partitions(table_name, element, config):
                for slot, piece in split_by_slot(table):
                    pieces.setdefault((date, slot), []).append(piece)
        for (date, slot), tabs in sorted(pieces.items()):
            owned.add(date)
            part = write_part(
                store,
                output_dir,
                table_name,
                config.name,
                date,
                pa.concat_tables(tabs),
                run_id,
                metadata,
                unique="0",
                slot=slot,
            )
            parts.setdefault((table_name, date), []).append(part)
    results = []
    for table_name in rows:
        for date in sorted(owned):
            results.append(
                commit_partition(store, output_dir, table_name, config.name, date, parts.get((table_name, date), []))
            )
    remove_temporary(store, output_dir, run_id)
    return results
