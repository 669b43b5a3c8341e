"""Indicator rows of a window (end to end from samples), the indicators table, and the Beam
transform ComputeIndicators under TestPipeline."""

import dataclasses
import math

import apache_beam as beam
import numpy as np
import pyarrow.parquet as pq
import pytest
from apache_beam.testing.test_pipeline import TestPipeline
from apache_beam.testing.util import assert_that, equal_to

from corrtransforms import tables
from corrtransforms.beam.indicators import ComputeIndicators
from corrtransforms.config import parse_config
from corrtransforms.records import WindowBlock
from corrtransforms.stages.correlate import correlate_window
from corrtransforms.stages.indicators import (
    IndicatorError,
    indicator_table,
    window_indicators,
    window_indicators_and_failures,
)
from tests.support.indicator_fixtures import simulate_sdof

FS = 50.0
SHIFT = 3  # deck_b lags deck_a by 3 samples
START_US = 1_700_000_400 * 10**6


def _config(weighting="phat"):
    return parse_config(
        {
            "asset": {"name": "test-bridge"},
            "archive": {"path": "/nonexistent", "sample_rate_hz": FS},
            "channels": {
                "names": ["deck_a", "deck_b"],
                "covariates": ["temperature"],
                "units": {"deck_a": "m/s2", "deck_b": "m/s2", "temperature": "degC"},
            },
            "windows": {"length_s": 300.0},
            "correlation": {"max_lag_s": 10.0, "weighting": weighting},
            "modes": [{"name": "first_bending", "channel": "deck_a", "band_hz": [1.5, 2.5]}],
        }
    )


def _block(seed=1, start_us=START_US):
    rng = np.random.default_rng(seed)
    n = 15000
    x = simulate_sdof(2.0, 0.02, FS, n + SHIFT, rng)
    x /= x.std()
    a = x[SHIFT:] + 0.05 * rng.standard_normal(n)
    b = x[:n] + 0.05 * rng.standard_normal(n)
    values = np.column_stack([a, b])
    return WindowBlock(
        asset="test-bridge",
        window_start_us=start_us,
        window_length_s=300.0,
        sample_rate_hz=FS,
        channels=("deck_a", "deck_b"),
        values=values,
        valid=np.ones_like(values, dtype=bool),
        covariates={"temperature": 12.5},
    )


@pytest.fixture(scope="module")
def window():
    return correlate_window(_block(), _config())


def _by_key(rows):
    return {(r.subject, r.indicator): r for r in rows}


def test_window_rows_names_units_and_values(window):
    config = _config()
    rows = window_indicators(window, config)
    got = _by_key(rows)
    expected = {(c, i) for c in ("deck_a", "deck_b") for i in ("rms", "corr_time_s", "decay_time_s")}
    expected |= {
        ("first_bending", "mode_freq_hz"),
        ("first_bending", "mode_damping"),
        ("deck_a:deck_b", "lag_s"),
        ("deck_a:deck_b", "peak_coef"),
        ("temperature", "covariate_mean"),
    }
    assert set(got) <= expected | {(r.subject, r.indicator) for r in window.extra_indicators}
    assert expected <= set(got)
    assert all(r.window_start_us == START_US for r in rows)
    assert got[("deck_a", "rms")].unit == "m/s2"
    assert got[("deck_a", "corr_time_s")].unit == "s"
    assert got[("first_bending", "mode_freq_hz")].unit == "Hz"
    assert got[("temperature", "covariate_mean")].unit == "degC"
    assert got[("temperature", "covariate_mean")].value == 12.5
    assert math.isnan(got[("temperature", "covariate_mean")].stderr)
    # rms of the mean-removed record: numpy reference
    a = _block().values[:, 0]
    assert got[("deck_a", "rms")].value == pytest.approx(np.std(a), rel=1e-9)
    # modal frequency of the simulated oscillator (fn = 2 Hz) from one 300 s window:
    # within 4 reported standard errors and 1 %
    mode = got[("first_bending", "mode_freq_hz")]
    assert mode.value == pytest.approx(2.0, rel=0.01)
    assert abs(mode.value - 2.0) < 4 * mode.stderr
    lag = got[("deck_a:deck_b", "lag_s")]
    assert abs(lag.value - SHIFT / FS) < 4 * lag.stderr + 0.1 / FS
    assert got[("deck_a:deck_b", "peak_coef")].value > 0.9
    assert all(np.isfinite(r.value) for r in rows)


