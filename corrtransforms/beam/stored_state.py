"""Beam glue that reads the detector state of earlier runs inside the pipeline.

A nightly run (and each later day of a backfill) resumes every series from the state written
before its first day. Handing those states to the pipeline as ``beam.Create`` rows would embed
them in the submitted job, which then grows with the history; instead the job carries only a
:class:`StoredState` description (output folder, asset, first day), and two reads inside the
pipeline fetch what is needed:

- :class:`ReadLatestStates`: the latest STATE row of each series before the day (the read-back
  summary ``_summaries/asset=NAME/latest_state.parquet`` plus the files it does not cover,
  :func:`corrtransforms.stages.summaries.summarize_partitions`);
- :class:`ReadBaselineSample`: the BASELINE_SAMPLE rows of earlier days, only when some series
  is still accumulating its baseline (one element per file, so the files are read in parallel);
- :class:`ReadModeReferences`: the multi-channel modes' baseline references
  (:mod:`corrtransforms.stages.mode_reference`), one small element.

File access goes through :class:`corrtransforms.beam.filesystems.BeamFiles`.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
from typing import Iterable, Optional

import apache_beam as beam

from corrtransforms import tables
from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.beam.metrics import counter
from corrtransforms.stages import mode_reference, summaries
from corrtransforms.stages.state import ACCUMULATING


@dataclasses.dataclass(frozen=True)
class StoredState:
    """Where a run's resumed state lives: the states of ``asset`` under ``output_dir`` written
    for days before ``before`` (and their baseline sample)."""

    output_dir: str
    asset: str
    before: _dt.date
    provenance: Optional[tuple] = None  # (key, value) pairs for a refreshed summary's metadata


def _latest_state_rows(stored: StoredState) -> Iterable[dict]:
    latest = summaries.summarize_partitions(
        BeamFiles(),
        stored.output_dir,
        "state",
        stored.asset,
        tables.STATE,
        summaries.latest_states,
        summaries.LATEST_STATE,
        before=stored.before,
        provenance=dict(stored.provenance or ()),
    )
    return latest.to_pylist()


def _sample_files(stored: StoredState, accumulating: list) -> Iterable[str]:
    if not accumulating:  # every series has fitted its baseline: the sample is not needed
        return []
    return summaries.partition_files_before(
        BeamFiles(), stored.output_dir, "baseline_sample", stored.asset, stored.before
    )


class _ReadSampleFileFn(beam.DoFn):
    def setup(self):
        self._store = BeamFiles()
        self._files = counter("baseline_sample_files_read")

    def process(self, path: str):
        self._files.inc()
        yield from summaries.read_file(self._store, path, tables.BASELINE_SAMPLE).to_pylist()


class ReadLatestStates(beam.PTransform):
    """``pipeline | ReadLatestStates(stored)`` -> STATE rows (dicts), the latest of each series."""

    def __init__(self, stored: StoredState):
        super().__init__()
        self._stored = stored

    def expand(self, pbegin):
        return (
            pbegin
            | "Where the state is" >> beam.Create([self._stored])
            | "Latest state of each series" >> beam.FlatMap(_latest_state_rows)
        )


class ReadBaselineSample(beam.PTransform):
    """``pipeline | ReadBaselineSample(stored, states)`` -> BASELINE_SAMPLE rows (dicts) of the
    days before ``stored.before``; nothing is read when no state in ``states`` accumulates."""

    def __init__(self, stored: StoredState, states: beam.PCollection):
        super().__init__()
        self._stored, self._states = stored, states

    def expand(self, pbegin):
        accumulating = (
            self._states
            | "Series in their baseline" >> beam.Filter(lambda s: s["phase"] == ACCUMULATING)
            | "Their keys" >> beam.Map(lambda s: (s["subject"], s["indicator"]))
        )
        return (
            pbegin
            | "Where the sample is" >> beam.Create([self._stored])
            | "List sample files" >> beam.FlatMap(_sample_files, accumulating=beam.pvalue.AsList(accumulating))
            | "Spread sample files" >> beam.Reshuffle()
            | "Read sample files" >> beam.ParDo(_ReadSampleFileFn())
        )


def _mode_references(stored: StoredState, config) -> dict:
    return mode_reference.read_references(
        BeamFiles(), stored.output_dir, config, stored.before, provenance=dict(stored.provenance or ())
    )


class ReadModeReferences(beam.PTransform):
    """``pipeline | ReadModeReferences(stored, config)`` -> one element: entry name ->
    :class:`~corrtransforms.stages.mode_reference.ModeReference` of the entries whose baseline
    completed before ``stored.before`` (empty when none has)."""

    def __init__(self, stored: StoredState, config):
        super().__init__()
        self._stored, self._config = stored, config

    def expand(self, pbegin):
        return (
            pbegin
            | "Where the mode shapes are" >> beam.Create([self._stored])
            | "Baseline references" >> beam.Map(_mode_references, config=self._config)
        )
