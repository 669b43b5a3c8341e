"""Planning from Parquet footers: windows, read tasks, time zones and file-level rejects."""

import datetime as dt
import os
import pickle
import zoneinfo

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from corrtransforms.stages.plan import (
    find_records,
    list_local_archive,
    missing_channels,
    plan_archive,
    read_footer,
    window_grid,
)
from corrtransforms.timeutil import local_to_utc_us
from tests.support.archive_data import (
    T0,
    US,
    bad_wide_archive,
    duty_cycled_records,
    long_table,
    make_config,
    samples,
    wide_table,
    write_duty_cycled_archive,
    write_files,
)


def _windows(plan):
    return sorted(s for t in plan.tasks for s in t.window_starts_us)


@pytest.fixture
def small_groups(tmp_path):
    # 10 minutes at 10 Hz, files of 200 s, row groups of 50 s (< a 60-s window)
    folder = str(tmp_path / "arc")
    write_files(folder, wide_table(samples(600, 10.0, seed=1)), 200, 500)
    return folder


def test_windows_are_epoch_aligned_and_each_in_one_task(small_groups):
    config = make_config(small_groups)
    plan = plan_archive(list_local_archive(small_groups), config)
    starts = _windows(plan)
    # closed form: 600 s of data from an epoch-aligned start, 60-s windows -> exactly 10 windows
    assert starts == [T0 + k * 60 * US for k in range(10)]
    assert len(starts) == len(set(starts))  # every window in exactly one task
    assert plan.windows_planned == 10 and plan.rejects == []
    assert plan.channels == ("a", "b") and plan.days == ("2024-03-04",)
    assert all(s % (60 * US) == 0 for s in starts)


def test_tasks_are_bounded_in_decoded_bytes(small_groups):
    config = make_config(small_groups, task_bytes=2**16)
    plan = plan_archive(list_local_archive(small_groups), config)
    # decoded bytes of a row group: rows * 8 bytes * (time + a + b + temperature) = 500 * 32
    assert all(p.decoded_bytes == 16000 * len(p.row_groups) for t in plan.tasks for p in t.pieces)
    for task in plan.tasks:
        assert task.decoded_bytes <= config.reading.task_bytes
    big = plan_archive(list_local_archive(small_groups), make_config(small_groups, task_bytes=2**24))
    assert len(big.tasks) == 1 and _windows(big) == _windows(plan)


def test_window_spanning_two_files_is_read_by_one_task(small_groups):
    plan = plan_archive(list_local_archive(small_groups), make_config(small_groups))
    spanning = T0 + 180 * US  # window [180 s, 240 s) crosses the file boundary at 200 s
    task = next(t for t in plan.tasks if spanning in t.window_starts_us)
    assert len({p.path for p in task.pieces}) == 2


def test_row_groups_larger_than_a_window_are_decoded_once(tmp_path):
    folder = str(tmp_path / "big")
    write_files(folder, wide_table(samples(600, 10.0, seed=1)), 600, 3000)  # 300-s row groups
    config = make_config(folder, task_bytes=2**16)  # one row group (96 kB) exceeds the budget
    plan = plan_archive(list_local_archive(folder), config)
    assert len(_windows(plan)) == 10
    uses = {}
    for task in plan.tasks:
        for piece in task.pieces:
            for rg in piece.row_groups:
                uses[rg] = uses.get(rg, 0) + 1
    assert uses == {0: 1, 1: 1}


def test_overlapping_windows_with_hop(small_groups):
    config = make_config(small_groups, hop_s=30.0)
    starts = _windows(plan_archive(list_local_archive(small_groups), config))
    # windows [k*30, k*30 + 60) holding samples of [0, 600): k = 0..19 (k = -1 holds samples from t=0 too)
    assert starts == [T0 + k * 30 * US for k in range(-1, 20)]