def test_quality_codes_are_joined(window):
    config = _config()
    pair = next(p for p in window.pairs if not p.is_auto)
    short = dataclasses.replace(pair, meets_target=False, quality=("few_pairs",))
    wc = dataclasses.replace(
        window,
        pairs=tuple(short if p is pair else p for p in window.pairs),
        subject_quality={"deck_a:deck_b": ("nonstationary",), "first_bending": ("clipped",), "*": ("window_note",)},
        covariates={"temperature": float("nan")},
    )
    got = _by_key(window_indicators(wc, config))
    assert got[("deck_a:deck_b", "lag_s")].quality.split(";") == sorted(
        ["few_pairs", "nonstationary", "record_too_short", "window_note"]
    )
    assert "clipped" in got[("first_bending", "mode_damping")].quality
    assert got[("temperature", "covariate_mean")].quality == "no_covariate_samples;window_note"
    assert math.isnan(got[("temperature", "covariate_mean")].value)


def test_bad_numbers_become_nan_with_codes_and_missing_mode_is_reported(window):
    config = _config()
    pair = next(p for p in window.pairs if not p.is_auto)
    nan_pair = dataclasses.replace(pair, coefficient=np.full_like(pair.coefficient, np.nan), weighted_coefficient=None)
    wc = dataclasses.replace(window, pairs=tuple(nan_pair if p is pair else p for p in window.pairs), modes=())
    got = _by_key(window_indicators(wc, config))
    assert math.isnan(got[("deck_a:deck_b", "lag_s")].value)
    assert "nonfinite_correlation" in got[("deck_a:deck_b", "lag_s")].quality
    assert "no_mode_correlation" in got[("first_bending", "mode_freq_hz")].quality.split(";")
    assert math.isnan(got[("first_bending", "mode_freq_hz")].value)


def _malformed(window):
    pair = next(p for p in window.pairs if not p.is_auto)
    broken = dataclasses.replace(pair, stderr=pair.stderr[:-5])
    return dataclasses.replace(
        window, pairs=tuple(broken if p is pair else p for p in window.pairs), window_start_us=START_US + 300 * 10**6
    )


def test_malformed_input_raises_or_is_isolated(window):
    config = _config()
    bad = _malformed(window)
    with pytest.raises(IndicatorError, match="deck_a:deck_b"):
        window_indicators(bad, config)
    rows, failures = window_indicators_and_failures(bad, config)
    assert [f[0] for f in failures] == ["deck_a:deck_b"]
    assert ("deck_a", "rms") in _by_key(rows) and ("deck_a:deck_b", "lag_s") not in _by_key(rows)


def test_indicator_table_schema_and_parquet_round_trip(window, tmp_path):
    rows = window_indicators(window, _config())
    table = indicator_table(rows)
    assert table.schema.equals(tables.INDICATORS, check_metadata=True)
    pq.write_table(table, tmp_path / "indicators.parquet", compression="zstd")
    back = pq.read_table(tmp_path / "indicators.parquet")
    assert back.num_rows == len(rows)
    assert back.column("subject").to_pylist() == [r.subject for r in rows]
    np.testing.assert_array_equal(back.column("value").to_numpy(), [r.value for r in rows])
    assert back.column("window_start").cast("int64").to_pylist() == [START_US] * len(rows)
    assert indicator_table([]).schema.equals(tables.INDICATORS)


def _comparable(row):
    return tuple(None if isinstance(v, float) and math.isnan(v) else v for v in row)


