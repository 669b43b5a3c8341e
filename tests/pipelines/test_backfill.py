"""The backfill command end to end on tiny invented archives written to a temporary folder."""

import json
import logging
import os
import subprocess
import sys
import textwrap

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pytest

from corrtransforms.config import load_config
from corrtransforms.records import quality_codes, quality_text
from corrtransforms.stages.analyse import analyse_window
from corrtransforms.stages.correlate import correlation_table
from corrtransforms.stages.plan import list_local_archive, plan_archive
from corrtransforms.stages.read import read_task
from corrtransforms.storage_precision import compact_correlations
from pipelines import backfill
from tests.support.archive_data import T0, US, bad_wide_archive, long_table, samples, wide_table, write_files


def _write_config(path, archive, layout="wide", names='["a", "b"]', timezone="UTC", task_bytes=65536):
    text = f"""
    [asset]
    name = "test-asset"
    [archive]
    path = "{archive}"
    layout = "{layout}"
    sample_rate_hz = 10.0
    timezone = "{timezone}"
    [channels]
    names = {names}
    covariates = ["temperature"]
    units = {{ a = "m/s2", b = "m/s2", temperature = "degC" }}
    [windows]
    length_s = 60.0
    [correlation]
    max_lag_s = 2.0
    [reading]
    task_bytes = {task_bytes}
    """
    with open(path, "w") as handle:
        handle.write(textwrap.dedent(text))
    return str(path)


def _in_memory(config):
    """The same computation without Beam: plan, read, analyse_window (screening + correlate_window),
    correlation_table, and the storage rounding of the correlations table's lists."""
    plan = plan_archive(list_local_archive(config.archive.path), config)
    results, whole = [], []
    for task in plan.tasks:
        blocks, rejects = read_task(task, config)
        whole += [r for r in rejects if r.rejects_whole_window]
        analysed = [analyse_window(b, config) for b in blocks]
        whole += [r for _, found in analysed for r in found if r.rejects_whole_window]
        results += [result for result, _ in analysed if result is not None]
    results = [r for r in results if r.pairs]
    table = correlation_table(results)
    if config.correlation.storage == "compact":
        table = compact_correlations(table)
    return plan, table, whole


def _read(output, table):
    data = ds.dataset(os.path.join(output, table), partitioning="hive").to_table()
    return data.sort_by(
        [(c, "ascending") for c in ("window_start", "channel_a", "channel_b")]
        if table == "correlations"
        else [("window_start", "ascending"), ("subject", "ascending"), ("reason", "ascending")]
    )


def _assert_same_correlations(got: pa.Table, expected: pa.Table):
    expected = expected.sort_by([(c, "ascending") for c in ("window_start", "channel_a", "channel_b")])
    assert got.num_rows == expected.num_rows > 0
    for name in ("window_start", "channel_a", "channel_b", "n_samples", "quality", "meets_target"):
        assert got.column(name).to_pylist() == expected.column(name).to_pylist(), name
    for name in ("coverage", "scale", "rel_error", "bandwidth_hz", "first_lag_s"):
        np.testing.assert_allclose(got.column(name).to_numpy(), expected.column(name).to_numpy(), rtol=1e-12)
    for g, e in zip(got.column("coefficient").to_pylist(), expected.column("coefficient").to_pylist()):
        np.testing.assert_array_equal(np.array(g, np.float32), np.array(e, np.float32))


@pytest.fixture(scope="module")
def bad_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("bad")
    expected = bad_wide_archive(str(root / "archive"))
    config_path = _write_config(root / "asset.toml", "archive")  # relative path: resolves beside the file
    output = str(root / "out")
    return expected, config_path, output


