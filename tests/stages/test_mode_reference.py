"""Baseline references of multi-channel modes (corrtransforms.stages.mode_reference) and tracking
against them: the median reference against numpy's median, the decomposable baseline reduction,
two entries with overlapping bands kept apart by shape when their modes cross, and a shape change
of MAC 0.98 with a 0.2 % frequency change seen as a mode_mac drop of several standard errors.
Windows are simulated from systems with prescribed modes (tests/support/multichannel_fixtures);
the truth is eig(A) of the simulated system and the MAC definition of Allemang & Brown (1982)."""

import datetime as _dt

import numpy as np
import pyarrow as pa
import pytest

from corrtransforms.config import parse_config
from corrtransforms.numerics.mode_shapes import modal_assurance_criterion, normalise_shape
from corrtransforms.records import WindowBlock, WindowCorrelation
from corrtransforms.stages.mode_reference import baseline_rows, references_from_rows
from corrtransforms.stages.modes import mode_shape_table, window_multichannel_modes
from tests.support.multichannel_fixtures import modal_system, simulate_records, true_modes

START_US = 1_700_000_000_000_000
WINDOW_US = 300_000_000
FS = 20.0
CHANNELS = ("north", "mid", "south")
SHAPES = np.linalg.qr(np.array([[1.0, 1.0, 1.0], [1.0, 0.2, -1.0], [1.0, -1.2, 0.6]]).T)[0]
DAY = _dt.date(2023, 11, 14)  # START_US is 2023-11-14 22:13 UTC


def _config(modes, baseline=None):
    return parse_config(
        {
            "asset": {"name": "test-asset"},
            "archive": {"path": "unused", "sample_rate_hz": FS},
            "channels": {"names": list(CHANNELS)},
            "windows": {"length_s": 300.0},
            "correlation": {"max_lag_s": 2.0, "pairs": "auto"},
            "modes": modes,
            "baseline": baseline or {"windows": 4, "min_windows": 2},
        }
    )


def _block(record, k=0):
    return WindowBlock(
        asset="test-asset", window_start_us=START_US + k * WINDOW_US, window_length_s=record.shape[0] / FS,
        sample_rate_hz=FS, channels=CHANNELS, values=record, valid=np.ones(record.shape, bool), covariates={},
        channel_quality={},
    )  # fmt: skip


def _shape_rows(config, records, references=None):
    """mode_shapes rows of the windows, as the stage writes them."""
    found = []
    for k, record in enumerate(records):
        modes = window_multichannel_modes(_block(record, k), config, references=references)
        start = START_US + k * WINDOW_US
        found.append(WindowCorrelation("test-asset", start, FS, len(record), CHANNELS, {}, {}, (), (), tuple(modes)))
    return mode_shape_table(found), found


def test_reference_is_the_median_of_the_baseline_windows_and_the_reduction_decomposes():
    config = _config([{"name": "first", "channels": list(CHANNELS), "band_hz": [1.7, 2.4]}])
    rng = np.random.default_rng(3)
    n = 6
    shapes = SHAPES[:, 0][None, :] * (1 + 0.02 * rng.standard_normal((n, 3))) * np.exp(1j * rng.uniform(0, 6, (n, 1)))
    index = int(np.argmax(np.abs(SHAPES[:, 0])))
    shapes[1:3] = normalise_shape(shapes[1:3], (index + 1) % 3)  # two windows normalised elsewhere
    shapes[[0, 3, 4, 5]] = normalise_shape(shapes[[0, 3, 4, 5]], index)
    freq = 2.0 + 0.01 * rng.standard_normal(n)
    rows = pa.table(
        {
            "window_start": pa.array(np.repeat(START_US + WINDOW_US * np.arange(n), 3)).cast(pa.timestamp("us", "UTC")),
            "mode": ["first"] * (3 * n),
            "channel": list(CHANNELS) * n,
            "shape_real": shapes.real.ravel(),
            "shape_imag": shapes.imag.ravel(),
            "freq_hz": np.repeat(freq, 3),
        }
    )
    keep = baseline_rows(config)
    assert keep(rows).num_rows == 4 * 3  # the first 4 windows
    split = keep(pa.concat_tables([keep(rows.slice(9)), rows.slice(0, 9)]))  # decomposable, any order
    assert sorted(split.to_pylist(), key=str) == sorted(keep(rows).to_pylist(), key=str)
    reference = references_from_rows(keep(rows), config, DAY)["first"]
    first4 = normalise_shape(shapes[:4], index)  # the channel carrying 1 most often
    expected = np.median(first4.real, axis=0) + 1j * np.median(first4.imag, axis=0)  # numpy's median
    assert reference.reference_index == index and reference.n_windows == 4
    assert reference.freq_hz == pytest.approx(np.median(freq[:4]))
    np.testing.assert_allclose(reference.shape, expected / expected[index])
    assert references_from_rows(keep(rows.slice(0, 9)), config, DAY) == {}  # 3 of 4 windows: pending


def test_dates_baseline_is_complete_only_for_a_run_after_its_last_day():
    config = _config(
        [{"name": "first", "channels": list(CHANNELS), "band_hz": [1.7, 2.4]}],
        {"start": "2023-11-14", "end": "2023-11-14", "min_windows": 2},
    )
    rows = pa.table(
        {
            "window_start": pa.array(np.repeat(START_US + WINDOW_US * np.arange(2), 3)).cast(pa.timestamp("us", "UTC")),
            "mode": ["first"] * 6,
            "channel": list(CHANNELS) * 2,
            "shape_real": [1.0, 0.5, 0.2] * 2,
            "shape_imag": [0.0] * 6,
            "freq_hz": [2.0] * 6,
        }
    )
    assert references_from_rows(baseline_rows(config)(rows), config, DAY) == {}
    later = references_from_rows(baseline_rows(config)(rows), config, DAY + _dt.timedelta(days=1))
    assert later["first"].freq_hz == 2.0