def test_compute_indicators_transform(window):
    config = _config()
    second = correlate_window(_block(seed=2, start_us=START_US + 600 * 10**6), config)
    bad = _malformed(window)
    expected = [_comparable(r) for wc in (window, second) for r in window_indicators(wc, config)]
    expected += [_comparable(r) for r in window_indicators_and_failures(bad, config)[0]]
    with TestPipeline() as p:
        out = p | "Windows" >> beam.Create([window, second, bad]) | ComputeIndicators(config)
        assert_that(
            out["indicators"] | "Comparable" >> beam.Map(_comparable),
            equal_to(expected),
            label="Rows equal the in-memory computation",
        )
        assert_that(
            out["rejects"]
            | "Reject keys" >> beam.Map(lambda r: (r.stage, r.subject, r.reason, r.window_start_us, r.asset)),
            equal_to([("indicators", "deck_a:deck_b", "indicator_failed", START_US + 300 * 10**6, "test-bridge")]),
            label="One reject for the malformed pair",
        )


def test_spurious_lag_peak_reaches_the_pair_rows_and_holds_the_window():
    # source and noise on 0-20 Hz of a 0-50 Hz record (benchmarks/calibration.py's band_limited
    # case): PHAT whitens the empty band and its peak wanders; the pair rows must carry the code
    # and records.HOLDING_CODES must hold them out of the shift detectors
    from corrtransforms.records import holds_window, quality_codes

    fs, n, delay = 100.0, 2000, 0.0537
    f = np.fft.rfftfreq(4 * n, 1 / fs)
    keep = (f > 0) & (f <= 20.0)
    config = parse_config(
        {
            "asset": {"name": "invented-tower"},
            "archive": {"path": "/nonexistent", "sample_rate_hz": fs},
            "windows": {"length_s": n / fs},
            "correlation": {"max_lag_s": 0.5, "weighting": "phat"},
        }
    )
    rng = np.random.default_rng(20)
    held = 0
    for window_index in range(4):

        def band(delay_s=0.0, z=None):
            z = (rng.standard_normal(len(f)) + 1j * rng.standard_normal(len(f))) * keep if z is None else z
            return np.fft.irfft(z * np.exp(-2j * np.pi * f * delay_s), 4 * n)[:n], z

        source, z = band()
        delayed, _ = band(delay, z)
        values = np.column_stack([source + 0.5 * band()[0], delayed + 0.5 * band()[0]])
        block = WindowBlock(
            asset="invented-tower",
            window_start_us=window_index * 20 * 10**6,
            window_length_s=n / fs,
            sample_rate_hz=fs,
            channels=("a", "b"),
            values=values,
            valid=np.ones_like(values, dtype=bool),
        )
        rows = _by_key(window_indicators(correlate_window(block, config), config))
        lag, peak = rows[("a:b", "lag_s")], rows[("a:b", "peak_coef")]
        assert lag.quality == peak.quality
        if "spurious_lag_peak" in quality_codes(lag.quality):
            assert holds_window(quality_codes(lag.quality))
            held += 1
        else:  # not flagged: the whitened peak agrees with the delay within a sample
            assert abs(lag.value - delay) < 1 / fs
    assert held >= 2  # 84 % of such windows in the calibration benchmark


def _gappy_delayed_block(rng, n=9500, fs=10.0, phi=0.9, delay=4, noise_var=0.1):
    """AR(1) source (phi 0.9) seen by two sensors, b lagging a by ``delay`` samples, white noise
    of variance ``noise_var`` on each, 20 % of samples missing in bursts (mean 50 samples)."""
    import scipy.signal

    drive = rng.standard_normal(n + delay + 500)
    source = scipy.signal.lfilter([1.0], [1.0, -phi], drive)[500:]
    a = source[delay:] + np.sqrt(noise_var) * rng.standard_normal(n)
    b = source[:n] + np.sqrt(noise_var) * rng.standard_normal(n)
    valid = np.ones(n, dtype=bool)
    t = int(rng.integers(0, 200))
    while t < n:  # alternating runs: valid of mean 200, missing of mean 50
        gap = int(rng.geometric(1 / 50))
        valid[t : t + gap] = False
        t += gap + int(rng.geometric(1 / 200))
    values = np.column_stack([np.where(valid, a, 0.0), np.where(valid, b, 0.0)])
    mask = np.column_stack([valid, valid])
    return WindowBlock("gappy", START_US, n / fs, fs, ("a", "b"), values, mask)