def test_backfill_accounts_for_every_window_and_equals_the_core(bad_run, caplog, capsys):
    expected, config_path, output = bad_run
    caplog.set_level(logging.INFO)
    counters = backfill.main(["--config", config_path, "--output", output, "--run_id", "first"])
    assert "Prism" not in caplog.text and "Downloading" not in caplog.text  # no network attempt
    printed = capsys.readouterr().out
    assert "windows planned 23, computed 20, rejected 3" in printed
    assert "rejected sample_rate_mismatch: 1" in printed

    config = load_config(config_path)
    plan, memory, whole = _in_memory(config)
    assert counters["windows_planned"] == plan.windows_planned == 23
    assert counters["windows_computed"] + counters["windows_rejected"] == counters["windows_planned"]
    correlations = _read(output, "correlations")
    _assert_same_correlations(correlations, memory)

    rejects = _read(output, "rejects")
    computed = set(correlations.column("window_start").cast(pa.int64()).to_pylist())
    rows = rejects.to_pylist()
    rejected = {
        r["window_start"]
        for r in rows
        if r["action"] == "rejected" and r["subject"] == "*" and r["window_start"] is not None
    }
    rejected_us = {int(t.timestamp() * US) for t in rejected}
    assert len(computed) + len(rejected_us) == plan.windows_planned and not computed & rejected_us
    assert {
        (int(r["window_start"].timestamp() * US) - T0) // (60 * US): r["reason"]
        for r in rows
        if r["subject"] == "*" and r["action"] == "rejected" and r["window_start"]
    } == expected["rejected"]
    file_reasons = {os.path.basename(r["source"]): r["reason"] for r in rows if r["stage"] == "plan"}
    assert file_reasons == expected["file_findings"]
    assert set(rejects.column("date").to_pylist()) == {"2024-03-04"}
    # the clipped channel's rows carry the quality code
    clipped = correlations.filter(
        pa.compute.equal(correlations.column("window_start"), pa.scalar(T0 + 8 * 60 * US, pa.timestamp("us", "UTC")))
    )
    quality = {
        (a, b): q
        for a, b, q in zip(
            clipped.column("channel_a").to_pylist(),
            clipped.column("channel_b").to_pylist(),
            clipped.column("quality").to_pylist(),
        )
    }
    # these short test records also carry few_effective_samples on every pair alike; only the
    # clipping code is under test here
    clip = {k: quality_text(c for c in quality_codes(q) if c != "few_effective_samples") for k, q in quality.items()}
    assert clip == {("a", "a"): "clipped", ("a", "b"): "clipped", ("b", "b"): "ok"}


def test_multi_processing_gives_the_same_rows(bad_run):
    expected, config_path, output = bad_run
    other = output + "-mp"
    backfill.main(
        ["--config", config_path, "--output", other, "--direct_running_mode=multi_processing", "--direct_num_workers=2"]
    )
    if not os.path.exists(os.path.join(output, "correlations")):
        backfill.main(["--config", config_path, "--output", output])
    _assert_same_correlations(_read(other, "correlations"), _read(output, "correlations"))
    drop = ["detail"]  # equal but for nothing: compared whole below
    a, b = _read(other, "rejects"), _read(output, "rejects")
    assert a.drop_columns(drop).equals(b.drop_columns(drop)) and a.column("detail").equals(b.column("detail"))


def test_output_reads_without_this_package(bad_run, tmp_path):
    _, config_path, output = bad_run
    if not os.path.exists(os.path.join(output, "correlations")):
        backfill.main(["--config", config_path, "--output", output])
    script = textwrap.dedent(f"""
        import json, sys
        import duckdb, pandas, pyarrow.dataset as ds
        root = {output!r}
        table = ds.dataset(root + "/correlations", partitioning="hive").to_table()
        frame = pandas.read_parquet(root + "/rejects")
        db = duckdb.sql("select count(*), count(distinct window_start), min(len(coefficient)) "
                        "from read_parquet('" + root + "/correlations/*/*/*.parquet', hive_partitioning = true)"
                        ).fetchall()[0]
        print(json.dumps({{"rows": table.num_rows, "rejects": len(frame),
                          "reasons": sorted(set(frame["reason"])), "duckdb": list(db),
                          "unit": table.schema.field("lag_step_s").metadata[b"unit"].decode(),
                          "tz": str(table.schema.field("window_start").type.tz),
                          "imported": "corrtransforms" in sys.modules}}))
    """)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, cwd=str(tmp_path), env=env, timeout=120
    )
    assert done.returncode == 0, done.stderr
    found = json.loads(done.stdout.strip().splitlines()[-1])
    correlations = _read(output, "correlations")
    assert found["rows"] == correlations.num_rows and found["imported"] is False
    assert found["duckdb"][0] == correlations.num_rows and found["duckdb"][1] == 20
    assert found["duckdb"][2] == 21  # auto pairs: lags 0..2 s at 10 Hz
    assert found["unit"] == "s" and found["tz"] == "UTC"
    assert "sample_rate_mismatch" in found["reasons"]


