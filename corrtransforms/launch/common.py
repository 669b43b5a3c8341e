"""What the backfill and nightly launchers share: options, configuration loading, checks before
the pipeline, running a job and its summary, and the exit statuses.

The default runner is Beam's in-process FnApiRunner: this Beam version's "DirectRunner" first
tries to download a runner binary from the network. ``--runner`` overrides it.
"""
from __future__ import annotations

import argparse
import datetime as _dt
import logging
import posixpath
import sys
import uuid
from typing import Any, Dict, List, Optional

import apache_beam as beam
from apache_beam.io.filesystem import CompressionTypes
from apache_beam.io.filesystems import FileSystems
from apache_beam.options.pipeline_options import PipelineOptions, StandardOptions

from corrtransforms import config as config_module
from corrtransforms import tables
from corrtransforms.beam import LOCAL_RUNNER
from corrtransforms.beam.metrics import window_accounting
from corrtransforms.beam.monitor import PROGRESS_LOGGER, MonitorAsset
from corrtransforms.beam.output_tables import (LATEST_STATE, latest_states, remove_stale_temporary,
                                               summarize_partitions, write_episodes)
from corrtransforms.config import AssetConfig, ConfigError, load_config, parse_config
from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages.write import provenance_metadata

#: exit statuses (README "Commands"): done; configuration or runtime error; missing previous
#: state; nothing to do or nothing usable
DONE, ERROR, MISSING_STATE, NOTHING_USABLE = 0, 1, 2, 3


def _date(text: str) -> str:
    """Check a ``YYYY-MM-DD`` flag and keep it as text: a portable runner sends every option to
    the job service as JSON, where a ``datetime.date`` value fails; :func:`as_date` converts."""
    try:
        return _dt.date.fromisoformat(text).isoformat()
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a date YYYY-MM-DD") from None


def as_date(text: Optional[str]) -> Optional[_dt.date]:
    """A date flag's value (``YYYY-MM-DD`` text or None) as a date."""
    return None if text is None else _dt.date.fromisoformat(str(text))


class JobOptions(PipelineOptions):
    """Options of the backfill, nightly and report commands (one class for all: Beam parses the
    arguments of every PipelineOptions subclass imported anywhere, so two classes defining
    ``--config`` would conflict). Nothing here is ``required`` for argparse, for the same reason:
    a required flag would break other pipelines in the same process; :func:`parse_options`
    checks them."""

    @classmethod
    def _add_argparse_args(cls, parser):
        parser.add_argument("--config", default=None, help="the asset's TOML configuration file (required)")
        parser.add_argument("--output", default=None, help="output root folder or filesystem URL (required)")
        parser.add_argument("--start", type=_date, default=None, help="first day (YYYY-MM-DD, asset time zone)")
        parser.add_argument("--end", type=_date, default=None, help="last day (YYYY-MM-DD, inclusive)")
        parser.add_argument("--run_id", default=None, help="id of this run (default: UTC time + random)")
        parser.add_argument("--date", type=_date, default=None,
                            help="nightly: the day to process (default: yesterday in the asset's time zone)")
        parser.add_argument("--rebuild_state", action="store_true", default=False,
                            help="nightly: rebuild a missing previous state from the indicators table")
        parser.add_argument("--stale_temporary_hours", type=float, default=24.0,
                            help="delete other runs' _temporary folders not written for this many hours "
                                 "(runs that died); 0 keeps them")
        parser.add_argument("--report_dir", default=None,
                            help="report: where to write the report (default OUTPUT/report)")


def new_run_id() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ") + "-" + uuid.uuid4().hex[:8]


def build_pipeline(p: beam.Pipeline, config: AssetConfig, output: str, start: Optional[_dt.date] = None,
                   end: Optional[_dt.date] = None, run_id: Optional[str] = None,
                   initial_states: Any = None) -> Dict[str, beam.PCollection]:
    """Add the whole job's steps to ``p`` (see :class:`corrtransforms.beam.MonitorAsset`)."""
    run_id = run_id or new_run_id()
    return p | "Monitor asset" >> MonitorAsset(config, output, run_id, start, end, initial_states)


def earlier_states(output: str, config: AssetConfig, start: Optional[_dt.date], run_id: str = ""):
    """State rows written before ``start`` (None when starting from the first window)."""
    if start is None:
        return None
    states = summarize_partitions(output, "state", config.name, tables.STATE, latest_states, LATEST_STATE,
                                  before=start, provenance=provenance_metadata(config, run_id))
    return states if states.num_rows else None


def _show_progress() -> None:
    """Progress lines of the local run on stderr (the runner's own logging stays as it is)."""
    log = logging.getLogger(PROGRESS_LOGGER)
    if not any(getattr(h, "_corrtransforms", False) for h in log.handlers):
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("%(asctime)s %(message)s", "%H:%M:%S"))
        handler._corrtransforms = True
        log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False


def remove_stale(options: PipelineOptions, output: str, run_id: str) -> None:
    """Delete the temporary files of other runs that died (``--stale_temporary_hours``)."""
    stale_hours = options.view_as(JobOptions).stale_temporary_hours
    for stale_run, age_s in remove_stale_temporary(output, run_id, 3600.0 * stale_hours):
        print(f"removed the temporary files of run {stale_run} under {output}: last written "
              f"{age_s / 3600.0:.1f} h ago (a run that did not finish)")


