"""Nightly runs: a rerun replaces exactly its day, a killed run leaves the previous output intact,
two nights at once do not clobber each other, and a missing state stops with exit status 2.

Invented archive: five minutes of samples at the end of 2024-03-03 and at the start of 2024-03-04
and 2024-03-05 (UTC), one file each; 60-s windows.
"""

import os
import shutil
import signal
import subprocess
import sys
import time

import pytest

from pipelines import backfill, nightly
from tests.support.archive_data import T0, US, samples, wide_table, write_files
from tests.support.reliability_data import CORRELATION_KEY, per_window, read_table, rows_by_key, write_config

DAY = 24 * 3600 * US
TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects")
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def _write_chunk(archive, start_us, seconds, seed, prefix):
    write_files(
        str(archive), wide_table(samples(seconds, 10.0, seed=seed, start_us=start_us)), seconds, 400, prefix=prefix
    )


def _archive(root):
    archive = root / "archive"
    _write_chunk(archive, T0 - 300 * US, 300, 1, "d1")  # 2024-03-03 23:55 - 24:00
    _write_chunk(archive, T0, 300, 2, "d2")  # 2024-03-04 00:00 - 00:05
    _write_chunk(archive, T0 + DAY, 300, 3, "d3")  # 2024-03-05 00:00 - 00:05
    return write_config(root / "asset.toml", "archive")


def _snapshot(output, date):
    """{relative path: (bytes, mtime)} of every file of one day's partitions."""
    out = {}
    for table in TABLES:
        folder = os.path.join(output, table, "asset=rel-asset", f"date={date}")
        for name in sorted(os.listdir(folder)) if os.path.isdir(folder) else []:
            path = os.path.join(folder, name)
            out[os.path.relpath(path, output)] = (open(path, "rb").read(), os.stat(path).st_mtime_ns)
    return out


def _nightly_command(config, output, date):
    return [sys.executable, "-m", "pipelines.nightly", "--config", config, "--output", output, "--date", date]


def _windows_per_day(output):
    rows = rows_by_key(read_table(output, "correlations"), CORRELATION_KEY)
    days = {}
    for key in rows:
        days.setdefault(key[0].date().isoformat(), set()).add(key[0])
    return {d: len(s) for d, s in days.items()}


@pytest.fixture()
def started(tmp_path):
    """Backfill of the first two days (it writes their state)."""
    config = _archive(tmp_path)
    output = str(tmp_path / "out")
    backfill.main(["--config", config, "--output", output, "--start", "2024-03-03", "--end", "2024-03-04"])
    return tmp_path, config, output


def test_rerunning_a_night_replaces_exactly_its_partitions(started):
    root, config, output = started
    nightly.main(["--config", config, "--output", output, "--date", "2024-03-05"])
    earlier = {d: _snapshot(output, d) for d in ("2024-03-03", "2024-03-04")}
    night = _snapshot(output, "2024-03-05")
    assert night and _windows_per_day(output) == {"2024-03-03": 5, "2024-03-04": 5, "2024-03-05": 5}
    nightly.main(["--config", config, "--output", output, "--date", "2024-03-05"])
    for date, files in earlier.items():
        assert _snapshot(output, date) == files  # same bytes, same modification times: untouched
    again = _snapshot(output, "2024-03-05")
    assert set(again) == set(night)  # the same file names: a function of the rows
    assert all(again[n][1] >= night[n][1] for n in night)  # rewritten
    assert _windows_per_day(output) == {"2024-03-03": 5, "2024-03-04": 5, "2024-03-05": 5}
    assert not os.path.exists(os.path.join(output, "_temporary"))


