"""PlanReads: an asset's archive -> read tasks, from the Parquet footers only (stage 1)."""

from __future__ import annotations

import datetime as _dt
from typing import List, Optional, Union

import apache_beam as beam

from corrtransforms.beam.filesystems import list_archive, open_file
from corrtransforms.beam.metrics import counter
from corrtransforms.config import AssetConfig
from corrtransforms.rejects import Reject
from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages.plan import FileFooter


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
        ``"tasks"``: :class:`~corrtransforms.stages.plan.ReadTask` after a Reshuffle;
        ``"rejects"``: file-level findings; ``"days"``: the dates (``YYYY-MM-DD``) this run owns.
    """

    def __init__(
        self,
        config: AssetConfig,
        start: Optional[_dt.date] = None,
        end: Optional[_dt.date] = None,
        pattern: Optional[str] = None,
    ):
        super().__init__()
        self._config, self._start, self._end = config, start, end
        self._pattern = pattern or config.archive.path

    def expand(self, pbegin):
        start, end = self._start, self._end
        paths = (
            pbegin
            | "Archive pattern" >> beam.Create([self._pattern])
            | "List files" >> beam.FlatMap(list_archive)
            | "Skip days outside the range" >> beam.Filter(archive_plan.in_day_range, start, end)
            | "Spread files" >> beam.Reshuffle()
        )
        footers = paths | "Read footers" >> beam.ParDo(_ReadFooterFn(self._config))
        planned = (
            footers
            | "Collect footers" >> beam.combiners.ToList()
            | "Plan windows and tasks"
            >> beam.ParDo(_PlanFn(self._config, start, end)).with_outputs("rejects", "days", main="tasks")
        )
        tasks = planned.tasks | "Spread tasks" >> beam.Reshuffle()
        return {"tasks": tasks, "rejects": planned.rejects, "days": planned.days}
