"""Beam glue of shift detection: :class:`DetectShifts` (no numerics here).

``indicator rows | DetectShifts(config, initial_states)`` -> ``{"shifts", "state", "baseline_sample", "rejects"}``:

- ``"shifts"``: one ``pyarrow.Table`` (SHIFTS schema) per (subject, indicator) series,
- ``"state"``: one ``pyarrow.Table`` (STATE schema) per series, a row per local day processed,
- ``"baseline_sample"``: one ``pyarrow.Table`` (BASELINE_SAMPLE schema) per series still in
  its baseline: the windows that entered its baseline sample,
- ``"rejects"``: :class:`~corrtransforms.rejects.Reject` records,

ready for :class:`corrtransforms.beam.write.WriteTables` (tables ``shifts``, ``state``,
``rejects``). The work is :func:`corrtransforms.stages.shifts.detect_shifts_for_rows`.
"""

from __future__ import annotations

from typing import Any, Dict, Iterable, Optional, Tuple, Union

import apache_beam as beam
import pyarrow as pa

from corrtransforms.beam.metrics import counter as _counter
from corrtransforms.beam.stored_state import ReadBaselineSample, ReadLatestStates, StoredState
from corrtransforms.config import AssetConfig
from corrtransforms.records import IndicatorRow
from corrtransforms.stages import novelty
from corrtransforms.stages import shifts as shift_series
from corrtransforms.stages.covariate_smoothing import SMOOTHER_INDICATOR, smooth_covariate_means
from corrtransforms.stages.state import ShiftState, states_table


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


class _SmoothCovariatesFn(beam.DoFn):
    """All ``(window, means)`` pairs of the run (one list) -> smoothed pairs, the smoothers' day
    states (``"state"``) and findings (``"rejects"``)."""

    def __init__(self, config: AssetConfig):
        self._config = config

    def process(self, pairs, resume_rows):
        smoothers = [r for r in resume_rows if r["indicator"] == SMOOTHER_INDICATOR]
        means, states, rejects = smooth_covariate_means(dict(pairs), self._config, smoothers)
        for reject in rejects:
            yield beam.pvalue.TaggedOutput("rejects", reject)
        if states:
            yield beam.pvalue.TaggedOutput("state", states_table(states))
        yield from means.items()


class _DetectSeriesFn(beam.DoFn):
    def __init__(self, config: AssetConfig, order: Optional[int]):
        self._config, self._order = config, order

    def setup(self):
        self._series = _counter("shift_series")
        self._windows = _counter("shift_windows")
        self._shifted = _counter("shift_windows_shifted")
        self._rejects = _counter("shift_rejects")

    def process(self, keyed, covariates, series):
        _key, grouped = keyed
        rows = list(grouped["rows"])
        if not rows:  # a series with a state but no windows in this run: nothing to do
            return
        config = shift_series.with_budget_limits(self._config, series)  # the same config without a budget
        outcome = shift_series.detect_shifts_for_rows(
            rows, covariates, config, list(grouped["states"]), self._order, list(grouped["sample"])
        )
        self._series.inc()
        self._windows.inc(outcome.shifts.num_rows)
        self._shifted.inc(outcome.shifted_windows)
        self._rejects.inc(len(outcome.rejects))
        for reject in outcome.rejects:
            yield beam.pvalue.TaggedOutput("rejects", reject)
        if outcome.states.num_rows:
            yield beam.pvalue.TaggedOutput("state", outcome.states)
        if outcome.baseline_sample.num_rows:
            yield beam.pvalue.TaggedOutput("baseline_sample", outcome.baseline_sample)
        if outcome.shifts.num_rows:
            yield outcome.shifts


class _NoveltyFn(beam.DoFn):
    """All the run's residuals of the asset (one list) -> charted novelty rows (main), every
    novelty indicator row ("indicators"), the model's day states ("state") and findings."""

    def __init__(self, config: AssetConfig):
        self._config = config

    def process(self, residuals, resume_rows):
        mine = [r for r in resume_rows if r["indicator"] == novelty.NOVELTY_MODEL]
        outcome = novelty.novelty_for_run(residuals, self._config, mine)
        for reject in outcome.rejects:
            yield beam.pvalue.TaggedOutput("rejects", reject)
        if outcome.states:
            yield beam.pvalue.TaggedOutput("state", novelty.novelty_states_table(outcome.states))
        for row in outcome.rows:
            yield beam.pvalue.TaggedOutput("indicators", row)
        yield from outcome.charted


def _residuals(table: pa.Table) -> list:
    columns = table.select(["window_start", "subject", "indicator", "z", "state", "quality"])
    return novelty.residuals_of_shift_rows(columns.to_pylist())


