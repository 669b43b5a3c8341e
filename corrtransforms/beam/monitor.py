"""The whole monitoring job for one asset as one composite PTransform (wiring only).

``pipeline | MonitorAsset(config, output_dir, run_id, start, end, initial_states)`` plans reads
from the archive's footers, reads every window once, screens and correlates it, computes the
indicators, runs the shift detectors and writes the tables (correlations, indicators, shifts,
state, baseline_sample, mode_shapes, rejects) into their partitions. The launchers in
``pipelines/`` are thin
on top.
"""

from __future__ import annotations

import datetime as _dt
import logging
import time
from typing import Any, Dict, NamedTuple, Optional, Sequence, Tuple

import apache_beam as beam

from corrtransforms.beam.by_asset import ByAssetFn
from corrtransforms.beam.correlate import CorrelateWindows, _CorrelateFn
from corrtransforms.beam.covariate_sources import JoinCovariateSources
from corrtransforms.beam.indicators import ComputeIndicators, _IndicatorsFn
from corrtransforms.beam.metrics import counting_for
from corrtransforms.beam.plan import PlanReads, _ChooseFilesFn, _PlanFn, _ReadFooterFn, _write_index
from corrtransforms.beam.read import ReadWindows, _ReadWindowsFn
from corrtransforms.beam.shifts import DetectFleetShifts, DetectShifts
from corrtransforms.beam.stored_state import ReadModeReferences, StoredState
from corrtransforms.beam.write import WriteTables, remove_run_temporary
from corrtransforms.config import AssetConfig

#: indicator rows per written batch (they are small: a few tens of bytes each)
INDICATOR_BATCH = 20_000


PROGRESS_LOGGER = "corrtransforms.progress"


def _duration(seconds: float) -> str:
    """A time left as the progress line shows it: "40 s", "12 min", "3.5 h"."""
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


class _ProgressFn(beam.DoFn):
    """Passes read tasks through unchanged and logs windows done / planned and the rate.

    It sits just before the read in the same fused stage, so when a task arrives the windows of
    the tasks before it in this worker are done (read, screened, correlated, indicators). Each
    worker process counts its own share; on the local in-process runner that is the whole job.
    The planned count comes from the plan as a side input (a side input on the read itself would
    be the same; one here keeps the read transform free of it).
    """

    def __init__(self, asset: str, interval_s: float):
        self._asset, self._interval_s = asset, interval_s

    def setup(self):
        self._log = logging.getLogger(PROGRESS_LOGGER)
        self._done = 0
        self._pending = 0
        self._started = None
        self._last = 0.0

    def _report(self, planned: int, force: bool = False) -> None:
        now = time.monotonic()
        if self._started is None:
            self._started, self._last = now, now
            self._log.info("%s: %d windows planned", self._asset, planned)
            return
        if force or now - self._last >= self._interval_s:
            self._last = now
            rate = self._done / max(now - self._started, 1e-9)
            left = (
                f", about {_duration((planned - self._done) / rate)} left" if rate > 0 and planned > self._done else ""
            )
            self._log.info(
                "%s: windows done %d / %d planned (%.1f windows/s%s)", self._asset, self._done, planned, rate, left
            )

    def process(self, task, planned):
        self._done += self._pending
        self._report(planned)
        self._pending = len(task.window_starts_us)
        yield task

    def finish_bundle(self):
        self._done += self._pending
        self._pending = 0


def _mode_shape_table(wc):
    from corrtransforms.stages.modes import mode_shape_table

    return mode_shape_table([wc])


def _indicator_table(rows):
    from corrtransforms.stages.indicators import indicator_table

    return indicator_table(rows)


