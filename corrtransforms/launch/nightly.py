"""Nightly: one calendar day of an asset, resuming the shift detectors from the previous state.

    corrtransforms-nightly --config FILE --output DIR [--date YYYY-MM-DD] [--rebuild_state]
                           [any Beam flag]

Processes the windows that start on ``--date`` (default: yesterday in the asset's time zone),
replaces exactly that day's partitions of every table, and resumes every detector from the
latest state written before that day. When no earlier state exists the run stops before doing
anything, with exit status 2 and a message; ``--rebuild_state`` instead replays the detectors
over the indicators table already written before that day (no raw samples are read again), which
gives the state a backfill would have written. Rerunning a night is harmless: it replaces the
same partitions with the same rows.
"""

from __future__ import annotations

import datetime as _dt
import sys
import zoneinfo
from typing import Any, Dict, List, Optional

from corrtransforms import tables
from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.beam.output_tables import partition_files, read_partitions
from corrtransforms.config import AssetConfig
from corrtransforms.launch import common
from corrtransforms.stages.state import replay_tables
from corrtransforms.stages.write import write_tables

MISSING_STATE = common.MISSING_STATE


def yesterday(config: AssetConfig, now: Optional[_dt.datetime] = None) -> _dt.date:
    """The calendar day before today in the asset's time zone."""
    now = now or _dt.datetime.now(_dt.timezone.utc)
    return (now.astimezone(zoneinfo.ZoneInfo(config.timezone)) - _dt.timedelta(days=1)).date()


def report_gap(config: AssetConfig, day: _dt.date, states) -> int:
    """Say how many days lie between the latest state and ``day`` (a nightly that did not run, or
    days without data); returns that count."""
    latest = max(states.column("local_date").to_pylist())
    missing = (day - latest).days - 1
    if missing > 0:
        print(
            f"nightly {config.name} {day}: resuming from the state of {latest}: {missing} "
            f"day{'s' if missing != 1 else ''} without state in between ({latest + _dt.timedelta(days=1)} to "
            f"{day - _dt.timedelta(days=1)}); run those nights first if they hold data"
        )
    return missing


def previous_states(output: str, config: AssetConfig, day: _dt.date, rebuild: bool, run_id: str = ""):
    """The state table to resume ``day`` from, or SystemExit(2) when there is none."""
    states = common.earlier_states(output, config, day, run_id)
    if states is not None:
        report_gap(config, day, states)
        return states
    earlier_indicators = [d for d, _ in partition_files(output, "indicators", config.name) if d < day.isoformat()]
    if not rebuild:
        hint = (
            "the indicators table has earlier days: pass --rebuild_state to replay the detectors over them"
            if earlier_indicators
            else "run the backfill over the earlier days first (it writes the state), "
            "or pass --rebuild_state to start from the indicators table"
        )
        print(
            f"nightly {config.name} {day}: no detector state before {day} under {output}/state/asset={config.name}/; "
            f"{hint}",
            file=sys.stderr,
        )
        raise SystemExit(MISSING_STATE)
    indicators = read_partitions(output, "indicators", config.name, tables.INDICATORS, before=day)
    rebuilt = replay_tables(indicators, config)
    # written where a backfill would have written them, so the run reads them like any state
    write_tables(
        output,
        config,
        run_id,
        {"state": [rebuilt.states], "baseline_sample": [rebuilt.baseline_sample]},
        store=BeamFiles(),
    )
    print(
        f"nightly {config.name} {day}: rebuilt the state of {rebuilt.latest.num_rows} series from "
        f"{indicators.num_rows} indicator rows of {len(earlier_indicators)} earlier days "
        f"(state and baseline_sample partitions of those days rewritten)"
    )
    return common.earlier_states(output, config, day, run_id)


def main(argv: Optional[List[str]] = None) -> Dict[str, Any]:
    """Run one night; returns the counters (also printed as a summary)."""
    from corrtransforms.launch import fleet

    fleet_options = common.pipeline_options(argv, "nightly")
    fleet_args = fleet_options.view_as(common.JobOptions)
    if fleet.is_fleet(common.config_specs(fleet_args)):
        if not fleet_args.output:
            raise SystemExit("--output is required")
        return fleet.nightly(fleet_options, fleet_args)
    options, args, config = common.parse_options(argv, "nightly")
    day = common.as_date(args.date) or yesterday(config)
    run_id = args.run_id or common.new_run_id()
    initial = previous_states(args.output, config, day, args.rebuild_state, run_id)
    print(f"nightly {config.name}: processing {day}")
    resume = None if initial is None else common.resume_point(args.output, config, day, run_id)
    return common.run(options, config, args.output, day, day, run_id, resume)


def cli() -> None:
    """Console entry point ``corrtransforms-nightly``."""
    common.entry_point(main)
