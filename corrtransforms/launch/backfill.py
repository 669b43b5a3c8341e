"""Backfill: an asset's Parquet archive (or some of its days) -> all output tables, committed day by day.

corrtransforms-backfill --config FILE --output DIR [--start YYYY-MM-DD] [--end YYYY-MM-DD]
                        [--commit_days N] [any Beam flag, e.g. --runner, --direct_num_workers]

The days are processed in time order, ``--commit_days`` at a time (default 1): each chunk is one
pipeline whose partitions are committed when it finishes, and the next chunk resumes the
detectors from the state just committed (exactly as a nightly run does). Memory is one chunk's
worth whatever the backfill's length. While it runs, ``DIR/_summaries/asset=NAME/backfill.json``
records the days committed; when a backfill stops part way (a crash, a killed process), the same
command again continues after the last committed chunk with the same run id, and the output is
byte for byte what an uninterrupted run writes. The record is removed when the backfill ends.

An asset with multi-channel modes never has the day a baseline reference completes and the days
after it in one chunk (:mod:`corrtransforms.stages.mode_reference`): a day's windows use the
reference of the days before it, as the nightly runs do. A dates baseline cuts the chunk after
its end day; a count baseline (``[baseline] windows``) runs one day per pipeline until every
entry's reference is complete.
"""

from __future__ import annotations

import datetime as _dt
import json
from typing import Any, Dict, List, Optional, Sequence

from corrtransforms.beam.filesystems import BeamFiles, list_archive, open_file
from corrtransforms.config import AssetConfig
from corrtransforms.launch import common
from corrtransforms.stages import mode_reference
from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages.summaries import summary_folder

#: name of the progress record of a running backfill under ``DIR/_summaries/asset=NAME/``
PROGRESS = "backfill.json"


def days_to_process(config: AssetConfig, start: Optional[_dt.date], end: Optional[_dt.date]) -> List[_dt.date]:
    """The days a backfill owns, in order: every day from ``start`` to ``end`` when both are
    given; otherwise the days one run over the archive would write: those with planned windows
    and those with dated file findings (an unreadable file on a day without other data), from
    the archive's footers (read once here; each chunk's pipeline then reads its own days' files)."""
    if start is not None and end is not None:
        return [start + _dt.timedelta(days=i) for i in range((end - start).days + 1)]
    try:
        paths = [p for p in list_archive(config.archive.path) if archive_plan.in_day_range(p, start, end)]
    except (FileNotFoundError, OSError):
        return []
    footers, findings = [], []
    for path in paths:
        footer, found = archive_plan.read_footer(path, config, open_file)
        findings.extend(found)
        if footer is not None:
            footers.append(footer)
    plan = archive_plan.plan_reads(footers, findings, config, start, end)
    dated = {r.date for r in plan.rejects if r.date is not None}
    return sorted(_dt.date.fromisoformat(d) for d in set(plan.days) | dated)


def chunks(days: Sequence[_dt.date], size: int) -> List[List[_dt.date]]:
    """Consecutive runs of at most ``size`` days; a gap in the days also ends a chunk (each chunk
    is one ``--start/--end`` range, so a chunk never owns a day the backfill does not)."""
    out: List[List[_dt.date]] = []
    for day in days:
        if out and len(out[-1]) < size and (day - out[-1][-1]).days == 1:
            out[-1].append(day)
        else:
            out.append([day])
    return out


def reference_pending(store, output: str, config: AssetConfig, day: _dt.date) -> bool:
    """Whether a run starting on ``day`` lacks some multi-channel entry's baseline reference."""
    if not any(m.is_multichannel for m in config.modes):
        return False
    found = mode_reference.read_references(store, output, config, day)
    return not mode_reference.references_complete(found, config)


def split_for_references(store, output: str, config: AssetConfig, chunk: List[_dt.date]) -> List[_dt.date]:
    """The days of ``chunk`` to run now; the rest follows as the next chunk.

    While a multi-channel entry's baseline reference is pending, a chunk must not hold both the
    day that completes it and the days after. With ``[baseline] start/end`` that day is known:
    every day up to ``end`` has the pending reference whatever ran before it, and every day after
    it has the reference of the baseline days' rows (all before the chunk when the chunk starts
    after ``end``), so the chunk is cut only after ``end``. With ``[baseline] windows = N`` the day
    depends on the data: one day at a time until the reference is complete."""
    if len(chunk) <= 1 or not reference_pending(store, output, config, chunk[0]):
        return chunk
    base = config.baseline
    if base.by_dates and base.end is not None:
        return chunk if chunk[0] > base.end else [day for day in chunk if day <= base.end]
    return chunk[:1]


