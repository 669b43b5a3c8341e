"""Fleet runs: several assets in one pipeline per day chunk, each asset isolated from the others.

``--config`` names a fleet when it is a folder, a glob, or given more than once. Each asset's
file is merged over its folder's ``_defaults.toml`` (:func:`corrtransforms.config.merge_defaults`)
and validated on its own; asset names must be unique (the error names both files). An asset
whose configuration or archive fails, or whose run has nothing usable, or (nightly) has no
previous state, is reported and the others complete: exit status 4 when some but not all
assets failed. ``OUTPUT/_runs/fleet/<run id>.json`` lists each asset's outcome; every asset that
ran also has its own run summary under ``OUTPUT/_runs/asset=NAME/``.

Backfill: the union of the assets' days is cut into ``--commit_days`` chunks; each chunk is one
pipeline (:class:`~corrtransforms.beam.monitor.MonitorFleet`) with the assets that own days in
it, each over its own days of the chunk, resuming from its own state. Progress is recorded per
asset (``_summaries/asset=NAME/backfill.json``, as for a single asset), so a rerun continues
each asset after its own last committed chunk.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import glob
import json
import os
import sys
from typing import Any, Dict, List, Optional, Sequence, Tuple

import apache_beam as beam
from apache_beam.io.filesystem import CompressionTypes
from apache_beam.io.filesystems import FileSystems

from corrtransforms import config as config_module
from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.beam.metrics import window_accounting
from corrtransforms.beam.monitor import FleetMember, MonitorFleet, fleet_step
from corrtransforms.config import FLEET_DEFAULTS, AssetConfig, ConfigError
from corrtransforms.launch import checks, common, run_summary

FLEET_STEP = "Monitor fleet"
DONE = "done"
FAILED = "failed"


@dataclasses.dataclass
class Outcome:
    """One asset's result in a fleet run: status 0 done, else 1, 2 or 3 with the reason."""

    asset: str
    source: str
    status: int = common.DONE
    reason: str = ""
    counters: Dict[str, int] = dataclasses.field(default_factory=dict)


@dataclasses.dataclass
class Fleet:
    """The assets of a fleet run: the configurations still running and every asset's outcome."""

    configs: List[AssetConfig]
    outcomes: Dict[str, Outcome]

    def fail(self, asset: str, status: int, reason: str) -> None:
        outcome = self.outcomes[asset]
        outcome.status, outcome.reason = status, reason
        self.configs = [c for c in self.configs if c.name != asset]
        print(f"fleet: {asset} failed (status {status}): {reason}", file=sys.stderr, flush=True)


# --------------------------------------------------------------------------------------------
# Loading


def _has_glob(spec: str) -> bool:
    return any(ch in spec for ch in "*?[")


def _is_folder(spec: str) -> bool:
    if "://" in spec:
        return spec.endswith("/")
    return os.path.isdir(spec)


def is_fleet(specs: Sequence[str]) -> bool:
    """Whether ``--config`` names a fleet: a folder, a glob, or more than one value."""
    return len(specs) > 1 or any(_is_folder(s) or _has_glob(s) for s in specs)


def _match(pattern: str) -> List[str]:
    if "://" in pattern:
        try:
            return sorted(m.path for m in FileSystems.match([pattern])[0].metadata_list)
        except Exception:  # noqa: BLE001 - an unreachable location matches nothing
            return []
    return sorted(glob.glob(pattern))


def _folder_of(path: str) -> str:
    return path.rsplit("/", 1)[0] if "://" in path else os.path.dirname(os.path.abspath(path))


def _join(folder: str, name: str) -> str:
    return f"{folder.rstrip('/')}/{name}" if "://" in folder else os.path.join(folder, name)


def _exists(path: str) -> bool:
    return FileSystems.exists(path) if "://" in path else os.path.isfile(path)