def _detect_novelty(config: AssetConfig, series_shifts, states, sample, series):
    """The novelty rows of the asset from its series' SHIFTS tables, and their two charts
    (:mod:`corrtransforms.stages.novelty`): ``(found, charted)`` tagged outputs."""
    asset = config.name

    def key(row):
        return (asset, row["subject"], row["indicator"])

    found = (
        series_shifts
        | "Residuals of the series" >> beam.FlatMap(_residuals)
        | "All residuals of the run" >> beam.combiners.ToList()
        | "Novelty of the asset"
        >> beam.ParDo(_NoveltyFn(config), beam.pvalue.AsList(states)).with_outputs(
            "indicators", "state", "rejects", main="charted"
        )
    )
    charts = {
        "rows": found.charted | "Key novelty rows" >> beam.Map(lambda r: ((asset, r.subject, r.indicator), r)),
        "states": states
        | "Novelty chart states" >> beam.Filter(lambda s: s["indicator"] in novelty.NOVELTY_INDICATORS)
        | "Key novelty states" >> beam.Map(lambda s: (key(s), s)),
        "sample": sample
        | "Novelty chart sample" >> beam.Filter(lambda s: s["indicator"] in novelty.NOVELTY_INDICATORS)
        | "Key novelty sample" >> beam.Map(lambda s: (key(s), s)),
    } | "Group novelty charts" >> beam.CoGroupByKey()
    charted = charts | "Detect novelty shifts" >> beam.ParDo(
        _DetectSeriesFn(novelty.chart_config(config), None),
        covariates={},
        series=beam.pvalue.AsSingleton(series),
    ).with_outputs("state", "baseline_sample", "rejects", main="shifts")
    return found, charted


def _state_rows(initial_states) -> list:
    if initial_states is None:
        return []
    if isinstance(initial_states, pa.Table):
        return initial_states.to_pylist()
    return [s.to_row() if isinstance(s, ShiftState) else dict(s) for s in initial_states]


