"""Scale benchmark: the backfill against the plain script and the floor, for 1, 2 and 4 days.

    python -m benchmarks.run_all [--days 1 2 4] [--variants pipeline default workers2 script floor lean]
                                 [--repeats 1] [--offline] [--trace-network]

On the same invented archives (benchmarks/scale_archive.py: wide, float32, hourly files, 15-minute
row groups, 8 channels at 100 Hz; 10-minute windows, all 36 pairs, max lag 10 s, two modes,
screening and shift detection on: the whole job) it runs, each in its own subprocess:

1. ``pipeline``: ``python -m pipelines.backfill --direct_num_workers=1``: the local runner in
   one process;
1b. ``default``: ``python -m pipelines.backfill`` as it is: the default, one worker process per
   core (:func:`corrtransforms.launch.common.use_every_core`);
2. ``workers2``: the same with ``--direct_running_mode=multi_processing --direct_num_workers=2``;
3. ``script``: the plain script a practitioner would write (benchmarks/scale_script.py);
4. ``floor``: decoding the same columns and row groups, one rFFT per channel per window and one
   inverse FFT per pair, nothing else (benchmarks/scale_floor.py);
5. ``lean``: the pipeline in-process on the same archive with the job cut down to what the
   script computes (no modes, screening off; it still adds every error column and shift detection
   on rms, correlation time, lag and peak coefficient): where the full job's time goes, not a
   target.

It prints wall time, samples per second and peak resident memory of each (the process tree's
summed RSS, sampled every 0.1 s, and the largest single process's ``ru_maxrss`` from
``wait4``), then the ratios pipeline/floor (1/4; its inverse is the efficiency), script/pipeline
(3/1, speed-up), pipeline/workers2 (1/2, worker scaling), lean/floor and script/lean, the time per day relative to the
shortest archive (linear growth) and the peak RSS relative to it (flat memory), and the marginal
cost per window (longest archive's run minus the shortest's, per extra window: start-up not
charged) of each variant next to the floor's. It prints a
table, never a verdict; timings on a shared machine are noisy: ``--repeats`` reruns every
variant (interleaved) and reports the median.

``--offline`` runs every variant in an empty network namespace (``unshare -rn``, loopback only),
so a run that needed the network would fail; ``--trace-network`` runs the pipeline variants of the
shortest archive under ``strace -f -e trace=connect`` and lists every non-loopback connect.
Work files go to benchmarks/_work/ (git-ignored); the archives are kept between runs.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import statistics
import subprocess
import sys
import threading
import time
from typing import Dict, List, Optional

from benchmarks import scale_archive

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
WORK = os.path.join(HERE, "_work")
VARIANTS = ("pipeline", "default", "workers2", "script", "floor", "lean")
LABELS = {
    "pipeline": "1 pipeline, 1 worker (in process)",
    "default": "1b pipeline, default (every core)",
    "workers2": "2 pipeline, 2 worker processes",
    "script": "3 plain script (scipy per pair)",
    "floor": "4 floor (decode + FFTs)",
    "lean": "5 pipeline, lean job, in-process",
}


def _children(pid: int) -> List[int]:
    out = []
    try:
        for task in os.listdir(f"/proc/{pid}/task"):
            with open(f"/proc/{pid}/task/{task}/children") as handle:
                out.extend(int(p) for p in handle.read().split())
    except OSError:
        pass
    return out


def _rss_bytes(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/statm") as handle:
            return int(handle.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, IndexError, ValueError):
        return 0


def tree_rss(pid: int) -> int:
    """Summed resident memory of ``pid`` and all its descendants, in bytes."""
    total, stack, seen = 0, [pid], set()
    while stack:
        p = stack.pop()
        if p in seen:
            continue
        seen.add(p)
        total += _rss_bytes(p)
        stack.extend(_children(p))
    return total


def measure(command: List[str], log_path: str, env: Optional[dict] = None) -> dict:
    """Run ``command``; wall time, peak tree RSS (sampled) and the largest ru_maxrss."""
    with open(log_path, "w") as log:
        start = time.perf_counter()
        child = subprocess.Popen(command, cwd=ROOT, stdout=log, stderr=subprocess.STDOUT, env=env)
        peak = [0]
        done = threading.Event()

        def sample():
            while not done.is_set():
                peak[0] = max(peak[0], tree_rss(child.pid))
                done.wait(0.1)

        sampler = threading.Thread(target=sample, daemon=True)
        sampler.start()
        _, status, usage = os.wait4(child.pid, 0)
        seconds = time.perf_counter() - start
        done.set()
        sampler.join()
        child.returncode = os.waitstatus_to_exitcode(status)
    if child.returncode != 0:
        with open(log_path) as handle:
            tail = handle.read()[-3000:]
        raise RuntimeError(f"{' '.join(command)} failed ({child.returncode}):\n{tail}")
    return {
        "seconds": seconds,
        "tree_rss_mb": peak[0] / 2**20,
        "maxrss_mb": usage.ru_maxrss / 1024,
        "cpu_s": usage.ru_utime + usage.ru_stime,
    }


def _offline(command: List[str]) -> List[str]:
    quoted = " ".join(_quote(c) for c in command)
    return ["unshare", "-rn", "sh", "-c", f"ip link set lo up 2>/dev/null; exec {quoted}"]


def _quote(text: str) -> str:
    return "'" + text.replace("'", "'\\''") + "'"


PIPELINE_VARIANTS = ("pipeline", "default", "workers2", "lean")


def command_for(variant: str, archive: str, config: str, folder: str) -> List[str]:
    python = sys.executable
    if variant in PIPELINE_VARIANTS:
        output = os.path.join(folder, f"out_{variant}")
        shutil.rmtree(output, ignore_errors=True)
        if variant == "lean":
            config = os.path.join(os.path.dirname(config), scale_archive.LEAN_CONFIG)
        command = [python, "-m", "pipelines.backfill", "--config", config, "--output", output]
        if variant == "workers2":
            command += ["--direct_running_mode=multi_processing", "--direct_num_workers=2"]
        elif variant in ("pipeline", "lean"):
            command += ["--direct_num_workers=1"]
        return command
    if variant == "script":
        output = os.path.join(folder, "out_script")
        shutil.rmtree(output, ignore_errors=True)
        return [python, "-m", "benchmarks.scale_script", archive, output]
    return [python, "-m", "benchmarks.scale_floor", archive]


def check_pipeline_log(variant: str, log_path: str, days: int) -> str:
    """The pipeline's window accounting line (and a check that every window was computed)."""
    with open(log_path) as handle:
        text = handle.read()
    found = re.search(r"windows planned (\d+), computed (\d+), rejected (\d+)", text)
    expected = days * 24 * 6
    if not found or int(found.group(2)) != expected:
        raise RuntimeError(f"{variant}: expected {expected} computed windows; log {log_path}")
    return found.group(0)


