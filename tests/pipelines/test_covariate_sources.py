"""``[[covariate_sources]]`` end to end: the invented footbridge archive (one 10-minute record
every 8 hours) and a separate weather archive of air temperature at one value a minute, in its
own Parquet files with naive local timestamps (Europe/Vienna), through the real backfill and
nightly commands.

- the ``covariate_mean`` rows of the source covariate equal the time-weighted window means
  computed here from the written samples with scipy's trapezoid of a dense linear interpolation;
- nightly runs after a partial backfill equal one backfill (with ``smoothing_h``);
- a gap in the weather archive gives NaN rows (``no_covariate_samples``) and ``covariate_missing``
  in the shifts table.
"""

import datetime as dt
import os
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.integrate import trapezoid

from corrtransforms.timeutil import local_to_utc_us
from demo_data import generate
from pipelines import backfill, nightly
from tests.support.demo_fixtures import DEMO_CONFIG
from tests.support.fleet_data import assert_same_asset
from tests.support.output_tables import assert_same_tables, read_table

DAYS = 4
EVERY_HOURS = 8
STATION_TZ = "Europe/Vienna"
#: a weather-station outage (local wall clock of the station): no sample in between
GAP = (dt.datetime(2025, 5, 3, 9, 0), dt.datetime(2025, 5, 3, 12, 0))
MINUTE_US = 60_000_000


def _local_minutes(day: dt.date) -> np.ndarray:
    """Naive local wall-clock microseconds of every minute of ``day``."""
    first = int((dt.datetime(day.year, day.month, day.day) - dt.datetime(1970, 1, 1)).total_seconds()) * 1_000_000
    return first + MINUTE_US * np.arange(24 * 60, dtype=np.int64)


def _air_temperature(utc_us: np.ndarray, rng) -> np.ndarray:
    """A daily cycle (minimum near 03:00 UTC) with a little sensor noise."""
    hours = utc_us / 3.6e9
    return 12.0 + 7.0 * np.sin(2 * np.pi * (hours - 9.0) / 24.0) + 0.05 * rng.standard_normal(hours.size)


def write_weather(folder: str, days, seed: int = 5):
    """One file per local day (row groups of 6 hours), naive local times; returns the UTC times
    and values written (the outage left out)."""
    rng = np.random.default_rng(seed)
    all_t, all_x = [], []
    os.makedirs(folder, exist_ok=True)
    for day in days:
        local = _local_minutes(day)
        epoch = np.datetime64("1970-01-01T00:00:00", "us")
        naive = epoch + local.astype("timedelta64[us]")
        outage = (naive >= np.datetime64(GAP[0])) & (naive < np.datetime64(GAP[1]))
        local, naive = local[~outage], naive[~outage]
        utc = local_to_utc_us(local, STATION_TZ)
        x = _air_temperature(utc, rng)
        table = pa.table({"stamp": pa.array(naive, pa.timestamp("us")), "air_temp": x, "humidity": 60.0 + 0 * x})
        pq.write_table(table, os.path.join(folder, f"station_{day:%Y%m%d}.parquet"), row_group_size=360)
        all_t.append(utc)
        all_x.append(x)
    return np.concatenate(all_t), np.concatenate(all_x)


SOURCE = """
[[covariate_sources]]
path = "weather"
layout = "wide"
time_column = "stamp"
timezone = "Europe/Vienna"
names = ["air_temp"]
max_gap_s = 300.0
smoothing_h = { air_temp = 6.0 }
"""


def _config_text() -> str:
    with open(DEMO_CONFIG, encoding="utf-8") as handle:
        text = handle.read()
    for pattern, new in [
        (r"(?m)^end = 2025-05-10", "end = 2025-05-02"),
        (r"(?m)^min_windows = 30", "min_windows = 3"),
        (r'(?m)^compensate = \["deck_temp"\]', 'compensate = ["air_temp"]'),
        (r'(?m)^deck_temp = "degC".*$', 'air_temp = "degC"'),
        # the demo's own source (the deck temperature logger) is replaced by the station below
        (r"(?ms)^\[\[covariate_sources\]\]\n.*?(?=^\[windows\])", ""),
    ]:
        text, count = re.subn(pattern, new, text)
        assert count == 1, pattern
    return text + SOURCE


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("sources")
    generate.write_archive(str(root / "archive"), days=DAYS, every_hours=EVERY_HOURS, weather_dir=str(root / "deck"))
    days = [dt.date(2025, 5, 1) + dt.timedelta(days=i) for i in range(DAYS + 1)]
    weather = write_weather(str(root / "weather"), [dt.date(2025, 4, 30)] + days)
    config = root / "footbridge.toml"
    config.write_text(_config_text(), encoding="utf-8")
    full = str(root / "full")
    backfill.main(["--config", str(config), "--output", full])
    return root, str(config), full, weather