def _progress_path(store, output: str, config: AssetConfig) -> str:
    return store.join(summary_folder(store, output, config.name), PROGRESS)


def read_progress(store, output: str, config: AssetConfig) -> Optional[dict]:
    """The progress record of an interrupted backfill, or None (none, or unreadable)."""
    path = _progress_path(store, output, config)
    try:
        if not store.exists(path):
            return None
        with store.open(path) as handle:
            return json.loads(handle.read().decode("utf-8"))
    except Exception:  # noqa: BLE001 - a damaged record: start again
        return None


def write_progress(store, output: str, config: AssetConfig, record: dict) -> None:
    path = _progress_path(store, output, config)
    store.mkdirs(summary_folder(store, output, config.name))
    temporary = f"{path}.tmp"
    with store.create(temporary) as handle:
        handle.write(json.dumps(record, sort_keys=True, indent=1).encode("utf-8"))
    store.rename(temporary, path)


def _request(config: AssetConfig, start, end, commit_days: int) -> dict:
    """What makes two backfill commands the same one (a rerun continues only such a command)."""
    return {
        "config_digest": config.digest(),
        "start": None if start is None else start.isoformat(),
        "end": None if end is None else end.isoformat(),
        "commit_days": int(commit_days),
    }


def _add(total: Dict[str, int], counters: Dict[str, int]) -> None:
    for name, value in counters.items():
        total[name] = total.get(name, 0) + int(value)


def main(argv: Optional[List[str]] = None) -> Dict[str, Any]:
    """Run the backfill chunk by chunk; returns the counters summed over the chunks (also
    printed as a summary)."""
    from corrtransforms.launch import fleet

    fleet_options = common.pipeline_options(argv, "backfill")
    fleet_args = fleet_options.view_as(common.JobOptions)
    if fleet.is_fleet(common.config_specs(fleet_args)):
        if not fleet_args.output:
            raise SystemExit("--output is required")
        return fleet.backfill(fleet_options, fleet_args)
    options, args, config = common.parse_options(argv, "backfill")
    start, end = common.as_date(args.start), common.as_date(args.end)
    if start and end and end < start:
        raise SystemExit(f"--end {end} is before --start {start}")
    size = int(args.commit_days)
    if size < 1:
        raise SystemExit(f"--commit_days {size}: must be 1 or more")
    store = BeamFiles()
    request = _request(config, start, end, size)
    progress = read_progress(store, args.output, config)
    done: Optional[_dt.date] = None
    if progress is not None and progress.get("request") == request:
        run_id = args.run_id or progress["run_id"]
        done = common.as_date(progress.get("committed_through"))
        print(
            f"backfill {config.name}: continuing the interrupted backfill (run {progress['run_id']}): "
            f"days through {done or 'none'} are committed, the rest is computed now"
        )
    else:
        if progress is not None:
            print(f"backfill {config.name}: an interrupted backfill with other settings is not continued")
        run_id = args.run_id or common.new_run_id()
    common.prepare(options, args.output, run_id)
    days = days_to_process(config, start, end)
    total: Dict[str, int] = {}
    if progress is not None and progress.get("request") == request:
        total = {k: int(v) for k, v in progress.get("counters", {}).items()}
    pieces = chunks(days, size)
    for number, whole in enumerate(pieces, 1):
        left = [d for d in whole if done is None or d > done]
        while left:
            chunk = split_for_references(store, args.output, config, left)
            left = left[len(chunk) :]
            first, last = chunk[0], chunk[-1]
            span = str(first) if first == last else f"{first} to {last}"
            print(f"backfill {config.name}: chunk {number}/{len(pieces)}: {span}")
            resume = common.stored_state(args.output, config, first, run_id)
            # file findings outside a chunk: its neighbour's
            edges = (number == 1 and first == whole[0], number == len(pieces) and last == whole[-1])
            _add(total, common.run_pipeline(options, config, args.output, first, last, run_id, resume, edges))
            record = {"request": request, "run_id": run_id, "committed_through": last.isoformat(), "counters": total}
            write_progress(store, args.output, config, record)
    # every chunk is committed: the backfill is no longer interrupted, whatever finish decides
    if store.exists(_progress_path(store, args.output, config)):
        store.delete([_progress_path(store, args.output, config)])
    return common.finish(total, config, args.output, start, end, run_id)


def cli() -> None:
    """Console entry point ``corrtransforms-backfill``."""
    common.entry_point(main)