def trace_network(days: int, archive: str, config: str, folder: str) -> None:
    """Every connect() of the pipeline variants, non-loopback ones listed."""
    if not shutil.which("strace"):
        print("network trace: strace not found, skipped")
        return
    for variant in ("pipeline", "workers2"):
        trace = os.path.join(folder, f"{variant}.strace")
        command = ["strace", "-f", "-qq", "-e", "trace=connect", "-o", trace] + command_for(
            variant, archive, config, folder
        )
        measure(command, os.path.join(folder, f"{variant}.strace.log"))
        with open(trace) as handle:
            calls = [line for line in handle if "connect(" in line]
        outside = [
            c.strip()
            for c in calls
            if ("AF_INET" in c and "127.0.0.1" not in c and "::1" not in c and "0.0.0.0" not in c)
        ]
        families = sorted({m.group(1) for m in (re.search(r"sa_family=(AF_\w+)", c) for c in calls) if m})
        print(
            f"network trace, {variant}: {len(calls)} connect() calls ({', '.join(families) or 'none'}); "
            f"to non-loopback addresses: {len(outside)}"
        )
        for line in outside[:5]:
            print("   ", line[:200])


def main(argv=None) -> Dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, nargs="+", default=[1, 2, 4])
    parser.add_argument("--variants", nargs="+", default=list(VARIANTS), choices=VARIANTS)
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--offline", action="store_true", help="run every variant without a network")
    parser.add_argument(
        "--trace-network", action="store_true", help="list the connect() calls of the pipeline variants (strace)"
    )
    parser.add_argument("--work", default=WORK)
    args = parser.parse_args(argv)

    os.makedirs(args.work, exist_ok=True)
    started = time.perf_counter()
    archives = scale_archive.prepare(args.work, args.days)
    print(f"archives ready in {time.perf_counter() - started:.0f} s under {args.work}")
    print(
        f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.2f} at start "
        "(shared with other work: timings are noisy)"
    )
    results: Dict[int, Dict[str, dict]] = {}
    for days in sorted(args.days):
        archive, config = archives[days]
        folder = os.path.dirname(config)
        runs: Dict[str, List[dict]] = {v: [] for v in args.variants}
        for _ in range(args.repeats):
            for variant in args.variants:
                command = command_for(variant, archive, config, folder)
                if args.offline:
                    command = _offline(command)
                log_path = os.path.join(folder, f"{variant}.log")
                run = measure(command, log_path)
                if variant in PIPELINE_VARIANTS:
                    run["accounting"] = check_pipeline_log(variant, log_path, days)
                runs[variant].append(run)
                print(
                    f"  {days} d {variant:9s} {run['seconds']:7.1f} s  tree RSS {run['tree_rss_mb']:6.0f} MB",
                    flush=True,
                )
        samples = days * 24 * scale_archive.ROWS_PER_HOUR * len(scale_archive.CHANNELS)
        results[days] = {}
        for variant, items in runs.items():
            seconds = [r["seconds"] for r in items]
            results[days][variant] = {
                "seconds": statistics.median(seconds),
                "best": min(seconds),
                "samples_per_s": samples / statistics.median(seconds),
                "tree_rss_mb": max(r["tree_rss_mb"] for r in items),
                "maxrss_mb": max(r["maxrss_mb"] for r in items),
                "cpu_s": statistics.median(r["cpu_s"] for r in items),
                "samples": samples,
            }
        if args.trace_network and days == min(args.days):
            trace_network(days, archive, config, folder)
    print()
    print(report(results, args))
    return results


