"""Checks of the launchers before and after a run: configured channels the archive does not have
(exit status 1), and runs with nothing usable (exit status 3).

Both read only Parquet footers and the run's rejects table, through Beam's FileSystems.
"""

from __future__ import annotations

import datetime as _dt
import sys
from typing import Any, Dict, List, Optional

from corrtransforms import tables
from corrtransforms.beam.filesystems import list_archive, open_file
from corrtransforms.beam.output_tables import read_partitions
from corrtransforms.config import AssetConfig
from corrtransforms.stages import plan as archive_plan
from corrtransforms.timeutil import local_date

NOTHING_USABLE = 3


def check_channels(config: AssetConfig, start: Optional[_dt.date], end: Optional[_dt.date]) -> None:
    """SystemExit (status 1) when a configured channel is a column of no file's footer in the
    requested days (wide layout with ``[channels] names``); the message lists the columns found.

    Footers are read in path order until every configured channel has been seen: one footer
    when the configuration is right, every footer of the days only when it is not.
    """
    if config.archive.layout != "wide" or not config.channels.names:
        return
    wanted = list(config.channels.names)
    seen: List[str] = []
    try:
        paths = [p for p in list_archive(config.archive.path) if archive_plan.may_hold_days(p, config, start, end)]
    except (FileNotFoundError, OSError):
        return  # check_archive names a path without files
    for path in paths:
        footer, _ = archive_plan.read_footer(path, config, open_file)
        if footer is None:
            continue
        seen.extend(c for c in footer.numeric_columns + footer.other_columns if c not in seen)
        if all(name in seen for name in wanted):
            return
    missing = [name for name in wanted if name not in seen]
    if seen and missing:
        raise SystemExit(
            f"configuration error: [channels] names: {', '.join(map(repr, missing))} "
            f"{'is' if len(missing) == 1 else 'are'} a column of no file in {len(paths)} files of "
            f"{config.archive.path!r}; columns found: {', '.join(seen)}"
        )


def last_data_time(config: AssetConfig) -> str:
    """The end of the latest data in the archive (its last file's footer), as UTC text."""
    try:
        paths = list_archive(config.archive.path)
    except (FileNotFoundError, OSError):
        return "none"
    for path in sorted(paths, key=lambda p: (archive_plan.path_date(p) or "", p), reverse=True)[:5]:
        footer, _ = archive_plan.read_footer(path, config, open_file)
        if footer is not None and footer.row_groups:
            return _dt.datetime.fromtimestamp(footer.end_us / 1e6, _dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")
    return "none readable"


def _days(start: Optional[_dt.date], end: Optional[_dt.date]) -> str:
    if start is None and end is None:
        return "the whole archive"
    if start == end:
        return str(start)
    return f"{start or 'the first day'} to {end or 'the last day'}"


def reject_examples(
    output: str, config: AssetConfig, start: Optional[_dt.date], end: Optional[_dt.date], limit: int = 3
):
    """The most frequent whole-window reject reasons of the days, each with a count and one
    example, and the sorted days those windows belong to."""
    rejects = read_partitions(output, "rejects", config.name, tables.REJECTS)
    found: Dict[str, Dict[str, Any]] = {}
    days = set()
    for row in rejects.to_pylist():
        if row["subject"] != "*" or row["action"] != "rejected" or row["window_start"] is None:
            continue
        day = local_date(int(row["window_start"].timestamp() * 1e6), config.timezone)
        if (start and _dt.date.fromisoformat(day) < start) or (end and _dt.date.fromisoformat(day) > end):
            continue
        days.add(day)
        entry = found.setdefault(
            row["reason"], {"reason": row["reason"], "windows": 0, "example": f"{row['source']}: {row['detail']}"}
        )
        entry["windows"] += 1
    return sorted(found.values(), key=lambda e: (-e["windows"], e["reason"]))[:limit], sorted(days)


def check_usable(
    counters: Dict[str, int], config: AssetConfig, output: str, start: Optional[_dt.date], end: Optional[_dt.date]
) -> None:
    """SystemExit (status 3) after a run that planned no window or had every window rejected."""
    message = nothing_usable(counters, config, output, start, end)
    if message is None:
        return
    print(message, file=sys.stderr, flush=True)
    raise SystemExit(NOTHING_USABLE)


def nothing_usable(
    counters: Dict[str, int], config: AssetConfig, output: str, start: Optional[_dt.date], end: Optional[_dt.date]
) -> Optional[str]:
    """Why a run is one of nothing usable (no window planned, or every one rejected), or None."""
    planned, computed = counters.get("windows_planned", 0), counters.get("windows_computed", 0)
    if planned and computed:
        return None
    if not planned:
        message = (
            f"nothing to do: {config.name}: no data in {_days(start, end)} under "
            f"{config.archive.path!r}; the last data seen ends {last_data_time(config)}"
        )
    else:
        examples, days = reject_examples(output, config, start, end)
        reasons = "; ".join(f"{e['reason']} ({e['windows']} windows, e.g. {e['example']})" for e in examples)
        shown = ", ".join(days[:3]) + (f" and {len(days) - 3} more days" if len(days) > 3 else "")
        message = (
            f"nothing usable: {config.name}: all {planned} planned windows ({shown or _days(start, end)}) "
            f"were rejected; top reasons: {reasons or 'see the rejects table'}"
        )
    return message
