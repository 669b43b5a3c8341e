"""CorrelateWindows: window blocks -> screened correlation records (stage 3)."""

from __future__ import annotations

import apache_beam as beam

from corrtransforms.beam.metrics import count_reject, counter, whole_window_reject
from corrtransforms.config import AssetConfig
from corrtransforms.records import WindowBlock


class _CorrelateFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        from corrtransforms.stages.analyse import analyse_window

        self._analyse = analyse_window
        self._computed = counter("windows_computed")

    def process(self, block: WindowBlock, mode_references=None):
        try:
            result, findings = self._analyse(block, self._config, mode_references)
        except Exception as err:  # noqa: BLE001 - routed to rejects with the error text
            finding = whole_window_reject(
                self._config, block.window_start_us, "correlate", "correlation_failed", f"{type(err).__name__}: {err}"
            )
            count_reject(finding)
            yield beam.pvalue.TaggedOutput("rejects", finding)
            return
        for finding in findings:  # screening's exclusion: a whole-window reject
            count_reject(finding)
            yield beam.pvalue.TaggedOutput("rejects", finding)
        if result is None:
            return
        if not result.pairs:
            finding = whole_window_reject(
                self._config,
                block.window_start_us,
                "correlate",
                "no_valid_pairs",
                f"channels {list(block.channels)}, pairs {self._config.correlation.pairs!r}",
            )
            count_reject(finding)
            yield beam.pvalue.TaggedOutput("rejects", finding)
            return
        self._computed.inc()
        yield result


class CorrelateWindows(beam.PTransform):
    """Window blocks -> :class:`~corrtransforms.records.WindowCorrelation` (``analyse_window``:
    stationarity screening, then ``correlate_window``).

    Returns ``{"correlations": ..., "rejects": ...}``; a window whose estimator fails or has no
    usable pair becomes a whole-window reject (``correlation_failed`` / ``no_valid_pairs``).
    ``mode_references``, optional, is a PCollection of one element: the multi-channel modes'
    baseline references (:class:`~corrtransforms.beam.stored_state.ReadModeReferences`), a
    side input of every window.
    """

    def __init__(self, config: AssetConfig, mode_references=None):
        super().__init__()
        self._config, self._references = config, mode_references

    def expand(self, blocks):
        side = {} if self._references is None else {"mode_references": beam.pvalue.AsSingleton(self._references)}
        out = blocks | "Correlate each window" >> beam.ParDo(_CorrelateFn(self._config), **side).with_outputs(
            "rejects", main="correlations"
        )
        return {"correlations": out.correlations, "rejects": out.rejects}
