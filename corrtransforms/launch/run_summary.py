"""The summary at the end of a backfill or nightly run: on the console and as JSON in
``OUTPUT/_runs/asset=NAME/<run id>.json``.

It says where the output went, how many windows were planned, computed and rejected (by reason),
which series are still accumulating their baseline (from the state table), the new and open
shift episodes (subject, indicator, direction, onset, size in units and in % of the baseline
level, peak |z|) and the report command to run next.
"""

from __future__ import annotations

import datetime as _dt
import json
from typing import Any, Dict, List, Optional

import pyarrow as pa
import pyarrow.parquet as pq

from corrtransforms import tables
from corrtransforms.beam.filesystems import BeamFiles, open_file
from corrtransforms.beam.output_tables import latest_states, partition_files
from corrtransforms.config import AssetConfig
from corrtransforms.stages.write import conform

RUNS = "_runs"


def _time(value) -> Optional[str]:
    return None if value is None else value.astimezone(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def run_states(output: str, config: AssetConfig, start: Optional[_dt.date], end: Optional[_dt.date]):
    """The latest state row of each series among the state partitions of the run's days (one
    day's files for a nightly run; no read-back summary is written)."""
    pieces = []
    for date, path in partition_files(output, "state", config.name):
        day = _dt.date.fromisoformat(date)
        if (start is None or day >= start) and (end is None or day <= end):
            with open_file(path) as handle:
                pieces.append(conform(pq.read_table(handle), tables.STATE))
    return latest_states(pa.concat_tables(pieces)) if pieces else tables.STATE.empty_table()


def baseline_status(states) -> Dict[str, Any]:
    """Series of the latest state rows by phase; the accumulating ones' fewest windows so far and
    the windows their baseline needs (``model_n`` is unknown until the fit: the configured count)."""
    # the smoothers' rows of smoothed covariates (phase "smoother") are no monitored series
    kept = [i for i, p in enumerate(states.column("phase").to_pylist()) if p != "smoother"]
    states = states.take(pa.array(kept, pa.int64()))  # typed: an empty list would be a null array
    phases = states.column("phase").to_pylist()
    seen = [n for n, p in zip(states.column("windows_seen").to_pylist(), phases) if p == "accumulating"]
    return {"series": len(phases), "accumulating": len(seen), "fewest_windows_seen": min(seen) if seen else None}


def _baseline_levels(states) -> Dict[tuple, float]:
    return {
        (s, i): loc
        for s, i, loc in zip(
            states.column("subject").to_pylist(),
            states.column("indicator").to_pylist(),
            states.column("model_location").to_pylist(),
        )
        if loc is not None
    }


def hinge_models(states) -> List[Dict[str, Any]]:
    """The fitted hinge models of the latest state rows: per series its knee (in units of the
    first compensated covariate), the slopes below and above it and the fit's quality (a knee
    of None: the fit fell back to linear, ``knee_not_in_baseline``)."""
    from corrtransforms.stages.state import ShiftState

    found = []
    for row in states.to_pylist():
        if row.get("model_form") != "hinge" or row.get("model_n") is None:
            continue
        model = ShiftState.from_row(row).model
        if model is None or not model.covariates:
            continue
        below, above = model.hinge_slopes
        found.append(
            {
                "subject": row["subject"],
                "indicator": row["indicator"],
                "covariate": model.covariates[0],
                "knee": model.knee,
                "slope_below": below,
                "slope_above": above,
                "quality": row.get("model_quality") or "ok",
            }
        )
    return found


def read_episodes(output: str, config: AssetConfig) -> List[Dict[str, Any]]:
    """The asset's episodes summary (``episodes/asset=NAME/episodes.parquet``), or none."""
    store = BeamFiles()
    path = store.join(output, "episodes", f"asset={config.name}", "episodes.parquet")
    if not store.exists(path):
        return []
    with open_file(path) as handle:
        return pq.read_table(handle).to_pylist()


def _episode_entry(e: Dict[str, Any], levels: Dict[tuple, float]) -> Dict[str, Any]:
    level = levels.get((e["subject"], e["indicator"]))
    size = e.get("shift_size")
    percent = 100.0 * size / abs(level) if size is not None and level is not None and abs(level) > 0 else None
    return {
        "subject": e["subject"],
        "indicator": e["indicator"],
        "status": e["status"],
        "direction": "up" if e["direction"] > 0 else "down",
        "onset": _time(e.get("onset")),
        "first_alarm": _time(e.get("first_alarm")),
        "shift_size": size,
        "unit": e.get("unit") or "",
        "baseline_level": level,
        "shift_percent": percent,
        "peak_abs_z": e.get("peak_abs_z"),
    }


def _in_days(moment, config: AssetConfig, start, end) -> bool:
    import zoneinfo

    day = moment.astimezone(zoneinfo.ZoneInfo(config.timezone)).date()
    return (start is None or day >= start) and (end is None or day <= end)


def build(
    counters: Dict[str, int],
    config: AssetConfig,
    output: str,
    run_id: str,
    start: Optional[_dt.date],
    end: Optional[_dt.date],
) -> Dict[str, Any]:
    """The run summary as plain values (what the JSON file holds)."""
    states = run_states(output, config, start, end)
    levels = _baseline_levels(states)
    episodes = read_episodes(output, config)
    prefix = "windows_rejected_"
    return {
        "run_id": run_id,
        "asset": config.name,
        "output": output,
        "days": {
            "start": None if start is None else start.isoformat(),
            "end": None if end is None else end.isoformat(),
        },
        "windows": {
            "planned": counters.get("windows_planned", 0),
            "computed": counters.get("windows_computed", 0),
            "rejected": counters.get("windows_rejected", 0),
            "rejected_by_reason": {k[len(prefix) :]: v for k, v in sorted(counters.items()) if k.startswith(prefix)},
        },
        "baseline": {
            **baseline_status(states),
            "windows_needed": config.baseline.windows,
            "until": None if config.baseline.end is None else config.baseline.end.isoformat(),
        },
        "detector_limits": detector_limits(states, config),
        "hinge_models": hinge_models(states),
        "new_episodes": [_episode_entry(e, levels) for e in episodes if _in_days(e["first_alarm"], config, start, end)],
        "open_episodes": [_episode_entry(e, levels) for e in episodes if e["status"] == "open"],
        "next": (
            f"corrtransforms-report --output {output}   (from a checkout: python -m pipelines.report --output {output})"
        ),
    }


def detector_limits(states, config: AssetConfig) -> Dict[str, Any]:
    """The CUSUM h and EWMA L in use (range over the series' latest states; the configured or
    budget value where a series has not fitted its baseline yet) and the false-alarm budget."""
    found: Dict[str, Any] = {"false_alarms_per_year": config.shifts.false_alarms_per_year}
    for column in ("cusum_h_used", "ewma_L_used"):
        values = [v for v in states.column(column).to_pylist() if v is not None] if states.num_rows else []
        found[column] = [min(values), max(values)] if values else None
    return found


def _baseline_line(b: Dict[str, Any]) -> str:
    if not b["series"]:
        return "baseline: no monitored series yet"
    if not b["accumulating"]:
        return f"baseline: fitted for all {b['series']} series"
    need = (
        f" of {b['windows_needed']}" if b["windows_needed"] else f" (baseline until {b['until']})" if b["until"] else ""
    )
    alarms = "no alarms possible yet" if b["accumulating"] == b["series"] else "alarms possible for the others"
    return (
        f"{b['accumulating']} of {b['series']} series: baseline accumulating, "
        f"{b['fewest_windows_seen']}{need} windows; {alarms}"
    )


def _episode_line(e: Dict[str, Any]) -> str:
    size = "" if e["shift_size"] is None else f"{e['shift_size']:+.4g} {e['unit']}".rstrip()
    percent = "" if e["shift_percent"] is None else f" ({e['shift_percent']:+.1f} % of the baseline level)"
    z = "" if e["peak_abs_z"] is None else f", peak |z| {e['peak_abs_z']:.1f}"
    return f"  {e['subject']} {e['indicator']} {e['direction']}, onset {e['onset']}, size {size}{percent}{z}"


def _hinge_line(h: Dict[str, Any]) -> str:
    where = f"hinge model of {h['subject']} {h['indicator']} in {h['covariate']}"
    if h["knee"] is None:
        return f"{where}: no knee in the baseline, linear (slope {h['slope_below']:.4g})"
    return f"{where}: knee {h['knee']:.3g}, slopes {h['slope_below']:.4g} below and {h['slope_above']:.4g} above"


def text(summary: Dict[str, Any]) -> str:
    """The console form of the summary."""
    w = summary["windows"]
    lines = [
        f"run {summary['run_id']} of {summary['asset']}: output {summary['output']}",
        f"windows: planned {w['planned']}, computed {w['computed']}, rejected {w['rejected']}"
        + "".join(f"; {reason} {n}" for reason, n in w["rejected_by_reason"].items()),
        _baseline_line(summary["baseline"]),
    ]
    limits = summary.get("detector_limits") or {}
    if limits.get("cusum_h_used") or limits.get("ewma_L_used"):
        budget = limits.get("false_alarms_per_year")
        lines.append(
            "detector limits in use: "
            + ", ".join(
                f"{name} {lo:.4g}" + ("" if hi == lo else f" to {hi:.4g}")
                for name, pair in (("CUSUM h", limits.get("cusum_h_used")), ("EWMA L", limits.get("ewma_L_used")))
                if pair
                for lo, hi in [pair]
            )
            + (f" (from false_alarms_per_year = {budget:g})" if budget else "")
        )
    lines += [_hinge_line(h) for h in summary.get("hinge_models", ())]
    for key, title in (("new_episodes", "new shift episodes"), ("open_episodes", "open shift episodes")):
        lines.append(f"{title}: {len(summary[key])}" + (":" if summary[key] else ""))
        lines += [_episode_line(e) for e in summary[key]]
    lines.append(f"next: {summary['next']}")
    return "\n".join(lines)


def write(summary: Dict[str, Any], output: str) -> str:
    """Write the summary as JSON under ``OUTPUT/_runs/asset=NAME/``; returns its path."""
    store = BeamFiles()
    path = store.join(output, RUNS, f"asset={summary['asset']}", f"{summary['run_id']}.json")
    with store.create(path) as handle:
        handle.write(json.dumps(summary, indent=2).encode("utf-8"))
    return path
