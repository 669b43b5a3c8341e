"""Beam metrics of the package: one namespace, the counters the launchers read back.

Every counter lives in the ``"corrtransforms"`` namespace; :func:`window_accounting` reads them
from a finished pipeline so the launcher can print that every planned window was computed or
rejected.
"""

from __future__ import annotations

import contextlib
import contextvars
from typing import Dict, Iterator, Optional

from apache_beam.metrics import Metrics

from corrtransforms.config import AssetConfig
from corrtransforms.rejects import WHOLE_WINDOW, Reject, iso_utc

NAMESPACE = "corrtransforms"

#: the asset whose element a shared fleet step is working on (None outside such a step)
_ASSET: contextvars.ContextVar[Optional[str]] = contextvars.ContextVar("corrtransforms_asset", default=None)


def asset_namespace(asset: str) -> str:
    """The namespace of one asset's counters in a shared fleet step: ``corrtransforms/asset=NAME``."""
    return f"{NAMESPACE}/asset={asset}"


@contextlib.contextmanager
def counting_for(asset: str) -> Iterator[None]:
    """Counters made inside go to :func:`asset_namespace` of ``asset`` (a step shared by the
    assets of a fleet, where the step label no longer tells them apart)."""
    token = _ASSET.set(asset)
    try:
        yield
    finally:
        _ASSET.reset(token)


def current_namespace() -> str:
    asset = _ASSET.get()
    return NAMESPACE if asset is None else asset_namespace(asset)


def counter(name: str):
    """The counter ``name`` of the package's namespace (of the asset's, inside :func:`counting_for`)."""
    return Metrics.counter(current_namespace(), name)


def distribution(name: str):
    """The distribution ``name``, namespaced as :func:`counter`."""
    return Metrics.distribution(current_namespace(), name)


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


def window_accounting(metrics_result, step: Optional[str] = None, asset: Optional[str] = None) -> Dict[str, int]:
    """Counters of the "corrtransforms" namespace from a finished pipeline's metrics; with
    ``step``, only those of the steps below that label (one asset of a fleet pipeline); with
    ``asset``, also that asset's counters of the fleet's shared steps (:func:`asset_namespace`)."""
    from apache_beam.metrics.metric import MetricsFilter

    found = metrics_result.query(MetricsFilter().with_namespace(NAMESPACE))
    items = list(found["counters"])
    if asset is not None:
        items += list(metrics_result.query(MetricsFilter().with_namespace(asset_namespace(asset)))["counters"])
    out: Dict[str, int] = {}
    for item in items:
        in_step = step is None or (item.key.step or "").startswith(step + "/")
        if item.key.metric.namespace == NAMESPACE and not in_step:
            continue
        value = item.committed if item.committed is not None else item.attempted
        out[item.key.metric.name] = out.get(item.key.metric.name, 0) + int(value or 0)
    return out
