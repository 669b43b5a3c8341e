"""JoinCovariateSources: ``[[covariate_sources]]`` joined to the windows as ``covariate_mean``
indicator rows (wiring only; the work is :mod:`corrtransforms.stages.covariate_sources`)."""

from __future__ import annotations

import datetime as _dt
from typing import List, Optional, Tuple

import apache_beam as beam
from apache_beam.metrics import Metrics

from corrtransforms.beam.filesystems import list_archive, open_file
from corrtransforms.beam.metrics import NAMESPACE, counter
from corrtransforms.config import AssetConfig
from corrtransforms.rejects import Reject
from corrtransforms.stages import covariate_sources as sources
from corrtransforms.stages.plan import dated_findings, in_day_range
from corrtransforms.timeutil import local_date

__all__ = ["JoinCovariateSources"]


def _source_files(index: int, config: AssetConfig, start, end) -> List[Tuple[int, str]]:
    """``(index, path)`` of source ``index``'s files that may hold the days (``date=`` folders)."""
    return [
        (index, path) for path in list_archive(config.covariate_sources[index].path) if in_day_range(path, start, end)
    ]


class _SourceFooterFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._opened = counter("covariate_source_footers_opened")

    def process(self, item: Tuple[int, str]):
        index, path = item
        self._opened.inc()
        footer, findings = sources.read_source_footer(path, self._config, index, open_file)
        if footer is not None:
            yield index, footer
        for finding in findings:
            yield beam.pvalue.TaggedOutput("rejects", finding)


class _JoinDayFn(beam.DoFn):
    """``(date, window starts)`` -> the day's ``covariate_mean`` rows of every source covariate."""

    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._rows = counter("covariate_source_rows")
        self._missing = counter("covariate_source_rows_missing")
        self._bytes = Metrics.distribution(NAMESPACE, "covariate_source_bytes_per_day")

    def process(self, keyed, footers):
        date, starts = keyed
        joined = sources.join_day(date, sorted(starts), footers, self._config, open_file)
        for decoded in joined.decoded_bytes:
            self._bytes.update(decoded)
        self._rows.inc(len(joined.rows))
        self._missing.inc(sum(1 for r in joined.rows if r.value != r.value))
        for finding in joined.findings:
            yield beam.pvalue.TaggedOutput("rejects", finding)
        yield from joined.rows


def _date_file_findings(findings: List[Reject], days: List[str], start, end, report_edges) -> List[Reject]:
    """The source files' findings dated inside the run's days, as the archive's file findings."""
    first = min(days) if days else None
    if first is None:
        return []
    return dated_findings(findings, set(), start, end, first, report_edges)


class JoinCovariateSources(beam.PTransform):
    """Window correlations -> ``covariate_mean`` rows of the ``[[covariate_sources]]`` covariates.

    ``window_correlations | JoinCovariateSources(config, start, end)`` lists each source's files
    once (``date=`` folders more than a day outside the run's days are skipped), reads their
    footers, groups the windows' starts by calendar day and, per day, decodes only the row
    groups that reach that day's windows (time and named columns), so one element holds one
    day of source samples.

    Parameters
    ----------
    config : AssetConfig
        ``[[covariate_sources]]``, ``[windows] length_s``, ``[channels] units``, the time zone.
    start, end : datetime.date, optional
        The run's days (None: the whole archive), for the file choice and the findings' dates.
    report_edges : (bool, bool)
        As :class:`~corrtransforms.beam.plan.PlanReads` (a backfill's inner chunks leave file
        findings dated outside their days to the neighbouring chunk).

    Returns
    -------
    dict of PCollection
        ``"indicators"``: :class:`~corrtransforms.records.IndicatorRow` (``covariate_mean``);
        ``"rejects"``: findings (stage ``covariate_sources``).
    """

    def __init__(
        self,
        config: AssetConfig,
        start: Optional[_dt.date] = None,
        end: Optional[_dt.date] = None,
        report_edges: Tuple[bool, bool] = (True, True),
    ):
        super().__init__()
        self._config, self._start, self._end = config, start, end
        self._report_edges = tuple(report_edges)

    def expand(self, window_correlations):
        config, start, end = self._config, self._start, self._end
        tz = config.timezone
        days = (
            window_correlations
            | "Window starts by day"
            >> beam.Map(lambda wc: (local_date(wc.window_start_us, tz), int(wc.window_start_us)))
            | "Group window starts by day" >> beam.GroupByKey()
        )
        footers = (
            window_correlations.pipeline
            | "Covariate sources" >> beam.Create(list(range(len(config.covariate_sources))))
            | "List source files" >> beam.FlatMap(_source_files, config, start, end)
            | "Spread source files" >> beam.Reshuffle()
            | "Read source footers" >> beam.ParDo(_SourceFooterFn(config)).with_outputs("rejects", main="footers")
        )
        joined = days | "Join sources to windows" >> beam.ParDo(
            _JoinDayFn(config), footers=beam.pvalue.AsList(footers.footers)
        ).with_outputs("rejects", main="indicators")
        file_findings = (
            footers.rejects
            | "Collect source file findings" >> beam.combiners.ToList()
            | "Date source file findings"
            >> beam.FlatMap(
                _date_file_findings,
                beam.pvalue.AsList(days | "Days with windows" >> beam.Keys()),
                start,
                end,
                self._report_edges,
            )
        )
        rejects = (joined.rejects, file_findings) | "Source findings" >> beam.Flatten()
        return {"indicators": joined.indicators, "rejects": rejects}
