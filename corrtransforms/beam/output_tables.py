"""Reading back and summarising the output tables through Beam's FileSystems (no numerics).

Used by the launchers before and after a pipeline: the nightly run reads earlier state (or
indicators, to rebuild it), and every run rewrites the asset's episodes summary from its shifts
table. All access goes through :class:`apache_beam.io.filesystems.FileSystems`, so the output
folder may be any registered filesystem URL.
"""
from __future__ import annotations

import datetime as _dt
import re
from typing import Callable, List, Optional, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from apache_beam.io.filesystems import CompressionTypes, FileSystems

from corrtransforms import shift_series, table_writer, tables
from corrtransforms.beam.archive import BeamFiles
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
    if columns is not None:
        schema = pa.schema([schema.field(name) for name in columns])
    pieces = []
    for date, path in partition_files(output_dir, table, asset):
        if before is not None and _dt.date.fromisoformat(date) >= before:
            continue
        with FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED) as handle:
            read = pq.read_table(handle, columns=None if columns is None else list(columns))
        piece = table_writer.conform(read, schema)
        if keep is None:
            pieces.append(piece)
        else:
            pieces = [keep(pa.concat_tables(pieces + [piece]))]
    if not pieces:
        return schema.empty_table()
    return pa.concat_tables(pieces)


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
    renamed into place). Returns the number of episodes.
    """
    evidence = read_partitions(output_dir, "shifts", config.name, tables.SHIFTS, columns=EPISODE_COLUMNS,
                               keep=episode_evidence)
    episodes = shift_series.shift_episodes(evidence)
    store = BeamFiles()
    folder = store.join(output_dir, "episodes", f"asset={config.name}")
    store.mkdirs(folder)
    final = store.join(folder, "episodes.parquet")
    temporary = store.join(folder, f"_episodes-{run_id}.tmp")
    metadata = table_writer.provenance_metadata(config, run_id)
    episodes = episodes.replace_schema_metadata({**(episodes.schema.metadata or {}),
                                                 **{k.encode(): v.encode() for k, v in metadata.items()}})
    with store.create(temporary) as handle:
        pq.write_table(episodes, handle, compression="zstd", use_compliant_nested_type=True)
    store.rename(temporary, final)
    return episodes.num_rows
