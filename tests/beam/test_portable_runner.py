"""The backfill and nightly jobs through Beam's portable runner API give the same tables as in-process.

``--runner=PortableRunner --job_endpoint=embed`` translates the pipeline to its portable (protobuf)
form, submits it to an embedded job service and runs it on SDK workers over gRPC, as Flink, Spark
and Dataflow runners do; it works offline. Two worker environments:

- ``LOOPBACK``: the SDK worker runs in the launching process (what the issue asks for);
- ``EXTERNAL``: the workers run in a separate worker-pool process started here (Beam's
  ``worker_pool_main``, which the SDK container runs on a cluster), so every DoFn, side input and
  element is unpickled in another process: nothing may rely on the launcher's globals.

Each environment runs the backfill (days up to 2025-05-13) and the nightly job (2025-05-19) on a
few days of the demo archive with broken inputs; every output file (tables, partitions, part-file
names, rows, schemas and metadata, and the episodes summary) must equal the in-process run's. A
two-asset fleet backfill (one pipeline, tests/support/fleet_data.py) runs on the worker pool too.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time

import pyarrow.parquet as pq
import pytest

from pipelines import backfill, nightly
from tests.support import demo_fixtures, fleet_data
from tests.support.demo_fixtures import BACKFILL_END, NIGHT, TABLES

REPO = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
RUN_ID = "portable-equivalence"
PORTABLE = ["--runner=PortableRunner", "--job_endpoint=embed"]

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    root = tmp_path_factory.mktemp("site")
    expected = demo_fixtures.write_small_archive(str(root / "archive"))
    config = root / "footbridge.toml"
    config.write_text(demo_fixtures.small_config_text("archive"))
    return root, str(config), expected


def _run_both(config: str, output: str, extra_flags):
    """Backfill up to BACKFILL_END, then the nightly run of NIGHT; returns both counter dicts."""
    common = ["--config", config, "--output", output, "--run_id", RUN_ID] + list(extra_flags)
    first = backfill.main(common + ["--end", BACKFILL_END.isoformat()])
    listing = demo_fixtures.partition_files(output)
    second = nightly.main(common + ["--date", NIGHT.isoformat()])
    return first, listing, second


@pytest.fixture(scope="module")
def in_process(site, tmp_path_factory):
    _, config, _ = site
    output = str(tmp_path_factory.mktemp("in-process") / "out")
    return (output,) + _run_both(config, output, [])


@pytest.fixture(scope="module")
def worker_pool(tmp_path_factory):
    """A Beam worker pool in its own process; SDK workers are its child processes."""
    cwd = tmp_path_factory.mktemp("worker-pool")
    log_path = cwd / "pool.log"
    env = dict(os.environ)
    # the workers start `python` from PATH: the interpreter of this test run, with the package
    # importable as it would be installed on a cluster's workers
    env["PATH"] = os.path.dirname(sys.executable) + os.pathsep + env.get("PATH", "")
    env["PYTHONPATH"] = REPO + os.pathsep + env.get("PYTHONPATH", "")
    with open(log_path, "w") as log:
        pool = subprocess.Popen(
            [sys.executable, "-m", "apache_beam.runners.worker.worker_pool_main", "--service_port=0"],
            cwd=str(cwd),
            env=env,
            stdout=log,
            stderr=log,
        )
    address = None
    deadline = time.monotonic() + 60
    while address is None and time.monotonic() < deadline and pool.poll() is None:
        found = re.search(r"Started worker pool servicer at port: (\S+)", log_path.read_text())
        address = found.group(1) if found else None
        time.sleep(0.1)
    if address is None:
        pool.kill()
        pool.wait()
        pytest.fail("the worker pool did not start:\n" + log_path.read_text()[-3000:])
    yield address, log_path
    # SIGINT lets the pool stop its server and worker processes; a process started in the
    # background may ignore it, so terminate after a while
    for stop, wait_s in ((pool.send_signal, 5), (lambda _: pool.terminate(), 10), (lambda _: pool.kill(), 10)):
        stop(signal.SIGINT)
        try:
            pool.wait(timeout=wait_s)
            break
        except subprocess.TimeoutExpired:
            continue


def _assert_same_outputs(got: str, expected: str, listing_got=None, listing_expected=None):
    if listing_got is not None:
        assert listing_got == listing_expected
    files = demo_fixtures.partition_files(expected)
    assert demo_fixtures.partition_files(got) == files
    tables = {rel.split("/")[0] for rel in files}
    assert tables == set(TABLES) | {"episodes", "_summaries"}
    for rel in files:
        a = pq.read_table(os.path.join(got, rel))
        b = pq.read_table(os.path.join(expected, rel))
        assert a.num_rows == b.num_rows > 0 or rel.startswith("episodes/"), rel
        assert a.schema.equals(b.schema, check_metadata=True), rel  # provenance metadata included
        assert demo_fixtures.table_bytes(a) == demo_fixtures.table_bytes(b), rel  # bit-equal values


def _assert_accounting(first, second):
    # backfill: 6 records (05-01, 05-02, 05-13), the stuck channel of 05-13 found in both of its
    # windows; night of 05-19: 2 records, the truncated one unusable from its footer
    assert first["windows_planned"] == first["windows_computed"] == 6
    assert first["findings_flat_channel"] == 2
    assert second["files_listed"] == 2 and second["files_rejected"] == 1
    assert second["windows_planned"] == second["windows_computed"] == 1
    for counters in (first, second):
        for table in TABLES:  # a night after the baseline adds nothing to the baseline sample
            assert counters.get(f"rows_written_{table}", 0) > 0 or table == "baseline_sample", table


def test_in_process_run_is_a_meaningful_reference(in_process):
    output, first, listing, second = in_process
    _assert_accounting(first, second)
    files = demo_fixtures.partition_files(output)
    dates = {re.search(r"date=([\d-]+)", rel).group(1) for rel in files if "date=" in rel}
    assert dates == {d.isoformat() for d in demo_fixtures.DAYS}
    assert "episodes/asset=footbridge/episodes.parquet" in files


def test_portable_runner_loopback_equals_in_process(site, in_process, tmp_path):
    _, config, expected = site
    reference, first_ref, listing_ref, second_ref = in_process
    output = str(tmp_path / "out")
    first, listing, second = _run_both(config, output, PORTABLE + ["--environment_type=LOOPBACK"])
    _assert_same_outputs(output, reference, listing, listing_ref)
    assert first == first_ref and second == second_ref  # metrics come back through the job service


def test_portable_runner_separate_worker_process_equals_in_process(site, in_process, worker_pool, tmp_path):
    _, config, expected = site
    reference, first_ref, listing_ref, second_ref = in_process
    address, log_path = worker_pool
    output = str(tmp_path / "out")
    first, listing, second = _run_both(
        config, output, PORTABLE + ["--environment_type=EXTERNAL", f"--environment_config={address}"]
    )
    _assert_same_outputs(output, reference, listing, listing_ref)
    assert first == first_ref and second == second_ref
    # the work ran in worker processes that the pool started (one per job: backfill, nightly)
    assert log_path.read_text().count("Starting worker with command") >= 2


@pytest.fixture(scope="module")
def fleet_site(tmp_path_factory):
    """The fleet tests' two assets (tests/support/fleet_data.py), one day of 10 windows each, and
    their in-process fleet backfill."""
    root = tmp_path_factory.mktemp("fleet-site")
    folder = fleet_data.write_fleet(str(root))
    output = str(root / "in-process")
    found = backfill.main(["--config", folder, "--output", output, "--run_id", RUN_ID])
    return folder, output, found


def test_fleet_backfill_in_a_separate_worker_process_equals_in_process(fleet_site, worker_pool, tmp_path):
    folder, reference, found_ref = fleet_site
    address, log_path = worker_pool
    started = log_path.read_text().count("Starting worker with command")
    output = str(tmp_path / "out")
    flags = PORTABLE + ["--environment_type=EXTERNAL", f"--environment_config={address}"]
    found = backfill.main(["--config", folder, "--output", output, "--run_id", RUN_ID] + flags)
    assert sorted(found) == ["north", "south"]
    assert all(found_ref[a]["windows_computed"] == 10 for a in found_ref)
    assert found == found_ref  # each asset's counters, read back from its own steps through the job service
    files = demo_fixtures.partition_files(reference)
    assert demo_fixtures.partition_files(output) == files
    assert {rel.split("/")[1] for rel in files if rel.split("/")[0] in TABLES} == {"asset=north", "asset=south"}
    for rel in files:
        if rel.endswith(".parquet"):
            a, b = pq.read_table(os.path.join(output, rel)), pq.read_table(os.path.join(reference, rel))
            assert a.schema.equals(b.schema, check_metadata=True), rel  # provenance metadata included
            assert demo_fixtures.table_bytes(a) == demo_fixtures.table_bytes(b), rel  # bit-equal values
        else:
            with open(os.path.join(output, rel), "rb") as x, open(os.path.join(reference, rel), "rb") as y:
                assert x.read() == y.read(), rel
    with open(os.path.join(output, "_runs", "fleet", f"{RUN_ID}.json")) as handle:
        assert json.load(handle)["status"] == 0
    # the fleet's one pipeline ran in a worker process that the pool started
    assert log_path.read_text().count("Starting worker with command") > started
