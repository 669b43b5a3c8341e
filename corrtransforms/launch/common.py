"""What the backfill and nightly launchers share: options, configuration loading, checks before
the pipeline, running a job and its summary, and the exit statuses.

The default runner is Beam's in-process FnApiRunner: this Beam version's "DirectRunner" first
tries to download a runner binary from the network. ``--runner`` overrides it.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import difflib
import logging
import os
import posixpath
import sys
import uuid
from typing import Any, Dict, List, Optional, Tuple

import apache_beam as beam
from apache_beam.io.filesystem import CompressionTypes
from apache_beam.io.filesystems import FileSystems
from apache_beam.options.pipeline_options import DirectOptions, PipelineOptions, StandardOptions

from corrtransforms import config as config_module
from corrtransforms import tables
from corrtransforms.beam import LOCAL_RUNNER
from corrtransforms.beam.metrics import window_accounting
from corrtransforms.beam.monitor import PROGRESS_LOGGER, MonitorAsset
from corrtransforms.beam.output_tables import (
    LATEST_STATE,
    latest_states,
    remove_stale_temporary,
    summarize_partitions,
    write_episodes,
)
from corrtransforms.beam.stored_state import StoredState
from corrtransforms.config import AssetConfig, ConfigError, load_config, parse_config
from corrtransforms.launch import checks, run_summary
from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages.write import provenance_metadata

#: exit statuses (README "Commands"): done; configuration or runtime error; missing previous
#: state; nothing to do or nothing usable; some assets of a fleet failed, the others done
DONE, ERROR, MISSING_STATE, NOTHING_USABLE, SOME_ASSETS_FAILED = 0, 1, 2, checks.NOTHING_USABLE, 4


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
        parser.add_argument(
            "--config",
            action="append",
            default=None,
            help="an asset's TOML file, a fleet folder or a glob (required; may be repeated)",
        )
        parser.add_argument("--output", default=None, help="output root folder or filesystem URL (required)")
        parser.add_argument("--start", type=_date, default=None, help="first day (YYYY-MM-DD, asset time zone)")
        parser.add_argument("--end", type=_date, default=None, help="last day (YYYY-MM-DD, inclusive)")
        parser.add_argument("--run_id", default=None, help="id of this run (default: UTC time + random)")
        parser.add_argument(
            "--commit_days",
            type=int,
            default=1,
            help="backfill: days per pipeline; each chunk is committed before the next starts",
        )
        parser.add_argument(
            "--date",
            type=_date,
            default=None,
            help="nightly: the day to process (default: yesterday in the asset's time zone)",
        )
        parser.add_argument(
            "--rebuild_state",
            action="store_true",
            default=False,
            help="nightly: rebuild a missing previous state from the indicators table",
        )
        parser.add_argument(
            "--stale_temporary_hours",
            type=float,
            default=24.0,
            help="delete other runs' _temporary folders not written for this many hours (runs that died); 0 keeps them",
        )
        parser.add_argument(
            "--report_dir", default=None, help="report: where to write the report (default OUTPUT/report)"
        )


#: each command's own flags and their one-line help (every other JobOptions flag belongs to another
#: command and is an error)
COMMAND_FLAGS = {
    "backfill": {
        "--config": "CONFIG the asset's TOML file (a path or filesystem URL; required), or a fleet: a folder (each "
        "*.toml not starting with _ is an asset; _defaults.toml merged under each), a glob, or --config repeated",
        "--output": "DIR    output root folder or filesystem URL (required)",
        "--start": "DAY    first day to process, YYYY-MM-DD in the asset's time zone (default: the first data)",
        "--end": "DAY    last day to process, inclusive (default: the last data)",
        "--commit_days": "N      days per pipeline, committed before the next chunk starts (1); a rerun "
        "after a crash continues after the last committed chunk",
        "--run_id": "ID     id of this run in provenance and temporary names (default: UTC time + random)",
        "--stale_temporary_hours": "H      delete other runs' temporary files not written for H hours (24; 0 keeps)",
    },
    "nightly": {
        "--config": "CONFIG the asset's TOML file (a path or filesystem URL; required), or a fleet: a folder (each "
        "*.toml not starting with _ is an asset; _defaults.toml merged under each), a glob, or --config repeated",
        "--output": "DIR    output root folder or filesystem URL (required)",
        "--date": "DAY    the day to process, YYYY-MM-DD (default: yesterday in the asset's time zone)",
        "--rebuild_state": "       rebuild a missing previous state from the indicators table",
        "--run_id": "ID     id of this run in provenance and temporary names (default: UTC time + random)",
        "--stale_temporary_hours": "H      delete other runs' temporary files not written for H hours (24; 0 keeps)",
    },
    "report": {
        "--output": "DIR    output root folder or filesystem URL to report (required)",
        "--report_dir": "DIR    where to write index.html and plots/ (default: OUTPUT/report)",
    },
}
COMMAND_PURPOSE = {
    "backfill": "Reduce an asset's Parquet archive (or some of its days) to the output tables.",
    "nightly": "Process one day of an asset, resuming the shift detectors from the previous state.",
    "report": "Write OUTPUT/report/index.html and one picture per subject and indicator.",
}
EXIT_STATUSES = """exit statuses:
  0  done
  1  configuration or runtime error (a bad flag, key or path, a channel no file has, a failed run)
  2  missing previous state (nightly without an earlier state; see --rebuild_state)
  3  nothing to do or nothing usable: the requested days hold no data, or every planned window
     was rejected
  4  a fleet (several assets): some assets failed (1, 2 or 3 above), the others are done; the
     fleet summary (OUTPUT/_runs/fleet/RUN_ID.json) names each asset's outcome and reason"""
