"""Apache Beam glue: the public PTransforms over the core (no numerics here).

- Archive to tables: :class:`PlanReads`, :class:`ReadWindows`, :class:`CorrelateWindows`,
  :class:`WriteTables` (see :mod:`corrtransforms.beam.archive`).
- Indicators: :class:`ComputeIndicators` (:mod:`corrtransforms.beam.indicators`).
- Shifts: :class:`DetectShifts` (:mod:`corrtransforms.beam.shifts`).
- The whole job of one asset: :class:`MonitorAsset` (:mod:`corrtransforms.beam.monitoring`).
"""
from corrtransforms.beam.archive import (LOCAL_RUNNER, NAMESPACE, CorrelateWindows, PlanReads, ReadWindows,
                                         WriteTables, window_accounting)
from corrtransforms.beam.indicators import ComputeIndicators
from corrtransforms.beam.monitoring import MonitorAsset
from corrtransforms.beam.shifts import DetectShifts

__all__ = ["LOCAL_RUNNER", "NAMESPACE", "CorrelateWindows", "PlanReads", "ReadWindows", "WriteTables",
           "window_accounting", "ComputeIndicators", "DetectShifts", "MonitorAsset"]