class MonitorAsset(beam.PTransform):
    """Archive -> correlations, indicators, shifts, state, baseline_sample and rejects tables of one asset.

    Parameters
    ----------
    config : AssetConfig
    output_dir : str
        Output root (local folder or any Beam filesystem URL).
    run_id : str
        Id of the run (temporary files and provenance metadata).
    start, end : datetime.date, optional
        Calendar days (asset time zone, inclusive) to process; None means the whole archive.
        The partitions of those days are replaced in every table.
    initial_states : StoredState or pyarrow.Table, optional
        Detector states to resume from: a
        :class:`~corrtransforms.beam.stored_state.StoredState` (the state and baseline sample
        tables before ``start``, read inside the pipeline), or a STATE table; None starts fresh.
    progress_interval_s : float
        Seconds between progress log lines (logger ``corrtransforms.progress``, level INFO).
    report_edges : (bool, bool)
        :class:`~corrtransforms.beam.plan.PlanReads`: whether file findings dated before
        ``start`` / after ``end`` are this run's to report (False for a backfill's inner chunks).
    remove_temporary : bool
        :class:`~corrtransforms.beam.write.WriteTables`: delete the run's temporary folder after
        the commits (False inside :class:`MonitorFleet`, which deletes it once for all assets).

    Returns
    -------
    dict of PCollection
        ``"commits"`` (the commit results), and the intermediate collections ``"tasks"``,
        ``"blocks"``, ``"correlations"``, ``"indicators"``, ``"shifts"``, ``"state"``,
        ``"mode_shapes"`` (pyarrow tables), ``"rejects"`` for callers that add their own steps.
    """

    def __init__(
        self,
        config: AssetConfig,
        output_dir: str,
        run_id: str,
        start: Optional[_dt.date] = None,
        end: Optional[_dt.date] = None,
        initial_states: Any = None,
        progress_interval_s: float = 15.0,
        report_edges: Tuple[bool, bool] = (True, True),
        remove_temporary: bool = True,
    ):
        super().__init__()
        self._config, self._output, self._run_id = config, output_dir, run_id
        self._remove_temporary = remove_temporary
        self._start, self._end, self._initial_states = start, end, initial_states
        self._progress_interval_s = progress_interval_s
        self._report_edges = tuple(report_edges)

    def expand(self, pbegin):
        config = self._config
        plan = pbegin | "Plan reads" >> PlanReads(
            config,
            self._start,
            self._end,
            output_dir=self._output,
            run_id=self._run_id,
            report_edges=self._report_edges,
        )
        planned = (
            plan["tasks"]
            | "Windows per task" >> beam.Map(lambda task: len(task.window_starts_us))
            | "Windows planned" >> beam.CombineGlobally(sum)
        )
        tasks = plan["tasks"] | "Log progress" >> beam.ParDo(
            _ProgressFn(config.name, self._progress_interval_s), planned=beam.pvalue.AsSingleton(planned)
        )
        read = tasks | "Read windows" >> ReadWindows(config)
        references = None
        if isinstance(self._initial_states, StoredState) and any(m.is_multichannel for m in config.modes):
            references = pbegin | "Read mode references" >> ReadModeReferences(self._initial_states, config)
        correlated = read["blocks"] | "Screen and correlate windows" >> CorrelateWindows(config, references)
        indicators = correlated["correlations"] | "Compute indicators" >> ComputeIndicators(config)
        indicator_rows, source_rejects = indicators["indicators"], []
        if config.covariate_sources:
            joined = correlated["correlations"] | "Join covariate sources" >> JoinCovariateSources(
                config, self._start, self._end, self._report_edges
            )
            indicator_rows = (indicator_rows, joined["indicators"]) | "With source covariates" >> beam.Flatten()
            source_rejects = [joined["rejects"]]
        shifts = indicator_rows | "Detect shifts" >> DetectShifts(config, self._initial_states)
        table_rows = indicator_rows
        if config.shifts.multivariate:  # the novelty rows join the indicators table
            table_rows = (indicator_rows, shifts["indicators"]) | "With novelty rows" >> beam.Flatten()
        rejects = (
            plan["rejects"],
            read["rejects"],
            correlated["rejects"],
            indicators["rejects"],
            shifts["rejects"],
            *source_rejects,
        ) | "All rejects" >> beam.Flatten()
        commits, tables = _write_asset(
            config,
            self._output,
            self._run_id,
            self._remove_temporary,
            correlations=correlated["correlations"],
            indicator_rows=table_rows,
            shifts=shifts,
            rejects=rejects,
            days=plan["days"],
        )
        return {
            "commits": commits,
            "tasks": plan["tasks"],
            "blocks": read["blocks"],
            "correlations": correlated["correlations"],
            "indicators": indicator_rows,
            "shifts": shifts["shifts"],
            "state": shifts["state"],
            "mode_shapes": tables["mode_shapes"],
            "rejects": rejects,
        }


