"""PlanReads: an asset's archive -> read tasks, from the Parquet footers only (stage 1)."""

from __future__ import annotations

import datetime as _dt
from typing import List, Optional, Tuple, Union

import apache_beam as beam

from corrtransforms.beam.filesystems import BeamFiles, list_archive_files, open_file
from corrtransforms.beam.metrics import counter
from corrtransforms.config import AssetConfig
from corrtransforms.rejects import Reject
from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages.footer_index import (
    IndexEntry,
    ListedFile,
    entry_for,
    load_footer_index,
    write_footer_index,
)
from corrtransforms.stages.plan import FileFooter
from corrtransforms.stages.write import provenance_metadata


class _ChooseFilesFn(beam.DoFn):
    """The archive pattern -> the files whose footers this run opens, and (tagged ``indexed``)
    the footer-index entries of the files known without opening them."""

    def __init__(self, config: AssetConfig, start, end, output_dir: Optional[str]):
        self._config, self._start, self._end, self._output = config, start, end, output_dir

    def setup(self):
        self._listed = counter("files_in_archive")
        self._by_name = counter("files_skipped_by_name")
        self._by_index = counter("files_skipped_by_index")

    def process(self, pattern: str):
        listed = list_archive_files(pattern)
        index = load_footer_index(BeamFiles(), self._output, self._config) if self._output else {}
        choice = archive_plan.choose_files(listed, self._config, self._start, self._end, index)
        self._listed.inc(len(listed))
        self._by_name.inc(choice.skipped_by_name)
        self._by_index.inc(choice.skipped_by_index)
        yield from choice.open
        for entry in choice.carried:
            yield beam.pvalue.TaggedOutput("indexed", entry)


class _ReadFooterFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._opened = counter("footers_opened")
        self._files = counter("files_listed")
        self._unusable = counter("files_rejected")

    def process(self, listed: ListedFile):
        self._opened.inc()
        self._files.inc()
        footer, findings = archive_plan.read_footer(listed.path, self._config, open_file)
        if footer is None:
            self._unusable.inc()
        else:
            yield footer
            mismatch = archive_plan.file_time_finding(footer, self._config)
            findings = findings + ([mismatch] if mismatch else [])
            entry = entry_for(listed, footer.start_us, footer.end_us)
            if entry is not None:
                yield beam.pvalue.TaggedOutput("indexed", entry)
        yield from findings


def _write_index(entries: List[IndexEntry], output_dir: str, config: AssetConfig, run_id: str) -> bool:
    provenance = provenance_metadata(config, run_id)
    written = write_footer_index(BeamFiles(), output_dir, config, entries, provenance)
    if written:
        counter("footer_index_written").inc()
    return written


class _PlanFn(beam.DoFn):
    def __init__(self, config: AssetConfig, start, end, report_edges=(True, True)):
        self._config, self._start, self._end = config, start, end
        self._report_edges = tuple(report_edges)

    def setup(self):
        self._windows = counter("windows_planned")
        self._tasks = counter("read_tasks")

    def process(self, items: List[Union[FileFooter, Reject]]):
        footers = [i for i in items if isinstance(i, FileFooter)]
        findings = [i for i in items if isinstance(i, Reject)]
        plan = archive_plan.plan_reads(footers, findings, self._config, self._start, self._end, self._report_edges)
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
    output_dir : str, optional
        The output root: the footer index (:mod:`corrtransforms.stages.footer_index`) is read from
        and written to ``output_dir/_summaries/asset=NAME/footer_index.parquet``, so a run for a
        few days opens only the footers of files whose range can hold them. None: no index.
    run_id : str
        The run's id in the index's provenance metadata.
    report_edges : (bool, bool)
        Whether file findings dated before ``start`` (or undated) / after ``end`` are reported by
        this run, moved onto its first / last day (the default); a backfill's inner day chunks
        leave them to the neighbouring chunk, so each finding is written once.

    Notes
    -----
    Files not opened (:func:`corrtransforms.stages.plan.choose_files`): ``date=`` folders more
    than a day outside the days, names whose ``[archive] file_time_pattern`` start lies outside
    them, and indexed files of unchanged size and modification time whose range lies outside
    them. Counters: ``files_in_archive`` (listed), ``footers_opened`` (``files_listed`` counts
    the same, its name kept from before the skipping), ``files_skipped_by_name``,
    ``files_skipped_by_index``, ``footer_index_written``.

    Returns
    -------
    dict
        ``"tasks"``: :class:`~corrtransforms.stages.plan.ReadTask` after a Reshuffle;
        ``"rejects"``: file-level findings; ``"days"``: the dates (``YYYY-MM-DD``) this run owns.
    """

    def __init__(
        self,
        config: AssetConfig,
        start: Optional[_dt.date] = None,
        end: Optional[_dt.date] = None,
        pattern: Optional[str] = None,
        output_dir: Optional[str] = None,
        run_id: str = "",
        report_edges: Tuple[bool, bool] = (True, True),
    ):
        super().__init__()
        self._config, self._start, self._end = config, start, end
        self._pattern = pattern or config.archive.path
        self._output, self._run_id = output_dir, run_id
        self._report_edges = tuple(report_edges)

    def expand(self, pbegin):
        start, end = self._start, self._end
        chosen = (
            pbegin
            | "Archive pattern" >> beam.Create([self._pattern])
            | "List files and skip days outside the range"
            >> beam.ParDo(_ChooseFilesFn(self._config, start, end, self._output)).with_outputs("indexed", main="open")
        )
        footers = (
            chosen.open
            | "Spread files" >> beam.Reshuffle()
            | "Read footers" >> beam.ParDo(_ReadFooterFn(self._config)).with_outputs("indexed", main="footers")
        )
        if self._output:
            _ = (
                (chosen.indexed, footers.indexed)
                | "Index entries" >> beam.Flatten()
                | "Collect index entries" >> beam.combiners.ToList()
                | "Write footer index" >> beam.Map(_write_index, self._output, self._config, self._run_id)
            )
        planned = (
            footers.footers
            | "Collect footers" >> beam.combiners.ToList()
            | "Plan windows and tasks"
            >> beam.ParDo(_PlanFn(self._config, start, end, self._report_edges)).with_outputs(
                "rejects", "days", main="tasks"
            )
        )
        tasks = planned.tasks | "Spread tasks" >> beam.Reshuffle()
        return {"tasks": tasks, "rejects": planned.rejects, "days": planned.days}
