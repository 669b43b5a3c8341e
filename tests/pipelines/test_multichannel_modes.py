"""Multi-channel modes end to end: the backfill command on a small generated archive (three
accelerometers of a simulated 3-DOF system, 30 minutes across midnight) writes mode_shapes rows and
mode_mac indicators into both days' Hive partitions, equal to the same computation in memory, and
runs the shift detectors on mode_mac."""

import os
import textwrap

import numpy as np
import pyarrow.dataset as ds
import pytest

from corrtransforms.config import load_config
from corrtransforms.stages.analyse import analyse_window
from corrtransforms.stages.modes import mode_shape_table
from corrtransforms.stages.plan import list_local_archive, plan_archive
from corrtransforms.stages.read import read_task
from pipelines import backfill
from tests.support.archive_data import T0, US, wide_table, write_files
from tests.support.multichannel_fixtures import modal_system, simulate_records, true_modes

FS = 20.0
CHANNELS = ("north", "mid", "south")
SHAPES = np.linalg.qr(np.array([[1.0, 1.0, 1.0], [1.0, 0.2, -1.0], [1.0, -1.2, 0.6]]).T)[0]
CONFIG = """
[asset]
name = "test-asset"
[archive]
path = "archive"
sample_rate_hz = 20.0
[channels]
names = ["north", "mid", "south"]
[windows]
length_s = 300.0
[correlation]
max_lag_s = 2.0
pairs = "auto"
[[modes]]
name = "first"
channels = ["north", "mid", "south"]
band_hz = [1.7, 2.4]
reference_shape = [{r0}, {r1}, {r2}]
[baseline]
windows = 3
min_windows = 3
[shifts]
indicators = ["rms", "mode_freq_hz", "mode_mac"]
"""


def _read(output, table):
    data = ds.dataset(os.path.join(output, table), partitioning="hive").to_table()
    return data.sort_by([(c, "ascending") for c in data.column_names if c in ("window_start", "subject", "indicator")])


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("modes")
    A, B = modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], SHAPES)
    record = simulate_records(A, B, FS, int(1800 * FS), np.random.default_rng(5), 1, 3)[0]
    start = T0 - 900 * US  # 23:45 to 00:15 UTC: two days
    columns = {"time": start + np.arange(record.shape[0]) * int(US / FS)}
    columns.update({name: record[:, k] for k, name in enumerate(CHANNELS)})
    write_files(str(folder / "archive"), wide_table(columns), 600, 4000)
    path = folder / "asset.toml"
    path.write_text(textwrap.dedent(CONFIG.format(r0=SHAPES[0, 0], r1=SHAPES[1, 0], r2=SHAPES[2, 0])))
    output = str(folder / "out")
    counters = backfill.main(["--config", str(path), "--output", output])
    return load_config(str(path)), output, counters, true_modes(A)


def test_mode_shapes_and_mode_mac_are_written_in_both_days_partitions(run):
    config, output, counters, truth = run
    assert counters["windows_planned"] == counters["windows_computed"] == 6
    shapes = _read(output, "mode_shapes")
    assert shapes.num_rows == 6 * 3
    assert set(shapes.column("date").to_pylist()) == {"2024-03-03", "2024-03-04"}
    assert set(shapes.column("asset").to_pylist()) == {"test-asset"}
    assert set(shapes.column("channel").to_pylist()) == set(CHANNELS)
    # the reference's largest component carries the 1 in every window
    reference_channel = CHANNELS[int(np.argmax(np.abs(SHAPES[:, 0])))]
    at_reference = [
        (re, im) for c, re, im in zip(*(shapes.column(k).to_pylist() for k in ("channel", "shape_real", "shape_imag")))
        if c == reference_channel
    ]  # fmt: skip
    assert at_reference == [(1.0, 0.0)] * 6
    indicators = _read(output, "indicators")
    rows = indicators.filter(ds.field("subject") == "first").to_pylist()
    by_name = {}
    for row in rows:
        by_name.setdefault(row["indicator"], []).append(row)
    assert {k: len(v) for k, v in by_name.items()} == {"mode_freq_hz": 6, "mode_damping": 6, "mode_mac": 6}
    # truth: eig(A) of the simulated system; the MAC of a correct shape to the true one is near 1
    assert all(abs(r["value"] / truth.freq_hz[0] - 1) < 0.01 for r in by_name["mode_freq_hz"])
    assert all(r["value"] > 0.99 and 0 < r["stderr"] < 0.01 for r in by_name["mode_mac"])
    shifts = _read(output, "shifts").filter(ds.field("subject") == "first")
    assert set(shifts.column("indicator").to_pylist()) == {"mode_freq_hz", "mode_mac"}
    assert shifts.filter(ds.field("indicator") == "mode_mac").num_rows == 6


def test_written_mode_shapes_equal_the_in_memory_computation(run):
    config, output, _, _ = run
    plan = plan_archive(list_local_archive(config.archive.path), config)
    results = []
    for task in plan.tasks:
        blocks, _ = read_task(task, config)
        results += [analyse_window(b, config)[0] for b in blocks]
    expected = mode_shape_table(results).sort_by([("window_start", "ascending"), ("channel", "ascending")])
    written = _read(output, "mode_shapes").sort_by([("window_start", "ascending"), ("channel", "ascending")])
    for name in expected.column_names:
        assert written.column(name).to_pylist() == expected.column(name).to_pylist(), name