def _write_asset(
    config: AssetConfig,
    output_dir: str,
    run_id: str,
    remove_temporary: bool,
    correlations,
    indicator_rows,
    shifts: Dict[str, beam.PCollection],
    rejects,
    days,
) -> Tuple[beam.PCollection, Dict[str, beam.PCollection]]:
    """One asset's table batches and writes (applied in the caller's scope: :class:`MonitorAsset`'s
    own, or an asset's :class:`_WriteAsset` in a fleet); the commits and the tables."""
    indicator_tables = (
        indicator_rows
        | "Batch indicator rows" >> beam.BatchElements(min_batch_size=1000, max_batch_size=INDICATOR_BATCH)
        | "Indicator tables" >> beam.Map(_indicator_table)
    )
    mode_shapes = (
        correlations
        | "Windows with multi-channel modes" >> beam.Filter(lambda wc: bool(wc.multichannel_modes))
        | "Mode shape tables" >> beam.Map(_mode_shape_table)
    )
    tables: Dict[str, beam.PCollection] = {
        "correlations": correlations,
        "indicators": indicator_tables,
        "shifts": shifts["shifts"],
        "state": shifts["state"],
        "baseline_sample": shifts["baseline_sample"],
        "mode_shapes": mode_shapes,
        "rejects": rejects,
    }
    commits = tables | "Write tables" >> WriteTables(
        output_dir, config, run_id, days=days, remove_temporary=remove_temporary
    )
    return commits, tables


class FleetMember(NamedTuple):
    """One asset of a fleet run: what :class:`MonitorAsset` takes besides the output and run id."""

    config: AssetConfig
    start: Optional[_dt.date] = None
    end: Optional[_dt.date] = None
    initial_states: Any = None
    report_edges: Tuple[bool, bool] = (True, True)


def fleet_step(asset: str) -> str:
    """The label of an asset's steps in a fleet pipeline (its counters are read back by it)."""
    return f"Asset {asset}"


def _values(keyed: Tuple[str, Any]) -> Any:
    return keyed[1]


def _key_by(value: Any, asset: str) -> Tuple[str, Any]:
    return asset, value


class _WriteAsset(beam.PTransform):
    """One asset's part of a fleet after the shared steps: its keyed elements -> :func:`_write_asset`."""

    def __init__(self, config: AssetConfig, output_dir: str, run_id: str):
        super().__init__()
        self._config, self._output, self._run_id = config, output_dir, run_id

    def expand(self, keyed: Dict[str, beam.PCollection]):
        mine = {name: pc | f"{name.capitalize()} of the asset" >> beam.Map(_values) for name, pc in keyed.items()}
        commits, _ = _write_asset(
            self._config,
            self._output,
            self._run_id,
            False,
            correlations=mine["correlations"],
            indicator_rows=mine["indicators"],
            shifts={k: mine[k] for k in ("shifts", "state", "baseline_sample")},
            rejects=mine["rejects"],
            days=mine["days"],
        )
        return commits


def _write_fleet_index(keyed, output_dir: str, configs: Dict[str, AssetConfig], run_id: str) -> bool:
    asset, entries = keyed
    with counting_for(asset):
        return _write_index([e for e in entries if e is not None], output_dir, configs[asset], run_id)


class _ByAssetIndex:
    """Partition function: a keyed element -> its asset's position in the fleet."""

    def __init__(self, names: Sequence[str]):
        self._index = {name: i for i, name in enumerate(names)}

    def __call__(self, keyed, n):
        return self._index[keyed[0]]