def test_lag_and_peak_coef_unbiased_on_records_with_gaps():
    # the biased estimator divides every lag by sqrt(N_a N_b) whatever its pair count, which
    # tilted the peak towards lag 0 by 2.5 stderr and shrank peak_coef by 9 stderr on such records
    config = parse_config(
        {
            "asset": {"name": "gappy"},
            "archive": {"path": "/nonexistent", "sample_rate_hz": 10.0},
            "windows": {"length_s": 950.0},
            "correlation": {"max_lag_s": 10.0},
        }
    )
    rng = np.random.default_rng(31)
    lags, lag_se, peaks, peak_se = [], [], [], []
    for _ in range(60):
        rows = _by_key(window_indicators(correlate_window(_gappy_delayed_block(rng), config), config))
        lags.append(rows[("a:b", "lag_s")].value)
        lag_se.append(rows[("a:b", "lag_s")].stderr)
        peaks.append(rows[("a:b", "peak_coef")].value)
        peak_se.append(rows[("a:b", "peak_coef")].stderr)
    # truths in closed form: the AR(1) autocovariance 1 / (1 - phi^2) phi^|k| (Box & Jenkins,
    # Time Series Analysis, Sec. 3.2) peaks at the delay, 0.4 s; its coefficient is
    # var_s / (var_s + 0.1)
    var_s = 1 / (1 - 0.9**2)
    truth_peak = var_s / (var_s + 0.1)
    lags, lag_se, peaks, peak_se = map(np.array, (lags, lag_se, peaks, peak_se))
    assert abs(np.mean(lags) - 0.4) < 0.5 * np.median(lag_se)
    assert abs(np.mean(peaks) - truth_peak) < 0.5 * np.median(peak_se)
    assert np.mean(np.abs(lags - 0.4) <= 1.96 * lag_se) >= 0.88
    # peak_coef's coverage: test_peak_coef_stderr_covers_on_records_with_gaps
    assert np.mean(np.abs(peaks - truth_peak) <= 1.96 * peak_se) >= 0.8


def test_peak_coef_stderr_covers_on_records_with_gaps():
    # Monte-Carlo coverage of +/-1.96 stderr of peak_coef on a record with 20 % missing in bursts
    # (the calibration matrix's gappy cell, 0.86 with Bartlett's variance alone: its numerator
    # runs over fewer samples than its normalisation, numerics.bartlett.subset_mismatch_variance).
    # Reference: the normal law's 95 % point (1.96) and the binomial law of the count of covered
    # windows: 200 windows, sd sqrt(0.95 * 0.05 / 200) = 0.015, so [0.90, 0.99] is about
    # -3.2 / +2.6 sd around 0.95. Measured at this seed: 0.815 (scatter 1.44x the median
    # stderr) with Bartlett's variance alone, 0.985 (0.90x) with the subset term.
    config = parse_config(
        {
            "asset": {"name": "gappy"},
            "archive": {"path": "/nonexistent", "sample_rate_hz": 10.0},
            "windows": {"length_s": 950.0},
            "correlation": {"max_lag_s": 10.0},
        }
    )
    rng = np.random.default_rng(47)
    # closed-form truth: AR(1) variance 1 / (1 - phi^2) (Box & Jenkins Sec. 3.2) over itself + 0.1
    var_s = 1 / (1 - 0.9**2)
    truth_peak = var_s / (var_s + 0.1)
    peaks, peak_se = [], []
    for _ in range(200):
        row = _by_key(window_indicators(correlate_window(_gappy_delayed_block(rng), config), config))[
            ("a:b", "peak_coef")
        ]
        peaks.append(row.value)
        peak_se.append(row.stderr)
    peaks, peak_se = np.array(peaks), np.array(peak_se)
    coverage = np.mean(np.abs(peaks - truth_peak) <= 1.96 * peak_se)
    assert 0.90 <= coverage <= 0.99, coverage
    # the scatter against the median stderr: 1 for a right stderr; the sd of a sample sd of 200 is
    # about 5 %, so [0.8, 1.2] is about 4 of them
    assert 0.8 <= np.std(peaks, ddof=1) / np.median(peak_se) <= 1.2
