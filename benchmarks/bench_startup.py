"""Where a day-chunk backfill's time goes: start-up, planning, and each chunk's pipeline.

    python -m benchmarks.bench_startup [--days 1 4] [--commit_days 1 4] [--repeats 1] [extra backfill flags]

On the scale benchmark's archives (benchmarks/scale_archive.py, prepared by benchmarks/run_all.py)
it runs ``python -m pipelines.backfill`` once per (days, --commit_days) in its own subprocess,
with timers around the backfill's steps (the same code; the timers only wrap functions):

- ``imports``: interpreter start and importing the package and Beam;
- ``plan``: ``days_to_process`` (the footers read once before the chunks);
- per chunk: ``state`` (the earlier state's summary, ``stored_state``), ``build`` (the Beam
  graph, ``build_pipeline``), ``run`` (the runner: start-up and the work) and after the last
  chunk ``finish`` (episodes and run summaries);
- ``empty pipeline``: a one-element Beam pipeline on the same runner, as the runner's own
  fixed cost per pipeline;
- ``CPU``: CPU seconds of the process and its worker processes (less noisy than wall time on a
  shared machine).

It prints the seconds of each and the fixed cost per chunk (everything but the data work: a
chunk's run time minus its share of the per-window work estimated from the 4-day run), and the
ratios of the 4-day runs with ``--commit_days 1`` and ``4``. Never asserts a time.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)


def _inner(config: str, output: str, commit_days: int, extra) -> None:
    started = time.perf_counter()
    import apache_beam as beam

    from corrtransforms.launch import backfill, common

    timings: dict = {"imports": time.perf_counter() - started, "chunks": []}

    def timed(name, func, per_chunk=False):
        def wrapper(*args, **kwargs):
            t = time.perf_counter()
            out = func(*args, **kwargs)
            seconds = time.perf_counter() - t
            if per_chunk:
                if name == "state":
                    timings["chunks"].append({})
                timings["chunks"][-1][name] = timings["chunks"][-1].get(name, 0.0) + seconds
            else:
                timings[name] = timings.get(name, 0.0) + seconds
            return out

        return wrapper

    backfill.days_to_process = timed("plan", backfill.days_to_process)
    common.stored_state = timed("state", common.stored_state, per_chunk=True)
    common.build_pipeline = timed("build", common.build_pipeline, per_chunk=True)
    common.run_pipeline = timed("pipeline", common.run_pipeline, per_chunk=True)
    common.finish = timed("finish", common.finish)
    t = time.perf_counter()
    backfill.main(["--config", config, "--output", output, "--commit_days", str(commit_days), *extra])
    timings["backfill"] = time.perf_counter() - t
    options = common.pipeline_options(list(extra), "backfill")
    t = time.perf_counter()
    with beam.Pipeline(options=options) as p:
        _ = p | beam.Create([1]) | beam.Map(lambda x: x + 1)
    timings["empty pipeline"] = time.perf_counter() - t
    timings["total"] = time.perf_counter() - started
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    timings["cpu"] = own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime
    print("TIMINGS " + json.dumps(timings))


def _measure(days: int, commit_days: int, extra, work: str) -> dict:
    folder = os.path.join(work, f"{days}d")
    output = os.path.join(folder, f"out_startup_{commit_days}")
    shutil.rmtree(output, ignore_errors=True)
    command = [
        sys.executable,
        "-m",
        "benchmarks.bench_startup",
        "--inner",
        os.path.join(folder, "asset.toml"),
        output,
        str(commit_days),
        *extra,
    ]
    start = time.perf_counter()
    done = subprocess.run(command, cwd=ROOT, capture_output=True, text=True)
    wall = time.perf_counter() - start
    if done.returncode != 0:
        raise RuntimeError(done.stdout[-2000:] + done.stderr[-3000:])
    line = [x for x in done.stdout.splitlines() if x.startswith("TIMINGS ")][-1]
    timings = json.loads(line[len("TIMINGS ") :])
    timings["wall"] = wall
    return timings


def main(argv=None) -> None:
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] == "--inner":
        _inner(argv[1], argv[2], int(argv[3]), argv[4:])
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, nargs="+", default=[1, 4])
    parser.add_argument("--commit_days", type=int, nargs="+", default=[1, 4])
    parser.add_argument("--repeats", type=int, default=1)
    parser.add_argument("--work", default=os.path.join(HERE, "_work"))
    args, extra = parser.parse_known_args(argv)
    from benchmarks import scale_archive

    scale_archive.prepare(args.work, args.days)
    print(f"load average {os.getloadavg()[0]:.2f} at start; extra flags: {' '.join(extra) or 'none'}")
    print(
        f"{'days':>4} {'commit':>6} {'chunks':>6} | {'wall':>6} {'imports':>7} {'plan':>5} {'state':>5} "
        f"{'build':>5} {'run':>6} {'finish':>6} {'empty':>5} {'CPU':>6} | per chunk: build+state, runs [s]"
    )
    for days in args.days:
        for commit in args.commit_days:
            if commit > days and commit != args.commit_days[0]:
                continue
            runs = [_measure(days, commit, extra, args.work) for _ in range(args.repeats)]
            t = min(runs, key=lambda r: r["wall"]) if args.repeats > 1 else runs[0]
            chunks = t["chunks"]
            build = sum(c.get("build", 0.0) for c in chunks)
            state = sum(c.get("state", 0.0) for c in chunks)
            run = sum(c.get("pipeline", 0.0) - c.get("build", 0.0) for c in chunks)
            per_chunk = ", ".join(f"{c.get('pipeline', 0.0) - c.get('build', 0.0):.1f}" for c in chunks)
            print(
                f"{days:4d} {commit:6d} {len(chunks):6d} | {statistics.median(r['wall'] for r in runs):6.1f} "
                f"{t['imports']:7.1f} {t.get('plan', 0):5.1f} {state:5.1f} {build:5.1f} {run:6.1f} "
                f"{t.get('finish', 0):6.1f} {t['empty pipeline']:5.1f} {t.get('cpu', float('nan')):6.1f} | "
                f"{(build + state) / max(len(chunks), 1):.2f}, {per_chunk}",
                flush=True,
            )


if __name__ == "__main__":
    main()
