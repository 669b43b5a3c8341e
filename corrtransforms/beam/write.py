"""WriteTables: rows of every table -> committed Hive partitions (the last step of every run).

Part files are written where the rows are made (no shuffle of big rows) and each partition is
committed after a GroupByKey of the small part-file records; the commit merges a partition's part
files into files that depend on its rows only (one per partition, or one per hour slot of a large
partition: :func:`corrtransforms.stages.write.commit_partition`), so the output does not depend on
bundling or on the number of workers.
"""

from __future__ import annotations

import uuid
from typing import Dict, Sequence, Tuple, Union

import apache_beam as beam
from apache_beam.transforms.window import GlobalWindows

from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.beam.metrics import counter
from corrtransforms.config import AssetConfig
from corrtransforms.stages import write as table_writer

#: buffered bytes of one table's rows after which a writer flushes a part file
FLUSH_BYTES = 32 * 2**20


class _WritePartsFn(beam.DoFn):
    """Buffer one table's rows per partition and hour slot within a bundle; write part files to the
    temporary area."""

    def __init__(self, table_name: str, output_dir: str, config: AssetConfig, run_id: str, flush_bytes: int):
        self._table, self._output, self._config, self._run_id = table_name, output_dir, config, run_id
        self._flush_bytes = flush_bytes

    def setup(self):
        self._store = BeamFiles()
        self._metadata = table_writer.provenance_metadata(self._config, self._run_id)
        self._rows = counter(f"rows_written_{self._table}")

    def start_bundle(self):
        self._buffers: Dict[Tuple[str, str], list] = {}
        self._sizes: Dict[Tuple[str, str], int] = {}

    def _flush(self, key: Tuple[str, str]):
        import pyarrow as pa

        tables = self._buffers.pop(key, [])
        self._sizes.pop(key, None)
        if not tables:
            return None
        date, slot = key
        table = pa.concat_tables(tables)
        part = table_writer.write_part(
            self._store,
            self._output,
            self._table,
            self._config.name,
            date,
            table,
            self._run_id,
            self._metadata,
            unique=uuid.uuid4().hex,
            slot=slot,
        )
        self._rows.inc(part.rows)
        return part

    def process(self, element):
        for date, rows in table_writer.to_partitions(self._table, element, self._config):
            for slot, table in table_writer.split_by_slot(rows):
                key = (date, slot)
                self._buffers.setdefault(key, []).append(table)
                self._sizes[key] = self._sizes.get(key, 0) + table.nbytes
                if self._sizes[key] >= self._flush_bytes:
                    yield self._flush(key)

    def finish_bundle(self):
        for key in sorted(self._buffers):
            part = self._flush(key)
            if part is not None:
                yield GlobalWindows.windowed_value(part)


class _CommitFn(beam.DoFn):
    def __init__(self, table_names: Sequence[str], output_dir: str):
        self._tables, self._output = tuple(table_names), output_dir

    def setup(self):
        self._store = BeamFiles()
        self._files = counter("files_committed")
        self._stale = counter("stale_files_removed")

    def process(self, keyed):
        (asset, date), values = keyed
        parts = [v for v in values if v is not None]
        for name in self._tables:
            result = table_writer.commit_partition(
                self._store, self._output, name, asset, date, [p for p in parts if p.table == name]
            )
            self._files.inc(len(result.files))
            self._stale.inc(len(result.removed))
            yield result


def remove_run_temporary(results, output_dir: str, run_id: str):
    """Delete the run's temporary folder once ``results`` (every commit) are in; returns them sorted."""
    table_writer.remove_temporary(BeamFiles(), output_dir, run_id)
    return sorted(results)


class WriteTables(beam.PTransform):
    """Write tables into ``DIR/<table>/asset=NAME/date=YYYY-MM-DD/`` and replace those partitions.

    Apply to a dict of PCollections, table name -> elements (``pyarrow.Table`` rows of that table,
    :class:`~corrtransforms.rejects.Reject` for "rejects", WindowCorrelation for "correlations").

    Parameters
    ----------
    output_dir : str
        Output root (local path or Beam filesystem URL).
    config : AssetConfig
        The asset (name, time zone, provenance).
    run_id : str
        Id of this run (temporary folder and file metadata).
    days : sequence of str or PCollection of str, optional
        Dates the run owns: their partitions of every table in the dict are replaced even when
        the run has no rows for them. Dates that receive rows are always owned.
    flush_bytes : int
        Buffered bytes per table, partition and hour slot after which a part file is written
        (bounds a writer's memory; the committed files do not depend on it).
    remove_temporary : bool
        Delete the run's temporary folder after the commits (the default). False leaves that to
        the caller: in a fleet every asset writes under the same run id, and the folder goes
        once all of them are committed (:class:`~corrtransforms.beam.monitor.MonitorFleet`).

    Returns
    -------
    PCollection
        One list of :class:`~corrtransforms.stages.write.CommitResult` (after the cleanup).

    Notes
    -----
    Part files are written where the rows are made (no shuffle of correlation rows); only the
    small part-file records go through the GroupByKey per (asset, date) that commits a partition.
    A retried bundle writes new temporary files under a fresh token; only files reported by
    successful bundles are committed, the rest go with the temporary folder. The commit merges
    a partition's part files (:func:`corrtransforms.stages.write.commit_partition`): a partition
    of at most ``FILE_CELLS`` cells becomes one file, a larger one one file per hour of
    ``window_start``, each with its rows sorted and named by their digest, so the committed
    files are the same bytes whatever the bundles, the flush size or the number of workers.
    """

    def __init__(
        self,
        output_dir: str,
        config: AssetConfig,
        run_id: str,
        days: Union[None, Sequence[str], beam.PCollection] = None,
        flush_bytes: int = FLUSH_BYTES,
        remove_temporary: bool = True,
    ):
        super().__init__()
        self._output, self._config, self._run_id = output_dir, config, run_id
        self._days, self._flush_bytes = days, flush_bytes
        self._remove_temporary = remove_temporary

    def expand(self, tables: Dict[str, beam.PCollection]):
        names = sorted(tables)
        asset = self._config.name
        pipeline = next(iter(tables.values())).pipeline
        keyed = []
        for name in names:
            parts = tables[name] | f"Write {name} parts" >> beam.ParDo(
                _WritePartsFn(name, self._output, self._config, self._run_id, self._flush_bytes)
            )
            keyed.append(parts | f"Key {name} parts" >> beam.Map(lambda p: ((p.asset, p.date), p)))
        if self._days is not None:
            days = (
                self._days
                if isinstance(self._days, beam.PCollection)
                else (pipeline | "Owned days" >> beam.Create(list(self._days)))
            )
            keyed.append(days | "Key owned days" >> beam.Map(lambda d: ((asset, d), None)))
        results = (
            keyed
            | "All parts" >> beam.Flatten()
            | "Group by partition" >> beam.GroupByKey()
            | "Commit partitions" >> beam.ParDo(_CommitFn(names, self._output))
        )
        collected = results | "Collect commits" >> beam.combiners.ToList()
        if not self._remove_temporary:
            return collected | "Sort commits" >> beam.Map(sorted)
        return collected | "Remove temporary files" >> beam.Map(remove_run_temporary, self._output, self._run_id)