def member_files(specs: Sequence[str]) -> List[Tuple[str, Optional[str]]]:
    """(asset file, its folder's ``_defaults.toml`` or None) of every ``--config`` value, in
    order, each file once. A folder gives its ``*.toml`` files (not recursive) and a glob its
    matches, both without names starting with ``_``; a single file is taken as it is (no defaults).
    A value that gives no asset file is a configuration error."""
    found: List[Tuple[str, Optional[str]]] = []
    for spec in specs:
        if _is_folder(spec) or _has_glob(spec):
            pattern = _join(spec, "*.toml") if _is_folder(spec) else spec
            paths = [p for p in _match(pattern) if config_module.is_fleet_member(p)]
            if not paths:
                raise ConfigError("--config", spec, "gives no asset file (*.toml not starting with '_')")
            for path in paths:
                shared = _join(_folder_of(path), FLEET_DEFAULTS)
                found.append((path, shared if _exists(shared) else None))
        else:
            found.append((spec, None))
    seen: set = set()
    unique: List[Tuple[str, Optional[str]]] = []
    for path, defaults_path in found:
        key = path if "://" in path else os.path.abspath(path)
        if key not in seen:
            seen.add(key)
            unique.append((path, defaults_path))
    return unique


def read_toml(path: str) -> Dict[str, Any]:
    """A TOML file (local or any Beam filesystem URL) as a mapping; ConfigError when unreadable."""
    try:
        if "://" in path:
            with FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED) as handle:
                text = handle.read().decode("utf-8")
        else:
            with open(path, encoding="utf-8") as handle:
                text = handle.read()
    except Exception as err:  # noqa: BLE001 - a missing file or filesystem
        raise ConfigError("--config", path, f"cannot be read ({type(err).__name__}: {err})") from None
    try:
        return config_module.tomllib.loads(text)
    except config_module.tomllib.TOMLDecodeError as err:
        raise ConfigError("--config", path, f"is not valid TOML ({err})") from None


def load_member(path: str, defaults: Optional[Dict[str, Any]]) -> AssetConfig:
    """One asset: its file over the defaults; relative paths against the asset file's folder."""
    raw = read_toml(path)
    if "://" in path:
        merged = common.with_url_relative_paths(config_module.merge_defaults(defaults or {}, raw), path)
        return config_module.parse_config(merged, base_dir="", source=path)
    return config_module.parse_fleet_member(raw, defaults, os.path.dirname(os.path.abspath(path)), path)


def _label(path: str) -> str:
    name = path.rstrip("/").rsplit("/", 1)[-1]
    return os.path.splitext(name)[0]


def load_fleet(specs: Sequence[str], start: Optional[_dt.date], end: Optional[_dt.date]) -> Fleet:
    """Every asset of ``specs``, validated one by one (a broken asset is an outcome, not a stop);
    SystemExit (status 1) when no value gives a file or two files give one asset name."""
    try:
        files = member_files(specs)
    except ConfigError as err:
        raise SystemExit(f"configuration error: {err}") from None
    defaults_cache: Dict[str, Any] = {}
    configs, outcomes = [], {}
    for path, defaults_path in files:
        try:
            if defaults_path is not None and defaults_path not in defaults_cache:
                defaults_cache[defaults_path] = read_toml(defaults_path)
            config = load_member(path, defaults_cache.get(defaults_path) if defaults_path else None)
        except ConfigError as err:
            label = _label(path)
            while label in outcomes:
                label += "_"
            outcomes[label] = Outcome(label, path, common.ERROR, f"configuration error: {err}")
            print(f"fleet: {label} ({path}): configuration error: {err}", file=sys.stderr)
            continue
        configs.append(config)
    duplicate = config_module.duplicate_asset_names(configs)
    if duplicate:
        raise SystemExit(f"configuration error: {duplicate}")
    for config in configs:
        outcomes[config.name] = Outcome(config.name, config.source)
    fleet = Fleet(list(configs), outcomes)
    for config in configs:
        try:
            if config.shifts.multivariate:
                # the shared shift detection of a fleet has no novelty step yet: refused rather
                # than run without the asset's novelty charts
                raise SystemExit(
                    f"configuration error: {config.source}: [shifts] multivariate = true is not supported in "
                    "a fleet run yet; run this asset on its own (pipelines.backfill / pipelines.nightly "
                    "with its file)"
                )
            common.check_archive(config)
            checks.check_channels(config, start, end)
        except SystemExit as stop:
            fleet.fail(config.name, common.ERROR, str(stop.code))
    return fleet


# --------------------------------------------------------------------------------------------
# Running


def run_members(options, members: Sequence[FleetMember], output: str, run_id: str) -> Dict[str, Dict[str, int]]:
    """One pipeline for ``members``; each asset's counters (its own steps' and its share of the
    shared steps')."""
    p = beam.Pipeline(options=options)
    _ = p | FLEET_STEP >> MonitorFleet(members, output, run_id)
    result = p.run()
    result.wait_until_finish()
    metrics = result.metrics()
    return {
        name: window_accounting(metrics, step=f"{FLEET_STEP}/{fleet_step(name)}", asset=name)
        for name in (m.config.name for m in members)
    }