BEAM_FLAGS_NOTE = (
    "Beam's pipeline flags pass to Beam (--runner, --direct_num_workers, --temp_location, "
    "filesystem credentials ...):\n  see "
    "https://beam.apache.org/releases/pydoc/current/apache_beam.options.pipeline_options.html"
)


def help_text(command: str) -> str:
    """The ``--help`` page of a command: its own flags one per line, exit statuses, Beam's flags."""
    lines = [
        f"usage: corrtransforms-{command} (or python -m pipelines.{command}) "
        + " ".join(f"{flag} ..." for flag in COMMAND_FLAGS[command] if flag in ("--config", "--output"))
        + " [flags] [Beam flags]",
        "",
        COMMAND_PURPOSE[command],
        "",
        "flags:",
    ]
    lines += [f"  {flag:<24} {text}" for flag, text in COMMAND_FLAGS[command].items()]
    lines += [
        "  --help                   this text",
        "  (hyphenated spellings such as --report-dir or --run-id are accepted for the flags above)",
        "",
        EXIT_STATUSES,
        "",
        BEAM_FLAGS_NOTE,
    ]
    return "\n".join(lines)


def beam_flags() -> List[str]:
    """Every flag Beam's PipelineOptions classes define (this package's own JobOptions excluded)."""
    from apache_beam.options.pipeline_options import _BeamArgumentParser

    parser = _BeamArgumentParser(conflict_handler="resolve", add_help=False)
    pending, seen = list(PipelineOptions.__subclasses__()), set()
    while pending:
        cls = pending.pop()
        if cls in seen:
            continue
        seen.add(cls)
        pending.extend(cls.__subclasses__())
        if cls is not JobOptions:
            cls._add_argparse_args(parser)
    return sorted({s for action in parser._actions for s in action.option_strings if s.startswith("--")})


def check_flags(command: str, argv: List[str]) -> None:
    """Stop on ``--help`` (the command's help, status 0) and on any flag that is neither the
    command's own nor Beam's (status 1, naming the nearest known flag); a flag of another
    command says whose it is."""
    if "--help" in argv or "-h" in argv:
        print(help_text(command))
        raise SystemExit(DONE)
    own = list(COMMAND_FLAGS[command])
    beam_known = None
    for token in argv:
        name = token.split("=", 1)[0]
        if not name.startswith("--") or name in own:
            continue
        beam_known = beam_known if beam_known is not None else set(beam_flags())
        if name in beam_known:
            continue
        owners = [c for c, flags in COMMAND_FLAGS.items() if name in flags]
        if owners:
            raise SystemExit(
                f"{command}: {name} is a flag of {' and '.join(owners)}, not of {command} "
                f"(its flags: {', '.join(own)}; see --help)"
            )
        near = difflib.get_close_matches(name, own + sorted(beam_known), n=1, cutoff=0.6)
        raise SystemExit(
            f"{command}: unknown flag {name}" + (f"; did you mean {near[0]}?" if near else "") + " (see --help)"
        )


def new_run_id() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ") + "-" + uuid.uuid4().hex[:8]


