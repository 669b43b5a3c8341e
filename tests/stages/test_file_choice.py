"""Which files a run opens: start times in file names ([archive] file_time_pattern), the span of
samples a range of days needs, and the footer index (real Parquet files in a tmp folder).

Footers are counted through the planner's own ``open_file`` parameter: a counting wrapper around
the local file opener, so every footer the planner reads is one real open of a real file.
"""

import datetime as dt
import os
import zoneinfo

import pyarrow.parquet as pq
import pytest

from corrtransforms.stages import footer_index
from corrtransforms.stages.footer_index import ListedFile, entry_for, load_footer_index, write_footer_index
from corrtransforms.stages.plan import (
    choose_files,
    file_time_finding,
    list_local_archive,
    may_hold_days,
    open_local_file,
    plan_archive,
    read_footer,
    reading_span,
)
from corrtransforms.stages.write import LocalFiles
from corrtransforms.timeutil import compile_file_time_pattern, file_name_time_us
from tests.support.archive_data import (
    FLAT_NAME,
    HIVE_NAME,
    T0,
    US,
    make_config,
    samples,
    wide_table,
    write_hourly_archive,
)

DAY = dt.date(2024, 3, 8)  # the fifth day of an archive starting at T0 (2024-03-04)


class CountingOpener:
    """``open_file`` for the planner that counts the files it opens."""

    def __init__(self):
        self.opened = []

    def __call__(self, path):
        self.opened.append(path)
        return open_local_file(path)


def _utc_us(*args, tz="UTC"):
    """Reference: datetime and zoneinfo (Python's standard library), not the package."""
    instant = dt.datetime(*args, tzinfo=zoneinfo.ZoneInfo(tz))
    return round(instant.timestamp() * 1e6)


@pytest.mark.parametrize(
    "pattern, path, tz, expected",
    [
        ("site_%Y%m%d_%H%M.parquet", "/a/b/site_20240304_0130.parquet", "UTC", (2024, 3, 4, 1, 30)),
        ("%Y-%m-%d/%H.parquet", "/a/2024-07-01/23.parquet", "Europe/Vienna", (2024, 7, 1, 23)),
        ("*_%Y%j.pq", "logger7_2024060.pq", "UTC", (2024, 2, 29)),
        ("x%Y%m%d%H%M%S%%.parquet", "x20241231235959%.parquet", "America/New_York", (2024, 12, 31, 23, 59, 59)),
    ],
)
def test_named_start_time_against_the_standard_library(pattern, path, tz, expected):
    compiled = compile_file_time_pattern(pattern)
    assert file_name_time_us(compiled, path, tz) == _utc_us(*expected, tz=tz)


def test_a_zone_in_the_name_overrides_the_archive_time_zone():
    compiled = compile_file_time_pattern("%Y%m%dT%H%M%z.parquet")
    reference = round(dt.datetime(2024, 3, 4, 12, 0, tzinfo=dt.timezone(dt.timedelta(hours=-5))).timestamp() * 1e6)
    assert file_name_time_us(compiled, "20240304T1200-0500.parquet", "Europe/Vienna") == reference
    assert file_name_time_us(compiled, "20240304T1200Z.parquet", "Europe/Vienna") == _utc_us(2024, 3, 4, 12)


@pytest.mark.parametrize(
    "path", ["site_20240230_0000.parquet", "site_2024030_0000.parquet", "other_20240304_0000.parquet", "x/y.parquet"]
)
def test_names_that_do_not_match_or_name_no_real_time_give_none(path):
    assert file_name_time_us(compile_file_time_pattern("site_%Y%m%d_%H%M.parquet"), path, "UTC") is None


def test_reading_span_is_the_days_and_a_window_on_each_side():
    config = make_config("x", rate=10.0, length_s=60.0)
    lo, hi = _utc_us(2024, 3, 8), _utc_us(2024, 3, 9)
    assert reading_span(config, DAY, DAY) == (lo - 60 * US, hi + 60 * US)
    # days in the asset's time zone (zoneinfo: Vienna is UTC+1 in March before the change)
    vienna = make_config("x", rate=10.0, length_s=60.0, extra={"asset": {"timezone": "Europe/Vienna"}})
    assert reading_span(vienna, DAY, DAY) == (lo - 3600 * US - 60 * US, hi - 3600 * US + 60 * US)
    assert reading_span(config, None, None) == (None, None)


def test_pattern_opens_two_days_of_a_flat_archive_and_plans_as_the_full_listing(tmp_path):
    folder = str(tmp_path / "flat")
    write_hourly_archive(folder, days=10, seconds=120.0, rate=2.0)
    base = make_config(folder, rate=2.0, length_s=60.0, max_lag_s=5.0)
    paths = list_local_archive(folder)
    everything = CountingOpener()
    full = plan_archive(paths, base, everything, DAY, DAY)
    assert len(everything.opened) == 240
    for span_h, expected in ((24, 49), (1, 26)):
        config = make_config(
            folder,
            rate=2.0,
            length_s=60.0,
            max_lag_s=5.0,
            extra={"archive": {"file_time_pattern": FLAT_NAME, "file_span_h": span_h}},
        )
        opener = CountingOpener()
        plan = plan_archive(paths, config, opener, DAY, DAY)
        # the day's 24 files, every file named in the file_span_h (and a window) before midnight,
        # and the next day's first file (it may hold samples of a window that crosses midnight)
        assert len(opener.opened) == expected
        assert plan.tasks == full.tasks and plan.days == full.days
        assert sorted(plan.rejects, key=repr) == sorted(full.rejects, key=repr)


