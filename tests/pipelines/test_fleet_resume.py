"""Fleet runs over several days: nights resuming each asset from its own state, a missing state
stopping only its asset (status 4) unless --rebuild_state, a killed fleet backfill continued to
the same files, and the false-alarm budget's limits in the states of a fitted baseline.

Archive: the fleet tests' two assets (tests/support/fleet_data.py) over three days, 5 windows
of 120 s a day; north's baseline is 4 windows, south's 5 (all of day one) with a budget of one
false alarm a year.
"""

import datetime as dt
import json
import os
import shutil
import signal
import subprocess
import sys
import time

import pytest

from corrtransforms.config import ShiftsConfig
from corrtransforms.numerics.arl import (
    SECONDS_PER_YEAR,
    cusum_arl_markov_chain,
    ewma_arl_markov_chain,
    limit_for_estimated_parameters,
    limit_for_run_length,
    run_length_for_budget,
)
from pipelines import backfill, nightly
from tests.support.fleet_data import FIRST_DAY, assert_same_asset, asset_table, write_fleet
from tests.support.output_tables import files_by_path

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
DAYS = [(FIRST_DAY + dt.timedelta(days=i)).isoformat() for i in range(3)]
ASSETS = ("north", "south")
#: 120-s windows: 5 a day, enough effective samples for the baselines to fit (fleet_data.write_fleet)
WINDOW_S = 120.0
RESUMED_TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample")


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet_resume")
    fleet = write_fleet(str(root), days=3, length_s=WINDOW_S)
    full = str(root / "full")
    found = backfill.main(["--config", fleet, "--output", full, "--run_id", "full"])
    assert all(found[a]["windows_computed"] == 15 for a in ASSETS), found
    return root, fleet, full


def _summary(output, run_id):
    with open(os.path.join(output, "_runs", "fleet", f"{run_id}.json")) as handle:
        return {a["asset"]: a for a in json.load(handle)["assets"]}


def test_fleet_nights_resume_each_asset_from_its_own_state(site):
    root, fleet, full = site
    output = str(root / "nights")
    backfill.main(["--config", fleet, "--output", output, "--end", DAYS[0]])
    for day in DAYS[1:]:
        found = nightly.main(["--config", fleet, "--output", output, "--date", day])
        assert all(found[a]["windows_computed"] == 5 for a in ASSETS), (day, found)
    for asset in ASSETS:
        assert_same_asset(output, full, asset, tables=RESUMED_TABLES)
    # both assets fitted on day one and carried on: the nights resumed them, not a fresh start
    for asset in ASSETS:
        phases = {s["local_date"]: s["phase"] for s in _rows(full, "state", asset)}
        assert set(phases.values()) == {"fitted"}, (asset, phases)


def _rows(output, table, asset):
    found = asset_table(output, table, asset)
    return [dict(zip(found, values)) for values in zip(*found.values())]


def _drop(output, asset, tables, day=None):
    for table in tables:
        folder = os.path.join(output, table, f"asset={asset}")
        if day is not None:
            folder = os.path.join(folder, f"date={day}")
        shutil.rmtree(folder, ignore_errors=True)


def test_a_missing_state_stops_only_its_asset_unless_rebuilt(site):
    root, fleet, full = site
    output = str(root / "missing")
    shutil.copytree(full, output)
    _drop(output, "south", ("state", "baseline_sample"))  # south never had a state written
    for asset in ASSETS:  # the night to run is not written yet
        _drop(output, asset, RESUMED_TABLES + ("rejects",), day=DAYS[2])
    with pytest.raises(SystemExit) as stop:
        nightly.main(["--config", fleet, "--output", output, "--date", DAYS[2], "--run_id", "night"])
    assert stop.value.code == 4
    outcomes = _summary(output, "night")
    assert outcomes["north"]["outcome"] == "done" and outcomes["north"]["windows"]["computed"] == 5
    assert outcomes["south"]["status"] == 2 and "--rebuild_state" in outcomes["south"]["reason"]
    assert_same_asset(output, full, "north", tables=RESUMED_TABLES)
    for table in RESUMED_TABLES:
        assert not os.path.exists(os.path.join(output, table, "asset=south", f"date={DAYS[2]}")), table
    # with --rebuild_state south replays its indicators (no samples read again) and runs the night
    found = nightly.main(["--config", fleet, "--output", output, "--date", DAYS[2], "--rebuild_state"])
    assert found["south"]["windows_computed"] == found["north"]["windows_computed"] == 5
    for asset in ASSETS:
        assert_same_asset(output, full, asset, tables=RESUMED_TABLES)


def _progress(output, asset):
    path = os.path.join(output, "_summaries", f"asset={asset}", "backfill.json")
    try:
        with open(path, encoding="utf-8") as handle:
            return json.load(handle)
    except (OSError, ValueError):
        return None


