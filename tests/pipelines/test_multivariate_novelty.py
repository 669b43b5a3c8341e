"""``[shifts] multivariate = true`` end to end, through the real backfill and nightly commands on
an invented archive: a machine with six vibration channels whose RMS levels all rise with
temperature (3 % per degC, a daily cycle of +-5 degC on a slow warming); one record of 60 s at
10 Hz every 30 minutes. From ``CHANGE`` on, channel ``c3``'s level is 25 % higher than the temperature
explains (about 8 of its record-length standard errors).

Periods (48 windows a day): the series' baselines (48 windows), the novelty model's sample
(48 windows), the novelty charts' own baseline (48 windows), then 1.5 healthy days before the
change.

Checked: the novelty_t2 chart is shifted within a day of the change and has no shifted window
before it; c3 carries the largest T^2 contribution after the change; rows before the fit are
``novelty_pending``; nightly runs after a partial backfill equal one backfill.
"""

import datetime as dt
import os

import numpy as np
import pyarrow.parquet as pq
import pytest

from pipelines import backfill, nightly
from tests.support.archive_data import wide_table
from tests.support.output_tables import assert_same_tables, read_table

US = 1_000_000
DAYS = 6
FIRST = dt.datetime(2024, 6, 1, tzinfo=dt.timezone.utc)
CHANGE = FIRST + dt.timedelta(days=4, hours=12)
CHANNELS = [f"c{i}" for i in range(1, 7)]
RATE, SECONDS = 10.0, 60.0

CONFIG = """
[asset]
name = "rig"

[archive]
path = "archive"
layout = "wide"
time_column = "time"
sample_rate_hz = 10.0
timezone = "UTC"

[channels]
names = ["c1", "c2", "c3", "c4", "c5", "c6"]
covariates = ["temperature"]

[windows]
length_s = 60.0

[correlation]
max_lag_s = 2.0
pairs = [["c1", "c1"], ["c2", "c2"], ["c3", "c3"], ["c4", "c4"], ["c5", "c5"], ["c6", "c6"]]

[baseline]
windows = 48
min_windows = 30

[screening]
enabled = false

[shifts]
detector = "cusum"
cusum_k = 1.0
cusum_h = 8.0
indicators = ["rms"]
multivariate = true
multivariate_windows = 48
"""


def _temperature(hours: np.ndarray) -> np.ndarray:
    return 15.0 + 5.0 * np.sin(2 * np.pi * (hours - 9.0) / 24.0) + 0.03 * hours


def write_archive(folder: str, seed: int = 3) -> None:
    rng = np.random.default_rng(seed)
    os.makedirs(folder, exist_ok=True)
    n = int(RATE * SECONDS)
    first_us = int(FIRST.timestamp()) * US
    for k in range(DAYS * 48):
        start = first_us + k * 1800 * US
        hour = k / 2.0
        temp = _temperature(hour + np.arange(n) / RATE / 3600.0)
        level = 1.0 + 0.03 * (temp.mean() - 15.0)
        columns = {"time": start + np.round(np.arange(n) * US / RATE).astype(np.int64)}
        for j, name in enumerate(CHANNELS):
            gain = level * (1.0 + 0.1 * j)
            if name == "c3" and start >= int(CHANGE.timestamp()) * US:
                gain *= 1.25
            columns[name] = gain * rng.standard_normal(n)
        columns["temperature"] = temp
        stamp = dt.datetime(1970, 1, 1) + dt.timedelta(microseconds=start)
        pq.write_table(wide_table(columns), os.path.join(folder, stamp.strftime("rig_%Y%m%d_%H%M.parquet")))


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("novelty")
    write_archive(str(root / "archive"))
    config = root / "rig.toml"
    config.write_text(CONFIG, encoding="utf-8")
    full = str(root / "full")
    backfill.main(["--config", str(config), "--output", full])
    return root, str(config), full


def _rows(output, name):
    columns = read_table(output, name)
    return [dict(zip(columns, values)) for values in zip(*columns.values())]


def test_a_change_in_one_of_six_indicators_is_flagged_within_a_day_without_false_episodes(site):
    _, _, full = site
    shifts = sorted(
        (r for r in _rows(full, "shifts") if r["subject"] == "rig" and r["indicator"] == "novelty_t2"),
        key=lambda r: r["window_start"],
    )
    assert shifts, "no novelty_t2 rows were charted"
    monitored = [r for r in shifts if r["state"] != "baseline"]
    before = [r for r in monitored if r["window_start"] < CHANGE]
    after = [r for r in monitored if r["window_start"] >= CHANGE]
    assert len(before) >= 60  # 1.5 healthy days watched by the chart
    assert all(r["state"] == "normal" for r in before), [r["window_start"] for r in before if r["state"] != "normal"]
    flagged = [r["window_start"] for r in after if r["state"] == "shifted"]
    assert flagged and flagged[0] - CHANGE < dt.timedelta(days=1), flagged[:3]
    print("novelty_t2 flagged", flagged[0] - CHANGE, "after the change")


def test_contributions_point_at_the_changed_channel_and_early_rows_are_pending(site):
    _, _, full = site
    rows = _rows(full, "indicators")
    t2 = [r for r in rows if r["indicator"] == "novelty_t2"]
    pending = [r for r in t2 if r["quality"] == "novelty_pending"]
    assert pending and all(np.isnan(r["value"]) for r in pending)
    assert max(r["window_start"] for r in pending) < min(r["window_start"] for r in t2 if r["quality"] == "ok")
    contributions = [r for r in rows if r["indicator"] == "novelty_t2_contribution" and r["window_start"] >= CHANGE]
    by_window = {}
    for r in contributions:
        by_window.setdefault(r["window_start"], {})[r["subject"]] = r["value"]
    top = [max(c, key=c.get) for c in by_window.values()]
    assert len(by_window) >= 10 and top.count("c3/rms") >= 0.8 * len(top)
    # each window's contributions add up to its T^2 (checked through the normal score's inverse
    # is the core's job; here: six contributions per window, one per monitored series)
    assert all(sorted(c) == sorted(f"{ch}/rms" for ch in CHANNELS) for c in by_window.values())


def test_nights_with_multivariate_equal_one_backfill(site):
    root, config, full = site
    stepwise = str(root / "stepwise")
    backfill.main(["--config", config, "--output", stepwise, "--start", "2024-06-01", "--end", "2024-06-03"])
    for day in range(4, DAYS + 1):
        nightly.main(["--config", config, "--output", stepwise, "--date", f"2024-06-{day:02d}"])
    assert_same_tables(full, stepwise)
    state = _rows(full, "state")
    assert any(s["subject"] == "rig" and s["indicator"] == "novelty_model" and s["phase"] == "fitted" for s in state)