def _plan_fleet(pbegin, members, each, output_dir: str, run_id: str):
    """Every asset's listing, footers, footer index and plan in one set of steps (elements keyed
    by asset): ``(planned outputs, windows planned per asset)``."""
    names = list(members)
    configs = {name: m.config for name, m in members.items()}
    every_asset = pbegin | "Every asset" >> beam.Create([(name, None) for name in names])
    chosen = (
        pbegin
        | "Archive patterns" >> beam.Create([(name, m.config.archive.path) for name, m in members.items()])
        | "List files and skip days outside the range"
        >> beam.ParDo(each(lambda m: _ChooseFilesFn(m.config, m.start, m.end, output_dir))).with_outputs(
            "indexed", main="open"
        )
    )
    footers = (
        chosen.open
        | "Spread files" >> beam.Reshuffle()
        | "Read footers" >> beam.ParDo(each(lambda m: _ReadFooterFn(m.config))).with_outputs("indexed", main="footers")
    )
    _ = (
        (chosen.indexed, footers.indexed, every_asset)
        | "Index entries" >> beam.Flatten()
        | "Index entries by asset" >> beam.GroupByKey()
        | "Write footer indexes" >> beam.Map(_write_fleet_index, output_dir, configs, run_id)
    )
    planned = (
        (footers.footers, every_asset)
        | "Footers" >> beam.Flatten()
        | "Footers by asset" >> beam.GroupByKey()
        | "Plan windows and tasks"
        >> beam.ParDo(each(lambda m: _PlanFn(m.config, m.start, m.end, m.report_edges))).with_outputs(
            "rejects", "days", main="tasks"
        )
    )
    windows_planned = (
        planned.tasks
        | "Windows per task" >> beam.Map(lambda keyed: (keyed[0], len(keyed[1].window_starts_us)))
        | "Windows planned per asset" >> beam.CombinePerKey(sum)
    )
    return planned, windows_planned


def _fleet_source_rows(correlations, members):
    """Each asset's ``[[covariate_sources]]`` joined under its own step (its own archive and time
    zone), rows and findings keyed by asset: ``(rows, rejects)`` lists of PCollections."""
    source_rows, source_rejects = [], []
    for i, (name, m) in enumerate(members.items()):
        if not m.config.covariate_sources:
            continue
        joined = (
            correlations[i]
            | f"Correlations of {name}" >> beam.Map(_values)
            | f"{fleet_step(name)}/Join covariate sources"
            >> JoinCovariateSources(m.config, m.start, m.end, m.report_edges)
        )
        source_rows.append(joined["indicators"] | f"Key source covariates of {name}" >> beam.Map(_key_by, name))
        source_rejects.append(joined["rejects"] | f"Key source rejects of {name}" >> beam.Map(_key_by, name))
    return source_rows, source_rejects


