"""Each public transform under TestPipeline + assert_that, compared with the core run in memory."""

import glob
import hashlib
import os

import apache_beam as beam
import numpy as np
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
from apache_beam.testing.test_pipeline import TestPipeline
from apache_beam.testing.util import assert_that, equal_to

from corrtransforms.beam import LOCAL_RUNNER, CorrelateWindows, PlanReads, ReadWindows, WriteTables, window_accounting
from corrtransforms.records import WindowBlock
from corrtransforms.rejects import Reject
from corrtransforms.stages.analyse import analyse_window
from corrtransforms.stages.plan import list_local_archive, plan_archive
from corrtransforms.stages.read import read_task
from tests.support.archive_data import (
    T0,
    US,
    bad_wide_archive,
    duty_cycled_records,
    make_config,
    samples,
    wide_table,
    write_duty_cycled_archive,
    write_files,
)


def _pipeline():
    return TestPipeline(runner=LOCAL_RUNNER)


def _block_key(block: WindowBlock):
    digest = hashlib.sha256(block.values.tobytes() + block.valid.tobytes()).hexdigest()
    return (
        block.window_start_us,
        block.channels,
        digest,
        tuple(sorted(block.covariates.items())),
        tuple(sorted(block.channel_quality.items())),
    )


def _reject_key(r: Reject):
    return (r.stage, r.subject, r.reason, r.action, r.window_start_us, r.date)


@pytest.fixture(scope="module")
def bad(tmp_path_factory):
    folder = str(tmp_path_factory.mktemp("bad"))
    bad_wide_archive(folder)
    config = make_config(folder)
    plan = plan_archive(list_local_archive(folder), config)
    blocks, rejects = [], []
    for task in plan.tasks:
        b, r = read_task(task, config)
        blocks += b
        rejects += r
    return folder, config, plan, blocks, rejects


def test_plan_reads_matches_the_core_plan(bad):
    folder, config, plan, _, _ = bad
    with _pipeline() as p:
        out = p | PlanReads(config)
        assert_that(out["tasks"], equal_to(plan.tasks), label="tasks")
        assert_that(
            out["rejects"] | beam.Map(_reject_key), equal_to([_reject_key(r) for r in plan.rejects]), label="rejects"
        )
        assert_that(out["days"], equal_to(list(plan.days)), label="days")


def test_plan_reads_fails_loudly_on_a_path_matching_nothing(tmp_path):
    config = make_config(str(tmp_path / "missing"))
    with pytest.raises(Exception, match="no files match"):
        with _pipeline() as p:
            p | PlanReads(config)


def test_read_windows_matches_the_core_reader(bad):
    _, config, plan, blocks, rejects = bad
    with _pipeline() as p:
        out = p | beam.Create(plan.tasks) | ReadWindows(config)
        assert_that(
            out["blocks"] | "block keys" >> beam.Map(_block_key),
            equal_to([_block_key(b) for b in blocks]),
            label="blocks",
        )
        assert_that(
            out["rejects"] | "reject keys" >> beam.Map(_reject_key),
            equal_to([_reject_key(r) for r in rejects]),
            label="rejects",
        )


def _correlation_key(wc):
    return tuple(
        (p.channel_a, p.channel_b, wc.window_start_us, np.round(p.coefficient, 12).tobytes(), round(p.rel_error, 12))
        for p in wc.pairs
    )


def test_correlate_windows_matches_analyse_window_in_memory(bad):
    _, config, _, blocks, _ = bad
    some = blocks[:6]
    dead = WindowBlock(config.name, T0 - 60 * US, 60.0, 10.0, ("a",), np.zeros((600, 1)), np.zeros((600, 1), bool))
    broken = WindowBlock(
        config.name, T0 - 120 * US, 60.0, 10.0, ("a", "b"), np.zeros((600, 1)), np.ones((600, 1), bool)
    )  # two channel names, one column: the estimator raises
    expected = [_correlation_key(analyse_window(b, config)[0]) for b in some]
    with _pipeline() as p:
        out = p | beam.Create(some + [dead, broken]) | CorrelateWindows(config)
        assert_that(out["correlations"] | beam.Map(_correlation_key), equal_to(expected), label="rows")
        assert_that(
            out["rejects"] | beam.Map(lambda r: (r.window_start_us, r.stage, r.reason, r.subject)),
            equal_to(
                [
                    (T0 - 60 * US, "correlate", "no_valid_pairs", "*"),
                    (T0 - 120 * US, "correlate", "correlation_failed", "*"),
                ]
            ),
            label="rejects",
        )


