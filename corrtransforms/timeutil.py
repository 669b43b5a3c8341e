"""Time helpers: every time inside the package is an integer count of microseconds since the
Unix epoch (UTC); these convert between that, wall-clock times of a time zone, calendar days and
text. One home for them (stages and the report import from here).
"""
from __future__ import annotations

import datetime as _dt

import numpy as np

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
        offsets[i] = int(wall.replace(tzinfo=zone).utcoffset() / _dt.timedelta(microseconds=1))
    return local_us - offsets[inverse.reshape(-1)]


def local_date(utc_us: int, timezone: str) -> str:
    """Calendar date (``YYYY-MM-DD``) of a UTC instant in ``timezone``."""
    import zoneinfo

    instant = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc) + _dt.timedelta(microseconds=int(utc_us))
    return instant.astimezone(zoneinfo.ZoneInfo(timezone)).date().isoformat()


def day_start_us(day: _dt.date, timezone: str) -> int:
    """UTC microseconds of local midnight starting ``day`` in ``timezone``."""
    local = int((_dt.datetime(day.year, day.month, day.day) - _dt.datetime(1970, 1, 1))
                / _dt.timedelta(microseconds=1))
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