class MonitorFleet(beam.PTransform):
    """Several assets in one pipeline, their windows in one shared chain.

    One planning step lists and plans every asset's archive (elements keyed by asset, each
    asset's files and footers done with its own configuration), the read tasks of every asset
    go through one Reshuffle, and read, screening, correlation and indicators are one chain for
    all assets whose per-element work uses that element's asset's configuration
    (:class:`~corrtransforms.beam.by_asset.ByAssetFn`, configurations held by asset name).
    The outputs, keyed by asset, are then split by asset: each asset's covariate sources, shift
    detection (grouped by (asset, subject, indicator), resumed from that asset's state) and
    writes run under ``Asset NAME`` (:func:`fleet_step`), into its own ``asset=NAME/``
    partitions exactly as a run of that asset alone. Counters of the shared steps are kept per
    asset (namespace :func:`~corrtransforms.beam.metrics.asset_namespace`). The shared temporary
    folder of the run is removed once every asset is committed.

    Parameters
    ----------
    members : sequence of FleetMember
        The assets (names unique) with their days, resumed states and edge rules.
    output_dir, run_id, progress_interval_s
        As :class:`MonitorAsset`.

    Returns
    -------
    dict of PCollection
        asset name -> that asset's commit results; ``"*"`` (no asset's name) -> every asset's
        commit results once the temporary folder is gone.
    """

    def __init__(self, members: Sequence[FleetMember], output_dir: str, run_id: str, progress_interval_s: float = 15.0):
        super().__init__()
        names = [m.config.name for m in members]
        if len(set(names)) != len(names):
            raise ValueError(f"asset names must be unique in a fleet: {names}")
        self._members, self._output, self._run_id = tuple(members), output_dir, run_id
        self._progress_interval_s = progress_interval_s

    def expand(self, pbegin):
        members = {m.config.name: m for m in self._members}
        names = list(members)

        def each(make) -> ByAssetFn:
            return ByAssetFn({name: make(m) for name, m in members.items()})

        planned, windows_planned = _plan_fleet(pbegin, members, each, self._output, self._run_id)
        tasks = (
            planned.tasks
            | "Spread tasks of every asset" >> beam.Reshuffle()
            | "Log progress"
            >> beam.ParDo(
                ByAssetFn(
                    {name: _ProgressFn(name, self._progress_interval_s) for name in names}, sides=[("planned", 0)]
                ),
                beam.pvalue.AsDict(windows_planned),
            )
        )
        read = tasks | "Read windows" >> beam.ParDo(each(lambda m: _ReadWindowsFn(m.config))).with_outputs(
            "rejects", main="blocks"
        )
        references = [
            pbegin
            | f"Read mode references of {name}" >> ReadModeReferences(m.initial_states, m.config)
            | f"Key mode references of {name}" >> beam.Map(lambda refs, a=name: (a, refs))
            for name, m in members.items()
            if isinstance(m.initial_states, StoredState) and any(mode.is_multichannel for mode in m.config.modes)
        ]
        correlate = each(lambda m: _CorrelateFn(m.config))
        side = []
        if references:
            correlate = ByAssetFn(correlate._dofns, sides=[("mode_references", None)])
            side = [beam.pvalue.AsDict(references | "Mode references" >> beam.Flatten())]
        correlated = read.blocks | "Screen and correlate windows" >> beam.ParDo(correlate, *side).with_outputs(
            "rejects", main="correlations"
        )
        indicators = correlated.correlations | "Compute indicators" >> beam.ParDo(
            each(lambda m: _IndicatorsFn(m.config))
        ).with_outputs("rejects", main="indicators")
        correlations = correlated.correlations | "Split correlations by asset" >> beam.Partition(
            _ByAssetIndex(names), len(names)
        )
        source_rows, source_rejects = _fleet_source_rows(correlations, members)
        indicator_rows = indicators.indicators
        if source_rows:
            indicator_rows = (indicator_rows, *source_rows) | "With source covariates" >> beam.Flatten()
        shifts = indicator_rows | "Detect shifts" >> DetectFleetShifts(
            {name: (m.config, m.initial_states) for name, m in members.items()}
        )
        keyed = {
            "indicators": indicator_rows,
            "shifts": shifts["shifts"],
            "state": shifts["state"],
            "baseline_sample": shifts["baseline_sample"],
            "days": planned.days,
            "rejects": (
                planned.rejects,
                read.rejects,
                correlated.rejects,
                indicators.rejects,
                shifts["rejects"],
                *source_rejects,
            )
            | "All rejects" >> beam.Flatten(),
        }
        by_asset = {
            name: pc | f"Split {name} by asset" >> beam.Partition(_ByAssetIndex(names), len(names))
            for name, pc in keyed.items()
        }
        return self._write_every_asset(by_asset, correlations, members, names)

    def _write_every_asset(self, by_asset, correlations, members, names):
        """Each asset's tables written under its own step; ``"*"``: every commit once the run's
        temporary folder is gone."""
        branches: Dict[str, Any] = {}
        for i, name in enumerate(names):
            mine = {table: parts[i] for table, parts in by_asset.items()}
            mine["correlations"] = correlations[i]
            branches[name] = mine | fleet_step(name) >> _WriteAsset(members[name].config, self._output, self._run_id)
        commits = (
            list(branches.values())
            | "Commits of every asset" >> beam.Flatten()
            | "Concatenate commits" >> beam.FlatMap(lambda results: results)
            | "Collect fleet commits" >> beam.combiners.ToList()
            | "Remove temporary files" >> beam.Map(remove_run_temporary, self._output, self._run_id)
        )
        return {**branches, "*": commits}
