"""Covariates from other archives (``[[covariate_sources]]``): one day's windows -> their
``covariate_mean`` indicator rows.

A source (a weather station at one value a minute, a control system's log) is a Parquet archive
of its own, wide or long, on its own clock. Per source the run reads every file's footer once
(:func:`read_source_footer`: the same planning code as the asset's archive, so naive times,
missing statistics and unreadable files are handled and reported alike); then per calendar day
of the run (:func:`join_day`) only the row groups whose time range reaches the day's windows
are decoded, only the time column and the named columns, and each window gets the
time-weighted mean of the piecewise-linear covariate
(:func:`corrtransforms.numerics.covariate_join.time_weighted_window_means`).

The rows are exactly those in-file covariates produce (:mod:`corrtransforms.stages.indicators`):
``subject`` = the covariate, ``indicator`` = ``covariate_mean``, stderr NaN, the unit of
``[channels] units``; a window without a mean is NaN with ``no_covariate_samples`` (and
``covariate_missing`` in the shifts table). Everything downstream (smoothing, compensation,
detection, the run summary) is unchanged.

Memory: one element holds the samples of one source over one day plus ``max_gap_s`` and a
window length at its edges, as decoded from the row groups that reach that span (a row group
larger than a day is decoded whole, then cut).
"""

from __future__ import annotations

import dataclasses
from typing import Dict, List, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from corrtransforms.config import ArchiveConfig, AssetConfig, ChannelsConfig, CovariateSourceConfig
from corrtransforms.numerics.covariate_join import time_weighted_window_means
from corrtransforms.records import IndicatorRow, quality_text
from corrtransforms.rejects import Reject
from corrtransforms.stages.plan import FileFooter, OpenFile, open_local_file, read_footer, span_may_hold
from corrtransforms.stages.shifts import COVARIATE_INDICATOR
from corrtransforms.timeutil import US_PER_S, local_date, local_to_utc_us

STAGE = "covariate_sources"
NAN = float("nan")


def source_reading_config(config: AssetConfig, index: int) -> AssetConfig:
    """The asset's configuration with ``[archive]`` and ``[channels]`` of source ``index``: what
    the planner's footer reader needs (layout, columns, the time zone of naive timestamps)."""
    source = config.covariate_sources[index]
    archive = ArchiveConfig(
        path=source.path,
        sample_rate_hz=config.archive.sample_rate_hz,  # not used for a source's footers
        layout=source.layout,
        time_column=source.time_column,
        channel_column=source.channel_column,
        value_column=source.value_column,
        timezone=source.timezone,
    )
    windows = dataclasses.replace(config.windows, align="epoch")
    return dataclasses.replace(
        config, archive=archive, channels=ChannelsConfig(names=source.names), windows=windows, modes=()
    )


def read_source_footer(
    path: str, config: AssetConfig, index: int, open_file: OpenFile = open_local_file
) -> Tuple[Optional[FileFooter], List[Reject]]:
    """One source file's footer (row-group time ranges in UTC) and its findings (stage
    ``covariate_sources``): those of :func:`corrtransforms.stages.plan.read_footer`, and
    ``missing_channel_column`` per named covariate a wide file lacks."""
    reading = source_reading_config(config, index)
    footer, findings = read_footer(path, reading, open_file)
    if footer is not None and reading.archive.layout == "wide":
        numeric = ", ".join(footer.numeric_columns)
        for name in config.covariate_sources[index].names:
            if name not in footer.numeric_columns:
                detail = f"covariate {name!r} is not a numeric column; numeric columns: {numeric}"
                date = local_date(footer.start_us, config.timezone)
                findings.append(
                    Reject(STAGE, path, name, "missing_channel_column", detail, asset=config.name, date=date)
                )
    return footer, [dataclasses.replace(f, stage=STAGE) for f in findings]


def day_span_us(window_starts_us: Sequence[int], length_s: float, source: CovariateSourceConfig) -> Tuple[int, int]:
    """``[first, stop)`` of the samples the windows need: ``max_gap_s`` before the first start
    and after the last window's end (the samples that interpolate to the windows' edges)."""
    gap_us = int(np.ceil(source.max_gap_s * US_PER_S))
    length_us = int(round(length_s * US_PER_S))
    return int(min(window_starts_us)) - gap_us, int(max(window_starts_us)) + length_us + gap_us + 1