def test_same_windows_whichever_files_are_read(small_groups):
    config = make_config(small_groups)
    paths = list_local_archive(small_groups)
    full = set(_windows(plan_archive(paths, config)))
    part = set(_windows(plan_archive(paths[1:], config)))
    assert part <= full and len(part) == 7  # file 2 spans [200, 400) s: windows 3..9 overlap files 2-3


def test_statistics_missing_falls_back_to_reading_time(tmp_path):
    folder = str(tmp_path / "nostats")
    table = wide_table(samples(300, 10.0, seed=2))
    os.makedirs(folder)
    pq.write_table(table, os.path.join(folder, "x.parquet"), row_group_size=700, write_statistics=False)
    config = make_config(folder)
    footer, findings = read_footer(os.path.join(folder, "x.parquet"), config)
    assert [f.reason for f in findings] == ["statistics_missing"] and findings[0].action == "repaired"
    times = table.column("time").cast(pa.int64()).to_numpy()
    assert [(rg.start_us, rg.end_us) for rg in footer.row_groups] == [
        (int(times[i]), int(times[min(i + 699, len(times) - 1)])) for i in range(0, len(times), 700)
    ]


def test_local_to_utc_matches_zoneinfo_across_daylight_saving():
    zone = zoneinfo.ZoneInfo("Europe/Berlin")
    # 2024-03-31: clocks go from 02:00 to 03:00 local (CET -> CEST); sample every 7 minutes
    walls = [dt.datetime(2024, 3, 30, 22) + dt.timedelta(minutes=7 * i) for i in range(60)]
    walls = [w for w in walls if not (dt.datetime(2024, 3, 31, 2) <= w < dt.datetime(2024, 3, 31, 3))]
    local = np.array([int((w - dt.datetime(1970, 1, 1)).total_seconds()) * US for w in walls])
    expected = [int(w.replace(tzinfo=zone).timestamp()) * US for w in walls]  # reference: zoneinfo
    assert local_to_utc_us(local, "Europe/Berlin").tolist() == expected


def test_day_range_in_the_asset_time_zone_and_naive_times(tmp_path):
    # 22:30-23:30 UTC on 2024-03-03 is 23:30-00:30 in Berlin (UTC+1 in March)
    start = T0 - 90 * 60 * US
    cols = samples(3600, 1.0, seed=3, start_us=start)
    naive = dict(cols)
    naive["time"] = cols["time"] + 3600 * US  # wall clock of Berlin, written without time zone
    folder = str(tmp_path / "tz")
    write_files(folder, wide_table(naive, tz=None), 3600, 1000, hive=True)
    assert "date=2024-03-03" in list_local_archive(folder)[0]
    config = make_config(folder, rate=1.0, length_s=600.0, max_lag_s=10.0, timezone="Europe/Berlin")
    everything = _windows(plan_archive(list_local_archive(folder), config))
    assert everything == [start + k * 600 * US for k in range(6)]  # naive local -> the UTC instants
    day = dt.date(2024, 3, 4)
    only = plan_archive(list_local_archive(folder), config, start=day, end=day)
    berlin = zoneinfo.ZoneInfo("Europe/Berlin")
    expected = [s for s in everything if dt.datetime.fromtimestamp(s / US, berlin).date() == day]  # reference: zoneinfo
    assert _windows(only) == expected == [T0 - 60 * 60 * US + k * 600 * US for k in range(3)]
    assert only.days == ("2024-03-04",)


