"""Long runs: nights during the baseline, a rebuilt baseline state, a lost sample partition, and a
backfill killed part way and run again.

A short, sparse version of the invented demo archive (6 days, a record every 6 hours) with the
baseline over its first four days, so the nights of days 3 and 4 resume series that are still
accumulating their baseline sample.
"""

import datetime as dt
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time

import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from demo_data import generate
from pipelines import backfill, nightly
from tests.support.output_tables import files_by_path

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects")


def _config_text():
    with open(os.path.join(REPO, "demo_data", "footbridge.toml"), encoding="utf-8") as handle:
        text = handle.read()
    text = text.replace("start = 2025-05-01            # ten healthy days", "start = 2025-05-01")
    text = re.sub(r"end = 2025-05-10", "end = 2025-05-04", text)
    return text.replace("min_windows = 30", "min_windows = 10")


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("long_runs")
    generate.write_archive(str(root / "archive"), days=6, every_hours=6)
    (root / "footbridge.toml").write_text(_config_text(), encoding="utf-8")
    config = str(root / "footbridge.toml")
    full = str(root / "full")
    backfill.main(["--config", config, "--output", full, "--run_id", "same-run"])
    return root, config, full


def read(output, name):
    table = ds.dataset(os.path.join(output, name), format="parquet", partitioning="hive").to_table()
    return table.sort_by([(c, "ascending") for c in ("window_start", "subject", "indicator")]).to_pylist()


def same_rows(a, b):
    return json.dumps(a, default=str, sort_keys=True) == json.dumps(b, default=str, sort_keys=True)


def test_nights_during_the_baseline_equal_one_backfill_and_state_rows_stay_small(site):
    root, config, full = site
    stepwise = str(root / "stepwise")
    backfill.main(["--config", config, "--output", stepwise, "--start", "2025-05-01", "--end", "2025-05-02"])
    for day in ("2025-05-03", "2025-05-04", "2025-05-05", "2025-05-06"):
        nightly.main(["--config", config, "--output", stepwise, "--date", day])
    for name in ("shifts", "state", "baseline_sample"):
        assert same_rows(read(full, name), read(stepwise, name)), name
    states = read(full, "state")
    assert {s["phase"] for s in states} == {"accumulating", "fitted"}
    # no state row carries the sample; the sample's windows are in baseline_sample, once each
    assert all(not s["sample_value"] and not s["sample_window_start"] for s in states)
    day_two = [s for s in states if s["local_date"] == dt.date(2025, 5, 2)]
    day_three = [s for s in states if s["local_date"] == dt.date(2025, 5, 3)]
    sample = read(full, "baseline_sample")
    for late in day_three:
        early = next(s for s in day_two if (s["subject"], s["indicator"]) == (late["subject"], late["indicator"]))
        assert late["sample_count"] > early["sample_count"] > 0
        rows = [
            r
            for r in sample
            if (r["subject"], r["indicator"]) == (late["subject"], late["indicator"])
            and r["window_start"] <= late["window_start"]
        ]
        assert len(rows) == late["sample_count"] == len({r["window_start"] for r in rows})
    # bytes of a day's state file: independent of how long the baseline has grown
    sizes = {}
    for day in ("2025-05-01", "2025-05-03"):
        folder = os.path.join(full, "state", "asset=footbridge", f"date={day}")
        sizes[day] = sum(os.path.getsize(os.path.join(folder, f)) for f in os.listdir(folder))
    assert sizes["2025-05-03"] < 1.1 * sizes["2025-05-01"], sizes


def test_rebuild_during_the_baseline_gives_the_backfill_night(site):
    root, config, full = site
    rebuilt = str(root / "rebuilt")
    backfill.main(["--config", config, "--output", rebuilt, "--start", "2025-05-01", "--end", "2025-05-02"])
    shutil.rmtree(os.path.join(rebuilt, "state"))
    shutil.rmtree(os.path.join(rebuilt, "baseline_sample"))
    nightly.main(["--config", config, "--output", rebuilt, "--date", "2025-05-03", "--rebuild_state"])
    day = dt.date(2025, 5, 3)
    full_rows = [r for r in read(full, "shifts") if r["window_start"].date() == day]
    rebuilt_rows = [r for r in read(rebuilt, "shifts") if r["window_start"].date() == day]
    assert full_rows and same_rows(full_rows, rebuilt_rows)
    assert same_rows(
        read(full, "baseline_sample")[: len(read(rebuilt, "baseline_sample"))], read(rebuilt, "baseline_sample")
    )


def test_a_lost_baseline_sample_partition_is_reported_not_ignored(site):
    root, config, _ = site
    lost = str(root / "lost")
    backfill.main(["--config", config, "--output", lost, "--start", "2025-05-01", "--end", "2025-05-02"])
    shutil.rmtree(os.path.join(lost, "baseline_sample", "asset=footbridge", "date=2025-05-01"))
    nightly.main(["--config", config, "--output", lost, "--date", "2025-05-03"])
    rejects = ds.dataset(os.path.join(lost, "rejects"), format="parquet", partitioning="hive").to_table().to_pylist()
    incomplete = [r for r in rejects if r["reason"] == "baseline_sample_incomplete"]
    series = {(s["subject"], s["indicator"]) for s in read(lost, "state") if s["local_date"] == dt.date(2025, 5, 2)}
    assert len(incomplete) == len(series) > 0
    assert "--rebuild_state" in incomplete[0]["detail"]
    assert not [r for r in read(lost, "shifts") if r["window_start"].date() == dt.date(2025, 5, 3)]


def _progress(output):
    path = os.path.join(output, "_summaries", "asset=footbridge", "backfill.json")
    try:
        with open(path, encoding="utf-8") as handle:
            return json.load(handle)
    except (OSError, ValueError):
        return None


def test_a_killed_backfill_run_again_continues_and_writes_the_same_files(site):
    root, config, full = site
    output = str(root / "killed")
    command = [sys.executable, "-m", "pipelines.backfill", "--config", config, "--output", output]
    process = subprocess.Popen(
        command + ["--run_id", "same-run"], cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    deadline = time.monotonic() + 300  # a guard against a hang only: the machine's CPUs are shared
    while time.monotonic() < deadline and process.poll() is None:
        record = _progress(output)
        if record and record["committed_through"] >= "2025-05-02":
            break
        time.sleep(0.05)
    assert process.poll() is None, "the backfill ended before it could be killed"
    process.send_signal(signal.SIGKILL)
    process.wait()
    committed = _progress(output)["committed_through"]
    assert "2025-05-02" <= committed < "2025-05-06"
    # the same command again (the run id comes from the progress record)
    again = subprocess.run(command, cwd=REPO, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stderr
    assert f"days through {committed} are committed" in again.stdout
    chunks = re.findall(r"chunk \d+/\d+: (\S+)", again.stdout)
    first_redone = dt.date.fromisoformat(committed) + dt.timedelta(days=1)
    assert chunks[0] == first_redone.isoformat() and len(chunks) == (dt.date(2025, 5, 6) - first_redone).days + 1
    assert _progress(output) is None  # finished: no interrupted backfill left
    assert files_by_path(output) == files_by_path(full)
    assert (
        pq.read_metadata(
            os.path.join(
                output,
                "shifts",
                "asset=footbridge",
                "date=2025-05-06",
                os.listdir(os.path.join(output, "shifts", "asset=footbridge", "date=2025-05-06"))[0],
            )
        ).metadata[b"corrtransforms.run_id"]
        == b"same-run"
    )
