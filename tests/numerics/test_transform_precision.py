"""Single-precision block transforms ([correlation] transform_precision = "float32", the default)
against the float64 path and against scipy.signal.correlate (method="direct", float64).

The claim checked: the float32 lag sums differ from exact sums by about single precision's unit
round-off (2^-24 = 6e-8, IEEE 754) times a small factor, relative to R(0), so every coefficient
moves by far less than its Bartlett standard error (about 1/sqrt(N) = 4e-3 here) and far less
than the table's compact storage step (2^-13 = 1.2e-4); the quality codes and the indicator
values do not change beyond that.
"""

import numpy as np
import scipy.signal
from scipy.signal import correlation_lags

from corrtransforms.config import parse_config
from corrtransforms.numerics.correlation import channel_spectra, correlate_spectra
from corrtransforms.records import WindowBlock
from corrtransforms.stages.correlate import correlate_window
from corrtransforms.stages.indicators import window_indicators
from tests.support.simulators import simulate_oscillator

START_US = 1_700_000_000_000_000  # an invented epoch-aligned window start


def _records(rng, n, fs):
    """Four invented channels that stress single precision: a large offset on a tone, a
    near-random walk (AR(1) phi 0.999) around 1000, a lightly damped oscillator and white noise."""
    t = np.arange(n) / fs
    tone = np.sin(2 * np.pi * 1.3 * t + 0.4) + 0.1 * rng.standard_normal(n) + 50.0
    walk = scipy.signal.lfilter([1.0], [1.0, -0.999], rng.standard_normal(n)) + 1000.0
    oscillator = simulate_oscillator(n, 1, fs, 2.0, 0.01, rng)[0][:, 0]
    return np.stack([tone, walk, oscillator, rng.standard_normal(n)], axis=1)


def _direct(a, b, L):
    """sum_t a(t) b(t + k), k = -L..L (scipy.signal.correlate(b, a) in float64, scipy docs)."""
    lags = correlation_lags(len(a), len(b))
    return scipy.signal.correlate(b, a, mode="full", method="direct")[(lags >= -L) & (lags <= L)]


def test_float32_lag_sums_match_direct_float64_sums():
    rng = np.random.default_rng(3)
    fs, n, L = 50.0, 12_000, 250
    x = _records(rng, n, fs)
    spectra = channel_spectra(x, fs, L / fs, precision="float32")
    assert spectra.precision == "float32" and spectra.segment_spectra.dtype == np.complex64
    est = correlate_spectra(spectra, "all")
    deviation = x - x.mean(axis=0)
    worst = 0.0
    for row, (a, b) in enumerate(est.pairs):
        exact = _direct(deviation[:, a], deviation[:, b], L) / n  # biased estimator, 1/N (Bendat & Piersol 8.4)
        r0 = np.sqrt(np.mean(deviation[:, a] ** 2) * np.mean(deviation[:, b] ** 2))
        worst = max(worst, float(np.max(np.abs(est.R[row] - exact)) / r0))
    assert worst < 1e-6  # measured about 1e-7


def test_float32_with_gaps_keeps_exact_pair_counts_and_the_float64_values():
    rng = np.random.default_rng(4)
    fs, n, L = 50.0, 12_000, 250
    x = _records(rng, n, fs)
    valid = np.ones_like(x, dtype=bool)
    valid[3000:3400] = False
    valid[7000:7050, 1] = False
    est = correlate_spectra(channel_spectra(x, fs, L / fs, valid=valid, precision="float32"), "all")
    est64 = correlate_spectra(channel_spectra(x, fs, L / fs, valid=valid, precision="float64"), "all")
    for row, (a, b) in enumerate(est.pairs):
        counts = _direct(valid[:, a].astype(float), valid[:, b].astype(float), L)
        np.testing.assert_array_equal(est.pair_count[row], np.rint(counts))  # masks stay float64
    np.testing.assert_array_equal(est.pair_count, est64.pair_count)
    # the float64 path is checked against scipy in test_correlation.py; Bartlett stderr here >= 4e-3
    assert np.nanmax(np.abs(est.coefficient - est64.coefficient)) < 2e-6  # measured below 6e-7


def test_round_off_of_r0_is_inside_the_checks_tolerance():
    rng = np.random.default_rng(8)
    fs, n, L = 100.0, 60_000, 1000
    x = _records(rng, n, fs)
    spectra = channel_spectra(x, fs, L / fs, precision="float32")
    est = correlate_spectra(spectra, "auto")
    for row, (a, _) in enumerate(est.pairs):
        r0_error = abs(est.R[row, L] - spectra.mean_square[a]) / spectra.mean_square[a]
        assert r0_error < spectra.round_off_rtol / 20  # measured below 1.2e-7 against 1e-5
        assert np.max(np.abs(est.R[row] - est.R[row, ::-1])) < spectra.round_off_rtol * est.R[row, L] / 20


def _config(precision):
    return parse_config(
        {
            "asset": {"name": "precision-test"},
            "archive": {"path": "unused", "sample_rate_hz": 20.0},
            "windows": {"length_s": 600.0},
            "correlation": {"max_lag_s": 15.0, "transform_precision": precision},
            "modes": [{"name": "first", "channel": "deck", "band_hz": [1.5, 2.5]}],
        }
    )


def test_stage_outputs_agree_with_the_float64_path_far_below_their_stderr():
    rng = np.random.default_rng(21)
    fs, n = 20.0, 12_000
    source = simulate_oscillator(n + 7, 1, fs, 2.0, 0.02, rng)[0][:, 0]
    values = np.stack(
        [source[7:] + 0.3 * rng.standard_normal(n), source[:n] + 0.3 * rng.standard_normal(n) + 400.0], axis=1
    )
    valid = np.ones_like(values, dtype=bool)
    valid[5000:5200, 1] = False
    block = WindowBlock(
        asset="precision-test",
        window_start_us=START_US,
        window_length_s=n / fs,
        sample_rate_hz=fs,
        channels=("deck", "pier"),
        values=np.where(valid, values, 0.0),
        valid=valid,
        covariates={},
        channel_quality={},
    )
    results = {p: correlate_window(block, _config(p)) for p in ("float32", "float64")}
    rows = {p: {(r.subject, r.indicator): r for r in window_indicators(results[p], _config(p))} for p in results}
    for p32, p64 in zip(results["float32"].pairs, results["float64"].pairs):
        assert p32.subject == p64.subject and p32.quality == p64.quality
        finite = np.isfinite(p64.coefficient)
        random = finite & (p64.stderr > 1e-6)  # rho(0) of an auto pair is 1 by construction
        assert np.max(np.abs(p32.coefficient - p64.coefficient)[finite]) < 1e-6
        assert np.max(np.abs(p32.coefficient - p64.coefficient)[random] / p64.stderr[random]) < 1e-4
    assert rows["float32"].keys() == rows["float64"].keys()
    compared = 0
    for key, r64 in rows["float64"].items():
        r32 = rows["float32"][key]
        assert r32.quality == r64.quality, key
        if np.isfinite(r64.value) and np.isfinite(r64.stderr) and r64.stderr > 0:
            assert abs(r32.value - r64.value) < 1e-3 * r64.stderr, key
            assert abs(r32.stderr - r64.stderr) < 1e-3 * r64.stderr, key
            compared += 1
    assert compared >= 10
