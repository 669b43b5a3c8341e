"""Backfill: an asset's Parquet archive (or some of its days) -> all five output tables.

corrtransforms-backfill --config FILE --output DIR [--start YYYY-MM-DD] [--end YYYY-MM-DD]
                        [any Beam flag, e.g. --runner, --direct_num_workers]
"""

from __future__ import annotations

from typing import Dict, List, Optional

from corrtransforms.launch import common


def main(argv: Optional[List[str]] = None) -> Dict[str, int]:
    """Run the backfill; returns the counters (also printed as a summary)."""
    options, args, config = common.parse_options(argv, "backfill")
    start, end = common.as_date(args.start), common.as_date(args.end)
    if start and end and end < start:
        raise SystemExit(f"--end {end} is before --start {start}")
    run_id = args.run_id or common.new_run_id()
    initial = common.earlier_states(args.output, config, start, run_id)
    return common.run(options, config, args.output, start, end, run_id, initial)


def cli() -> None:
    """Console entry point ``corrtransforms-backfill``."""
    common.entry_point(main)