def _crossing_systems():
    """Two modes with orthogonal shapes at 2.0 / 2.2 Hz (baseline), then crossed: 2.16 / 2.04 Hz."""
    shapes = SHAPES[:, :2]
    base = modal_system([2.0, 2.2, 4.5], [0.01, 0.01, 0.02], SHAPES)
    crossed = modal_system([2.16, 2.04, 4.5], [0.01, 0.01, 0.02], SHAPES)
    return base, crossed, shapes


def test_entries_with_overlapping_bands_stay_apart_by_shape_when_their_modes_cross():
    config = _config(
        [
            {"name": "a", "channels": list(CHANNELS), "band_hz": [1.8, 2.3]},
            {"name": "b", "channels": list(CHANNELS), "band_hz": [1.9, 2.4]},
        ]
    )
    (A0, B0), (A1, B1), shapes = _crossing_systems()
    rng = np.random.default_rng(21)
    baseline = simulate_records(A0, B0, FS, int(300 * FS), rng, 4, 3)
    rows, _ = _shape_rows(config, baseline)  # band-centre rule: a nearest 2.05 Hz, b nearest 2.15 Hz
    references = references_from_rows(baseline_rows(config)(rows), config, DAY)
    assert set(references) == {"a", "b"}
    truth = true_modes(A0)
    assert references["a"].freq_hz == pytest.approx(truth.freq_hz[0], rel=0.01)
    assert references["b"].freq_hz == pytest.approx(truth.freq_hz[1], rel=0.01)
    assert modal_assurance_criterion(references["a"].shape, shapes[:, 0]) > 0.99
    assert modal_assurance_criterion(references["b"].shape, shapes[:, 1]) > 0.99
    crossed = simulate_records(A1, B1, FS, int(300 * FS), rng, 2, 3)
    moved = true_modes(A1)  # a now at 2.16 Hz, b at 2.04 Hz
    for record in crossed:
        a, b = window_multichannel_modes(_block(record, 10), config, references=references)
        assert a.freq_hz == pytest.approx(moved.freq_hz[1], rel=0.01)  # 2.16 Hz: by shape, not frequency
        assert b.freq_hz == pytest.approx(moved.freq_hz[0], rel=0.01)
        assert a.mac > 0.99 and b.mac > 0.99
        # the frequency rule alone (band centres 2.05 / 2.15 Hz) swaps them
        a0, b0 = window_multichannel_modes(_block(record, 10), config)
        assert a0.freq_hz == pytest.approx(moved.freq_hz[0], rel=0.01)


def _rotated(shape, other, mac):
    """A unit shape in the plane of ``shape`` and ``other`` (orthonormal) with the given MAC to ``shape``."""
    angle = np.arccos(np.sqrt(mac))
    return np.cos(angle) * shape + np.sin(angle) * other


def test_a_shape_change_of_mac_098_is_a_mode_mac_drop_of_several_stderr():
    config = _config([{"name": "first", "channels": list(CHANNELS), "band_hz": [1.7, 2.4]}])
    rng = np.random.default_rng(8)
    A0, B0 = modal_system([2.0, 3.0, 4.5], [0.02, 0.015, 0.02], SHAPES)
    rows, before = _shape_rows(config, simulate_records(A0, B0, FS, int(300 * FS), rng, 4, 3))
    reference = references_from_rows(baseline_rows(config)(rows), config, DAY)
    changed = SHAPES.copy()
    changed[:, 0] = _rotated(SHAPES[:, 0], SHAPES[:, 2], 0.98)
    changed[:, 2] = _rotated(SHAPES[:, 2], -SHAPES[:, 0], 0.98)  # keep the shapes orthonormal
    assert modal_assurance_criterion(changed[:, 0], SHAPES[:, 0]) == pytest.approx(0.98)
    A1, B1 = modal_system([2.004, 3.0, 4.5], [0.02, 0.015, 0.02], changed)  # +0.2 % in frequency
    same = simulate_records(A0, B0, FS, int(300 * FS), rng, 3, 3)
    after = simulate_records(A1, B1, FS, int(300 * FS), rng, 3, 3)
    for healthy, damaged in zip(same, after):
        (m0,) = window_multichannel_modes(_block(healthy, 10), config, references=reference)
        (m1,) = window_multichannel_modes(_block(damaged, 11), config, references=reference)
        assert "mode_reference_pending" not in m0.quality and m0.mac > 0.99
        assert m1.mac == pytest.approx(0.98, abs=0.006)
        drop = (m0.mac - m1.mac) / np.hypot(m0.mac_stderr, m1.mac_stderr)
        freq_z = (m1.freq_hz - m0.freq_hz) / np.hypot(m0.freq_stderr_hz, m1.freq_stderr_hz)
        assert drop > 4.0 and abs(freq_z) < 3.0, (drop, freq_z)  # measured: drops of 37-40 se, |z| <= 1.1
        assert abs(m1.freq_hz / m0.freq_hz - 1) < 0.006  # the frequency hardly moves
    assert all(np.isnan(wc.multichannel_modes[0].mac) for wc in before)  # no reference yet
    assert all("mode_reference_pending" in wc.multichannel_modes[0].quality for wc in before)