def run_isolated(options, members: Sequence[FleetMember], output: str, run_id: str, fleet: Fleet):
    """:func:`run_members`; when the fleet's pipeline fails, each asset again on its own, so only
    the failing ones fail (status 1, with the error)."""
    if not members:
        return {}
    try:
        return run_members(options, members, output, run_id)
    except Exception as err:  # noqa: BLE001 - isolate the asset that broke the pipeline
        if len(members) == 1:
            fleet.fail(members[0].config.name, common.ERROR, f"the run failed: {type(err).__name__}: {err}")
            return {}
        print(f"fleet: the pipeline failed ({type(err).__name__}: {err}); running its assets one by one")
    found: Dict[str, Dict[str, int]] = {}
    for member in members:
        found.update(run_isolated(options, [member], output, run_id, fleet))
    return found


def finish_assets(fleet: Fleet, output: str, days: Dict[str, Tuple[Any, Any]], run_id: str) -> None:
    """Per asset still running: episodes, run summary, and the nothing-usable check (status 3)."""
    for config in list(fleet.configs):
        counters = fleet.outcomes[config.name].counters
        start, end = days[config.name]
        problem = checks.nothing_usable(counters, config, output, start, end)
        try:
            common.finish(counters, config, output, start, end, run_id)
        except SystemExit as stop:
            fleet.fail(config.name, common.exit_status_of(stop), problem or str(stop.code))


def fleet_summary(fleet: Fleet, output: str, run_id: str, command: str) -> Dict[str, Any]:
    assets = []
    for name in sorted(fleet.outcomes):
        o = fleet.outcomes[name]
        assets.append(
            {
                "asset": o.asset,
                "source": o.source,
                "outcome": DONE if o.status == common.DONE else FAILED,
                "status": o.status,
                "reason": o.reason,
                "windows": {k: o.counters.get(f"windows_{k}", 0) for k in ("planned", "computed", "rejected")},
            }
        )
    return {
        "run_id": run_id,
        "command": command,
        "output": output,
        "status": overall_status(fleet),
        "assets": assets,
    }


def overall_status(fleet: Fleet) -> int:
    """0 all done; 4 some failed; all failed: their common status, else 1."""
    failed = [o.status for o in fleet.outcomes.values() if o.status != common.DONE]
    if not failed:
        return common.DONE
    if len(failed) < len(fleet.outcomes):
        return common.SOME_ASSETS_FAILED
    return failed[0] if len(set(failed)) == 1 else common.ERROR


def summary_text(summary: Dict[str, Any]) -> str:
    lines = [f"fleet run {summary['run_id']} ({summary['command']}): {len(summary['assets'])} assets"]
    for a in summary["assets"]:
        w = a["windows"]
        lines.append(
            f"  {a['asset']:<24} {a['outcome']:<7} planned {w['planned']:>6}, computed {w['computed']:>6}, "
            f"rejected {w['rejected']:>6}" + (f"  status {a['status']}: {a['reason']}" if a["status"] else "")
        )
    return "\n".join(lines)


def conclude(fleet: Fleet, output: str, run_id: str, command: str) -> Dict[str, Dict[str, int]]:
    """Print and write the fleet summary; SystemExit with the overall status unless all done."""
    summary = fleet_summary(fleet, output, run_id, command)
    store = BeamFiles()
    path = store.join(output, run_summary.RUNS, "fleet", f"{run_id}.json")
    with store.create(path) as handle:
        handle.write(json.dumps(summary, indent=2).encode("utf-8"))
    print(summary_text(summary))
    print(f"fleet summary written to {path}")
    if summary["status"] != common.DONE:
        raise SystemExit(summary["status"])
    return {name: o.counters for name, o in fleet.outcomes.items()}


def _add(total: Dict[str, int], counters: Dict[str, int]) -> None:
    for name, value in counters.items():
        total[name] = total.get(name, 0) + int(value)


# --------------------------------------------------------------------------------------------
# The commands


