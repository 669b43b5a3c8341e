"""Public Beam transforms from a Parquet archive to written tables.

Each transform wraps core functions (no numerics here), routes failures to a ``"rejects"`` output
and counts with Beam metrics in the ``"corrtransforms"`` namespace. Each is usable alone:

- :class:`PlanReads`: ``pipeline | PlanReads(config)`` -> ``{"tasks", "rejects", "days"}``; lists the
  archive, reads footers in parallel, plans windows and read tasks, then a Reshuffle so only small
  task descriptions travel.
- :class:`ReadWindows`: tasks -> ``{"blocks", "rejects"}``.
- :class:`CorrelateWindows`: blocks -> ``{"correlations", "rejects"}`` (WindowCorrelation records).
- :class:`WriteTables`: ``{"correlations": ..., "rejects": ...} | WriteTables(output, config, run_id)``
  writes part files per bundle (no shuffle of big rows) and commits per partition after a
  GroupByKey of the small part-file records.

All file access goes through :class:`apache_beam.io.filesystems.FileSystems`, so local paths and
gs://, s3://, hdfs:// URLs work alike.
"""
from __future__ import annotations

import datetime as _dt
import logging
import uuid
from typing import Dict, List, Optional, Sequence, Union

import apache_beam as beam
from apache_beam.io.filesystem import CompressionTypes
from apache_beam.io.filesystems import FileSystems
from apache_beam.metrics import Metrics
from apache_beam.transforms.window import GlobalWindows

from corrtransforms import archive_plan, table_writer, window_read
from corrtransforms.archive_plan import FileFooter, ReadTask
from corrtransforms.config import AssetConfig
from corrtransforms.rejects import WHOLE_WINDOW, Reject, iso_utc
from corrtransforms.window_block import WindowBlock

NAMESPACE = "corrtransforms"
#: Beam's in-process runner. "DirectRunner" of this Beam version first tries to download the
#: Prism runner binary from the network; FnApiRunner is what it falls back to, without trying.
LOCAL_RUNNER = "FnApiRunner"
#: buffered bytes of one table's rows after which a writer flushes a part file
FLUSH_BYTES = 32 * 2**20

_LOG = logging.getLogger(__name__)


def counter(name: str):
    return Metrics.counter(NAMESPACE, name)


def open_file(path: str):
    """Open ``path`` for binary reading through Beam's FileSystems (any registered scheme)."""
    return FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED)


class BeamFiles:
    """The :mod:`corrtransforms.table_writer` store interface over Beam's FileSystems."""

    def join(self, *parts: str) -> str:
        return FileSystems.join(*parts)

    def create(self, path: str):
        return FileSystems.create(path, compression_type=CompressionTypes.UNCOMPRESSED)

    def rename(self, source: str, destination: str) -> None:
        FileSystems.rename([source], [destination])

    def exists(self, path: str) -> bool:
        return FileSystems.exists(path)

    def mkdirs(self, folder: str) -> None:
        if FileSystems.exists(folder):
            return
        try:
            FileSystems.mkdirs(folder)
        except IOError:
            if not FileSystems.exists(folder):
                raise

    def list_files(self, folder: str) -> List[str]:
        pattern = FileSystems.join(folder, "*")
        try:
            result = FileSystems.match([pattern])[0]
        except Exception:  # noqa: BLE001 - a missing folder matches nothing
            return []
        return sorted(m.path for m in result.metadata_list)

    def delete(self, paths: Sequence[str]) -> None:
        if paths:
            FileSystems.delete(list(paths))

    def delete_tree(self, folder: str) -> None:
        """Delete everything below ``folder``. Object stores (gs://, s3://) have no folders:
        ``exists`` is false for a prefix and deleting the prefix name deletes nothing, so the
        files below it are listed and deleted one by one."""
        if FileSystems.exists(folder):  # a real folder: local disk, HDFS
            FileSystems.delete([folder])
            return
        try:
            below = FileSystems.match([FileSystems.join(folder, "**")])[0].metadata_list
        except Exception:  # noqa: BLE001 - nothing below the prefix matches nothing
            return
        if below:
            FileSystems.delete([m.path for m in below])

    def remove_empty_folder(self, folder: str) -> None:
        if "://" in folder:
            return  # object stores have no folders
        table_writer.LocalFiles().remove_empty_folder(folder)


def list_archive(pattern: str) -> List[str]:
    """Files of the archive: ``pattern`` as a glob, a folder as everything below it (hidden
    ``.``/``_`` names skipped), sorted. No match is an error (a wrong path must not pass quietly)."""
    expanded = archive_plan.expand_archive_path(pattern)
    root = pattern.rstrip("/") + "/" if expanded != pattern else ""
    result = FileSystems.match([expanded])[0]
    paths = sorted(m.path for m in result.metadata_list if not archive_plan.is_hidden(m.path, root))
    if not paths:
        raise FileNotFoundError(f"[archive] path = {pattern!r}: no files match {expanded!r}")
    return paths


# --------------------------------------------------------------------------------------------
# Plan


