"""Apache Beam glue: the public PTransforms over the stages (no numerics here), one file per stage.

- :class:`PlanReads` (:mod:`~corrtransforms.beam.plan`), :class:`ReadWindows`
  (:mod:`~corrtransforms.beam.read`), :class:`CorrelateWindows` (:mod:`~corrtransforms.beam.correlate`),
  :class:`ComputeIndicators` (:mod:`~corrtransforms.beam.indicators`), :class:`DetectShifts`
  (:mod:`~corrtransforms.beam.shifts`), :class:`WriteTables` (:mod:`~corrtransforms.beam.write`);
- the whole job of one asset: :class:`MonitorAsset`, of several in one pipeline: :class:`MonitorFleet`
  (:mod:`~corrtransforms.beam.monitor`);
- file access through Beam's FileSystems (:mod:`~corrtransforms.beam.filesystems`) and the
  package's metrics namespace (:mod:`~corrtransforms.beam.metrics`).
"""

from corrtransforms.beam.correlate import CorrelateWindows
from corrtransforms.beam.indicators import ComputeIndicators
from corrtransforms.beam.metrics import NAMESPACE, window_accounting
from corrtransforms.beam.monitor import FleetMember, MonitorAsset, MonitorFleet
from corrtransforms.beam.plan import PlanReads
from corrtransforms.beam.read import ReadWindows
from corrtransforms.beam.shifts import DetectShifts
from corrtransforms.beam.write import WriteTables

#: Beam's in-process runner. "DirectRunner" of this Beam version first tries to download the
#: Prism runner binary from the network; FnApiRunner is what it falls back to, without trying.
LOCAL_RUNNER = "FnApiRunner"

__all__ = [
    "LOCAL_RUNNER",
    "NAMESPACE",
    "PlanReads",
    "ReadWindows",
    "CorrelateWindows",
    "ComputeIndicators",
    "DetectShifts",
    "WriteTables",
    "MonitorAsset",
    "MonitorFleet",
    "FleetMember",
    "window_accounting",
]
