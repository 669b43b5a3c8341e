"""Backfill: an asset's Parquet archive (or some of its days) -> correlations and rejects tables.

    python -m pipelines.backfill --config FILE --output DIR [--start YYYY-MM-DD] [--end YYYY-MM-DD]
                                 [any Beam flag, e.g. --runner, --direct_num_workers]

The default runner is Beam's in-process FnApiRunner: this Beam version's "DirectRunner" first
tries to download a runner binary from the network. ``--runner`` overrides it.
"""
from __future__ import annotations

import argparse
import datetime as _dt
import sys
import uuid
from typing import Callable, Dict, List, Optional

import apache_beam as beam
from apache_beam.options.pipeline_options import PipelineOptions, StandardOptions

from corrtransforms.beam import LOCAL_RUNNER, CorrelateWindows, PlanReads, ReadWindows, WriteTables
from corrtransforms.beam.archive import window_accounting
from corrtransforms.config import AssetConfig, ConfigError, load_config


def _date(text: str) -> _dt.date:
    try:
        return _dt.date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a date YYYY-MM-DD") from None


class BackfillOptions(PipelineOptions):
    """Options of the backfill command. Nothing here is ``required`` for argparse: Beam parses the
    arguments of every PipelineOptions subclass imported anywhere, so a required flag would break
    other pipelines in the same process; :func:`main` checks them instead."""

    @classmethod
    def _add_argparse_args(cls, parser):
        parser.add_argument("--config", default=None, help="the asset's TOML configuration file (required)")
        parser.add_argument("--output", default=None, help="output root folder or filesystem URL (required)")
        parser.add_argument("--start", type=_date, default=None, help="first day (YYYY-MM-DD, asset time zone)")
        parser.add_argument("--end", type=_date, default=None, help="last day (YYYY-MM-DD, inclusive)")
        parser.add_argument("--run_id", default=None, help="id of this run (default: UTC time + random)")


def new_run_id() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ") + "-" + uuid.uuid4().hex[:8]


def build_pipeline(p: beam.Pipeline, config: AssetConfig, output: str, start: Optional[_dt.date] = None,
                   end: Optional[_dt.date] = None, run_id: Optional[str] = None,
                   extra_tables: Optional[Callable[[Dict[str, beam.PCollection]], Dict[str, beam.PCollection]]] = None
                   ) -> Dict[str, beam.PCollection]:
    """Add the backfill's steps to ``p``; returns its main PCollections by name.

    ``extra_tables(branches)`` may return further tables (name -> PCollection, e.g. "indicators")
    built from ``branches`` ("tasks", "blocks", "correlations", "rejects"); they are written and
    committed together with the correlations and rejects. Rejects added there must be returned
    under "rejects_extra" to join the rejects table.
    """
    run_id = run_id or new_run_id()
    plan = p | "Plan reads" >> PlanReads(config, start, end)
    read = plan["tasks"] | "Read windows" >> ReadWindows(config)
    correlated = read["blocks"] | "Correlate windows" >> CorrelateWindows(config)
    branches = {"tasks": plan["tasks"], "blocks": read["blocks"], "correlations": correlated["correlations"],
                "days": plan["days"]}
    reject_sources: List[beam.PCollection] = [plan["rejects"], read["rejects"], correlated["rejects"]]
    tables = {"correlations": correlated["correlations"]}
    if extra_tables is not None:
        extra = dict(extra_tables(branches))
        if "rejects_extra" in extra:
            reject_sources.append(extra.pop("rejects_extra"))
        tables.update(extra)
    tables["rejects"] = reject_sources | "All rejects" >> beam.Flatten()
    branches["rejects"] = tables["rejects"]
    branches["commits"] = tables | "Write tables" >> WriteTables(output, config, run_id, days=plan["days"])
    return branches


def summary(counters: Dict[str, int]) -> str:
    """Short text summary of window accounting from the pipeline's counters."""
    planned = counters.get("windows_planned", 0)
    computed = counters.get("windows_computed", 0)
    rejected = counters.get("windows_rejected", 0)
    lines = [f"windows planned {planned}, computed {computed}, rejected {rejected}"
             + ("" if planned == computed + rejected else "  (ACCOUNTING MISMATCH)")]
    prefix = "windows_rejected_"
    for name in sorted(k for k in counters if k.startswith(prefix)):
        lines.append(f"  rejected {name[len(prefix):]}: {counters[name]}")
    findings = sorted((k[len("findings_"):], v) for k, v in counters.items() if k.startswith("findings_"))
    if findings:
        lines.append("findings: " + ", ".join(f"{k} {v}" for k, v in findings))
    lines.append(f"files listed {counters.get('files_listed', 0)}, unusable {counters.get('files_rejected', 0)}; "
                 f"rows written: correlations {counters.get('rows_written_correlations', 0)}, "
                 f"rejects {counters.get('rows_written_rejects', 0)}; "
                 f"files committed {counters.get('files_committed', 0)}, stale removed {counters.get('stale_files_removed', 0)}")
    return "\n".join(lines)


def main(argv: Optional[List[str]] = None) -> Dict[str, int]:
    """Run the backfill; returns the counters (also printed as a summary)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    options = PipelineOptions(argv)
    args = options.view_as(BackfillOptions)
    standard = options.view_as(StandardOptions)
    if not standard.runner:
        standard.runner = LOCAL_RUNNER
    for flag in ("config", "output"):
        if not getattr(args, flag):
            raise SystemExit(f"--{flag} is required (python -m pipelines.backfill --config FILE --output DIR)")
    try:
        config = load_config(args.config)
    except ConfigError as err:
        raise SystemExit(f"configuration error: {err}") from None
    if args.start and args.end and args.end < args.start:
        raise SystemExit(f"--end {args.end} is before --start {args.start}")
    run_id = args.run_id or new_run_id()
    p = beam.Pipeline(options=options)
    build_pipeline(p, config, args.output, args.start, args.end, run_id)
    result = p.run()
    result.wait_until_finish()
    counters = window_accounting(result.metrics())
    print(summary(counters))
    return counters


if __name__ == "__main__":  # pragma: no cover
    main()