def run(options: PipelineOptions, config: AssetConfig, output: str, start: Optional[_dt.date],
        end: Optional[_dt.date], run_id: str, initial_states: Any) -> Dict[str, int]:
    """Build, run and summarise one job; rewrites the episodes summary afterwards."""
    _show_progress()
    remove_stale(options, output, run_id)
    p = beam.Pipeline(options=options)
    build_pipeline(p, config, output, start, end, run_id, initial_states)
    result = p.run()
    result.wait_until_finish()
    counters = window_accounting(result.metrics())
    counters["episodes"] = write_episodes(output, config, run_id)
    print(summary(counters))
    return counters


def load_job_config(path: str) -> AssetConfig:
    """The asset's configuration from a local file or from any Beam filesystem URL.

    A URL (``gs://bucket/sites/pump-7.toml``) is read through FileSystems; a relative
    ``[archive] path`` in it resolves against the URL's folder, as it does for a local file.
    """
    if "://" not in path:
        return load_config(path)
    try:
        with FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED) as handle:
            text = handle.read().decode("utf-8")
    except Exception as err:  # noqa: BLE001 - BeamIOError, IOError, a missing filesystem
        raise ConfigError("--config", path, f"cannot be read ({type(err).__name__}: {err})") from None
    try:
        raw = config_module.tomllib.loads(text)
    except config_module.tomllib.TOMLDecodeError as err:
        raise ConfigError("--config", path, f"is not valid TOML ({err})") from None
    archive = raw.get("archive")
    if isinstance(archive, dict) and isinstance(archive.get("path"), str):
        relative = archive["path"]
        if "://" not in relative and not relative.startswith("/"):
            scheme, rest = path.split("://", 1)
            folder = posixpath.dirname(rest)
            raw = {**raw, "archive": {**archive,
                                      "path": f"{scheme}://{posixpath.normpath(posixpath.join(folder, relative))}"}}
    return parse_config(raw, base_dir="", source=path)


def _own_flags() -> List[str]:
    parser = argparse.ArgumentParser(add_help=False)
    JobOptions._add_argparse_args(parser)
    return [s for action in parser._actions for s in action.option_strings]


def with_underscores(argv: List[str]) -> List[str]:
    """The command line with the hyphenated spellings of this package's flags (``--report-dir``,
    ``--run-id``) written as their underscore form (Beam's style); other tokens unchanged."""
    own = set(_own_flags())
    out = []
    for token in argv:
        name, sep, value = token.partition("=")
        if name.startswith("--") and "-" in name[2:] and "--" + name[2:].replace("-", "_") in own:
            token = "--" + name[2:].replace("-", "_") + sep + value
        out.append(token)
    return out


def pipeline_options(argv: Optional[List[str]]) -> PipelineOptions:
    """Beam's options from the command line, with the local runner as default; the filesystems
    get them at once (the launcher reads configuration and earlier state before the pipeline
    exists: S3 credentials and endpoint, GCS project...)."""
    argv = with_underscores(list(sys.argv[1:] if argv is None else argv))
    options = PipelineOptions(argv)
    standard = options.view_as(StandardOptions)
    if not standard.runner:
        standard.runner = LOCAL_RUNNER
    FileSystems.set_options(options)
    return options


def parse_options(argv: Optional[List[str]], options_class=JobOptions):
    """(options, the command's view of them, the asset's configuration); SystemExit (status 1)
    on a missing flag, a configuration error or an archive path that matches no file."""
    options = pipeline_options(argv)
    args = options.view_as(options_class)
    for flag in ("config", "output"):
        if not getattr(args, flag):
            raise SystemExit(f"--{flag} is required")
    try:
        config = load_job_config(args.config)
    except ConfigError as err:
        raise SystemExit(f"configuration error: {err}") from None
    check_archive(config)
    return options, args, config


def check_archive(config: AssetConfig) -> None:
    """Stop before the pipeline starts when ``[archive] path`` matches no file (a wrong path must
    not surface as an error deep inside the running job)."""
    pattern = archive_plan.expand_archive_path(config.archive.path)
    try:
        found = FileSystems.match([pattern], limits=[1])[0].metadata_list
    except Exception as err:  # noqa: BLE001 - an unreachable or malformed location
        raise SystemExit(f"configuration error: [archive] path = {config.archive.path!r}: "
                         f"cannot be listed ({type(err).__name__}: {err})") from None
    if not found:
        raise SystemExit(f"configuration error: [archive] path = {config.archive.path!r}: no files match "
                         f"{pattern!r}")


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
                 f"rows written: " + ", ".join(f"{t} {counters.get('rows_written_' + t, 0)}" for t in
                                               ("correlations", "indicators", "shifts", "state", "rejects"))
                 + "; "
                 f"files committed {counters.get('files_committed', 0)}, stale removed {counters.get('stale_files_removed', 0)}")
    lines.append(f"shifts: {counters.get('shift_series', 0)} series, {counters.get('shift_windows', 0)} windows, "
                 f"{counters.get('shift_windows_shifted', 0)} in state shifted; "
                 f"episodes in the summary: {counters.get('episodes', 0)}")
    return "\n".join(lines)


def entry_point(main) -> None:
    """Run a launcher's ``main`` as a command: exit status 0 when it returns (any SystemExit it
    raises carries its own status or message)."""
    main()
    sys.exit(DONE)
