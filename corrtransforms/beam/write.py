"""WriteTables: rows of every table -> committed Hive partitions (the last step of every run).

Part files are written where the rows are made (no shuffle of big rows) and each partition is
committed after a GroupByKey of the small part-file records.
"""

from __future__ import annotations

import uuid
from typing import Dict, Sequence, Union

import apache_beam as beam
from apache_beam.transforms.window import GlobalWindows

from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.beam.metrics import counter
from corrtransforms.config import AssetConfig
from corrtransforms.stages import write as table_writer

#: buffered bytes of one table's rows after which a writer flushes a part file
FLUSH_BYTES = 32 * 2**20


class _WritePartsFn(beam.DoFn):
    """Buffer one table's rows per partition within a bundle; write part files to the temporary area."""

    def __init__(self, table_name: str, output_dir: str, config: AssetConfig, run_id: str, flush_bytes: int):
        self._table, self._output, self._config, self._run_id = table_name, output_dir, config, run_id
        self._flush_bytes = flush_bytes

    def setup(self):
        self._store = BeamFiles()
        self._metadata = table_writer.provenance_metadata(self._config, self._run_id)
        self._rows = counter(f"rows_written_{self._table}")

    def start_bundle(self):
        self._buffers: Dict[str, list] = {}
        self._sizes: Dict[str, int] = {}

    def _flush(self, date: str):
        import pyarrow as pa

        tables = self._buffers.pop(date, [])
        self._sizes.pop(date, None)
        if not tables:
            return None
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
        )
        self._rows.inc(part.rows)
        return part

    def process(self, element):
        for date, table in table_writer.to_partitions(self._table, element, self._config):
            self._buffers.setdefault(date, []).append(table)
            self._sizes[date] = self._sizes.get(date, 0) + table.nbytes
            if self._sizes[date] >= self._flush_bytes:
                yield self._flush(date)

    def finish_bundle(self):
        for date in sorted(self._buffers):
            part = self._flush(date)
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
        Buffered bytes per table and partition after which a part file is written.
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
    successful bundles are committed, the rest go with the temporary folder.
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