def test_archive_time_zone_reads_naive_times_and_asset_time_zone_sets_the_days(tmp_path):
    # the data above: naive Berlin wall clock for 22:30-23:30 UTC on 2024-03-03
    start = T0 - 90 * 60 * US
    cols = samples(3600, 1.0, seed=3, start_us=start)
    naive = dict(cols, time=cols["time"] + 3600 * US)
    folder = str(tmp_path / "tz")
    write_files(folder, wide_table(naive, tz=None), 3600, 1000, hive=True)
    utc_days = make_config(
        folder, rate=1.0, length_s=600.0, max_lag_s=10.0, timezone="Europe/Berlin", extra={"asset": {"timezone": "UTC"}}
    )
    assert (utc_days.archive.timezone, utc_days.timezone, utc_days.notes) == ("Europe/Berlin", "UTC", ())
    plan = plan_archive(list_local_archive(folder), utc_days)
    # naive times still read as Berlin wall clock: the same UTC instants as with one zone
    assert _windows(plan) == [start + k * 600 * US for k in range(6)]
    # ... but the windows belong to 2024-03-03, their UTC day (in Berlin they straddle midnight)
    assert plan.days == ("2024-03-03",) and {d for t in plan.tasks for d in t.dates} == {"2024-03-03"}
    day = dt.date(2024, 3, 4)
    assert plan_archive(list_local_archive(folder), utc_days, start=day, end=day).windows_planned == 0
    # the old single key still sets both (same days as before), with a deprecation note
    berlin_days = make_config(folder, rate=1.0, length_s=600.0, max_lag_s=10.0, timezone="Europe/Berlin")
    assert berlin_days.timezone == "Europe/Berlin" and "deprecated" in berlin_days.notes[0]
    assert plan_archive(list_local_archive(folder), berlin_days).days == ("2024-03-03", "2024-03-04")


def test_long_layout_plans_like_wide(tmp_path):
    cols = samples(600, 10.0, seed=4)
    write_files(str(tmp_path / "w"), wide_table(cols), 200, 500)
    write_files(str(tmp_path / "l"), long_table(cols), 200, 1500)
    wide = plan_archive(list_local_archive(str(tmp_path / "w")), make_config(str(tmp_path / "w")))
    long = plan_archive(
        list_local_archive(str(tmp_path / "l")), make_config(str(tmp_path / "l"), layout="long", names=None)
    )
    assert _windows(wide) == _windows(long)
    assert long.channels == ("a", "b")  # all channel values, minus the covariate, sorted per file


