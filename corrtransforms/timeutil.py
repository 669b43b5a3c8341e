"""Time helpers: every time inside the package is an integer count of microseconds since the
Unix epoch (UTC); these convert between that, wall-clock times of a time zone, calendar days and
text. One home for them (stages and the report import from here).
"""

from __future__ import annotations

import datetime as _dt
from typing import Optional

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

US_PER_S = 1_000_000
_UNIT_TO_US = {"s": 1_000_000, "ms": 1_000, "us": 1, "ns": None}


def local_to_utc_us(local_us: np.ndarray, timezone: str) -> np.ndarray:
    """Convert naive local times (microseconds, wall clock of ``timezone``) to UTC microseconds.

    Parameters
    ----------
    local_us : ndarray of int64
        Wall-clock times of ``timezone`` as microseconds since 1970-01-01 00:00 (local).
    timezone : str
        IANA time-zone name.

    Returns
    -------
    ndarray of int64
        ``local_us - offset(local)``, with the UTC offset looked up once per quarter hour of
        wall-clock time present (time-zone transitions fall on quarter hours).

    Notes
    -----
    Ambiguous wall-clock times (the repeated hour when clocks go back) take the first
    occurrence (``fold=0``), as do non-existent ones; naive archives cannot tell them apart,
    so the repeated hour shows up as duplicated timestamps.
    """
    local_us = np.asarray(local_us, dtype=np.int64)
    if timezone == "UTC" or local_us.size == 0:
        return local_us.copy()
    import zoneinfo

    zone = zoneinfo.ZoneInfo(timezone)
    quarter = 900 * US_PER_S
    buckets, inverse = np.unique(local_us // quarter, return_inverse=True)
    epoch = _dt.datetime(1970, 1, 1)
    offsets = np.empty(len(buckets), dtype=np.int64)
    for i, b in enumerate(buckets):
        wall = epoch + _dt.timedelta(microseconds=int(b) * quarter)
        offset = wall.replace(tzinfo=zone).utcoffset()
        assert offset is not None  # a ZoneInfo always gives an offset
        offsets[i] = int(offset / _dt.timedelta(microseconds=1))
    return local_us - offsets[inverse.reshape(-1)]


def local_date(utc_us: int, timezone: str) -> str:
    """Calendar date (``YYYY-MM-DD``) of a UTC instant in ``timezone``."""
    import zoneinfo

    instant = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc) + _dt.timedelta(microseconds=int(utc_us))
    return instant.astimezone(zoneinfo.ZoneInfo(timezone)).date().isoformat()


def day_start_us(day: _dt.date, timezone: str) -> int:
    """UTC microseconds of local midnight starting ``day`` in ``timezone``."""
    local = int((_dt.datetime(day.year, day.month, day.day) - _dt.datetime(1970, 1, 1)) / _dt.timedelta(microseconds=1))
    return int(local_to_utc_us(np.array([local]), timezone)[0])


def compact_utc(utc_us: int) -> str:
    """A UTC instant as ``YYYYMMDDTHHMMSS[.ffffff]Z`` (file and task names)."""
    instant = _dt.datetime(1970, 1, 1) + _dt.timedelta(microseconds=int(utc_us))
    text = instant.strftime("%Y%m%dT%H%M%S")
    if utc_us % US_PER_S:
        text += f".{utc_us % US_PER_S:06d}"
    return text + "Z"


def timestamp_to_us(values: np.ndarray, unit: str) -> np.ndarray:
    """Integer timestamps of ``unit`` ("s", "ms", "us", "ns") to microseconds (floor)."""
    values = np.asarray(values, dtype=np.int64)
    if unit == "ns":
        return np.floor_divide(values, 1000)
    return values * _UNIT_TO_US[unit]


# --------------------------------------------------------------------------------------------
# Instants as datetimes, calendar days as day numbers (the shifts stage and the state table)

_EPOCH_UTC = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)
_EPOCH_DATE = _dt.date(1970, 1, 1)


def datetime_to_us(value) -> Optional[int]:
    """UTC microseconds of a datetime (naive ones are taken as UTC); integers pass through, None
    stays None (timestamps as pyarrow returns them, or already converted)."""
    if value is None:
        return None
    if isinstance(value, _dt.datetime):
        if value.tzinfo is None:
            value = value.replace(tzinfo=_dt.timezone.utc)
        delta = value - _EPOCH_UTC
        return (delta.days * 86400 + delta.seconds) * 1_000_000 + delta.microseconds
    return int(value)


def us_to_datetime(us: Optional[int]) -> Optional[_dt.datetime]:
    """Inverse of :func:`datetime_to_us`: a UTC-aware datetime (None stays None)."""
    if us is None:
        return None
    return _EPOCH_UTC + _dt.timedelta(microseconds=int(us))


def local_days(times_us, timezone: str) -> np.ndarray:
    """Local calendar day of each instant, as days since 1970-01-01 (int32).

    Parameters
    ----------
    times_us : array_like of int
        Instants (e.g. window starts) in microseconds since the epoch, UTC.
    timezone : str
        IANA zone (``[archive] timezone``).

    Returns
    -------
    ndarray of int32
    """
    times = pa.array(np.asarray(times_us, dtype=np.int64), type=pa.int64()).cast(pa.timestamp("us", tz=timezone))
    local = pc.local_timestamp(times)
    return local.cast(pa.date32()).cast(pa.int32()).to_numpy(zero_copy_only=False).astype(np.int32)


def day_number(day: _dt.date) -> int:
    """Days since 1970-01-01 of a date."""
    return (day - _EPOCH_DATE).days


def day_date(number: int) -> _dt.date:
    """Inverse of :func:`day_number`."""
    return _EPOCH_DATE + _dt.timedelta(days=int(number))