def report(results: Dict[int, Dict[str, dict]], args) -> str:
    lines = [
        f"8 channels at 100 Hz, 10-minute windows, 36 pairs, max lag 10 s, indicators, screening and "
        f"shifts on; median of {args.repeats} run(s); {os.cpu_count()} cores"
        + (" ; offline (empty network namespace)" if args.offline else ""),
        "",
        f"{'days':>4}  {'variant':32s} {'wall s':>8} {'CPU s':>8} {'Msamples/s':>11} "
        f"{'tree RSS MB':>12} {'max RSS MB':>11}",
    ]
    for days in sorted(results):
        for variant in VARIANTS:
            r = results[days].get(variant)
            if r is None:
                continue
            lines.append(
                f"{days:>4}  {LABELS[variant]:32s} {r['seconds']:8.1f} {r['cpu_s']:8.1f} "
                f"{r['samples_per_s'] / 1e6:11.2f} {r['tree_rss_mb']:12.0f} {r['maxrss_mb']:11.0f}"
            )
    lines += [
        "",
        f"{'days':>4}  {'1/4 pipeline/floor':>19} {'efficiency 4/1':>15} {'3/1 speed-up':>13} "
        f"{'1/2 worker scaling':>19} {'1/1b default speed-up':>22} {'1b/4 default/floor':>19} "
        f"{'5/4 lean/floor':>15} {'3/5 script/lean':>16}",
    ]

    def ratio(days, top, bottom):
        r = results[days]
        if top in r and bottom in r:
            return f"{r[top]['seconds'] / r[bottom]['seconds']:.2f}"
        return "-"

    for days in sorted(results):
        lines.append(
            f"{days:>4}  {ratio(days, 'pipeline', 'floor'):>19} {ratio(days, 'floor', 'pipeline'):>15} "
            f"{ratio(days, 'script', 'pipeline'):>13} {ratio(days, 'pipeline', 'workers2'):>19} "
            f"{ratio(days, 'pipeline', 'default'):>22} {ratio(days, 'default', 'floor'):>19} "
            f"{ratio(days, 'lean', 'floor'):>15} {ratio(days, 'script', 'lean'):>16}"
        )
    first = min(results)
    lines += ["", f"growth against the {first}-day archive: time per day (1.00 = linear) and peak tree RSS ratio"]
    lines.append(
        f"{'days':>4}  " + " ".join(f"{v + ' t/day':>15} {v + ' RSS':>13}" for v in VARIANTS if v in results[first])
    )
    for days in sorted(results):
        cells = []
        for v in VARIANTS:
            if v not in results[first] or v not in results[days]:
                continue
            per_day = (results[days][v]["seconds"] / days) / (results[first][v]["seconds"] / first)
            rss = results[days][v]["tree_rss_mb"] / results[first][v]["tree_rss_mb"]
            cells.append(f"{per_day:15.2f} {rss:13.2f}")
        lines.append(f"{days:>4}  " + " ".join(cells))
    lines += marginal_cost_lines(results)
    return "\n".join(lines)


#: 10-minute windows of the scale archive per day
WINDOWS_PER_DAY = 144


def marginal_cost_lines(results: Dict[int, Dict[str, dict]]) -> List[str]:
    """Marginal cost per window: (wall time of the longest archive - of the shortest) / (the
    difference in windows), so that start-up and other fixed costs are not charged; per
    variant in ms and as a ratio to the floor's marginal cost. Wall and CPU seconds both."""
    first, last = min(results), max(results)
    if first == last:
        return []
    extra = (last - first) * WINDOWS_PER_DAY
    lines = [
        "",
        f"marginal cost per window ({last}-day run minus {first}-day run, {extra} windows): ms, and / floor's",
        f"{'variant':32s} {'wall ms':>8} {'/ floor':>8} {'CPU ms':>8} {'/ floor':>8}",
    ]

    def marginal(variant, key):
        if variant not in results[first] or variant not in results[last]:
            return None
        return 1e3 * (results[last][variant][key] - results[first][variant][key]) / extra

    for variant in VARIANTS:
        wall, cpu = marginal(variant, "seconds"), marginal(variant, "cpu_s")
        if wall is None or cpu is None:
            continue
        floor_wall, floor_cpu = marginal("floor", "seconds"), marginal("floor", "cpu_s")
        wall_ratio = f"{wall / floor_wall:8.2f}" if floor_wall else f"{'-':>8}"
        cpu_ratio = f"{cpu / floor_cpu:8.2f}" if floor_cpu else f"{'-':>8}"
        lines.append(f"{LABELS[variant]:32s} {wall:8.1f} {wall_ratio} {cpu:8.1f} {cpu_ratio}")
    return lines


if __name__ == "__main__":
    main()