@dataclasses.dataclass
class SourceSamples:
    """One source's samples over a span: per covariate its times (UTC us, increasing) and values."""

    series: Dict[str, Tuple[np.ndarray, np.ndarray]]
    decoded_bytes: int = 0
    findings: List[Reject] = dataclasses.field(default_factory=list)


def read_source_samples(
    footers: Sequence[FileFooter],
    config: AssetConfig,
    index: int,
    span_us: Tuple[int, int],
    open_file: OpenFile = open_local_file,
    date: Optional[str] = None,
) -> SourceSamples:
    """Decode the row groups of ``footers`` that reach ``span_us`` (time and named columns only)
    and return each covariate's finite samples in the span, sorted, one per timestamp.

    Equal timestamps with equal values are kept once (``duplicate_timestamps``, repaired); with
    different values the timestamp is dropped (``conflicting_duplicates``); rows without a
    timestamp are dropped (``null_timestamps``). Findings are dated ``date``.
    """
    source = config.covariate_sources[index]
    times: Dict[str, List[np.ndarray]] = {n: [] for n in source.names}
    values: Dict[str, List[np.ndarray]] = {n: [] for n in source.names}
    out = SourceSamples(series={})
    for footer in footers:
        groups = [rg.index for rg in footer.row_groups if span_may_hold(rg.start_us, rg.end_us, span_us)]
        if not groups:
            continue
        table = _read_groups(footer, source, groups, open_file)
        out.decoded_bytes += int(table.nbytes)
        nulls = table.column(source.time_column).null_count
        if nulls:
            detail = f"{nulls} rows of row groups {groups} have no timestamp; not used"
            out.findings.append(
                Reject(STAGE, footer.path, "*", "null_timestamps", detail, asset=config.name, date=date)
            )
        for name, (t, x) in _columns_by_name(table, source, footer.time_naive).items():
            inside = (t >= span_us[0]) & (t < span_us[1])
            times[name].append(t[inside])
            values[name].append(x[inside])
    for name in source.names:
        t = np.concatenate(times[name]) if times[name] else np.zeros(0, np.int64)
        x = np.concatenate(values[name]) if values[name] else np.zeros(0)
        keep = np.isfinite(x)
        t, x, found = _one_per_timestamp(t[keep], x[keep])
        out.series[name] = (t, x)
        out.findings.extend(_sample_findings(found, config, source, name, date))
    return out


def _read_groups(footer: FileFooter, source: CovariateSourceConfig, groups: List[int], open_file) -> pa.Table:
    if source.layout == "long":
        columns = [source.time_column, source.channel_column, source.value_column]
    else:
        columns = [source.time_column] + [n for n in source.names if n in footer.numeric_columns]
    with open_file(footer.path) as handle:
        return pq.ParquetFile(handle).read_row_groups(groups, columns=columns)


def _columns_by_name(
    table: pa.Table, source: CovariateSourceConfig, naive: bool
) -> Dict[str, Tuple[np.ndarray, np.ndarray]]:
    """Per named covariate present in ``table``: (UTC times us, float values), nulls as NaN;
    rows without a timestamp carry the time ``_NULL_TIME``, outside every span."""
    time_type = table.schema.field(source.time_column).type
    raw = table.column(source.time_column).cast(pa.timestamp("us", time_type.tz), safe=False).cast(pa.int64())
    null_time = raw.is_null().to_numpy(zero_copy_only=False)
    t = raw.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    if naive:
        t = local_to_utc_us(t, source.timezone)
    t[null_time] = _NULL_TIME
    if source.layout == "long":
        channel = table.column(source.channel_column).cast(pa.string())
        value = _floats(table.column(source.value_column))
        found = {}
        for name in source.names:
            mask = pc.fill_null(pc.equal(channel, name), False).to_numpy(zero_copy_only=False)
            found[name] = (t[mask], value[mask])
        return found
    return {name: (t, _floats(table.column(name))) for name in source.names if name in table.column_names}