def test_a_killed_night_leaves_the_previous_output_and_the_rerun_completes(started):
    root, config, output = started
    nightly.main(["--config", config, "--output", output, "--date", "2024-03-05"])
    before = _snapshot(output, "2024-03-05")
    _write_chunk(root / "archive", T0 + DAY + 300 * US, 180, 4, "d3-late")  # three more windows arrive
    process = subprocess.Popen(
        _nightly_command(config, output, "2024-03-05"), cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    temporary = os.path.join(output, "_temporary")
    killed = False
    deadline = time.monotonic() + 120
    while process.poll() is None and time.monotonic() < deadline:
        # the first part file is being written (part files sit under <table>/asset=NAME/date=...;
        # the launcher's own temporary files before the pipeline, e.g. the footer index summary,
        # sit in the run folder itself and are moved into place at once)
        if any(files for folder, _, files in os.walk(temporary) if "asset=" in folder):
            process.send_signal(signal.SIGKILL)
            killed = True
            break
        time.sleep(0.002)
    process.wait(timeout=60)
    assert killed, "the night finished before its first part file was seen"
    assert _snapshot(output, "2024-03-05") == before  # the previous good output, byte for byte
    assert _windows_per_day(output)["2024-03-05"] == 5  # and readers see the previous day
    nightly.main(["--config", config, "--output", output, "--date", "2024-03-05"])
    assert _windows_per_day(output) == {"2024-03-03": 5, "2024-03-04": 5, "2024-03-05": 8}
    for table in TABLES:  # every file of every table is readable and rows are not doubled
        assert read_table(output, table).num_rows >= 0
    rows = rows_by_key(read_table(output, "correlations"), CORRELATION_KEY)  # raises on a duplicate row
    assert len(per_window(rows)) == 18
    # the killed run's temporary folder stays while it could belong to a running job ...
    left = [name for name in os.listdir(temporary)]
    assert len(left) == 1
    fresh = os.path.join(temporary, "a-run-still-writing", "shifts")
    os.makedirs(fresh)
    open(os.path.join(fresh, "part.parquet.tmp"), "wb").close()
    # ... and goes once nothing has been written there for longer than --stale_temporary_hours
    two_days_ago = time.time() - 48 * 3600
    for folder, _, files in os.walk(os.path.join(temporary, left[0])):
        for name in files:
            os.utime(os.path.join(folder, name), (two_days_ago, two_days_ago))
    nightly.main(["--config", config, "--output", output, "--date", "2024-03-05"])
    assert sorted(os.listdir(temporary)) == ["a-run-still-writing"]
    assert _windows_per_day(output) == {"2024-03-03": 5, "2024-03-04": 5, "2024-03-05": 8}
    shutil.rmtree(temporary)


def test_two_nights_at_once_do_not_clobber_each_other(started):
    root, config, output = started
    # reference: the same nights one after the other in a separate output
    reference = str(root / "reference")
    backfill.main(["--config", config, "--output", reference, "--start", "2024-03-03", "--end", "2024-03-04"])
    nightly.main(["--config", config, "--output", reference, "--date", "2024-03-05"])
    # in the shared output: the night of 03-05 and a rerun of 03-04 at the same time
    processes = [
        subprocess.Popen(
            _nightly_command(config, output, d), cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
        )
        for d in ("2024-03-05", "2024-03-04")
    ]
    for p in processes:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err[-2000:]
    for table in TABLES:
        got, want = read_table(output, table), read_table(reference, table)
        # baseline_sample: these nights come after the baseline, nothing enters it
        assert got.num_rows == want.num_rows > 0 or table in ("rejects", "baseline_sample"), table
        assert sorted(map(repr, got.to_pylist())) == sorted(map(repr, want.to_pylist())), table
    assert not os.path.exists(os.path.join(output, "_temporary"))


def test_missing_previous_state_exits_with_status_2_and_says_what_to_do(tmp_path):
    config = _archive(tmp_path)
    done = subprocess.run(
        _nightly_command(config, str(tmp_path / "empty"), "2024-03-04"),
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == nightly.MISSING_STATE == 2
    assert "no detector state before 2024-03-04" in done.stderr and "--rebuild_state" in done.stderr
    assert not os.path.exists(tmp_path / "empty" / "correlations")  # nothing was written
