"""Apache Beam glue: the public PTransforms over the core (no numerics here).

Archive to tables: :class:`PlanReads`, :class:`ReadWindows`, :class:`CorrelateWindows`,
:class:`WriteTables` (see :mod:`corrtransforms.beam.archive`).
"""
from corrtransforms.beam.archive import (LOCAL_RUNNER, NAMESPACE, CorrelateWindows, PlanReads, ReadWindows,
                                         WriteTables, window_accounting)

__all__ = ["LOCAL_RUNNER", "NAMESPACE", "CorrelateWindows", "PlanReads", "ReadWindows", "WriteTables",
           "window_accounting"]