def build_pipeline(
    p: beam.Pipeline,
    config: AssetConfig,
    output: str,
    start: Optional[_dt.date] = None,
    end: Optional[_dt.date] = None,
    run_id: Optional[str] = None,
    initial_states: Any = None,
    report_edges: Tuple[bool, bool] = (True, True),
) -> Dict[str, beam.PCollection]:
    """Add the whole job's steps to ``p`` (see :class:`corrtransforms.beam.MonitorAsset`)."""
    run_id = run_id or new_run_id()
    return p | "Monitor asset" >> MonitorAsset(
        config, output, run_id, start, end, initial_states, report_edges=report_edges
    )


def earlier_states(output: str, config: AssetConfig, start: Optional[_dt.date], run_id: str = ""):
    """State rows written before ``start`` (None when starting from the first window)."""
    if start is None:
        return None
    states = summarize_partitions(
        output,
        "state",
        config.name,
        tables.STATE,
        latest_states,
        LATEST_STATE,
        before=start,
        provenance=provenance_metadata(config, run_id),
    )
    return states if states.num_rows else None


def stored_state(
    output: str, config: AssetConfig, start: Optional[_dt.date], run_id: str = ""
) -> Optional[StoredState]:
    """Where a run starting on ``start`` resumes from (None: no earlier state, start fresh).

    Only this description goes into the job: the states and the baseline sample are read inside
    the pipeline (:mod:`corrtransforms.beam.stored_state`), so the submitted job's size does not
    grow with the history. The read-back summary of the latest states is refreshed here.
    """
    if earlier_states(output, config, start, run_id) is None or start is None:
        return None
    return resume_point(output, config, start, run_id)


def resume_point(output: str, config: AssetConfig, start: _dt.date, run_id: str = "") -> StoredState:
    """The :class:`StoredState` description of a run starting on ``start``, for a caller that has
    already read the earlier states (no read here)."""
    return StoredState(output, config.name, start, tuple(sorted(provenance_metadata(config, run_id).items())))


def _show_progress() -> None:
    """Progress lines of the local run on stderr (the runner's own logging stays as it is)."""
    log = logging.getLogger(PROGRESS_LOGGER)
    if not any(getattr(h, "_corrtransforms", False) for h in log.handlers):
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("%(asctime)s %(message)s", "%H:%M:%S"))
        handler._corrtransforms = True  # type: ignore[attr-defined]  # marks the package's own handler
        log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False


def remove_stale(options: PipelineOptions, output: str, run_id: str) -> None:
    """Delete the temporary files of other runs that died (``--stale_temporary_hours``)."""
    stale_hours = options.view_as(JobOptions).stale_temporary_hours
    for stale_run, age_s in remove_stale_temporary(output, run_id, 3600.0 * stale_hours):
        print(
            f"removed the temporary files of run {stale_run} under {output}: last written "
            f"{age_s / 3600.0:.1f} h ago (a run that did not finish)"
        )


def prepare(options: PipelineOptions, output: str, run_id: str) -> None:
    """Before a run's pipelines: progress lines on stderr, other dead runs' temporary files removed."""
    _show_progress()
    remove_stale(options, output, run_id)


def run(
    options: PipelineOptions,
    config: AssetConfig,
    output: str,
    start: Optional[_dt.date],
    end: Optional[_dt.date],
    run_id: str,
    initial_states: Any,
) -> Dict[str, int]:
    """Build, run and summarise one job; rewrites the episodes summary afterwards."""
    prepare(options, output, run_id)
    counters = run_pipeline(options, config, output, start, end, run_id, initial_states)
    return finish(counters, config, output, start, end, run_id)


def run_pipeline(
    options: PipelineOptions,
    config: AssetConfig,
    output: str,
    start: Optional[_dt.date],
    end: Optional[_dt.date],
    run_id: str,
    initial_states: Any,
    report_edges: Tuple[bool, bool] = (True, True),
) -> Dict[str, int]:
    """Build and run one pipeline over the days; its counters (every partition committed)."""
    p = beam.Pipeline(options=options)
    build_pipeline(p, config, output, start, end, run_id, initial_states, report_edges)
    result = p.run()
    result.wait_until_finish()
    return window_accounting(result.metrics())


def finish(
    counters: Dict[str, int],
    config: AssetConfig,
    output: str,
    start: Optional[_dt.date],
    end: Optional[_dt.date],
    run_id: str,
) -> Dict[str, int]:
    """After the pipelines of a run: the episodes summary, the console and JSON run summaries,
    and the nothing-usable check (exit status 3)."""
    counters["episodes"] = write_episodes(output, config, run_id)
    print(summary(counters))
    checks.check_usable(counters, config, output, start, end)
    finished = run_summary.build(counters, config, output, run_id, start, end)
    print(run_summary.text(finished))
    print(f"run summary written to {run_summary.write(finished, output)}")
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
    return parse_config(with_url_relative_paths(raw, path), base_dir="", source=path)