#: the time given to rows without a timestamp (never inside a span; reported as null_timestamps)
_NULL_TIME = np.iinfo(np.int64).min


def _floats(column) -> np.ndarray:
    return column.cast(pa.float64()).fill_null(NAN).to_numpy(zero_copy_only=False).astype(float)


def _one_per_timestamp(t: np.ndarray, x: np.ndarray) -> Tuple[np.ndarray, np.ndarray, Dict[str, int]]:
    """Sorted samples with one value per timestamp, and the counts of what was repaired/dropped."""
    order = np.argsort(t, kind="stable")
    t, x = t[order], x[order]
    same = np.flatnonzero(np.diff(t) == 0)
    if same.size == 0:
        return t, x, {}
    equal = x[same] == x[same + 1]
    conflicting = np.unique(t[same[~equal]])
    keep = np.ones(t.size, bool)
    keep[same + 1] = False  # the repeats
    keep &= ~np.isin(t, conflicting)
    found = {"duplicate_timestamps": int(np.sum(equal)), "conflicting_duplicates": int(conflicting.size)}
    return t[keep], x[keep], {k: v for k, v in found.items() if v}


def _sample_findings(
    found: Dict[str, int], config: AssetConfig, source: CovariateSourceConfig, name: str, date: Optional[str]
) -> List[Reject]:
    words = {
        "duplicate_timestamps": "timestamps repeated with equal values; kept once",
        "conflicting_duplicates": "timestamps repeated with different values; not used",
    }
    return [
        Reject(STAGE, source.path, name, code, f"{count} {words[code]}", asset=config.name, date=date)
        for code, count in sorted(found.items())
    ]


def window_rows(
    window_starts_us: Sequence[int], samples: SourceSamples, config: AssetConfig, index: int
) -> List[IndicatorRow]:
    """``covariate_mean`` rows of the windows from one source's samples (NaN and
    ``no_covariate_samples`` where a window's covered fraction is below ``min_coverage``)."""
    source = config.covariate_sources[index]
    starts = np.asarray(sorted(set(int(s) for s in window_starts_us)), dtype=np.int64)
    rows: List[IndicatorRow] = []
    for name in source.names:
        t, x = samples.series[name]
        means, _coverage = time_weighted_window_means(
            t, x, starts, config.windows.length_s, source.max_gap_s, source.min_coverage
        )
        unit = config.channels.unit(name)
        for start, mean in zip(starts, means):
            codes = () if np.isfinite(mean) else ("no_covariate_samples",)
            rows.append(
                IndicatorRow(int(start), name, COVARIATE_INDICATOR, float(mean), NAN, unit, quality_text(codes))
            )
    return rows


@dataclasses.dataclass
class DayJoin:
    """Result of :func:`join_day`: the rows, the findings and the bytes decoded per source."""

    rows: List[IndicatorRow]
    findings: List[Reject]
    decoded_bytes: List[int]


def join_day(
    date: str,
    window_starts_us: Sequence[int],
    footers: Sequence[Tuple[int, FileFooter]],
    config: AssetConfig,
    open_file: OpenFile = open_local_file,
) -> DayJoin:
    """The ``covariate_mean`` rows of every source covariate for one day's windows.

    Parameters
    ----------
    date : str
        The windows' calendar day (asset time zone): the date of the findings.
    window_starts_us : sequence of int
        Starts of the day's windows (UTC microseconds).
    footers : sequence of (source index, FileFooter)
        Every source file's footer (:func:`read_source_footer`).
    config : AssetConfig

    Returns
    -------
    DayJoin
    """
    result = DayJoin(rows=[], findings=[], decoded_bytes=[])
    if not window_starts_us:
        return result
    for index, source in enumerate(config.covariate_sources):
        span = day_span_us(window_starts_us, config.windows.length_s, source)
        own = sorted((f for i, f in footers if i == index), key=lambda f: f.path)
        samples = read_source_samples(own, config, index, span, open_file, date)
        result.rows.extend(window_rows(window_starts_us, samples, config, index))
        result.findings.extend(samples.findings)
        result.decoded_bytes.append(samples.decoded_bytes)
    return result