def test_a_name_that_does_not_match_the_pattern_is_opened(tmp_path):
    config = make_config(str(tmp_path), extra={"archive": {"file_time_pattern": FLAT_NAME}})
    assert may_hold_days(str(tmp_path / "site_20240304_0000.parquet"), config, DAY, DAY) is False
    assert may_hold_days(str(tmp_path / "site_20240307_2300.parquet"), config, DAY, DAY) is True
    assert may_hold_days(str(tmp_path / "export-final.parquet"), config, DAY, DAY) is True
    assert may_hold_days(str(tmp_path / "site_20240304_0000.parquet"), config, None, None) is True


def test_a_file_whose_samples_break_its_name_is_flagged(tmp_path):
    folder = tmp_path / "flat"
    folder.mkdir()
    config = make_config(str(folder), extra={"archive": {"file_time_pattern": FLAT_NAME, "file_span_h": 1}})
    ok = folder / "site_20240304_0000.parquet"
    late = folder / "site_20240304_0100.parquet"  # holds samples from 00:00: before its named start
    pq.write_table(wide_table(samples(120, 10.0, start_us=T0)), ok)
    pq.write_table(wide_table(samples(120, 10.0, start_us=T0)), late)
    assert file_time_finding(read_footer(str(ok), config)[0], config) is None
    finding = file_time_finding(read_footer(str(late), config)[0], config)
    assert finding.reason == "file_time_mismatch" and finding.action == "flagged"
    assert "2024-03-04T01:00:00Z" in finding.detail and finding.date == "2024-03-04"


def _listed(paths):
    return [ListedFile(p, os.path.getsize(p), os.path.getmtime(p)) for p in paths]


def _index_of(listed, config):
    entries = []
    for item in listed:
        footer, _ = read_footer(item.path, config)
        entries.append(entry_for(item, footer.start_us, footer.end_us))
    return entries


def test_the_index_skips_unchanged_files_outside_the_days_and_reopens_changed_ones(tmp_path):
    folder = str(tmp_path / "flat")
    paths = write_hourly_archive(folder, days=10, seconds=120.0, rate=2.0)
    config = make_config(folder, rate=2.0, length_s=60.0, max_lag_s=5.0)
    store, output = LocalFiles(), str(tmp_path / "out")
    listed = _listed(paths)
    assert choose_files(listed, config, DAY, DAY, {}).open == listed  # no index: every file
    assert write_footer_index(store, output, config, _index_of(listed, config)) is True
    assert write_footer_index(store, output, config, _index_of(listed, config)) is False  # unchanged
    index = load_footer_index(store, output, config)
    assert os.path.exists(os.path.join(output, "_summaries", "asset=test-asset", "footer_index.parquet"))
    choice = choose_files(listed, config, DAY, DAY, index)
    # the files named 00:00 to 23:00 of the day and 00:00 of the next: the only 120-s records
    # that reach the day or the window length after it
    assert [item.path for item in choice.open] == paths[4 * 24 : 5 * 24 + 1]
    assert choice.skipped_by_index == 215 and len(choice.carried) == 215
    # a file of another day rewritten with new content is opened again
    changed = paths[30]
    pq.write_table(wide_table(samples(120.0, 2.0, seed=99, start_us=T0 + 30 * 3600 * US)), changed)
    again = choose_files(_listed(paths), config, DAY, DAY, index)
    assert changed in [item.path for item in again.open] and len(again.open) == 26
    # an index made with another archive time zone is not used
    other = make_config(folder, rate=2.0, length_s=60.0, max_lag_s=5.0, timezone="Europe/Vienna")
    assert load_footer_index(store, output, other) == {}


def test_a_damaged_index_is_ignored(tmp_path):
    config = make_config(str(tmp_path))
    store, output = LocalFiles(), str(tmp_path / "out")
    path = footer_index.index_path(store, output, config)
    os.makedirs(os.path.dirname(path))
    with open(path, "wb") as handle:
        handle.write(b"not parquet")
    assert load_footer_index(store, output, config) == {}


def test_files_without_a_modification_time_are_always_opened(tmp_path):
    config = make_config(str(tmp_path), rate=2.0, length_s=60.0, max_lag_s=5.0)
    unknown = ListedFile("/archive/a.parquet", 100, None)
    assert entry_for(unknown, T0, T0 + 1) is None
    index = {unknown.path: footer_index.IndexEntry(unknown.path, 100, 5.0, T0, T0 + 1)}
    assert choose_files([unknown], config, DAY, DAY, index).open == [unknown]


def test_hive_names_with_a_two_part_pattern(tmp_path):
    folder = str(tmp_path / "hive")
    write_hourly_archive(folder, days=3, name=HIVE_NAME, seconds=60.0, rate=2.0)
    config = make_config(
        folder,
        rate=2.0,
        length_s=60.0,
        max_lag_s=5.0,
        extra={"archive": {"file_time_pattern": "date=%Y-%m-%d/%H%M.parquet", "file_span_h": 1}},
    )
    day = dt.date(2024, 3, 5)
    kept = [p for p in list_local_archive(folder) if may_hold_days(p, config, day, day)]
    # 23:00 of the day before (its hour may reach midnight), the day's 24 files, 00:00 after it
    assert len(kept) == 26 and kept[0].endswith(os.path.join("date=2024-03-04", "2300.parquet"))
    assert kept[-1].endswith(os.path.join("date=2024-03-06", "0000.parquet"))
