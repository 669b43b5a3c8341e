"""Beam glue of shift detection: :class:`DetectShifts` (no numerics here).

``indicator rows | DetectShifts(config, initial_states)`` -> ``{"shifts", "state", "rejects"}``:

- ``"shifts"``: one ``pyarrow.Table`` (SHIFTS schema) per (subject, indicator) series,
- ``"state"``: one ``pyarrow.Table`` (STATE schema) per series, a row per local day processed,
- ``"rejects"``: :class:`~corrtransforms.rejects.Reject` records,

ready for :class:`corrtransforms.beam.write.WriteTables` (tables ``shifts``, ``state``,
``rejects``). The work is :func:`corrtransforms.stages.shifts.detect_shifts_for_rows`.
"""

from __future__ import annotations

from typing import Any, Iterable, Union

import apache_beam as beam
import pyarrow as pa

from corrtransforms.beam.metrics import counter as _counter
from corrtransforms.config import AssetConfig
from corrtransforms.records import IndicatorRow
from corrtransforms.stages import shifts as shift_series
from corrtransforms.stages.state import ShiftState


class _SplitRowsFn(beam.DoFn):
    """Monitored rows to the main output, covariate means to "covariates"; counts the rest."""

    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._ignored = _counter("shift_rows_not_monitored")

    def process(self, row: IndicatorRow):
        role = shift_series.row_role(row, self._config)
        if role == "covariate":
            yield beam.pvalue.TaggedOutput("covariates", row)
        elif role == "monitored":
            yield row
        else:
            self._ignored.inc()


class _CovariateMeansFn(beam.DoFn):
    def __init__(self, asset: str):
        self._asset = asset

    def process(self, keyed):
        window_start_us, rows = keyed
        means, rejects = shift_series.covariates_for_window(window_start_us, rows, self._asset)
        for reject in rejects:
            yield beam.pvalue.TaggedOutput("rejects", reject)
        yield window_start_us, means


class _DetectSeriesFn(beam.DoFn):
    def __init__(self, config: AssetConfig, order: int):
        self._config, self._order = config, order

    def setup(self):
        self._series = _counter("shift_series")
        self._windows = _counter("shift_windows")
        self._shifted = _counter("shift_windows_shifted")
        self._rejects = _counter("shift_rejects")

    def process(self, keyed, covariates, states):
        (_asset, subject, indicator), rows = keyed
        outcome = shift_series.detect_shifts_for_rows(
            rows, covariates, self._config, states[(subject, indicator)], self._order
        )
        self._series.inc()
        self._windows.inc(outcome.shifts.num_rows)
        self._shifted.inc(outcome.shifted_windows)
        self._rejects.inc(len(outcome.rejects))
        for reject in outcome.rejects:
            yield beam.pvalue.TaggedOutput("rejects", reject)
        if outcome.states.num_rows:
            yield beam.pvalue.TaggedOutput("state", outcome.states)
        if outcome.shifts.num_rows:
            yield outcome.shifts


def _state_rows(initial_states) -> list:
    if initial_states is None:
        return []
    if isinstance(initial_states, pa.Table):
        return initial_states.to_pylist()
    return [s.to_row() if isinstance(s, ShiftState) else dict(s) for s in initial_states]


def _split_state_table(element) -> Iterable[Any]:
    if isinstance(element, pa.Table):
        return element.to_pylist()
    if isinstance(element, ShiftState):
        return [element.to_row()]
    return [element]


class DetectShifts(beam.PTransform):
    """Error-aware shift detection of every monitored (subject, indicator) series.

    Parameters
    ----------
    config : AssetConfig
        ``[baseline]``, ``[shifts]`` (detector, cusum_k, cusum_h, ewma_lambda, ewma_L,
        compensate, indicators), ``[channels] covariates`` and ``[archive] timezone``.
    initial_states : pyarrow.Table, iterable of STATE rows / ShiftState, or PCollection, optional
        States of earlier runs (for a nightly run: the state table up to the day before). Per
        series the latest state before the run's first window is resumed; None starts every
        series fresh (a backfill from the first day).
    order : {1, 2}
        Covariate model order.

    Input
    -----
    PCollection of :class:`~corrtransforms.records.IndicatorRow`: monitored indicators
    (``[shifts] indicators``) and ``covariate_mean`` rows (subject = covariate channel), which
    become a side input ``{window_start_us: {covariate: mean}}``. Other rows are counted
    (``shift_rows_not_monitored``) and left alone: they stay in the indicators table.

    Returns
    -------
    dict of PCollection
        ``"shifts"`` and ``"state"``: one ``pyarrow.Table`` per series (SHIFTS / STATE schema);
        ``"rejects"``: Reject records (stage "shifts").

    Notes
    -----
    Grouping is per (asset, subject, indicator): a series is a few rows per window, small next
    to the samples, and the detectors need it in time order, which the core sorts.
    """

    def __init__(
        self,
        config: AssetConfig,
        initial_states: Union[None, pa.Table, Iterable[Any], beam.PCollection] = None,
        order: int = 1,
    ):
        super().__init__()
        self._config, self._initial_states, self._order = config, initial_states, order

    def expand(self, indicator_rows):
        config = self._config
        asset = config.name
        pipeline = indicator_rows.pipeline
        split = indicator_rows | "Split monitored and covariate rows" >> beam.ParDo(_SplitRowsFn(config)).with_outputs(
            "covariates", main="monitored"
        )
        covariates = (
            split.covariates
            | "Key covariates by window" >> beam.Map(lambda r: (int(r.window_start_us), r))
            | "Group covariates by window" >> beam.GroupByKey()
            | "Covariate means per window" >> beam.ParDo(_CovariateMeansFn(asset)).with_outputs("rejects", main="means")
        )
        if isinstance(self._initial_states, beam.PCollection):
            states = self._initial_states | "Initial state rows" >> beam.FlatMap(_split_state_table)
        else:
            states = pipeline | "Initial states" >> beam.Create(_state_rows(self._initial_states))
        keyed_states = states | "Key states by series" >> beam.Map(lambda s: ((s["subject"], s["indicator"]), s))
        detected = (
            split.monitored
            | "Key by series" >> beam.Map(lambda r: ((asset, r.subject, r.indicator), r))
            | "Group by series" >> beam.GroupByKey()
            | "Detect shifts"
            >> beam.ParDo(
                _DetectSeriesFn(config, self._order),
                covariates=beam.pvalue.AsDict(covariates.means),
                states=beam.pvalue.AsMultiMap(keyed_states),
            ).with_outputs("state", "rejects", main="shifts")
        )
        rejects = (covariates.rejects, detected.rejects) | "Collect shift rejects" >> beam.Flatten()
        return {"shifts": detected.shifts, "state": detected.state, "rejects": rejects}