def test_write_tables_commits_partitions_and_a_rerun_replaces_them(tmp_path):
    folder = str(tmp_path / "arc")
    write_files(folder, wide_table(samples(300, 10.0, seed=3)), 100, 250)
    config = make_config(folder)
    plan = plan_archive(list_local_archive(folder), config)
    correlations = [analyse_window(b, config)[0] for t in plan.tasks for b in read_task(t, config)[0]]
    finding = Reject("plan", "/x", "*", "empty_file", "0 bytes", config.name, date="2024-03-04")
    out = str(tmp_path / "out")
    names = []
    for run, flush in (("many", 1), ("few", 2**30)):  # one part file per element, then one per bundle
        with _pipeline() as p:
            tables = {
                "correlations": p | "c" >> beam.Create(correlations),
                "rejects": p | "r" >> beam.Create([finding]),
            }
            commits = tables | WriteTables(out, config, run, flush_bytes=flush)
            assert_that(
                commits | beam.Map(lambda results: sorted((c.table, c.date, c.rows) for c in results)),
                equal_to([[("correlations", "2024-03-04", 15), ("rejects", "2024-03-04", 1)]]),
            )
        files = glob.glob(os.path.join(out, "correlations", "*", "*", "*.parquet"))
        # the commit merges the part files: one file for this small partition, whatever the flush
        # size (five part files in the first run, one in the second); the rerun replaced it
        assert len(files) == 1
        assert {pq.ParquetFile(f).schema_arrow.metadata[b"corrtransforms.run_id"] for f in files} == {run.encode()}
        names.append(os.path.basename(files[0]))
        data = ds.dataset(os.path.join(out, "correlations"), partitioning="hive").to_table()
        assert data.num_rows == 15 and len(set(data.column("window_start").to_pylist())) == 5
        assert not os.path.exists(os.path.join(out, "_temporary"))
    assert names[0] == names[1]  # the name is a function of the rows


def test_counters_account_for_every_planned_window(bad):
    folder, config, plan, blocks, rejects = bad
    p = _pipeline()
    planned = p | PlanReads(config)
    read = planned["tasks"] | ReadWindows(config)
    read["blocks"] | CorrelateWindows(config)  # applied: its counters are what is checked
    result = p.run()
    result.wait_until_finish()
    counters = window_accounting(result.metrics())
    whole = [r for r in rejects if r.rejects_whole_window]
    assert counters["windows_planned"] == plan.windows_planned == 23
    assert counters["windows_read"] == len(blocks)
    assert counters["windows_computed"] + counters["windows_rejected"] == counters["windows_planned"]
    assert counters["windows_rejected"] == len(whole) == 3
    assert counters["windows_rejected_sample_rate_mismatch"] == 1
    assert counters["files_listed"] == len(list_local_archive(folder)) and counters["files_rejected"] == 5


def test_record_aligned_plan_and_read_under_beam_match_the_core_run(tmp_path):
    # duty-cycled 10-minute records at hh:03 in one file whose row groups straddle records
    records = duty_cycled_records(n_records=3)
    write_duty_cycled_archive(str(tmp_path), records, one_file=True, row_group_size=7000)
    config = make_config(str(tmp_path), rate=25.0, length_s=600.0, align="records")
    plan = plan_archive(list_local_archive(str(tmp_path)), config)
    blocks = [b for t in plan.tasks for b in read_task(t, config)[0]]
    assert sorted(b.window_start_us for b in blocks) == [int(r["time"][0]) for r in records]
    with _pipeline() as p:
        planned = p | PlanReads(config)
        read = planned["tasks"] | ReadWindows(config)
        assert_that(
            read["blocks"] | "block keys" >> beam.Map(_block_key),
            equal_to([_block_key(b) for b in blocks]),
            label="blocks",
        )
        assert_that(read["rejects"], equal_to([]), label="rejects")
