"""Beam glue of the indicators stage: :class:`ComputeIndicators` (no numerics here).

``window correlations | ComputeIndicators(config)`` -> ``{"indicators", "rejects"}``:

- ``"indicators"``: :class:`~corrtransforms.records.IndicatorRow` records (the indicators table),
- ``"rejects"``: :class:`~corrtransforms.rejects.Reject` records, reason ``indicator_failed``,
  one per subject (or ``"*"`` for the whole window) whose computation raised.

The work is :func:`corrtransforms.stages.indicators.window_indicators_and_failures`.
"""

from __future__ import annotations

import apache_beam as beam

from corrtransforms.beam.metrics import counter, distribution
from corrtransforms.config import AssetConfig
from corrtransforms.records import OK, WindowCorrelation
from corrtransforms.rejects import WHOLE_WINDOW, Reject, iso_utc
from corrtransforms.stages.indicators import window_indicators_and_failures

NAMESPACE = "corrtransforms"
STAGE = "indicators"


def _reject(wc: WindowCorrelation, asset: str, subject: str, detail: str) -> Reject:
    start = getattr(wc, "window_start_us", None)
    source = iso_utc(start) if isinstance(start, int) else repr(start)
    return Reject(
        stage=STAGE,
        source=source,
        subject=subject,
        reason="indicator_failed",
        detail=detail[:2000],
        asset=asset,
        window_start_us=start if isinstance(start, int) else None,
    )


class _IndicatorsFn(beam.DoFn):
    """One window's correlations -> indicator rows; failures -> tagged "rejects"."""

    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._windows = counter("indicator_windows")
        self._rows = counter("indicator_rows")
        self._flagged = counter("indicator_rows_flagged")
        self._nan = counter("indicator_rows_nan")
        self._failed = counter("indicator_failures")
        self._per_window = distribution("indicator_rows_per_window")

    def process(self, wc: WindowCorrelation):
        self._windows.inc()
        try:
            rows, failures = window_indicators_and_failures(wc, self._config)
        except Exception as err:  # noqa: BLE001 - a malformed window becomes one reject
            self._failed.inc()
            yield beam.pvalue.TaggedOutput(
                "rejects", _reject(wc, self._config.name, WHOLE_WINDOW, f"{type(err).__name__}: {err}")
            )
            return
        for subject, detail in failures:
            self._failed.inc()
            yield beam.pvalue.TaggedOutput("rejects", _reject(wc, self._config.name, subject, detail))
        self._per_window.update(len(rows))
        for row in rows:
            self._rows.inc()
            if row.quality != OK:
                self._flagged.inc()
            if row.value != row.value:
                self._nan.inc()
            yield row


class ComputeIndicators(beam.PTransform):
    """Condition indicators of every window: correlation rows -> indicator rows.

    Parameters
    ----------
    config : AssetConfig
        Channel units, ``[[modes]]``, ``[correlation] weighting`` and ``max_lag_s``.

    Input
    -----
    PCollection of :class:`~corrtransforms.records.WindowCorrelation` (the correlate stage's
    ``"correlations"`` output).

    Returns
    -------
    dict of PCollection
        ``"indicators"``: IndicatorRow records; ``"rejects"``: Reject records (stage
        "indicators", reason ``indicator_failed``).

    Notes
    -----
    Beam metrics (namespace ``corrtransforms``): ``indicator_windows``, ``indicator_rows``,
    ``indicator_rows_flagged`` (quality not "ok"), ``indicator_rows_nan``,
    ``indicator_failures`` and the distribution ``indicator_rows_per_window``.
    """

    def __init__(self, config: AssetConfig):
        super().__init__()
        self._config = config

    def expand(self, window_correlations):
        out = window_correlations | "Indicators per window" >> beam.ParDo(_IndicatorsFn(self._config)).with_outputs(
            "rejects", main="indicators"
        )
        return {"indicators": out.indicators, "rejects": out.rejects}
