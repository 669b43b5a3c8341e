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

from corrtransforms.beam.correlate import CorrelateWindows
from corrtransforms.beam.covariate_sources import JoinCovariateSources
from corrtransforms.beam.indicators import ComputeIndicators
from corrtransforms.beam.plan import PlanReads
from corrtransforms.beam.read import ReadWindows
from corrtransforms.beam.shifts import DetectShifts
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
        indicator_tables = (
            table_rows
            | "Batch indicator rows" >> beam.BatchElements(min_batch_size=1000, max_batch_size=INDICATOR_BATCH)
            | "Indicator tables" >> beam.Map(_indicator_table)
        )
        mode_shapes = (
            correlated["correlations"]
            | "Windows with multi-channel modes" >> beam.Filter(lambda wc: bool(wc.multichannel_modes))
            | "Mode shape tables" >> beam.Map(_mode_shape_table)
        )
        rejects = (
            plan["rejects"],
            read["rejects"],
            correlated["rejects"],
            indicators["rejects"],
            shifts["rejects"],
            *source_rejects,
        ) | "All rejects" >> beam.Flatten()
        tables: Dict[str, beam.PCollection] = {
            "correlations": correlated["correlations"],
            "indicators": indicator_tables,
            "shifts": shifts["shifts"],
            "state": shifts["state"],
            "baseline_sample": shifts["baseline_sample"],
            "mode_shapes": mode_shapes,
            "rejects": rejects,
        }
        commits = tables | "Write tables" >> WriteTables(
            self._output, config, self._run_id, days=plan["days"], remove_temporary=self._remove_temporary
        )
        return {
            "commits": commits,
            "tasks": plan["tasks"],
            "blocks": read["blocks"],
            "correlations": correlated["correlations"],
            "indicators": indicator_rows,
            "shifts": shifts["shifts"],
            "state": shifts["state"],
            "mode_shapes": mode_shapes,
            "rejects": rejects,
        }


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


class MonitorFleet(beam.PTransform):
    """Several assets in one pipeline: one :class:`MonitorAsset` branch per asset, labelled
    ``Asset NAME`` (:func:`fleet_step`), so the job starts once and every row stays with its
    asset (each branch writes its own ``asset=NAME/`` partitions exactly as a run of that asset
    alone). The shared temporary folder of the run is removed once every asset is committed.

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
        branches: Dict[str, Any] = {}
        for m in self._members:
            outputs = pbegin | fleet_step(m.config.name) >> MonitorAsset(
                m.config,
                self._output,
                self._run_id,
                m.start,
                m.end,
                m.initial_states,
                self._progress_interval_s,
                report_edges=m.report_edges,
                remove_temporary=False,
            )
            branches[m.config.name] = outputs["commits"]
        commits = (
            list(branches.values())
            | "Commits of every asset" >> beam.Flatten()
            | "Concatenate commits" >> beam.FlatMap(lambda results: results)
            | "Collect fleet commits" >> beam.combiners.ToList()
            | "Remove temporary files" >> beam.Map(remove_run_temporary, self._output, self._run_id)
        )
        return {**branches, "*": commits}