def _rows(output, name):
    columns = read_table(output, name)
    return [dict(zip(columns, values)) for values in zip(*columns.values())]


def _source_rows(output):
    rows = [r for r in _rows(output, "indicators") if r["subject"] == "air_temp"]
    assert rows and all(r["indicator"] == "covariate_mean" and r["unit"] == "degC" for r in rows)
    return rows


def _reference_mean(t_us, x, start_us, length_s):
    """Mean over [start, start + length) of the linear interpolation of the samples (scipy's
    trapezoid on a dense grid; exact for a piecewise-linear signal up to rounding)."""
    grid = np.linspace(start_us, start_us + length_s * 1e6, 6001)
    return trapezoid(np.interp(grid, t_us, x), grid) / (length_s * 1e6)


def test_source_means_equal_the_time_weighted_mean_of_the_written_samples(site):
    _, _, full, (t_us, x) = site
    rows = _source_rows(full)
    indicators = _rows(full, "indicators")
    windows = {r["window_start"] for r in indicators if r["indicator"] == "mode_freq_hz"}
    assert {r["window_start"] for r in rows} == windows  # every analysed window, and only those
    checked = 0
    for row in rows:
        start = int(row["window_start"].timestamp() * 1e6)
        in_gap = np.any((t_us[1:] - t_us[:-1] > 300e6) & (t_us[1:] > start) & (t_us[:-1] < start + 600e6))
        if in_gap:
            continue
        assert row["value"] == pytest.approx(_reference_mean(t_us, x, start, 600.0), rel=1e-9, abs=1e-9)
        assert row["quality"] == "ok"
        checked += 1
    assert checked >= 3 * DAYS - 1


def test_an_outage_of_the_station_gives_missing_covariates(site):
    _, _, full, _ = site
    gap_utc = local_to_utc_us(
        np.array([int((g - dt.datetime(1970, 1, 1)).total_seconds() * 1e6) for g in GAP]), STATION_TZ
    )
    rows = _source_rows(full)
    inside = [r for r in rows if gap_utc[0] <= r["window_start"].timestamp() * 1e6 < gap_utc[1] - 600e6]
    assert len(inside) == 1  # the 08:00 UTC record of 3 May (10:00 at the station)
    assert np.isnan(inside[0]["value"]) and inside[0]["quality"] == "no_covariate_samples"
    shifts = _rows(full, "shifts")
    at_gap = [s for s in shifts if s["window_start"] == inside[0]["window_start"]]
    assert at_gap and all("covariate_missing" in s["quality"] for s in at_gap)


def test_nights_with_a_source_and_smoothing_equal_one_backfill(site):
    root, config, full, _ = site
    stepwise = str(root / "stepwise")
    backfill.main(["--config", config, "--output", stepwise, "--start", "2025-05-01", "--end", "2025-05-02"])
    for day in ("2025-05-03", "2025-05-04"):
        nightly.main(["--config", config, "--output", stepwise, "--date", day])
    assert_same_tables(full, stepwise)
    state = _rows(full, "state")
    assert any(s["subject"] == "air_temp" and s["indicator"] == "covariate_smoother" for s in state)


def test_a_source_path_without_files_stops_before_the_pipeline(site, tmp_path):
    root, _, _, _ = site
    config = root / "nowhere.toml"
    config.write_text(_config_text().replace('path = "weather"', 'path = "no-such-station"'), encoding="utf-8")
    with pytest.raises(SystemExit) as stop:
        backfill.main(["--config", str(config), "--output", str(tmp_path / "out")])
    assert "[[covariate_sources]] #1 path" in str(stop.value) and "no files match" in str(stop.value)
    assert not (tmp_path / "out" / "indicators").exists()


def test_a_fleet_with_a_source_and_smoothing_writes_what_the_single_run_writes(site):
    """In a fleet the source is joined for its asset alone and the smoothing and shift detection
    run in the shared steps (keyed by asset): its tables equal the single run's. The second asset
    (the same archive under another name, its own temperature channel, no source) runs beside it."""
    root, config, full, _ = site
    other = root / "footbridge_b.toml"
    text = _config_text().replace(SOURCE, "")
    for old, new in [
        ('name = "footbridge"', 'name = "footbridge_b"'),
        ('compensate = ["air_temp"]', "compensate = []"),
    ]:
        assert old in text, old
        text = text.replace(old, new)
    other.write_text(text, encoding="utf-8")
    fleet_output = str(root / "fleet")
    found = backfill.main(["--config", config, "--config", str(other), "--output", fleet_output])
    assert found["footbridge"]["windows_computed"] == found["footbridge_b"]["windows_computed"] > 0
    assert_same_asset(fleet_output, full, "footbridge")
    state = _rows(fleet_output, "state")
    assert any(s["asset"] == "footbridge" and s["indicator"] == "covariate_smoother" for s in state)
    assert not any(s["asset"] == "footbridge_b" and s["subject"] == "air_temp" for s in state)
