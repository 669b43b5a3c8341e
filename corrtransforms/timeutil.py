"""Time helpers: every time inside the package is an integer count of microseconds since the
Unix epoch (UTC); these convert between that, wall-clock times of a time zone, calendar days and
text. One home for them (stages and the report import from here).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import re
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


# --------------------------------------------------------------------------------------------
# Start times named in file names ([archive] file_time_pattern)

#: the fields of a file-name time pattern and the digits each one matches
FILE_TIME_FIELDS = {
    "Y": r"\d{4}",
    "m": r"\d{2}",
    "d": r"\d{2}",
    "j": r"\d{3}",
    "H": r"\d{2}",
    "M": r"\d{2}",
    "S": r"\d{2}",
    "z": r"[+-]\d{2}:?\d{2}|Z",
}
#: a field that needs another one before it means a time (hours need a day, minutes need hours)
_FIELD_NEEDS = {"d": ("m",), "H": ("d", "j"), "M": ("H",), "S": ("M",)}


@dataclasses.dataclass(frozen=True)
class FileTimePattern:
    """A compiled ``[archive] file_time_pattern``: the pattern's text, its regular expression and
    the number of ``/``-separated path parts it matches (the last ones of a file's path)."""

    text: str
    regex: re.Pattern[str]
    parts: int


def compile_file_time_pattern(text: str) -> FileTimePattern:
    """Compile a file-name time pattern; ValueError with the reason when it is not one.

    Parameters
    ----------
    text : str
        strftime-like: ``%Y`` (4 digits), ``%m``, ``%d``, ``%H``, ``%M``, ``%S`` (2 digits),
        ``%j`` (day of the year, 3 digits), ``%z`` (``+HHMM``, ``+HH:MM`` or ``Z``), ``%%`` (a
        per cent sign), ``*`` (any characters except ``/``); every other character stands for
        itself. ``/`` separates path parts: ``"%Y-%m-%d/%H.parquet"`` matches a folder and a name.

    Returns
    -------
    FileTimePattern

    Notes
    -----
    Each field appears at most once and ``%Y`` is required; ``%d`` needs ``%m``, ``%H`` needs a
    day (``%d`` or ``%j``), ``%M`` needs ``%H``, ``%S`` needs ``%M``; ``%j`` excludes ``%m`` and
    ``%d``. Fields that are absent take their first value (month 1, day 1, hour 0, ...).

    Examples
    --------
    >>> pattern = compile_file_time_pattern("site_%Y%m%d_%H%M.parquet")
    >>> file_name_time_us(pattern, "raw/site_20240304_0130.parquet", "UTC") == 1709515800 * US_PER_S
    True
    """
    if not text or text.startswith("/") or text.endswith("/") or "//" in text:
        raise ValueError("must be a non-empty pattern of path parts separated by single '/'")
    regex, seen, i = [], [], 0
    while i < len(text):
        char = text[i]
        if char == "%":
            field = text[i + 1 : i + 2]
            if field == "%":
                regex.append("%")
            elif field in FILE_TIME_FIELDS:
                if field in seen:
                    raise ValueError(f"repeats the field %{field}")
                seen.append(field)
                regex.append(f"(?P<{field}>{FILE_TIME_FIELDS[field]})")
            else:
                raise ValueError(f"has the unknown field %{field or ''} (fields: {_FIELD_LIST}, * and %%)")
            i += 2
            continue
        regex.append("[^/]*" if char == "*" else re.escape(char))
        i += 1
    _check_fields(seen)
    return FileTimePattern(text=text, regex=re.compile("".join(regex)), parts=text.count("/") + 1)


_FIELD_LIST = " ".join("%" + f for f in FILE_TIME_FIELDS)


def _check_fields(seen) -> None:
    """The field rules of :func:`compile_file_time_pattern` (ValueError naming the first broken one)."""
    if "Y" not in seen:
        raise ValueError("must hold the year field %Y")
    if "j" in seen and ("m" in seen or "d" in seen):
        raise ValueError("must not combine %j (day of the year) with %m or %d")
    for field, needs in _FIELD_NEEDS.items():
        if field in seen and not any(n in seen for n in needs):
            raise ValueError(f"has %{field} without {' or '.join('%' + n for n in needs)}")


def file_name_time_us(pattern: FileTimePattern, path: str, timezone: str) -> Optional[int]:
    """The start time (UTC microseconds) a file's path names, or None when it does not match.

    The last ``pattern.parts`` parts of ``path`` must match the whole pattern and name a real
    date and time. Without ``%z`` the time is wall-clock time of ``timezone`` (the first
    occurrence in the hour repeated when clocks go back, as :func:`local_to_utc_us`).
    """
    tail = "/".join(path.replace("\\", "/").split("/")[-pattern.parts :])
    found = pattern.regex.fullmatch(tail)
    if found is None:
        return None
    fields = found.groupdict()
    try:
        day = _dt.date(int(fields["Y"]), int(fields.get("m") or 1), int(fields.get("d") or 1))
        if fields.get("j"):
            if not 1 <= int(fields["j"]) <= 366:
                return None
            day = _dt.date(day.year, 1, 1) + _dt.timedelta(days=int(fields["j"]) - 1)
            if day.year != int(fields["Y"]):
                return None
        wall = _dt.datetime(
            day.year,
            day.month,
            day.day,
            int(fields.get("H") or 0),
            int(fields.get("M") or 0),
            int(fields.get("S") or 0),
        )
    except ValueError:
        return None
    local_us = (wall - _dt.datetime(1970, 1, 1)) // _dt.timedelta(microseconds=1)
    zone = fields.get("z")
    if zone is None:
        return int(local_to_utc_us(np.array([local_us]), timezone)[0])
    if zone == "Z":
        return int(local_us)
    sign = -1 if zone[0] == "-" else 1
    digits = zone[1:].replace(":", "")
    offset_us = sign * (int(digits[:2]) * 3600 + int(digits[2:]) * 60) * US_PER_S
    return int(local_us - offset_us)