def _resumed(store, output: str, fleet: Fleet, requests: Dict[str, dict]):
    """Per asset the day its interrupted backfill committed through, and the run id to continue."""
    from corrtransforms.launch import backfill

    done: Dict[str, Optional[_dt.date]] = {}
    run_ids = set()
    for config in fleet.configs:
        progress = backfill.read_progress(store, output, config)
        if progress is not None and progress.get("request") == requests[config.name]:
            done[config.name] = common.as_date(progress.get("committed_through"))
            run_ids.add(progress["run_id"])
            fleet.outcomes[config.name].counters = {k: int(v) for k, v in progress.get("counters", {}).items()}
            print(f"backfill {config.name}: continuing after {done[config.name] or 'none'} (run {progress['run_id']})")
    return done, (run_ids.pop() if len(run_ids) == 1 else None)


def backfill(options, args) -> Dict[str, Dict[str, int]]:
    """The backfill of a fleet (see the module's docstring)."""
    from corrtransforms.launch import backfill as single

    start, end = common.as_date(args.start), common.as_date(args.end)
    if start and end and end < start:
        raise SystemExit(f"--end {end} is before --start {start}")
    size = int(args.commit_days)
    if size < 1:
        raise SystemExit(f"--commit_days {size}: must be 1 or more")
    fleet = load_fleet(common.config_specs(args), start, end)
    store = BeamFiles()
    requests = {c.name: single._request(c, start, end, size) for c in fleet.configs}
    done, resumed_run = _resumed(store, args.output, fleet, requests)
    run_id = args.run_id or resumed_run or common.new_run_id()
    common.prepare(options, args.output, run_id)
    own_days = {c.name: single.days_to_process(c, start, end) for c in fleet.configs}
    if any(m.is_multichannel for c in fleet.configs for m in c.modes):
        size = 1  # a day's windows use the mode references of the days before it (launch.backfill)
    pieces = single.chunks(sorted({d for days in own_days.values() for d in days}), size)
    for number, chunk in enumerate(pieces, 1):
        members = []
        for config in fleet.configs:
            days = own_days[config.name]
            mine = [d for d in chunk if d in days and (done.get(config.name) is None or d > done[config.name])]
            if mine:
                edges = (mine[0] == days[0], mine[-1] == days[-1])
                resume = common.stored_state(args.output, config, mine[0], run_id)
                members.append(FleetMember(config, mine[0], mine[-1], resume, edges))
        if not members:
            continue
        span = str(chunk[0]) if len(chunk) == 1 else f"{chunk[0]} to {chunk[-1]}"
        print(f"backfill fleet: chunk {number}/{len(pieces)}: {span}, {len(members)} assets")
        counters = run_isolated(options, members, args.output, run_id, fleet)
        for member in members:
            name = member.config.name
            if name not in counters:
                continue
            _add(fleet.outcomes[name].counters, counters[name])
            record = {
                "request": requests[name],
                "run_id": run_id,
                "committed_through": str(member.end),
                "counters": fleet.outcomes[name].counters,
            }
            single.write_progress(store, args.output, member.config, record)
    for config in fleet.configs:  # every chunk committed: no longer interrupted
        path = single._progress_path(store, args.output, config)
        if store.exists(path):
            store.delete([path])
    finish_assets(fleet, args.output, {c.name: (start, end) for c in fleet.configs}, run_id)
    return conclude(fleet, args.output, run_id, "backfill")


def nightly(options, args) -> Dict[str, Dict[str, int]]:
    """One night of every asset of a fleet, each resumed from its own state; an asset without a
    previous state stops alone (status 2 for it) unless ``--rebuild_state``."""
    from corrtransforms.launch import nightly as single

    date = common.as_date(args.date)
    fleet = load_fleet(common.config_specs(args), date, date)
    run_id = args.run_id or common.new_run_id()
    common.prepare(options, args.output, run_id)
    members, days = [], {}
    for config in list(fleet.configs):
        day = date or single.yesterday(config)
        days[config.name] = (day, day)
        try:
            initial = single.previous_states(args.output, config, day, args.rebuild_state, run_id)
        except SystemExit as stop:
            reason = f"no detector state before {day} (run the backfill first, or pass --rebuild_state)"
            fleet.fail(config.name, common.exit_status_of(stop), reason)
            continue
        resume = None if initial is None else common.resume_point(args.output, config, day, run_id)
        members.append(FleetMember(config, day, day, resume))
    print(f"nightly fleet: {len(members)} assets")
    for name, counters in run_isolated(options, members, args.output, run_id, fleet).items():
        fleet.outcomes[name].counters = counters
    finish_assets(fleet, args.output, days, run_id)
    return conclude(fleet, args.output, run_id, "nightly")