def with_url_relative_paths(raw: Dict[str, Any], path: str) -> Dict[str, Any]:
    """``raw`` with a relative ``[archive] path`` and every relative ``[[covariate_sources]] path``
    resolved against the folder of the URL ``path`` (as a local file's folder resolves them)."""
    scheme, rest = path.split("://", 1)
    folder = posixpath.dirname(rest)

    def resolved(entry: Any) -> Any:
        if not (isinstance(entry, dict) and isinstance(entry.get("path"), str)):
            return entry
        relative = entry["path"]
        if "://" in relative or relative.startswith("/"):
            return entry
        return {**entry, "path": f"{scheme}://{posixpath.normpath(posixpath.join(folder, relative))}"}

    raw = {**raw}
    if "archive" in raw:
        raw["archive"] = resolved(raw["archive"])
    if isinstance(raw.get("covariate_sources"), list):
        raw["covariate_sources"] = [resolved(entry) for entry in raw["covariate_sources"]]
    return raw


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


def pipeline_options(argv: Optional[List[str]], command: str) -> PipelineOptions:
    """Beam's options from ``command``'s command line (checked by :func:`check_flags`), with the
    local runner as default; the filesystems get them at once (the launcher reads configuration
    and earlier state before the pipeline exists: S3 credentials and endpoint, GCS project...)."""
    argv = with_underscores(list(sys.argv[1:] if argv is None else argv))
    check_flags(command, argv)
    options = PipelineOptions(argv)
    standard = options.view_as(StandardOptions)
    if not standard.runner:
        standard.runner = LOCAL_RUNNER
    use_every_core(options, argv)
    FileSystems.set_options(options)
    return options


#: the local runners whose worker count and mode this package chooses when the user does not
LOCAL_RUNNERS = (LOCAL_RUNNER, "DirectRunner", "BundleBasedDirectRunner", "SwitchingDirectRunner")
WORKER_FLAGS = ("--direct_num_workers", "--direct_running_mode")


