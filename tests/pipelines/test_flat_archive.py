"""Flat archives (all hourly files in one folder) through the public commands: how many Parquet
footers a run opens, and that the tables equal those of the same data in date= folders.

Footers are counted by the pipeline's own Beam counters (``footers_opened``, ``files_listed``,
``files_skipped_by_index`` in the namespace ``corrtransforms``) that the commands return. The
archive: 10 invented days, one file per hour holding one minute at 4 Hz (two 30-s windows).
"""

import os

import pyarrow.parquet as pq
import pytest

from corrtransforms.config import load_config
from corrtransforms.stages.footer_index import load_footer_index
from corrtransforms.stages.write import LocalFiles
from pipelines import backfill, nightly
from tests.support.archive_data import FLAT_NAME, HIVE_NAME, T0, US, samples, wide_table, write_hourly_archive
from tests.support.output_tables import assert_same_tables, read_table

CONFIG = """
[asset]
name = "flat-site"

[archive]
path = "{archive}"
sample_rate_hz = 4
{extra}

[channels]
names = ["a", "b"]
covariates = ["temperature"]

[windows]
length_s = 30

[correlation]
max_lag_s = 3

[baseline]
windows = 20
min_windows = 10

[screening]
enabled = false
"""
FILES_PER_DAY = 24
DAY5, DAY6, DAY7 = "2024-03-08", "2024-03-09", "2024-03-10"


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("flat")
    write_hourly_archive(str(root / "flat"), days=10, name=FLAT_NAME)
    write_hourly_archive(str(root / "hive"), days=10, name=HIVE_NAME)
    configs = {
        "hive": CONFIG.format(archive="hive", extra=""),
        "flat": CONFIG.format(archive="flat", extra=""),
        "pattern": CONFIG.format(archive="flat", extra=f'file_time_pattern = "{FLAT_NAME}"'),
    }
    for name, text in configs.items():
        (root / f"{name}.toml").write_text(text)
    return root


@pytest.fixture(scope="module")
def hive_day(site):
    """The fifth day backfilled from the date= folder copy: the reference tables."""
    counters = _backfill(site, "hive", site / "out-hive", DAY5)
    return site / "out-hive", counters


def _backfill(root, name, output, *days):
    argv = ["--config", str(root / f"{name}.toml"), "--output", str(output)]
    return backfill.main(argv + ["--start", days[0], "--end", days[-1]])


def _nightly(root, name, output, day):
    return nightly.main(["--config", str(root / f"{name}.toml"), "--output", str(output), "--date", day])


def test_a_pattern_opens_two_days_of_files_and_gives_the_tables_of_date_folders(site, hive_day):
    reference, hive = hive_day
    assert hive["footers_opened"] == 3 * FILES_PER_DAY  # date= folders: the day and one on each side
    pattern = _backfill(site, "pattern", site / "out-pattern", DAY5)
    assert pattern["files_in_archive"] == 10 * FILES_PER_DAY
    # file_span_h = 24 (the default): the day's files, those named in the 24 h before it, and the
    # next day's first file (a window's length after midnight belongs to the day's planning)
    assert pattern["footers_opened"] == 2 * FILES_PER_DAY + 1
    assert pattern["windows_planned"] == hive["windows_planned"] == 2 * FILES_PER_DAY
    assert_same_tables(reference, site / "out-pattern")
    night = _nightly(site, "pattern", site / "out-pattern", DAY6)
    # the next night: the files the first run opened are in the footer index now, so of the
    # pattern's 49 only the day's 24 and the next day's first are opened
    assert night["footers_opened"] == FILES_PER_DAY + 1 and night["files_skipped_by_index"] == FILES_PER_DAY
    assert night["windows_computed"] == 2 * FILES_PER_DAY


def test_without_a_pattern_the_index_lets_later_nights_open_one_day_of_files(site, hive_day):
    output = site / "out-flat"
    first = _backfill(site, "flat", output, DAY5)
    assert first["footers_opened"] == 10 * FILES_PER_DAY  # nothing known yet: every footer
    assert first["footer_index_written"] == 1
    config = load_config(str(site / "flat.toml"))
    assert len(load_footer_index(LocalFiles(), str(output), config)) == 10 * FILES_PER_DAY
    assert_same_tables(hive_day[0], output)

    second = _nightly(site, "flat", output, DAY6)
    # the day's files and the next day's first; every other file is known from the index (its
    # minute cannot reach the day or a window length around it)
    assert second["footers_opened"] == FILES_PER_DAY + 1 <= 2 * FILES_PER_DAY
    assert second["files_skipped_by_index"] == 9 * FILES_PER_DAY - 1
    assert second.get("footer_index_written", 0) == 0  # nothing changed: the index is not rewritten

    # a file of day 2 rewritten with new content, now holding a minute of day 7 at 12:30
    changed = os.path.join(str(site / "flat"), "site_20240305_0300.parquet")
    moved_us = T0 + (6 * 24 + 12.5) * 3600 * US
    pq.write_table(wide_table(samples(60.0, 4.0, seed=1234, start_us=int(moved_us))), changed)
    third = _nightly(site, "flat", output, DAY7)
    assert third["footers_opened"] == FILES_PER_DAY + 2 and third["footer_index_written"] == 1
    assert third["windows_computed"] == 2 * FILES_PER_DAY + 2  # its two windows are read too
    indexed = load_footer_index(LocalFiles(), str(output), config)[changed]
    assert indexed.start_us == int(moved_us) and indexed.size == os.path.getsize(changed)
    starts = {int(t.timestamp()) * US for t in read_table(str(output), "correlations")["window_start"]}
    assert int(moved_us) in starts
