"""Reading tasks into window blocks: grid snapping, gaps, repairs and rejects, exact accounting."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from corrtransforms.stages.plan import list_local_archive, plan_archive
from corrtransforms.stages.read import read_task
from tests.support.archive_data import (
    T0,
    US,
    bad_wide_archive,
    duty_cycled_records,
    long_table,
    make_config,
    samples,
    wide_table,
    window_rows,
    write_duty_cycled_archive,
    write_files,
)


def _read_all(folder, config):
    plan = plan_archive(list_local_archive(folder), config)
    blocks, rejects = [], []
    for task in plan.tasks:
        b, r = read_task(task, config)
        windows = set(task.window_starts_us)
        whole = [x for x in r if x.rejects_whole_window]
        # accounting per task: every planned window is exactly one block or one whole-window reject
        assert sorted([x.window_start_us for x in b] + [x.window_start_us for x in whole]) == sorted(windows)
        blocks += b
        rejects += r
    return plan, blocks, rejects


def _k(start_us):
    return (start_us - T0) // (60 * US)


def test_clean_blocks_hold_the_written_samples_and_covariate_means(tmp_path):
    cols = samples(600, 10.0, seed=1)
    write_files(str(tmp_path), wide_table(cols), 200, 500)
    _, blocks, rejects = _read_all(str(tmp_path), make_config(str(tmp_path)))
    assert rejects == [] and len(blocks) == 10
    for block in blocks:
        rows = window_rows(cols, _k(block.window_start_us))
        assert block.channels == ("a", "b") and block.values.shape == (600, 2) and block.valid.all()
        np.testing.assert_array_equal(block.values[:, 0], cols["a"][rows])
        np.testing.assert_array_equal(block.values[:, 1], cols["b"][rows])
        # reference: numpy mean of the covariate samples in the window
        assert block.covariates["temperature"] == pytest.approx(np.mean(cols["temperature"][rows]), rel=1e-12)
        np.testing.assert_array_equal(block.coverage(), [1.0, 1.0])


def test_long_layout_pivots_to_the_same_blocks(tmp_path):
    cols = samples(300, 10.0, seed=2)
    write_files(str(tmp_path / "w"), wide_table(cols), 100, 250)
    write_files(str(tmp_path / "l"), long_table(cols), 100, 700)
    _, wide, _ = _read_all(str(tmp_path / "w"), make_config(str(tmp_path / "w")))
    _, long, rejects = _read_all(str(tmp_path / "l"), make_config(str(tmp_path / "l"), layout="long"))
    assert rejects == [] and len(wide) == len(long) == 5
    for w, lo in zip(wide, long):
        assert w.window_start_us == lo.window_start_us and w.channels == lo.channels
        np.testing.assert_array_equal(w.values, lo.values)
        np.testing.assert_array_equal(w.valid, lo.valid)
        assert w.covariates == pytest.approx(lo.covariates)


def test_phase_offset_from_the_epoch_grid_is_kept(tmp_path):
    cols = samples(120, 10.0, seed=3, start_us=T0 + 30_000)  # every sample 0.3 period after the grid
    write_files(str(tmp_path), wide_table(cols), 120, 1200)
    _, blocks, rejects = _read_all(str(tmp_path), make_config(str(tmp_path)))
    assert [r.reason for r in rejects] == []
    assert len(blocks) == 2 and all(b.valid.all() for b in blocks)
    np.testing.assert_array_equal(blocks[1].values[:, 0], cols["a"][600:1200])


@pytest.fixture(scope="module")
def bad(tmp_path_factory):
    folder = str(tmp_path_factory.mktemp("bad"))
    expected = bad_wide_archive(folder)
    config = make_config(folder)
    plan, blocks, rejects = _read_all(folder, config)
    return expected, config, plan, blocks, rejects


def test_every_bad_window_kind_gets_its_reason(bad):
    expected, _, plan, blocks, rejects = bad
    computed = sorted(_k(b.window_start_us) for b in blocks)
    whole = {_k(r.window_start_us): r.reason for r in rejects if r.rejects_whole_window}
    assert computed == expected["computed"]
    assert whole == expected["rejected"]
    assert plan.windows_planned == len(blocks) + len(whole)  # accounting holds exactly
    by_window = {}
    for r in rejects:
        if r.window_start_us is not None and not r.rejects_whole_window:
            by_window.setdefault(_k(r.window_start_us), []).append(r.reason)
    assert {k: sorted(v) for k, v in by_window.items()} == expected["findings"]


def test_nan_and_inf_become_gaps_with_counted_coverage(bad):
    expected, _, _, blocks, rejects = bad
    block = next(b for b in blocks if _k(b.window_start_us) == 1)
    invalid = np.flatnonzero(~block.valid[:, 0])
    assert invalid.tolist() == list(range(100, 120)) + list(range(200, 205))
    assert block.coverage()[0] == pytest.approx(1 - 25 / 600)
    finding = next(r for r in rejects if r.reason == "nonfinite_values")
    assert finding.subject == "a" and finding.detail.startswith("25 ")


def test_duplicates_unordered_and_jitter_are_repaired_to_the_true_samples(bad):
    expected, _, _, blocks, rejects = bad
    cols = expected["columns"]
    for k in (3, 5, 6):  # equal duplicates, unordered rows, jitter within tolerance
        block = next(b for b in blocks if _k(b.window_start_us) == k)
        rows = window_rows({"time": T0 + np.arange(cols["a"].size) * 100_000}, k)
        assert block.valid.all()
        np.testing.assert_array_equal(block.values[:, 0], cols["a"][rows])
    detail = {r.reason: r.detail for r in rejects}
    assert detail["duplicate_timestamps"].startswith("10 ")
    jitter = next(b for b in blocks if _k(b.window_start_us) == 15)
    assert (~jitter.valid[:, 0]).sum() == 30 and detail["jitter_beyond_tolerance"].startswith("30 ")


def test_flat_channel_is_dropped_from_its_window_and_clipping_is_flagged(bad):
    _, _, _, blocks, rejects = bad
    flat = next(b for b in blocks if _k(b.window_start_us) == 7)
    assert flat.channels == ("a",)
    assert next(r for r in rejects if r.reason == "flat_channel").subject == "b"
    clipped = next(b for b in blocks if _k(b.window_start_us) == 8)
    assert clipped.channel_quality == {"a": ("clipped",)}
    others = [b for b in blocks if _k(b.window_start_us) != 8]
    assert all(not b.channel_quality for b in others)


def test_overlapping_files_keep_each_sample_once(bad):
    expected, _, _, blocks, _ = bad
    block = next(b for b in blocks if _k(b.window_start_us) == 10)
    assert len(block.sources) == 2 and block.valid.all()
    rows = window_rows({"time": T0 + np.arange(expected["columns"]["a"].size) * 100_000}, 10)
    np.testing.assert_array_equal(block.values[:, 1], expected["columns"]["b"][rows])


def test_missing_channel_file_gives_windows_without_that_channel(bad):
    _, _, _, blocks, _ = bad
    for k in (16, 17):
        assert next(b for b in blocks if _k(b.window_start_us) == k).channels == ("a",)


def test_corrupt_data_pages_are_decode_failures_and_windows_still_accounted(tmp_path):
    cols = samples(300, 10.0, seed=5)
    path = str(tmp_path / "x.parquet")
    pq.write_table(wide_table(cols), path, row_group_size=1000, compression="zstd")
    config = make_config(str(tmp_path))
    plan = plan_archive([path], config)
    meta = pq.ParquetFile(path).metadata
    column = meta.row_group(1).column(1)  # channel "a" of row group 1
    with open(path, "r+b") as handle:
        handle.seek(column.data_page_offset + 20)
        handle.write(b"\xff" * 64)
    blocks, rejects = [], []
    for task in plan.tasks:
        b, r = read_task(task, config)
        blocks += b
        rejects += r
    failed = [r for r in rejects if r.reason == "decode_failed"]
    assert failed and failed[0].source == path
    whole = [r for r in rejects if r.rejects_whole_window]
    assert plan.windows_planned == 5 == len(blocks) + len(whole)


def test_gap_in_one_channel_of_long_layout_rejects_only_that_channel(tmp_path):
    cols = samples(120, 10.0, seed=6)
    table = long_table(cols)
    times = table.column("time").cast(pa.int64()).to_numpy()
    channel = np.array(table.column("channel").to_pylist())
    drop = (channel == "b") & (times >= T0 + 10 * US) & (times < T0 + 30 * US)  # b loses 1/3 of window 0
    write_files(str(tmp_path), table.filter(pa.array(~drop)), 120, 5000)
    _, blocks, rejects = _read_all(str(tmp_path), make_config(str(tmp_path), layout="long"))
    assert [b.channels for b in blocks] == [("a",), ("a", "b")]
    reject = next(r for r in rejects if r.reason == "insufficient_coverage")
    assert reject.subject == "b" and _k(reject.window_start_us) == 0


def test_sample_rate_mismatch_rejects_every_window(tmp_path):
    cols = samples(120, 20.0, seed=8)  # written at 20 Hz, configured as 10 Hz
    write_files(str(tmp_path), wide_table(cols), 120, 5000)
    _, blocks, rejects = _read_all(str(tmp_path), make_config(str(tmp_path), rate=10.0))
    reasons = {_k(r.window_start_us): r.reason for r in rejects}
    # window 2 only holds the last sample (119.95 s is within half a 10-Hz period of 120 s)
    assert blocks == [] and reasons == {
        0: "sample_rate_mismatch",
        1: "sample_rate_mismatch",
        2: "insufficient_coverage",
    }


def test_grid_phase_is_the_circular_mean_of_scipy():
    from scipy.stats import circmean

    from corrtransforms.stages.read import _circular_phase

    rng = np.random.default_rng(9)
    for centre in (0.0, 0.3, -0.45, 0.49):
        x = np.arange(500) + centre + rng.uniform(-0.1, 0.1, 500)  # wraps around +-0.5 for 0.49
        # reference: scipy.stats.circmean on the interval [-0.5, 0.5)
        assert _circular_phase(x) == pytest.approx(circmean(x - np.floor(x), high=0.5, low=-0.5), abs=1e-9)


def test_complete_windows_with_missing_values_read_in_place_equal_the_snapped_long_layout(tmp_path):
    # complete, on-grid wide windows skip the snapping copies; the long layout always snaps:
    # both must give the same blocks, including NaN/inf samples turned into gaps
    cols = samples(300, 10.0, seed=5)
    rng = np.random.default_rng(5)
    for name, bad_value in (("a", np.nan), ("b", np.inf), ("temperature", np.nan)):
        cols[name][rng.choice(len(cols[name]), 40, replace=False)] = bad_value
    write_files(str(tmp_path / "w"), wide_table(cols), 100, 250)
    write_files(str(tmp_path / "l"), long_table(cols), 100, 700)
    _, wide, wide_rejects = _read_all(str(tmp_path / "w"), make_config(str(tmp_path / "w")))
    _, long, long_rejects = _read_all(str(tmp_path / "l"), make_config(str(tmp_path / "l"), layout="long"))
    assert len(wide) == len(long) == 5
    assert sorted((r.window_start_us, r.subject, r.reason) for r in wide_rejects) == sorted(
        (r.window_start_us, r.subject, r.reason) for r in long_rejects
    )
    for w, lo in zip(wide, long):
        rows = window_rows(cols, _k(w.window_start_us))
        np.testing.assert_array_equal(w.values, lo.values)
        np.testing.assert_array_equal(w.valid, lo.valid)
        np.testing.assert_array_equal(w.valid[:, 0], np.isfinite(cols["a"][rows]))
        np.testing.assert_array_equal(w.values[:, 0], np.where(np.isfinite(cols["a"][rows]), cols["a"][rows], 0.0))
        # reference: numpy's nanmean of the covariate samples in the window
        assert w.covariates["temperature"] == pytest.approx(np.nanmean(cols["temperature"][rows]), rel=1e-12)
        assert w.covariates["temperature"] == pytest.approx(lo.covariates["temperature"], rel=1e-12)


@pytest.mark.parametrize("windows", [{"align": "records"}, {"offset_s": 180.0}], ids=["records", "offset"])
@pytest.mark.parametrize("layout", ["wide", "long"])
def test_duty_cycled_records_off_the_epoch_grid_each_become_one_complete_window(tmp_path, windows, layout):
    # 10-minute records at hh:03:00 every 2 hours, 25 Hz: with record alignment, or with the epoch
    # grid shifted by 180 s, each record is exactly one 600-s window of 15000 samples (closed form)
    records = duty_cycled_records()
    write_duty_cycled_archive(str(tmp_path), records, layout=layout)
    config = make_config(str(tmp_path), rate=25.0, length_s=600.0, layout=layout, **windows)
    plan, blocks, rejects = _read_all(str(tmp_path), config)
    assert [r.reason for r in rejects] == []
    assert sorted(b.window_start_us for b in blocks) == [int(r["time"][0]) for r in records]
    for block in sorted(blocks, key=lambda b: b.window_start_us):
        record = next(r for r in records if r["time"][0] == block.window_start_us)
        assert block.values.shape == (15000, 2) and block.valid.all()
        np.testing.assert_array_equal(block.values[:, 0], record["a"])
        np.testing.assert_array_equal(block.values[:, 1], record["b"])


def test_duty_cycled_records_on_the_default_epoch_grid_are_rejected_as_before(tmp_path):
    # the contrast: epoch windows hh:00 and hh:10 hold 7 and 3 minutes of each record (coverage
    # 0.7 and 0.3 < min_coverage 0.9), so every window is rejected and no block comes out
    records = duty_cycled_records()
    write_duty_cycled_archive(str(tmp_path), records)
    config = make_config(str(tmp_path), rate=25.0, length_s=600.0)
    plan, blocks, rejects = _read_all(str(tmp_path), config)
    assert blocks == [] and plan.windows_planned == 2 * len(records)
    whole = [r for r in rejects if r.rejects_whole_window]
    assert len(whole) == 2 * len(records) and {r.reason for r in whole} == {"insufficient_coverage"}
    assert all(r.window_start_us % (600 * US) == 0 for r in whole)
