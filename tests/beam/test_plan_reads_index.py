"""PlanReads with a footer index under TestPipeline: the tasks equal those planned in memory from
every footer, the index is written, and a second pipeline opens only the footers the day needs."""

import datetime as dt

from apache_beam.testing.test_pipeline import TestPipeline
from apache_beam.testing.util import assert_that, equal_to

from corrtransforms.beam import LOCAL_RUNNER, PlanReads, window_accounting
from corrtransforms.stages.footer_index import load_footer_index
from corrtransforms.stages.plan import list_local_archive, plan_archive
from corrtransforms.stages.write import LocalFiles
from tests.support.archive_data import make_config, write_hourly_archive

DAY = dt.date(2024, 3, 6)


def _plan(config, output):
    p = TestPipeline(runner=LOCAL_RUNNER)
    planned = p | "Plan" >> PlanReads(config, DAY, DAY, output_dir=output, run_id="index-test")
    assert_that(planned["tasks"], equal_to(_expected_tasks(config)), label="Tasks")
    result = p.run()
    result.wait_until_finish()
    return window_accounting(result.metrics())


def _expected_tasks(config):
    return plan_archive(list_local_archive(config.archive.path), config, start=DAY, end=DAY).tasks


def test_plan_reads_writes_the_index_and_then_opens_one_day_of_footers(tmp_path):
    folder, output = str(tmp_path / "flat"), str(tmp_path / "out")
    write_hourly_archive(folder, days=4, seconds=120.0, rate=2.0)
    config = make_config(folder, rate=2.0, length_s=60.0, max_lag_s=5.0)
    first = _plan(config, output)
    assert first["files_in_archive"] == first["footers_opened"] == 96 and first["footer_index_written"] == 1
    assert len(load_footer_index(LocalFiles(), output, config)) == 96
    second = _plan(config, output)
    # the day's 24 files and the next day's first
    assert second["footers_opened"] == 25 and second["files_skipped_by_index"] == 71
    assert second.get("footer_index_written", 0) == 0