def test_long_layout_with_large_row_groups_equals_wide(tmp_path):
    cols = samples(600, 10.0, seed=11)
    write_files(str(tmp_path / "wide"), wide_table(cols), 300, 200)  # row groups of 20 s
    write_files(str(tmp_path / "long"), long_table(cols), 600, 9000)  # row groups of 300 s
    wide_cfg = _write_config(tmp_path / "wide.toml", tmp_path / "wide")
    long_cfg = _write_config(tmp_path / "long.toml", tmp_path / "long", layout="long")
    backfill.main(["--config", wide_cfg, "--output", str(tmp_path / "out-wide")])
    counters = backfill.main(["--config", long_cfg, "--output", str(tmp_path / "out-long")])
    assert counters["windows_planned"] == counters["windows_computed"] == 10
    _assert_same_correlations(
        _read(str(tmp_path / "out-long"), "correlations"), _read(str(tmp_path / "out-wide"), "correlations")
    )


def test_rerunning_a_day_replaces_exactly_that_day(tmp_path):
    # 23:50 on 2024-03-03 to 00:10 on 2024-03-04 UTC, one file per 5 minutes
    cols = samples(1200, 10.0, seed=12, start_us=T0 - 600 * US)
    archive = tmp_path / "archive"
    paths = write_files(str(archive), wide_table(cols), 300, 1000)
    config = _write_config(tmp_path / "a.toml", archive)
    output = str(tmp_path / "out")
    backfill.main(["--config", config, "--output", output])
    day1 = os.path.join(output, "correlations", "asset=test-asset", "date=2024-03-03")
    before = {n: os.stat(os.path.join(day1, n)).st_mtime_ns for n in os.listdir(day1)}
    os.remove(paths[-1])  # the last five minutes of 2024-03-04 disappear from the archive
    counters = backfill.main(["--config", config, "--output", output, "--start", "2024-03-04", "--end", "2024-03-04"])
    assert counters["windows_planned"] == 5
    after = {n: os.stat(os.path.join(day1, n)).st_mtime_ns for n in os.listdir(day1)}
    assert after == before  # the other day is untouched
    data = _read(output, "correlations")
    per_day = {}
    for date, start in zip(data.column("date").to_pylist(), data.column("window_start").to_pylist()):
        per_day.setdefault(date, set()).add(start)
    assert {d: len(s) for d, s in per_day.items()} == {"2024-03-03": 10, "2024-03-04": 5}


def test_bad_arguments_fail_before_the_pipeline(tmp_path):
    with pytest.raises(SystemExit, match="--output is required"):
        backfill.main(["--config", str(tmp_path / "none.toml")])
    with pytest.raises(SystemExit, match="configuration error"):
        backfill.main(["--config", str(tmp_path / "none.toml"), "--output", str(tmp_path)])
    config = _write_config(tmp_path / "a.toml", tmp_path)
    with pytest.raises(SystemExit, match="before --start"):
        backfill.main(["--config", config, "--output", str(tmp_path), "--start", "2024-03-05", "--end", "2024-03-04"])


def test_an_archive_path_without_files_stops_before_the_pipeline(tmp_path):
    # a wrong [archive] path is a configuration error named before any step runs
    config = tmp_path / "asset.toml"
    config.write_text('[asset]\nname = "empty-site"\n[archive]\npath = "nothing-here"\nsample_rate_hz = 10\n')
    with pytest.raises(SystemExit) as stop:
        backfill.main(["--config", str(config), "--output", str(tmp_path / "out")])
    assert "[archive] path" in str(stop.value) and "no files match" in str(stop.value)
    assert not (tmp_path / "out").exists()


