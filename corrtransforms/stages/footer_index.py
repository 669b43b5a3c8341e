"""The footer index: what planning learned about each archive file, so later runs need not reopen it.

Planning opens a file's Parquet footer to learn its time range. For an archive whose names say
nothing about time (no ``date=`` folders, no ``[archive] file_time_pattern``), a nightly run would
open every footer of the archive's history. The index keeps, per file, its path, size,
modification time and time range (first and last sample, UTC) in
``OUTPUT/_summaries/asset=NAME/footer_index.parquet`` (beside the read-back summaries of
:mod:`corrtransforms.stages.summaries`, derived data, safe to delete). A listed file whose size and
modification time equal its entry is known without opening it; planning opens it only when its
range can hold samples of the requested days (:func:`corrtransforms.stages.plan.choose_files`).
A changed or new file is opened and its entry rewritten.

All file access goes through a store (:class:`corrtransforms.stages.write.LocalFiles`, or
:class:`corrtransforms.beam.filesystems.BeamFiles` for any Beam filesystem), so the index works on
``gs://`` and friends; this module stays pure pyarrow.
"""

from __future__ import annotations

import dataclasses
import json
from typing import Dict, Iterable, Mapping, Optional

import pyarrow as pa
import pyarrow.parquet as pq

from corrtransforms.config import AssetConfig
from corrtransforms.stages import summaries
from corrtransforms.stages import write as table_writer

#: name of the index under ``DIR/_summaries/asset=NAME/``
FOOTER_INDEX = "footer_index"
_FORMAT = "1"
_FORMAT_KEY = b"corrtransforms.footer_index.format"
_READING_KEY = b"corrtransforms.footer_index.reading"

SCHEMA = pa.schema(
    [
        pa.field("path", pa.string(), nullable=False),
        pa.field("size", pa.int64(), nullable=False),
        pa.field("mtime_s", pa.float64(), nullable=False),
        pa.field("start_us", pa.int64(), nullable=False),
        pa.field("end_us", pa.int64(), nullable=False),
    ]
)


@dataclasses.dataclass(frozen=True)
class ListedFile:
    """A file of the archive as the listing reports it.

    ``mtime_s`` is the modification time in seconds since the epoch, None when the filesystem
    does not report one (such a file is never taken from the index: it is always opened).
    """

    path: str
    size: int
    mtime_s: Optional[float] = None


@dataclasses.dataclass(frozen=True)
class IndexEntry:
    """One file of the index: its size and modification time when its footer was read, and the
    UTC time range (microseconds) of its samples from that footer."""

    path: str
    size: int
    mtime_s: float
    start_us: int
    end_us: int

    def describes(self, listed: ListedFile) -> bool:
        """True when ``listed`` is the file this entry was made from (same path, size and
        modification time, the time known)."""
        return (
            listed.mtime_s is not None
            and listed.mtime_s > 0
            and listed.path == self.path
            and listed.size == self.size
            and listed.mtime_s == self.mtime_s
        )


def entry_for(listed: ListedFile, start_us: int, end_us: int) -> Optional[IndexEntry]:
    """The index entry of a file whose footer gave ``[start_us, end_us]`` (None without a
    modification time: nothing would tell a changed file from the indexed one)."""
    if listed.mtime_s is None or not listed.mtime_s > 0:
        return None
    return IndexEntry(listed.path, int(listed.size), float(listed.mtime_s), int(start_us), int(end_us))


def _reading(config: AssetConfig) -> bytes:
    """The settings a file's time range depends on: an index made with others is not used."""
    archive = config.archive
    return json.dumps({"time_column": archive.time_column, "timezone": archive.timezone}, sort_keys=True).encode()


def index_path(store, output_dir: str, config: AssetConfig) -> str:
    """``DIR/_summaries/asset=NAME/footer_index.parquet``."""
    return summaries.summary_path(store, output_dir, config.name, FOOTER_INDEX)


def load_footer_index(store, output_dir: str, config: AssetConfig) -> Dict[str, IndexEntry]:
    """The entries of the asset's index by path; empty when there is none, when it is damaged or
    of another format, or when it was made with another ``[archive] time_column`` or ``timezone``
    (every file is then opened, as without an index)."""
    path = index_path(store, output_dir, config)
    try:
        if not store.exists(path):
            return {}
        with store.open(path) as handle:
            table = pq.read_table(handle)
        metadata = table.schema.metadata or {}
        if metadata.get(_FORMAT_KEY) != _FORMAT.encode() or metadata.get(_READING_KEY) != _reading(config):
            return {}
        if not table.schema.remove_metadata().equals(SCHEMA):
            return {}
        rows = table.to_pydict()
    except Exception:  # noqa: BLE001 - a damaged index is rebuilt: every file is opened once
        return {}
    entries = (IndexEntry(*values) for values in zip(*(rows[name] for name in SCHEMA.names)))
    return {entry.path: entry for entry in entries}


def write_footer_index(
    store,
    output_dir: str,
    config: AssetConfig,
    entries: Iterable[IndexEntry],
    provenance: Optional[Mapping[str, str]] = None,
) -> bool:
    """Replace the asset's index with ``entries`` (one per path; files no longer listed drop
    out), unless it already holds exactly these. Written to a temporary name, then renamed, with
    ``provenance`` (:func:`corrtransforms.stages.write.provenance_metadata`) in its file metadata.

    Returns
    -------
    bool
        True when the index was written.
    """
    by_path = {entry.path: entry for entry in entries}
    if by_path == load_footer_index(store, output_dir, config):
        return False
    ordered = [by_path[p] for p in sorted(by_path)]
    columns = {name: [getattr(e, name) for e in ordered] for name in SCHEMA.names}
    metadata = {k.encode(): v.encode() for k, v in (provenance or {}).items()}
    metadata.update({_FORMAT_KEY: _FORMAT.encode(), _READING_KEY: _reading(config)})
    table = pa.Table.from_pydict(columns, schema=SCHEMA).replace_schema_metadata(metadata)
    path = index_path(store, output_dir, config)
    store.mkdirs(summaries.summary_folder(store, output_dir, config.name))
    run_id = (provenance or {}).get(table_writer.META_PREFIX + "run_id", "")
    temporary = table_writer.temporary_path(store, output_dir, run_id, "footer_index.parquet")
    table_writer.write_parquet_in_place(store, path, table, temporary)
    return True