def usable_cores() -> int:
    """The cores this process may run on (its CPU affinity; ``os.cpu_count`` where that is unknown)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


#: environment variable: the default local run's number of worker processes (1 = one process),
#: for a machine or a test suite that starts many small runs; command-line flags still win
LOCAL_WORKERS_ENV = "CORRTRANSFORMS_LOCAL_WORKERS"


def default_local_workers() -> int:
    """Worker processes of the default local run: ``CORRTRANSFORMS_LOCAL_WORKERS`` when set (a
    positive integer, else SystemExit), otherwise :func:`usable_cores`."""
    value = os.environ.get(LOCAL_WORKERS_ENV, "").strip()
    if not value:
        return usable_cores()
    try:
        workers = int(value)
    except ValueError:
        workers = 0
    if workers < 1:
        raise SystemExit(f"{LOCAL_WORKERS_ENV}={value!r}: must be a positive integer (1 = one process)")
    return workers


def use_every_core(options: PipelineOptions, argv: List[str]) -> None:
    """The default local run uses every core: Beam's multi-process local mode with one worker
    process per usable core, unless the command line names ``--direct_num_workers`` or
    ``--direct_running_mode`` or a runner other than the local one, or one core is all there is.

    ``--direct_num_workers=1`` (or ``CORRTRANSFORMS_LOCAL_WORKERS=1`` in the environment) is the
    way back to one process. The worker processes are local
    Python subprocesses of the same interpreter (no runner or container is downloaded); the
    files written do not depend on the number of workers (:mod:`corrtransforms.beam.write`), and
    the counters the launchers read are gathered from every worker by the runner.
    """
    if any(token.split("=", 1)[0] in WORKER_FLAGS for token in argv):
        return
    if options.view_as(StandardOptions).runner not in LOCAL_RUNNERS:
        return
    cores = default_local_workers()
    if cores < 2:
        return
    direct = options.view_as(DirectOptions)
    direct.direct_running_mode = "multi_processing"
    direct.direct_num_workers = cores


def parse_options(argv: Optional[List[str]], command: str):
    """(options, the command's view of them, the asset's configuration); SystemExit (status 1)
    on a bad or missing flag, a configuration error or an archive path that matches no file."""
    options = pipeline_options(argv, command)
    args = options.view_as(JobOptions)
    for flag in ("config", "output"):
        if not getattr(args, flag):
            raise SystemExit(f"--{flag} is required")
    try:
        config = load_job_config(single_config(args))
    except ConfigError as err:
        raise SystemExit(f"configuration error: {err}") from None
    check_archive(config)
    checks.check_channels(
        config,
        as_date(args.start if command == "backfill" else args.date),
        as_date(args.end if command == "backfill" else args.date),
    )
    return options, args, config


def config_specs(args) -> List[str]:
    """The ``--config`` values in order (the flag may be repeated)."""
    given = args.config
    return [given] if isinstance(given, str) else list(given or [])


def single_config(args) -> str:
    """The one ``--config`` of a single-asset run."""
    specs = config_specs(args)
    if len(specs) != 1:
        raise SystemExit(f"--config: one asset's file expected here, got {specs}")
    return specs[0]


def check_archive(config: AssetConfig) -> None:
    """Stop before the pipeline starts when ``[archive] path`` (or a ``[[covariate_sources]]``
    path) matches no file (a wrong path must not surface as an error deep inside the running job)."""
    _check_path("[archive] path", config.archive.path)
    for i, source in enumerate(config.covariate_sources):
        _check_path(f"[[covariate_sources]] #{i + 1} path", source.path)


def _check_path(key: str, path: str) -> None:
    pattern = archive_plan.expand_archive_path(path)
    try:
        found = FileSystems.match([pattern], limits=[1])[0].metadata_list
    except Exception as err:  # noqa: BLE001 - an unreachable or malformed location
        raise SystemExit(
            f"configuration error: {key} = {path!r}: cannot be listed ({type(err).__name__}: {err})"
        ) from None
    if not found:
        raise SystemExit(f"configuration error: {key} = {path!r}: no files match {pattern!r}")


def summary(counters: Dict[str, int]) -> str:
    """Short text summary of window accounting from the pipeline's counters."""
    planned = counters.get("windows_planned", 0)
    computed = counters.get("windows_computed", 0)
    rejected = counters.get("windows_rejected", 0)
    lines = [
        f"windows planned {planned}, computed {computed}, rejected {rejected}"
        + ("" if planned == computed + rejected else "  (ACCOUNTING MISMATCH)")
    ]
    prefix = "windows_rejected_"
    for name in sorted(k for k in counters if k.startswith(prefix)):
        lines.append(f"  rejected {name[len(prefix) :]}: {counters[name]}")
    findings = sorted((k[len("findings_") :], v) for k, v in counters.items() if k.startswith("findings_"))
    if findings:
        lines.append("findings: " + ", ".join(f"{k} {v}" for k, v in findings))
    lines.append(
        f"files in the archive {counters.get('files_in_archive', 0)}, footers opened "
        f"{counters.get('footers_opened', 0)}, "
        f"unusable {counters.get('files_rejected', 0)}; "
        f"rows written: "
        + ", ".join(
            f"{t} {counters.get('rows_written_' + t, 0)}"
            for t in ("correlations", "indicators", "shifts", "state", "baseline_sample", "mode_shapes", "rejects")
        )
        + "; "
        f"files committed {counters.get('files_committed', 0)}, stale removed {counters.get('stale_files_removed', 0)}"
    )
    lines.append(
        f"shifts: {counters.get('shift_series', 0)} series, {counters.get('shift_windows', 0)} windows, "
        f"{counters.get('shift_windows_shifted', 0)} in state shifted; "
        f"episodes in the summary: {counters.get('episodes', 0)}"
    )
    return "\n".join(lines)


def entry_point(main) -> None:
    """Run a launcher's ``main`` as a command: exit status 0 when it returns (any SystemExit it
    raises carries its own status or message).

    The process ends with ``os._exit`` once the outputs are committed and the streams flushed:
    after a pipeline, native threads of the runner's libraries can still be winding down when
    the interpreter finalises, and a thread destroyed at that moment aborts the process
    ("terminate called without an active exception", status 134) although every file was
    written. The status the command chose is the one the shell sees.
    """
    try:
        main()
        status = DONE
    except SystemExit as stop:
        status = exit_status_of(stop)
    sys.stdout.flush()
    sys.stderr.flush()
    logging.shutdown()
    os._exit(status)


def exit_status_of(stop: SystemExit) -> int:
    """The status Python would exit with for ``stop`` (a message goes to stderr, status 1)."""
    code = stop.code
    if code is None:
        return DONE
    if isinstance(code, int):
        return code
    print(code, file=sys.stderr)
    return 1