def test_a_killed_fleet_backfill_run_again_continues_and_writes_the_same_files(site):
    root, fleet, full = site
    output = str(root / "killed")
    command = [sys.executable, "-m", "pipelines.backfill", "--config", fleet, "--output", output]
    process = subprocess.Popen(
        command + ["--run_id", "full"], cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    deadline = time.monotonic() + 300  # a guard against a hang only: the machine's CPUs are shared
    while time.monotonic() < deadline and process.poll() is None:
        records = [_progress(output, a) for a in ASSETS]
        if all(r and r["committed_through"] >= DAYS[0] for r in records):
            break
        time.sleep(0.05)
    assert process.poll() is None, "the backfill ended before it could be killed"
    process.send_signal(signal.SIGKILL)
    process.wait()
    committed = {a: _progress(output, a)["committed_through"] for a in ASSETS}
    assert all(DAYS[0] <= c < DAYS[2] for c in committed.values()), committed
    again = subprocess.run(command, cwd=REPO, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stdout[-3000:] + again.stderr[-3000:]
    for asset in ASSETS:
        assert f"backfill {asset}: continuing after {committed[asset]} (run full)" in again.stdout
        assert _progress(output, asset) is None  # finished: no interrupted backfill left
    assert files_by_path(output) == files_by_path(full)


def test_a_fleet_backfill_killed_between_two_assets_progress_records_continues_to_the_same_files(site):
    """Killed after north's record of day two and before south's: each asset continues after its own day.

    South's record is written as a temporary file then renamed (launch.backfill.write_progress);
    once its record of day one is in place, that temporary name is made a named pipe, so the
    run's next write of it blocks on opening it, after north's record of the same chunk is
    renamed into place. The run is killed there (SIGKILL), the pipe removed (a kill just before
    the write leaves no file) and the same command run again.
    """
    root, fleet, full = site
    output = str(root / "killed_between")
    command = [sys.executable, "-m", "pipelines.backfill", "--config", fleet, "--output", output]
    south_temporary = os.path.join(output, "_summaries", "asset=south", "backfill.json.tmp")
    process = subprocess.Popen(
        command + ["--run_id", "full"], cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    try:
        deadline = time.monotonic() + 300  # a guard against a hang only: the machine's CPUs are shared
        while time.monotonic() < deadline and process.poll() is None:
            south = _progress(output, "south")
            if south and south["committed_through"] == DAYS[0]:
                os.mkfifo(south_temporary)
                break
            time.sleep(0.02)
        north = _progress(output, "north")
        assert north and north["committed_through"] == DAYS[0], "the pipe came after north's next record"
        while time.monotonic() < deadline and process.poll() is None:
            north = _progress(output, "north")
            if north and north["committed_through"] == DAYS[1]:
                break
            time.sleep(0.02)
        time.sleep(0.5)  # the launcher is now blocked opening south's temporary record
        assert process.poll() is None, "the backfill ended before it could be killed"
    finally:
        process.send_signal(signal.SIGKILL)
        process.wait()
    assert _progress(output, "north")["committed_through"] == DAYS[1]
    assert _progress(output, "south")["committed_through"] == DAYS[0]
    os.remove(south_temporary)
    again = subprocess.run(command, cwd=REPO, capture_output=True, text=True, timeout=600)
    assert again.returncode == 0, again.stdout[-3000:] + again.stderr[-3000:]
    assert f"backfill north: continuing after {DAYS[1]} (run full)" in again.stdout
    assert f"backfill south: continuing after {DAYS[0]} (run full)" in again.stdout
    assert f"chunk 2/3: {DAYS[1]}, 1 assets" in again.stdout  # south's second day alone, then both
    for asset in ASSETS:
        assert _progress(output, asset) is None
    assert files_by_path(output) == files_by_path(full)


def test_the_budget_gives_the_limits_of_the_fitted_states(site):
    _, _, full = site
    states = _rows(full, "state", "south")
    series = {(s["subject"], s["indicator"]) for s in states}
    fitted = [s for s in states if s["phase"] == "fitted" and (s["model_n"] or 0) > 0]
    assert len({(s["subject"], s["indicator"]) for s in fitted}) == len(series) > 0
    # the budget of one false episode a year over south's series and its two charts (120-s windows, hop = length)
    arl0 = run_length_for_budget(1.0, len(series), SECONDS_PER_YEAR / WINDOW_S, 2)
    assert arl0 == pytest.approx(SECONDS_PER_YEAR / WINDOW_S * len(series) * 2)
    h = limit_for_run_length("cusum", arl0, k=0.5)
    width = limit_for_run_length("ewma", arl0, smoothing=0.1)
    # a second method: Brook & Evans (1972) and Lucas & Saccucci (1990) Markov chains
    assert cusum_arl_markov_chain(0.5, h, states=400) == pytest.approx(arl0, rel=0.01)
    assert ewma_arl_markov_chain(0.1, width) == pytest.approx(arl0, rel=0.015)
    for s in fitted:
        assert s["model_n"] == 5  # south's [baseline] windows
        assert s["cusum_h_used"] == limit_for_estimated_parameters("cusum", h, s["model_n"], k=0.5), s
        assert s["ewma_L_used"] == limit_for_estimated_parameters("ewma", width, s["model_n"], smoothing=0.1), s
        assert s["cusum_h_used"] > h and s["ewma_L_used"] > width  # widened for 5 baseline windows
    # the run summary names the range of the limits in use
    with open(os.path.join(full, "_runs", "asset=south", "full.json")) as handle:
        limits = json.load(handle)["detector_limits"]
    used = [s["cusum_h_used"] for s in fitted]
    assert limits["false_alarms_per_year"] == 1.0 and limits["cusum_h_used"] == [min(used), max(used)]
    # north has no budget: the default limits, widened the same way for its baseline windows
    # (4, fewer where a window was held: nonstationary)
    north = [s for s in _rows(full, "state", "north") if s["phase"] == "fitted" and s["model_n"]]
    assert north and all(2 <= s["model_n"] <= 4 for s in north)
    default = ShiftsConfig()
    for s in north:
        n = s["model_n"]
        assert s["cusum_h_used"] == limit_for_estimated_parameters("cusum", default.cusum_h, n, k=0.5), s
        assert s["ewma_L_used"] == limit_for_estimated_parameters("ewma", default.ewma_L, n, smoothing=0.1), s