def _command(*args, cwd=None):
    """One of the real commands from the checkout: (exit status, stdout, stderr)."""
    repo = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    done = subprocess.run(
        [sys.executable, "-m", *args], capture_output=True, text=True, cwd=cwd or repo, timeout=600
    )  # a guard against a hang only: the machine's CPUs are shared
    return done.returncode, done.stdout, done.stderr


def test_flags_are_checked_and_help_lists_them(tmp_path):
    status, out, err = _command("pipelines.backfill", "--help")
    assert status == 0 and "apitools" not in err
    flags = [line.split()[0] for line in out.splitlines() if line.startswith("  --")]
    assert flags == [
        "--config",
        "--output",
        "--start",
        "--end",
        "--commit_days",
        "--run_id",
        "--stale_temporary_hours",
        "--help",
    ]
    assert "exit statuses" in out and "3  nothing to do or nothing usable" in out and "beam.apache.org" in out
    # an unknown flag: status 1 and the nearest known flag (difflib)
    status, _, err = _command("pipelines.backfill", "--config", "x.toml", "--outptu", str(tmp_path))
    assert status == 1 and "unknown flag --outptu; did you mean --output?" in err
    # another command's flag is an error too, naming whose it is
    status, _, err = _command(
        "pipelines.backfill", "--config", "x.toml", "--output", str(tmp_path), "--date", "2024-03-04"
    )
    assert status == 1 and "--date is a flag of nightly, not of backfill" in err
    # Beam's runner flags pass (the run then stops at the missing configuration file: status 1)
    status, _, err = _command(
        "pipelines.backfill",
        "--config",
        str(tmp_path / "none.toml"),
        "--output",
        str(tmp_path),
        "--direct_num_workers=2",
        "--runner",
        "FnApiRunner",
    )
    assert status == 1 and "configuration error" in err and "unknown flag" not in err
    # the hyphenated spelling of a flag is an alias of its underscore form
    status, _, err = _command(
        "pipelines.nightly",
        "--config",
        str(tmp_path / "none.toml"),
        "--output",
        str(tmp_path),
        "--rebuild-state",
        "--run-id",
        "x",
    )
    assert status == 1 and "configuration error" in err and "unknown flag" not in err


def test_exit_statuses_of_unusable_runs(tmp_path):
    """Through the real command: a configured channel no file has (1), days without data (3) and
    a run whose every window is rejected (3), each with a message that says why."""
    write_files(str(tmp_path / "archive"), wide_table(samples(600, 10.0, seed=5)), 300, 1000)
    good = _write_config(tmp_path / "a.toml", tmp_path / "archive")
    absent = _write_config(tmp_path / "c.toml", tmp_path / "archive", names='["a", "c"]')
    status, _, err = _command("pipelines.backfill", "--config", absent, "--output", str(tmp_path / "out-c"))
    assert status == 1 and "'c' is a column of no file in 2 files" in err
    assert "columns found: a, b, temperature" in err
    status, _, err = _command(
        "pipelines.backfill",
        "--config",
        good,
        "--output",
        str(tmp_path / "out-a"),
        "--start",
        "2030-01-01",
        "--end",
        "2030-01-02",
    )
    assert status == 3 and "no data in 2030-01-01 to 2030-01-02" in err
    # the last sample: T0 + 599.9 s (600 s at 10 Hz from T0)
    assert "the last data seen ends 2024-03-04 00:09:59 UTC" in err
    wrong_rate = tmp_path / "b.toml"
    wrong_rate.write_text(open(good).read().replace("sample_rate_hz = 10.0", "sample_rate_hz = 20.0"))
    status, out, err = _command("pipelines.backfill", "--config", str(wrong_rate), "--output", str(tmp_path / "out-b"))
    assert status == 3 and "windows planned 10, computed 0, rejected 10" in out
    assert "all 10 planned windows (2024-03-04) were rejected" in err
    assert "top reasons: sample_rate_mismatch (10 windows, e.g. 2024-03-04T00:00:00Z: median sample interval" in err