class _ReadFooterFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._files = counter("files_listed")
        self._unusable = counter("files_rejected")

    def process(self, path: str):
        self._files.inc()
        footer, findings = archive_plan.read_footer(path, self._config, open_file)
        if footer is None:
            self._unusable.inc()
        else:
            yield footer
        yield from findings


class _PlanFn(beam.DoFn):
    def __init__(self, config: AssetConfig, start, end):
        self._config, self._start, self._end = config, start, end

    def setup(self):
        self._windows = counter("windows_planned")
        self._tasks = counter("read_tasks")

    def process(self, items: List[Union[FileFooter, Reject]]):
        footers = [i for i in items if isinstance(i, FileFooter)]
        findings = [i for i in items if isinstance(i, Reject)]
        plan = archive_plan.plan_reads(footers, findings, self._config, self._start, self._end)
        for task in plan.tasks:
            self._tasks.inc()
            self._windows.inc(len(task.window_starts_us))
            yield task
        for finding in plan.rejects:
            yield beam.pvalue.TaggedOutput("rejects", finding)
        for day in plan.days:
            yield beam.pvalue.TaggedOutput("days", day)


class PlanReads(beam.PTransform):
    """Plan an asset's archive from Parquet footers: ``pipeline | PlanReads(config)``.

    Parameters
    ----------
    config : AssetConfig
        The asset; ``[archive] path`` is listed (a folder, a glob or any Beam filesystem URL).
    start, end : datetime.date, optional
        Only windows starting on these calendar days (inclusive, asset time zone).
    pattern : str, optional
        Files to list instead of ``[archive] path``.

    Returns
    -------
    dict
        ``"tasks"``: :class:`~corrtransforms.archive_plan.ReadTask` after a Reshuffle;
        ``"rejects"``: file-level findings; ``"days"``: the dates (``YYYY-MM-DD``) this run owns.
    """

    def __init__(self, config: AssetConfig, start: Optional[_dt.date] = None, end: Optional[_dt.date] = None,
                 pattern: Optional[str] = None):
        super().__init__()
        self._config, self._start, self._end = config, start, end
        self._pattern = pattern or config.archive.path

    def expand(self, pbegin):
        start, end = self._start, self._end
        paths = (pbegin
                 | "Archive pattern" >> beam.Create([self._pattern])
                 | "List files" >> beam.FlatMap(list_archive)
                 | "Skip days outside the range" >> beam.Filter(archive_plan.in_day_range, start, end)
                 | "Spread files" >> beam.Reshuffle())
        footers = paths | "Read footers" >> beam.ParDo(_ReadFooterFn(self._config))
        planned = (footers
                   | "Collect footers" >> beam.combiners.ToList()
                   | "Plan windows and tasks" >> beam.ParDo(_PlanFn(self._config, start, end))
                   .with_outputs("rejects", "days", main="tasks"))
        tasks = planned.tasks | "Spread tasks" >> beam.Reshuffle()
        return {"tasks": tasks, "rejects": planned.rejects, "days": planned.days}


# --------------------------------------------------------------------------------------------
# Read


def _whole_window_reject(config: AssetConfig, start_us: int, stage: str, reason: str, detail: str) -> Reject:
    return Reject(stage=stage, source=iso_utc(start_us), subject=WHOLE_WINDOW, reason=reason,
                  detail=detail, asset=config.name, window_start_us=int(start_us))


def _count_reject(finding: Reject) -> None:
    counter(f"findings_{finding.reason}").inc()
    if finding.rejects_whole_window:
        counter("windows_rejected").inc()
        counter(f"windows_rejected_{finding.reason}").inc()


class _ReadWindowsFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._blocks = counter("windows_read")
        self._samples = counter("samples_read")

    def process(self, task: ReadTask):
        done = set()
        try:
            for item in window_read.read_windows(task, self._config, open_file):
                if isinstance(item, WindowBlock):
                    done.add(item.window_start_us)
                    self._blocks.inc()
                    self._samples.inc(int(item.valid.sum()))
                    yield item
                else:
                    if item.rejects_whole_window:
                        done.add(item.window_start_us)
                    _count_reject(item)
                    yield beam.pvalue.TaggedOutput("rejects", item)
        except Exception as err:  # noqa: BLE001 - an unforeseen failure rejects the rest, loudly
            _LOG.exception("read task %s failed", task.task_id)
            for start_us in task.window_starts_us:
                if start_us not in done:
                    finding = _whole_window_reject(self._config, start_us, "read", "decode_failed",
                                                   f"reading task {task.task_id} failed: {type(err).__name__}: {err}")
                    _count_reject(finding)
                    yield beam.pvalue.TaggedOutput("rejects", finding)


class ReadWindows(beam.PTransform):
    """Read tasks -> one :class:`~corrtransforms.window_block.WindowBlock` per computed window.

    Returns ``{"blocks": ..., "rejects": ...}``; every planned window is either a block or a
    whole-window reject (counters ``windows_read`` and ``windows_rejected``).
    """

    def __init__(self, config: AssetConfig):
        super().__init__()
        self._config = config

    def expand(self, tasks):
        out = tasks | "Read task windows" >> beam.ParDo(_ReadWindowsFn(self._config)).with_outputs(
            "rejects", main="blocks")
        return {"blocks": out.blocks, "rejects": out.rejects}


