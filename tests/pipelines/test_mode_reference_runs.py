"""Baseline references of a multi-channel mode end to end: a backfill (three days in one
--commit_days chunk) and a backfill of the first day followed by two nightly runs write the same
mode_shapes, indicators and shifts rows; the windows of the first day (the baseline) carry
mode_mac NaN with mode_reference_pending, the later days' mode_mac compares with the reference,
which equals the median of the first day's rows computed in memory (numpy's median)."""

import datetime as dt
import math
import os
import textwrap

import numpy as np
import pyarrow.dataset as ds
import pytest

from corrtransforms.config import load_config
from corrtransforms.numerics.mode_shapes import modal_assurance_criterion
from corrtransforms.stages.mode_reference import SUMMARY, read_references
from corrtransforms.stages.write import LocalFiles
from pipelines import backfill, nightly
from tests.support.archive_data import T0, US, wide_table, write_files
from tests.support.multichannel_fixtures import modal_system, simulate_records

FS = 20.0
CHANNELS = ("north", "mid", "south")
CHANNELS_SORTED = tuple(sorted(CHANNELS))  # the order of the written (sorted) rows
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
[baseline]
windows = 4
min_windows = 3
[shifts]
indicators = ["rms", "mode_freq_hz", "mode_mac"]
"""
TABLES = {
    "mode_shapes": ["window_start", "channel"],
    "indicators": ["window_start", "subject", "indicator"],
    "shifts": ["window_start", "subject", "indicator"],
}


def _read(output, table):
    data = ds.dataset(os.path.join(output, table), partitioning="hive").to_table()
    return data.sort_by([(c, "ascending") for c in TABLES[table]]).to_pydict()


def _same(xs, ys):
    return len(xs) == len(ys) and all(
        x == y or (isinstance(x, float) and math.isnan(x) and math.isnan(y)) for x, y in zip(xs, ys)
    )


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    folder = tmp_path_factory.mktemp("reference")
    A, B = modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], SHAPES)
    n = int(1200 * FS)
    record = simulate_records(A, B, FS, 4 * n, np.random.default_rng(7), 1, 3)[0]
    # 20 minutes before the first midnight, 20 minutes either side of the second, 20 after it:
    # days 2024-03-03 (4 windows, the baseline), 03-04 (8), 03-05 (4)
    starts = [T0 - 1200 * US, T0, T0 + 86400 * US - 1200 * US, T0 + 86400 * US]
    times = [start + np.arange(n) * int(US / FS) for start in starts]
    values = [record[k * n : (k + 1) * n] for k in range(4)]
    columns = {"time": np.concatenate(times)}
    columns.update({name: np.concatenate(values)[:, c] for c, name in enumerate(CHANNELS)})
    write_files(str(folder / "archive"), wide_table(columns), 1200, 4000)
    path = folder / "asset.toml"
    path.write_text(textwrap.dedent(CONFIG))
    config = str(path)
    whole = str(folder / "whole")
    backfill.main(["--config", config, "--output", whole, "--commit_days", "3"])
    nights = str(folder / "nights")
    days = [dt.date(2024, 3, 3) + dt.timedelta(days=i) for i in range(3)]
    backfill.main(["--config", config, "--output", nights, "--end", str(days[0]), "--start", str(days[0])])
    for day in days[1:]:
        nightly.main(["--config", config, "--output", nights, "--date", str(day)])
    return load_config(config), whole, nights, days


def test_backfill_and_nights_write_the_same_mode_rows(site):
    _, whole, nights, _ = site
    for table in TABLES:
        a, b = _read(whole, table), _read(nights, table)
        assert a.keys() == b.keys(), table
        for column in a:
            assert _same(a[column], b[column]), (table, column)


def test_mode_mac_waits_for_the_baseline_reference_then_compares_with_it(site):
    config, whole, _, days = site
    shapes = _read(whole, "mode_shapes")
    assert set(shapes["date"]) == {str(d) for d in days}
    rows = _read(whole, "indicators")
    keys = ("date", "subject", "indicator", "value", "quality")
    mac = [(d, v, q) for d, s, i, v, q in zip(*(rows[k] for k in keys)) if s == "first" and i == "mode_mac"]
    first_day = [m for m in mac if m[0] == str(days[0])]
    later = [m for m in mac if m[0] != str(days[0])]
    assert len(first_day) == 4 and len(later) == 12
    assert all(math.isnan(v) and "mode_reference_pending" in q for _, v, q in first_day)
    found = [(v, q) for _, v, q in later if "mode_not_found" not in q]
    assert len(found) >= 10  # measured: 11 of 12 (one window with no stable pole in the band)
    assert all(v > 0.99 and "mode_reference_pending" not in q for v, q in found)
    # the reference the later days used: the median of the first day's four windows
    references = read_references(LocalFiles(), whole, config, days[1])
    day1 = [i for i, d in enumerate(shapes["date"]) if d == str(days[0])]
    windows = sorted({shapes["window_start"][i] for i in day1})
    vectors = np.zeros((len(windows), len(CHANNELS)), complex)
    for i in day1:
        row, column = windows.index(shapes["window_start"][i]), CHANNELS.index(shapes["channel"][i])
        vectors[row, column] = complex(shapes["shape_real"][i], shapes["shape_imag"][i])
    reference = references["first"]
    vectors /= vectors[:, [reference.reference_index]]  # every window normalised at one channel
    median = np.median(vectors.real, axis=0) + 1j * np.median(vectors.imag, axis=0)  # numpy's median
    np.testing.assert_allclose(reference.shape, median / median[reference.reference_index])
    assert reference.freq_hz == pytest.approx(np.median([shapes["freq_hz"][i] for i in day1]))
    assert modal_assurance_criterion(reference.shape, SHAPES[:, 0]) > 0.995
    assert os.path.exists(os.path.join(whole, "_summaries", "asset=test-asset", f"{SUMMARY}.parquet"))


def test_report_draws_the_shape_beside_the_modes_trends(site, tmp_path):
    import matplotlib.image

    from corrtransforms.report.page import write_report
    from corrtransforms.report.plots import draw_mode_shape
    from corrtransforms.stages.mode_reference import median_reference, stored_baseline_rows

    config, whole, _, _ = site
    index = write_report(whole, str(tmp_path / "report"))
    page = open(index, encoding="utf-8").read()
    shape_at = page.index("plots/test-asset/first__mode_shape.png")
    trends = [page.index(f"plots/test-asset/first__{name}.png") for name in ("mode_damping", "mode_freq_hz")]
    assert shape_at < min(trends) and page[shape_at : min(trends)].count("<figure") == 1  # right beside them
    picture = matplotlib.image.imread(str(tmp_path / "report" / "plots" / "test-asset" / "first__mode_shape.png"))
    assert picture.ndim == 3 and picture.shape[1] >= 700
    # the drawn reference is the median of the kept baseline rows; the latest window as written
    shapes = ds.dataset(os.path.join(whole, "mode_shapes"), partitioning="hive").to_table()
    latest = shapes.filter(ds.field("window_start") == max(shapes.column("window_start").to_pylist())).sort_by(
        "channel"
    )
    reference = median_reference(stored_baseline_rows(LocalFiles(), whole, "test-asset"), "first", CHANNELS_SORTED)
    figure = draw_mode_shape("test-asset", "first", latest, reference, (0.99, 0.001))
    lines = {line.get_label(): line.get_ydata() for line in figure.axes[0].lines}
    parts = zip(latest.column("shape_real").to_pylist(), latest.column("shape_imag").to_pylist())
    at_one = [k for k, part in enumerate(parts) if part == (1.0, 0.0)][0]
    expected = reference.shape / reference.shape[at_one]
    np.testing.assert_allclose(lines["baseline reference, real (4 windows)"], expected.real)
    np.testing.assert_allclose(lines["latest window, imaginary"], latest.column("shape_imag").to_numpy())
