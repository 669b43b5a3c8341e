"""Rebuild the detector state from an indicators table, without reading raw samples again.

A nightly run resumes each series from the state written at the end of the previous day. When
that state is missing (a lost partition, a changed output folder), the detectors can be replayed
over the indicators already written: shift detection depends only on the indicator rows and the
configuration, so the replayed state equals the state a backfill would have written.
"""
from __future__ import annotations

from typing import Dict, List, Tuple

import pyarrow as pa

from corrtransforms import tables

from corrtransforms.stages import shifts as shift_series
from corrtransforms.config import AssetConfig
from corrtransforms.records import IndicatorRow
from corrtransforms.rejects import Reject


def indicator_rows_from_table(table: pa.Table) -> List[IndicatorRow]:
    """IndicatorRow records from an indicators table (as read back from Parquet)."""
    if table.num_rows == 0:
        return []
    starts = table.column("window_start").cast(pa.int64()).to_pylist()
    columns = [table.column(name).to_pylist() for name in ("subject", "indicator", "value", "stderr", "unit",
                                                            "quality")]
    return [IndicatorRow(int(s), subj, ind, float("nan") if v is None else float(v),
                         float("nan") if e is None else float(e), u or "", q or "ok")
            for s, subj, ind, v, e, u, q in zip(starts, *columns)]


def replay_states(indicators: pa.Table, config: AssetConfig) -> Tuple[pa.Table, List[Reject]]:
    """Run the detectors over an indicators table; return the latest state of every series.

    Parameters
    ----------
    indicators : pyarrow.Table
        Rows of the INDICATORS schema (monitored and ``covariate_mean`` rows), e.g. every
        partition of the asset before the day to be processed.
    config : AssetConfig

    Returns
    -------
    states : pyarrow.Table
        STATE rows, the last one of each monitored series.
    rejects : list of Reject
        Findings of the replay (duplicates, failures), as the shifts stage would report them.
    """
    by_window: Dict[int, List[IndicatorRow]] = {}
    series: Dict[Tuple[str, str], List[IndicatorRow]] = {}
    for row in indicator_rows_from_table(indicators):
        role = shift_series.row_role(row, config)
        if role == "covariate":
            by_window.setdefault(row.window_start_us, []).append(row)
        elif role == "monitored":
            series.setdefault((row.subject, row.indicator), []).append(row)
    rejects: List[Reject] = []
    covariates = {}
    for start, found in by_window.items():
        covariates[start], found_rejects = shift_series.covariates_for_window(start, found, config.name)
        rejects.extend(found_rejects)
    last = []
    for key in sorted(series):
        outcome = shift_series.detect_shifts_for_rows(series[key], covariates, config)
        rejects.extend(outcome.rejects)
        if outcome.states.num_rows:
            ordered = outcome.states.sort_by([("window_start", "ascending")])
            last.append(ordered.slice(ordered.num_rows - 1))
    if not last:
        return tables.STATE.empty_table(), rejects
    return pa.concat_tables(last), rejects