# --------------------------------------------------------------------------------------------
# Correlate


class _CorrelateFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        from corrtransforms.window_analysis import analyse_window

        self._analyse = analyse_window
        self._computed = counter("windows_computed")

    def process(self, block: WindowBlock):
        try:
            result, findings = self._analyse(block, self._config)
        except Exception as err:  # noqa: BLE001 - routed to rejects with the error text
            finding = _whole_window_reject(self._config, block.window_start_us, "correlate", "correlation_failed",
                                           f"{type(err).__name__}: {err}")
            _count_reject(finding)
            yield beam.pvalue.TaggedOutput("rejects", finding)
            return
        for finding in findings:  # screening's exclusion: a whole-window reject
            _count_reject(finding)
            yield beam.pvalue.TaggedOutput("rejects", finding)
        if result is None:
            return
        if not result.pairs:
            finding = _whole_window_reject(self._config, block.window_start_us, "correlate", "no_valid_pairs",
                                           f"channels {list(block.channels)}, pairs {self._config.correlation.pairs!r}")
            _count_reject(finding)
            yield beam.pvalue.TaggedOutput("rejects", finding)
            return
        self._computed.inc()
        yield result


class CorrelateWindows(beam.PTransform):
    """Window blocks -> :class:`~corrtransforms.records.WindowCorrelation` (``analyse_window``:
    stationarity screening, then ``correlate_window``).

    Returns ``{"correlations": ..., "rejects": ...}``; a window whose estimator fails or has no
    usable pair becomes a whole-window reject (``correlation_failed`` / ``no_valid_pairs``).
    """

    def __init__(self, config: AssetConfig):
        super().__init__()
        self._config = config

    def expand(self, blocks):
        out = blocks | "Correlate each window" >> beam.ParDo(_CorrelateFn(self._config)).with_outputs(
            "rejects", main="correlations")
        return {"correlations": out.correlations, "rejects": out.rejects}


# --------------------------------------------------------------------------------------------
# Write


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
        part = table_writer.write_part(self._store, self._output, self._table, self._config.name, date, table,
                                       self._run_id, self._metadata, unique=uuid.uuid4().hex)
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
            result = table_writer.commit_partition(self._store, self._output, name, asset, date,
                                                   [p for p in parts if p.table == name])
            self._files.inc(len(result.files))
            self._stale.inc(len(result.removed))
            yield result


def _remove_temporary(results, output_dir: str, run_id: str):
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

    Returns
    -------
    PCollection
        One list of :class:`~corrtransforms.table_writer.CommitResult` (after the cleanup).

    Notes
    -----
    Part files are written where the rows are made (no shuffle of correlation rows); only the
    small part-file records go through the GroupByKey per (asset, date) that commits a partition.
    A retried bundle writes new temporary files under a fresh token; only files reported by
    successful bundles are committed, the rest go with the temporary folder.
    """

    def __init__(self, output_dir: str, config: AssetConfig, run_id: str,
                 days: Union[None, Sequence[str], beam.PCollection] = None, flush_bytes: int = FLUSH_BYTES):
        super().__init__()
        self._output, self._config, self._run_id = output_dir, config, run_id
        self._days, self._flush_bytes = days, flush_bytes

    def expand(self, tables: Dict[str, beam.PCollection]):
        names = sorted(tables)
        asset = self._config.name
        pipeline = next(iter(tables.values())).pipeline
        keyed = []
        for name in names:
            parts = (tables[name]
                     | f"Write {name} parts" >> beam.ParDo(_WritePartsFn(name, self._output, self._config,
                                                                          self._run_id, self._flush_bytes)))
            keyed.append(parts | f"Key {name} parts" >> beam.Map(lambda p: ((p.asset, p.date), p)))
        if self._days is not None:
            days = self._days if isinstance(self._days, beam.PCollection) else (
                pipeline | "Owned days" >> beam.Create(list(self._days)))
            keyed.append(days | "Key owned days" >> beam.Map(lambda d: ((asset, d), None)))
        results = (keyed
                   | "All parts" >> beam.Flatten()
                   | "Group by partition" >> beam.GroupByKey()
                   | "Commit partitions" >> beam.ParDo(_CommitFn(names, self._output)))
        return (results
                | "Collect commits" >> beam.combiners.ToList()
                | "Remove temporary files" >> beam.Map(_remove_temporary, self._output, self._run_id))


def window_accounting(metrics_result) -> Dict[str, int]:
    """Counters of the "corrtransforms" namespace from a finished pipeline's metrics."""
    from apache_beam.metrics.metric import MetricsFilter

    found = metrics_result.query(MetricsFilter().with_namespace(NAMESPACE))
    out: Dict[str, int] = {}
    for item in found["counters"]:
        value = item.committed if item.committed is not None else item.attempted
        out[item.key.metric.name] = out.get(item.key.metric.name, 0) + int(value or 0)
    return out
