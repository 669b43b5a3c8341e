"""Beam metrics of the package: one namespace, the counters the launchers read back.

Every counter lives in the ``"corrtransforms"`` namespace; :func:`window_accounting` reads them
from a finished pipeline so the launcher can print that every planned window was computed or
rejected.
"""

from __future__ import annotations

from typing import Dict, Optional

from apache_beam.metrics import Metrics

from corrtransforms.config import AssetConfig
from corrtransforms.rejects import WHOLE_WINDOW, Reject, iso_utc

NAMESPACE = "corrtransforms"


def counter(name: str):
    """The counter ``name`` of the package's namespace."""
    return Metrics.counter(NAMESPACE, name)


def whole_window_reject(config: AssetConfig, start_us: int, stage: str, reason: str, detail: str) -> Reject:
    return Reject(
        stage=stage,
        source=iso_utc(start_us),
        subject=WHOLE_WINDOW,
        reason=reason,
        detail=detail,
        asset=config.name,
        window_start_us=int(start_us),
    )


def count_reject(finding: Reject) -> None:
    counter(f"findings_{finding.reason}").inc()
    if finding.rejects_whole_window:
        counter("windows_rejected").inc()
        counter(f"windows_rejected_{finding.reason}").inc()


def window_accounting(metrics_result, step: Optional[str] = None) -> Dict[str, int]:
    """Counters of the "corrtransforms" namespace from a finished pipeline's metrics; with
    ``step``, only those of the steps below that label (one asset of a fleet pipeline)."""
    from apache_beam.metrics.metric import MetricsFilter

    found = metrics_result.query(MetricsFilter().with_namespace(NAMESPACE))
    out: Dict[str, int] = {}
    for item in found["counters"]:
        if step is not None and not (item.key.step or "").startswith(step + "/"):
            continue
        value = item.committed if item.committed is not None else item.attempted
        out[item.key.metric.name] = out.get(item.key.metric.name, 0) + int(value or 0)
    return out