def test_file_level_rejects_and_the_other_files_still_plan(tmp_path):
    folder = str(tmp_path / "bad")
    expected = bad_wide_archive(folder)
    plan = plan_archive(list_local_archive(folder), make_config(folder))
    found = {os.path.basename(r.source): r.reason for r in plan.rejects}
    assert found == expected["file_findings"]
    assert all(r.stage == "plan" and r.date == "2024-03-04" for r in plan.rejects)
    starts = {(s - T0) // (60 * US) for s in _windows(plan)}
    assert starts == set(range(22)) | {40}


def test_task_description_is_small_and_picklable(small_groups):
    plan = plan_archive(list_local_archive(small_groups), make_config(small_groups))
    for task in plan.tasks:
        text = pickle.dumps(task)
        assert pickle.loads(text) == task and len(text) < 2000


def test_window_grid_values():
    config = make_config("/nowhere", rate=12.5, length_s=64.0, max_lag_s=4.0)
    assert window_grid(config) == (64 * US, 64 * US, 800, 80000.0)


def _footers(folder, config):
    return [read_footer(p, config)[0] for p in list_local_archive(folder)]


def test_record_starts_come_from_footer_statistics_alone_when_row_groups_hold_no_pause(tmp_path):
    records = duty_cycled_records()
    write_duty_cycled_archive(str(tmp_path), records)  # row groups of 5000 rows inside each record
    config = make_config(str(tmp_path), rate=25.0, length_s=600.0, align="records")
    footers = _footers(str(tmp_path), config)
    # every row group spans exactly (rows - 1) sample intervals: no time column was read
    assert all(rg.segments_us == () for f in footers for rg in f.row_groups)
    assert find_records(footers, config) == [(int(r["time"][0]), int(r["time"][-1])) for r in records]


def test_a_row_group_that_may_hold_a_pause_has_its_time_column_read(tmp_path):
    records = duty_cycled_records()
    # one file, row groups of 7000 rows: some row groups hold the end of one record and the start
    # of the next, which only their time column can tell
    write_duty_cycled_archive(str(tmp_path), records, one_file=True, row_group_size=7000)
    config = make_config(str(tmp_path), rate=25.0, length_s=600.0, align="records")
    (footer,) = _footers(str(tmp_path), config)
    straddling = [rg for rg in footer.row_groups if rg.segments_us]
    assert [rg.index for rg in straddling] == [2, 4, 6]  # rows 14000-20999, 28000-34999, 42000-48999
    assert find_records([footer], config) == [(int(r["time"][0]), int(r["time"][-1])) for r in records]
    plan = plan_archive(list_local_archive(str(tmp_path)), config)
    assert _windows(plan) == [int(r["time"][0]) for r in records]
    # epoch alignment never reads a time column for planning
    epoch = make_config(str(tmp_path), rate=25.0, length_s=600.0)
    assert all(rg.segments_us == () for rg in _footers(str(tmp_path), epoch)[0].row_groups)


def test_a_pause_longer_than_record_gap_s_starts_a_new_record(tmp_path):
    cols = samples(300, 25.0, seed=4)
    keep = np.ones(cols["time"].size, dtype=bool)
    keep[2500:2525] = False  # a 1-s dropout (25 samples) at 100 s
    pq.write_table(wide_table({k: v[keep] for k, v in cols.items()}), str(tmp_path / "one.parquet"))
    # default tolerance: 2 sample intervals (80 ms) < the 1.04-s pause: two records
    config = make_config(str(tmp_path), rate=25.0, length_s=60.0, align="records")
    assert [lo for lo, _ in find_records(_footers(str(tmp_path), config), config)] == [T0, T0 + 101 * US]
    # a stated tolerance of 2 s joins them: one record, windows every 60 s from its first sample
    config = make_config(str(tmp_path), rate=25.0, length_s=60.0, align="records", record_gap_s=2.0)
    assert find_records(_footers(str(tmp_path), config), config) == [(T0, int(cols["time"][-1]))]
    assert _windows(plan_archive(list_local_archive(str(tmp_path)), config)) == [T0 + k * 60 * US for k in range(5)]


def test_offset_s_shifts_the_epoch_grid(small_groups):
    config = make_config(small_groups, offset_s=15.0)
    starts = _windows(plan_archive(list_local_archive(small_groups), config))
    # 600 s of data from T0: windows at T0 - 45 s + k * 60 s that hold a sample (closed form: 11)
    assert starts == [T0 - 45 * US + k * 60 * US for k in range(11)]


def test_missing_channels_names_configured_channels_no_footer_holds(tmp_path):
    cols = samples(120, 10.0, seed=5)
    write_files(str(tmp_path / "w"), wide_table(cols), 60, 300)
    # file 2 lacks b: b is still in one file, so only the misspelt channel and covariate are missing
    pq.write_table(
        wide_table(samples(60, 10.0, seed=6, start_us=T0 + 200 * US)).drop_columns(["b"]),
        str(tmp_path / "w" / "no-b.parquet"),
    )
    config = make_config(str(tmp_path / "w"), names=("a", "b", "acc9"), covariates=("temprature",))
    footers = _footers(str(tmp_path / "w"), config)
    assert missing_channels(footers, config) == {
        "acc9": ("a", "b", "temperature"),
        "temprature": ("a", "b", "temperature"),
    }
    assert missing_channels(footers, make_config(str(tmp_path / "w"))) == {}
    assert missing_channels([], config) == {}
    # long layout with channel values in the footers ([channels] names omitted): covariates checked
    write_files(str(tmp_path / "l"), long_table(cols), 60, 900)
    long = make_config(str(tmp_path / "l"), layout="long", names=None, covariates=("humidity",))
    assert missing_channels(_footers(str(tmp_path / "l"), long), long) == {"humidity": ("a", "b", "temperature")}
