"""Nightly runs: a sequence of nights gives exactly the tables of one backfill over the same days.

Uses a short, sparse version of the invented demo archive (14 days, a record every 6 hours; the
baseline is the configured first ten days). The backfills run as few pipelines as the chunking
allows (``--commit_days``; chunking does not change a table, and the nights are one-day chunks).
Every comparison reads the tables back from Parquet with pyarrow.dataset, as a user would.
"""

import contextlib
import datetime as dt
import io
import os
import shutil

import pyarrow.dataset as ds
import pytest

from demo_data import generate
from pipelines import backfill, nightly
from tests.support.output_tables import _nan_equal, assert_same_tables, read_table

DEMO_DIR = os.path.join(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))), "demo_data")


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("nightly")
    generate.write_archive(str(root / "archive"), days=14, every_hours=6)
    shutil.copy(os.path.join(DEMO_DIR, "footbridge.toml"), root / "footbridge.toml")
    config = str(root / "footbridge.toml")
    full = str(root / "full")
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):  # one request, cut only where the baseline ends
        backfill.main(["--config", config, "--output", full, "--commit_days", "14"])
    chunks = [line for line in printed.getvalue().splitlines() if line.startswith("backfill footbridge: chunk")]
    assert [line.split(": ")[-1] for line in chunks] == ["2025-05-01 to 2025-05-10", "2025-05-11 to 2025-05-14"]
    return root, config, full


@pytest.fixture(scope="module")
def stepwise(site):
    """A backfill of 2025-05-01 to 05-11, then the nights of 05-12, 05-13 and 05-14; a copy of the
    output as it stood after the night of 05-13 is kept beside it (for the rebuild test). Built
    once: the backfills and nights are most of this file's time."""
    root, config, _ = site
    out = str(root / "stepwise")
    backfill.main(
        ["--config", config, "--output", out, "--start", "2025-05-01", "--end", "2025-05-11", "--commit_days", "11"]
    )
    for day in ("2025-05-12", "2025-05-13"):
        nightly.main(["--config", config, "--output", out, "--date", day])
    before_last = str(root / "stepwise-before-05-14")
    shutil.copytree(out, before_last)
    nightly.main(["--config", config, "--output", out, "--date", "2025-05-14"])
    return out, before_last


def test_nights_after_a_partial_backfill_equal_one_backfill(site, stepwise):
    _, _, full = site
    out, _ = stepwise
    assert_same_tables(full, out)
    # the nights really did resume: the shifts of the last night are not in state baseline
    shifts = read_table(out, "shifts")
    assert set(shifts["state"]) >= {"baseline", "normal"}


def test_a_missing_previous_state_stops_the_night_with_status_2(site, capsys):
    root, config, _ = site
    empty = str(root / "empty")
    with pytest.raises(SystemExit) as stop:
        nightly.main(["--config", config, "--output", empty, "--date", "2025-05-13"])
    assert stop.value.code == nightly.MISSING_STATE
    message = capsys.readouterr().err
    assert "no detector state before 2025-05-13" in message and "--rebuild_state" in message
    assert not os.path.exists(os.path.join(empty, "shifts"))  # nothing was written


def test_rebuild_state_from_the_indicators_gives_the_backfill_night(site, stepwise):
    root, config, full = site
    rebuilt = str(root / "rebuilt")
    shutil.copytree(stepwise[1], rebuilt)  # the tables of 2025-05-01 to 05-13
    shutil.rmtree(os.path.join(rebuilt, "state"))
    with pytest.raises(SystemExit):
        nightly.main(["--config", config, "--output", rebuilt, "--date", "2025-05-14"])
    nightly.main(["--config", config, "--output", rebuilt, "--date", "2025-05-14", "--rebuild_state"])
    full_shifts, rebuilt_shifts = read_table(full, "shifts"), read_table(rebuilt, "shifts")
    last_day = [i for i, t in enumerate(full_shifts["window_start"]) if t.date() == dt.date(2025, 5, 14)]
    rebuilt_day = [i for i, t in enumerate(rebuilt_shifts["window_start"]) if t.date() == dt.date(2025, 5, 14)]
    assert last_day and len(last_day) == len(rebuilt_day)
    for column in ("subject", "indicator", "z", "cusum_pos", "cusum_neg", "ewma", "state", "expected"):
        assert _nan_equal([full_shifts[column][i] for i in last_day], [rebuilt_shifts[column][i] for i in rebuilt_day])