def _split_table(element) -> Iterable[Any]:
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
    initial_states : StoredState, pyarrow.Table, iterable of STATE rows / ShiftState, or PCollection, optional
        States of earlier runs (for a nightly run: the state table up to the day before). Per
        series the latest state before the run's first window is resumed; None starts every
        series fresh (a backfill from the first day). A
        :class:`~corrtransforms.beam.stored_state.StoredState` reads them (and the baseline
        sample) inside the pipeline, so the submitted job does not grow with the history.
    order : {1, 2}, optional
        Covariate model order (None: ``[shifts] model`` of the configuration).
    baseline_sample : pyarrow.Table, iterable of BASELINE_SAMPLE rows, or PCollection, optional
        The baseline sample of series whose resumed state still accumulates its baseline (read
        from the output when ``initial_states`` is a StoredState).

    Input
    -----
    PCollection of :class:`~corrtransforms.records.IndicatorRow`: monitored indicators
    (``[shifts] indicators``) and ``covariate_mean`` rows (subject = covariate channel), which
    become a side input ``{window_start_us: {covariate: mean}}``. Other rows are counted
    (``shift_rows_not_monitored``) and left alone: they stay in the indicators table.

    Returns
    -------
    dict of PCollection
        ``"shifts"``, ``"state"`` and ``"baseline_sample"``: ``pyarrow.Table`` elements per
        series (SHIFTS / STATE / BASELINE_SAMPLE schema); ``"rejects"``: Reject records (stage
        "shifts").

    Notes
    -----
    Grouping is per (asset, subject, indicator), with the series' resumed states and baseline
    sample joined by the same key (CoGroupByKey, so no worker holds every series' state): a
    series is a few rows per window, small next to the samples, and the detectors need it in
    time order, which the core sorts.
    """

    def __init__(
        self,
        config: AssetConfig,
        initial_states: Union[None, StoredState, pa.Table, Iterable[Any], beam.PCollection] = None,
        order: Optional[int] = None,
        baseline_sample: Union[None, pa.Table, Iterable[Any], beam.PCollection] = None,
    ):
        super().__init__()
        self._config, self._initial_states, self._order = config, initial_states, order
        self._baseline_sample = baseline_sample

    def _rows_of(self, pipeline, given, label: str):
        if isinstance(given, beam.PCollection):
            return given | f"{label} rows" >> beam.FlatMap(_split_table)
        return pipeline | label >> beam.Create(_state_rows(given))

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
        if isinstance(self._initial_states, StoredState):
            states = pipeline | "Read resumed states" >> ReadLatestStates(self._initial_states)
            sample = pipeline | "Read baseline sample" >> ReadBaselineSample(self._initial_states, states)
        else:
            states = self._rows_of(pipeline, self._initial_states, "Initial states")
            sample = self._rows_of(pipeline, self._baseline_sample, "Initial baseline sample")

        means, smoother_outputs = covariates.means, []
        if config.covariate_smoothing_h():
            smoothed = (
                covariates.means
                | "All covariate means of the run" >> beam.combiners.ToList()
                | "Smooth covariates in time order"
                >> beam.ParDo(_SmoothCovariatesFn(config), beam.pvalue.AsList(states)).with_outputs(
                    "state", "rejects", main="means"
                )
            )
            means, smoother_outputs = smoothed.means, [smoothed]

        def key(row):
            return (asset, row["subject"], row["indicator"])

        multivariate = config.shifts.multivariate
        if multivariate:  # the novelty step's own states and sample rows do not enter the series' grouping
            series_states = states | "States of the series" >> beam.Filter(
                lambda s: not novelty.is_novelty_key(s["indicator"])
            )
            series_sample = sample | "Sample of the series" >> beam.Filter(
                lambda s: not novelty.is_novelty_key(s["indicator"])
            )
        else:
            series_states, series_sample = states, sample
        grouped = {
            "rows": split.monitored | "Key by series" >> beam.Map(lambda r: ((asset, r.subject, r.indicator), r)),
            "states": series_states | "Key states by series" >> beam.Map(lambda s: (key(s), s)),
            "sample": series_sample | "Key sample by series" >> beam.Map(lambda s: (key(s), s)),
        } | "Group by series" >> beam.CoGroupByKey()
        # the asset's monitored series (with windows or a state): [shifts] false_alarms_per_year is divided over them
        series = grouped | "Series of the asset" >> beam.combiners.Count.Globally()
        if multivariate:  # and the two novelty charts
            series = series | "With the novelty charts" >> beam.Map(lambda n: n + len(novelty.NOVELTY_INDICATORS))
        detected = grouped | "Detect shifts" >> beam.ParDo(
            _DetectSeriesFn(config, self._order),
            covariates=beam.pvalue.AsDict(means),
            series=beam.pvalue.AsSingleton(series),
        ).with_outputs("state", "baseline_sample", "rejects", main="shifts")
        rejects = [covariates.rejects, detected.rejects] + [o.rejects for o in smoother_outputs]
        state = [detected.state] + [o.state for o in smoother_outputs]
        shifts, samples, indicators = [detected.shifts], [detected.baseline_sample], []
        if multivariate:
            found, charted = _detect_novelty(config, detected.shifts, states, sample, series)
            shifts.append(charted.shifts)
            samples.append(charted.baseline_sample)
            state += [found.state, charted.state]
            rejects += [found.rejects, charted.rejects]
            indicators.append(found.indicators)
        return {
            "shifts": tuple(shifts) | "Collect shifts" >> beam.Flatten(),
            "state": tuple(state) | "Collect states" >> beam.Flatten(),
            "baseline_sample": tuple(samples) | "Collect baseline samples" >> beam.Flatten(),
            "rejects": tuple(rejects) | "Collect shift rejects" >> beam.Flatten(),
            # the novelty indicator rows (empty without [shifts] multivariate), for the indicators table
            "indicators": tuple(indicators) | "Collect novelty rows" >> beam.Flatten()
            if indicators
            else pipeline | "No novelty rows" >> beam.Create([]),
        }


def _by_series(keyed):
    asset, row = keyed
    return (asset, row.subject, row.indicator), row


def _keyed_rows(pipeline, asset: str, initial_states):
    """One asset's resumed states and baseline sample as ``((asset, subject, indicator), row)``."""
    if isinstance(initial_states, StoredState):
        states = pipeline | f"Read resumed states of {asset}" >> ReadLatestStates(initial_states)
        sample = pipeline | f"Read baseline sample of {asset}" >> ReadBaselineSample(initial_states, states)
    else:
        states = pipeline | f"Initial states of {asset}" >> beam.Create(_state_rows(initial_states))
        sample = pipeline | f"Initial baseline sample of {asset}" >> beam.Create([])

    def key(row):
        return (asset, row["subject"], row["indicator"]), row

    return (
        states | f"Key states of {asset}" >> beam.Map(key),
        sample | f"Key sample of {asset}" >> beam.Map(key),
    )


def _fleet_smoothed_means(covariate_means, states, configs):
    """The fleet's covariate means with each smoothed asset's means smoothed in time order from
    its resumed states (:class:`_SmoothCovariatesFn`): ``(means, smoother outputs)``."""
    from corrtransforms.beam.by_asset import ByAssetFn

    means, smoother_outputs = covariate_means, []
    smoothing = {name for name, c in configs.items() if c.covariate_smoothing_h()}
    if smoothing:
        resume_rows = (
            states
            | "States of smoothed assets" >> beam.Filter(lambda kv: kv[0][0] in smoothing)
            | "Key states by asset" >> beam.Map(lambda kv: (kv[0][0], kv[1]))
            | "States by asset" >> beam.GroupByKey()
            | "State lists" >> beam.MapTuple(lambda asset, rows: (asset, list(rows)))
        )
        smoothed = (
            covariate_means
            | "Means of smoothed assets" >> beam.Filter(lambda kv: kv[0] in smoothing)
            | "Covariate means by asset" >> beam.GroupByKey()
            | "Smooth covariates in time order"
            >> beam.ParDo(
                ByAssetFn(
                    {name: _SmoothCovariatesFn(configs[name]) for name in smoothing}, sides=[("resume_rows", [])]
                ),
                beam.pvalue.AsDict(resume_rows),
            ).with_outputs("state", "rejects", main="means")
        )
        unsmoothed = covariate_means | "Means of other assets" >> beam.Filter(lambda kv: kv[0] not in smoothing)
        means = (smoothed.means, unsmoothed) | "Covariate means" >> beam.Flatten()
        smoother_outputs = [smoothed]
    return means, smoother_outputs


class DetectFleetShifts(beam.PTransform):
    """:class:`DetectShifts` of several assets in one set of steps: ``(asset, IndicatorRow)``
    elements -> ``(asset, table or Reject)`` elements, every step's work done with that asset's
    configuration (:class:`~corrtransforms.beam.by_asset.ByAssetFn`).

    Rows are grouped by (asset, subject, indicator) with each asset's resumed states and baseline
    sample (read per asset: each from its own output partitions); covariate means are grouped
    by (asset, window) and given to the detectors as one dict per asset; the false-alarm budget
    is divided over each asset's own series. Per asset the outputs equal :class:`DetectShifts`'s.

    Parameters
    ----------
    members : dict
        Asset name -> (AssetConfig, initial_states as :class:`DetectShifts` takes them).
    """

    def __init__(self, members: Dict[str, Tuple[AssetConfig, Any]]):
        super().__init__()
        self._members = dict(members)

    def expand(self, indicator_rows):
        from corrtransforms.beam.by_asset import ByAssetFn

        configs = {name: config for name, (config, _) in self._members.items()}
        pipeline = indicator_rows.pipeline
        split = indicator_rows | "Split monitored and covariate rows" >> beam.ParDo(
            ByAssetFn({name: _SplitRowsFn(c) for name, c in configs.items()})
        ).with_outputs("covariates", main="monitored")
        covariates = (
            split.covariates
            | "Key covariates by window" >> beam.Map(lambda kv: ((kv[0], int(kv[1].window_start_us)), kv[1]))
            | "Group covariates by window" >> beam.GroupByKey()
            | "Key window groups by asset" >> beam.Map(lambda kv: (kv[0][0], (kv[0][1], kv[1])))
            | "Covariate means per window"
            >> beam.ParDo(ByAssetFn({name: _CovariateMeansFn(name) for name in configs})).with_outputs(
                "rejects", main="means"
            )
        )
        keyed_states, keyed_samples = [], []
        for name, (_, initial) in self._members.items():
            states, sample = _keyed_rows(pipeline, name, initial)
            keyed_states.append(states)
            keyed_samples.append(sample)
        states = keyed_states | "States of every asset" >> beam.Flatten()
        samples = keyed_samples | "Baseline samples of every asset" >> beam.Flatten()

        means, smoother_outputs = _fleet_smoothed_means(covariates.means, states, configs)
        means_by_asset = (
            means
            | "Covariate means of each asset" >> beam.GroupByKey()
            | "Covariate dicts" >> beam.MapTuple(lambda asset, pairs: (asset, dict(pairs)))
        )
        grouped = {
            "rows": split.monitored | "Key by series" >> beam.Map(_by_series),
            "states": states,
            "sample": samples,
        } | "Group by series" >> beam.CoGroupByKey()
        series = (
            grouped
            | "Asset of each series" >> beam.Map(lambda kv: kv[0][0])
            | "Series of each asset" >> beam.combiners.Count.PerElement()
        )
        detected = grouped | "Detect shifts" >> beam.ParDo(
            ByAssetFn(
                {name: _DetectSeriesFn(c, None) for name, c in configs.items()},
                sides=[("covariates", {}), ("series", 0)],
                series_keyed=True,
            ),
            beam.pvalue.AsDict(means_by_asset),
            beam.pvalue.AsDict(series),
        ).with_outputs("state", "baseline_sample", "rejects", main="shifts")
        rejects = [covariates.rejects, detected.rejects] + [o.rejects for o in smoother_outputs]
        state = [detected.state] + [o.state for o in smoother_outputs]
        return {
            "shifts": detected.shifts,
            "state": tuple(state) | "Collect states" >> beam.Flatten(),
            "baseline_sample": detected.baseline_sample,
            "rejects": tuple(rejects) | "Collect shift rejects" >> beam.Flatten(),
        }