def test_yesterday_is_taken_in_the_assets_time_zone(site):
    _, config, _ = site
    from corrtransforms.config import load_config

    asset = load_config(config)
    late_evening_utc = dt.datetime(2026, 3, 1, 23, 30, tzinfo=dt.timezone.utc)
    assert nightly.yesterday(asset, late_evening_utc) == dt.date(2026, 2, 28)
    tokyo = asset.__class__(**{**asset.__dict__, "timezone": "Asia/Tokyo"})  # [asset] timezone: the calendar day
    assert nightly.yesterday(tokyo, late_evening_utc) == dt.date(2026, 3, 1)  # already 2 March in Tokyo


def test_episodes_from_the_reduced_shifts_equal_those_from_the_whole_table(site):
    # the launcher reads only shifted rows and each series' latest row per file; the summary
    # must be exactly the one built from every row
    from corrtransforms import tables
    from corrtransforms.beam.output_tables import episode_evidence, read_partitions
    from corrtransforms.stages import summaries

    _, config, full = site
    whole = read_partitions(full, "shifts", "footbridge", tables.SHIFTS)
    reduced = read_partitions(full, "shifts", "footbridge", tables.SHIFTS, keep=episode_evidence)
    assert reduced.num_rows < whole.num_rows
    assert summaries.shift_episodes(reduced).equals(summaries.shift_episodes(whole))
    written = ds.dataset(os.path.join(full, "episodes"), format="parquet").to_table()
    assert (
        written.drop_columns([c for c in written.column_names if c not in tables.EPISODES.names])
        .select(tables.EPISODES.names)
        .to_pylist()
        == summaries.shift_episodes(whole).to_pylist()
    )


def test_nights_update_the_episodes_as_one_backfill_writes_them(site, stepwise):
    # the nights fold only their own day's shifts into the read-back summary of the episode
    # evidence; the episodes file must equal the one a single backfill writes
    _, _, full = site
    stepwise, _ = stepwise
    episodes = [
        ds.dataset(os.path.join(out, "episodes"), format="parquet").to_table().to_pylist() for out in (full, stepwise)
    ]
    assert episodes[0] == episodes[1]
    # the evidence behind them (shifted rows and each series' latest row), folded night by night,
    # equals the evidence of the whole table read at once
    import pyarrow.parquet as pq

    from corrtransforms.beam.output_tables import EPISODE_EVIDENCE, summary_path

    evidence = [
        _sorted_rows(pq.read_table(summary_path(out, "footbridge", EPISODE_EVIDENCE))) for out in (full, stepwise)
    ]
    assert evidence[0] and evidence[0] == evidence[1]


def _sorted_rows(table):
    from corrtransforms.stages import write as table_writer

    rows = table.sort_by([(c, "ascending") for c in table_writer.sort_columns(table)]).to_pylist()
    return [{k: ("NaN" if isinstance(v, float) and v != v else v) for k, v in row.items()} for row in rows]


def test_read_back_summaries_equal_reading_every_file(site, tmp_path):
    # the summaries are derived data: whatever happened to the partitions since they were
    # written, summarize_partitions gives what reading and reducing every file gives
    from corrtransforms import tables
    from corrtransforms.beam import output_tables as ot

    _, _, full = site
    out = str(tmp_path / "out")
    shutil.copytree(full, out)
    cases = [
        ("shifts", tables.SHIFTS, ot.episode_evidence, ot.EPISODE_EVIDENCE, ot.EPISODE_COLUMNS),
        ("state", tables.STATE, ot.latest_states, ot.LATEST_STATE, None),
    ]

    def reference(table, schema, keep, columns, before=None):
        return _sorted_rows(
            ot.read_partitions(out, table, "footbridge", schema, before=before, columns=columns, keep=keep)
        )

    def summarized(table, schema, keep, name, columns, before=None):
        return _sorted_rows(
            ot.summarize_partitions(out, table, "footbridge", schema, keep, name, before=before, columns=columns)
        )

    for table, schema, keep, name, columns in cases:
        want = reference(table, schema, keep, columns)
        assert want and summarized(table, schema, keep, name, columns) == want  # first: builds the summary
        files = ot.partition_files(out, table, "footbridge")
        # a covered file is not opened again: garbage under its name changes nothing ...
        date, victim = files[3]
        original = open(victim, "rb").read()
        with open(victim, "wb") as handle:
            handle.write(b"not parquet")
        assert summarized(table, schema, keep, name, columns) == want
        with pytest.raises(Exception):  # noqa: B017 - any reader error: reading every file would fail on it
            reference(table, schema, keep, columns)
        with open(victim, "wb") as handle:
            handle.write(original)
        # a partition that disappeared (rewritten or deleted): the summary is not used
        shutil.rmtree(os.path.dirname(files[-1][1]))
        want = reference(table, schema, keep, columns)
        assert summarized(table, schema, keep, name, columns) == want
        # only dates before a day: not the summary of later days
        before = dt.date.fromisoformat(files[5][0])
        assert summarized(table, schema, keep, name, columns, before) == reference(table, schema, keep, columns, before)
        assert summarized(table, schema, keep, name, columns) == want
        # a damaged summary is rebuilt
        with open(ot.summary_path(out, "footbridge", name), "wb") as handle:
            handle.write(b"\x00" * 64)
        assert summarized(table, schema, keep, name, columns) == want
        assert not [
            n for n in os.listdir(os.path.dirname(ot.summary_path(out, "footbridge", name))) if n.endswith(".tmp")
        ]


def test_summaries_read_the_same_through_the_local_store_and_beam_filesystems(site, tmp_path):
    # stages.summaries takes a store; the Beam adapter is the same functions over BeamFiles
    from corrtransforms import tables
    from corrtransforms.beam import output_tables as ot
    from corrtransforms.stages import summaries
    from corrtransforms.stages.write import LocalFiles

    _, _, full = site
    out = str(tmp_path / "out")
    shutil.copytree(full, out)
    local = LocalFiles()
    assert summaries.partition_files(local, out, "state", "footbridge") == ot.partition_files(
        out, "state", "footbridge"
    )
    assert summaries.partition_files(local, out, "state", "nobody") == []
    whole = summaries.read_partitions(local, out, "shifts", "footbridge", tables.SHIFTS)
    assert whole.num_rows > 0
    assert _sorted_rows(whole) == _sorted_rows(ot.read_partitions(out, "shifts", "footbridge", tables.SHIFTS))
    shutil.rmtree(os.path.join(out, summaries.SUMMARIES))
    latest = summaries.summarize_partitions(
        local, out, "state", "footbridge", tables.STATE, summaries.latest_states, summaries.LATEST_STATE
    )
    assert os.path.exists(summaries.summary_path(local, out, "footbridge", summaries.LATEST_STATE))
    assert _sorted_rows(latest) == _sorted_rows(
        ot.summarize_partitions(out, "state", "footbridge", tables.STATE, ot.latest_states, ot.LATEST_STATE)
    )


def test_a_night_after_a_gap_says_how_many_days_were_missing_and_a_day_without_data_is_status_3(site, tmp_path):
    """Through the real command on a copy of the backfill (data end 2025-05-14): the night of
    2025-05-17 resumes from the state of 2025-05-14, two days without state in between, and finds
    no data (exit status 3, naming the day and the last data time)."""
    import subprocess
    import sys

    root, config, full = site
    output = str(tmp_path / "copy")
    shutil.copytree(full, output)
    repo = os.path.dirname(DEMO_DIR)
    done = subprocess.run(
        [sys.executable, "-m", "pipelines.nightly", "--config", config, "--output", output, "--date", "2025-05-17"],
        capture_output=True,
        text=True,
        cwd=repo,
        timeout=300,
    )
    assert done.returncode == 3, done.stderr
    assert (
        "resuming from the state of 2025-05-14: 2 days without state in between (2025-05-15 to 2025-05-16)"
        in done.stdout
    )
    assert "no data in 2025-05-17" in done.stderr and "the last data seen ends 2025-05-14" in done.stderr
