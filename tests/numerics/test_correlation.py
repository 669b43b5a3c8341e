"""The FFT correlation estimator against outside references: scipy.signal.correlate
(method="direct"), numpy.correlate, brute-force masked sums, numpy.polyfit, and closed forms."""

import numpy as np
import pytest
import scipy.signal
from scipy.signal import correlation_lags

from corrtransforms.numerics.correlation import (
    DEFAULT_MIN_PAIRS,
    channel_spectra,
    correlate_block,
    correlate_spectra,
    resolve_pairs,
)


def _lag_slice(n, L):
    lags = correlation_lags(n, n)
    return (lags >= -L) & (lags <= L)


def _direct(a, b, L):
    """sum_t a(t) b(t + k) for k = -L..L: scipy.signal.correlate(b, a)[lag == k]."""
    # scipy.signal.correlate(in1, in2)[k] = sum_n in1[n + k] in2[n] (scipy docs), so with
    # in1 = b and in2 = a it is sum_t a(t) b(t + k): our R_ab(k) before the divisor.
    return scipy.signal.correlate(b, a, mode="full", method="direct")[_lag_slice(len(a), L)]


@pytest.mark.parametrize("estimator", ["biased", "unbiased"])
@pytest.mark.parametrize("detrend", ["none", "mean"])
def test_every_pair_matches_scipy_direct(estimator, detrend):
    rng = np.random.default_rng(11)
    n, L, fs = 157, 23, 4.0
    x = rng.standard_normal((n, 3)) + np.array([0.0, 2.0, -1.0])
    est = correlate_block(x, fs, L / fs, pairs="all", estimator=estimator, detrend=detrend)
    assert est.pairs == ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))
    np.testing.assert_allclose(est.lags_s, np.arange(-L, L + 1) / fs)
    ref = x - x.mean(axis=0) if detrend == "mean" else x
    k = np.arange(-L, L + 1)
    divisor = n if estimator == "biased" else n - np.abs(k)  # Bendat & Piersol Sec. 8.4: 1/N or 1/(N-|r|)
    for row, (a, b) in enumerate(est.pairs):
        expected = _direct(ref[:, a], ref[:, b], L) / divisor
        np.testing.assert_allclose(est.R[row], expected, rtol=1e-10, atol=1e-12)
        scale = np.sqrt(np.mean(ref[:, a] ** 2) * np.mean(ref[:, b] ** 2))
        np.testing.assert_allclose(est.scale[row], scale, rtol=1e-12)
        np.testing.assert_allclose(est.coefficient[row], expected / scale, rtol=1e-10, atol=1e-12)
        np.testing.assert_array_equal(est.pair_count[row], n - np.abs(k))


def test_auto_matches_numpy_correlate_at_every_lag_without_wraparound():
    # L = n - 1: every lag of the full linear correlation; a circular wrap-around would show here
    rng = np.random.default_rng(5)
    n = 64
    x = rng.standard_normal(n)
    est = correlate_block(x, 1.0, n - 1, pairs="auto", detrend="none", min_pairs=1)
    full = np.correlate(x, x, mode="full")  # numpy: c[k] = sum_n x[n + k] x[n], lags -(n-1)..n-1
    np.testing.assert_allclose(est.R[0], full / n, rtol=1e-10, atol=1e-13)


def test_lag_sign_b_lagging_a_peaks_at_positive_lag():
    rng = np.random.default_rng(2)
    n, fs, delay = 4000, 50.0, 7
    source = rng.standard_normal(n + delay)
    a = source[delay:]
    b = source[:n]  # b(t) = a(t - delay/fs): b lags a
    est = correlate_block(np.column_stack([a, b]), fs, 0.5, pairs=[(0, 1), (1, 0)])
    assert est.lags_s[np.argmax(est.coefficient[0])] == pytest.approx(delay / fs)
    assert est.lags_s[np.argmax(est.coefficient[1])] == pytest.approx(-delay / fs)
    # explicit conversion to scipy: correlate(b, a) peaks at correlation_lags == +delay
    lags = correlation_lags(n, n)
    ref = scipy.signal.correlate(b - b.mean(), a - a.mean(), method="direct")
    assert lags[np.argmax(ref)] == delay
    # R_ba(tau) = R_ab(-tau)
    np.testing.assert_allclose(est.R[1], est.R[0][::-1], rtol=1e-10, atol=1e-12)


def _brute_masked(x, valid, L, estimator, min_pairs):
    """Masked estimate by explicit loops over lags and samples (no FFT)."""
    n, c = x.shape
    xm = np.zeros_like(x)
    counts_ch = valid.sum(axis=0)
    for j in range(c):
        xm[valid[:, j], j] = x[valid[:, j], j] - x[valid[:, j], j].mean()
    out = {}
    for a in range(c):
        for b in range(a, c):
            R = np.empty(2 * L + 1)
            count = np.empty(2 * L + 1, dtype=int)
            for i, k in enumerate(range(-L, L + 1)):
                s, m = 0.0, 0
                for t in range(n):
                    u = t + k
                    if 0 <= u < n and valid[t, a] and valid[u, b]:
                        s += xm[t, a] * xm[u, b]
                        m += 1
                count[i] = m
                div = np.sqrt(counts_ch[a] * counts_ch[b]) if estimator == "biased" else m
                R[i] = s / div if m >= min_pairs else np.nan
            out[(a, b)] = (R, count)
    return out


@pytest.mark.parametrize("estimator", ["biased", "unbiased"])
def test_masked_estimator_matches_brute_force(estimator):
    rng = np.random.default_rng(3)
    n, L = 90, 40
    x = rng.standard_normal((n, 3))
    valid = rng.random((n, 3)) > 0.3
    valid[:30, 2] = False  # a long gap: far lags of pairs with channel 2 have few pairs
    x[~valid] = np.nan  # NaN where invalid: the estimator must not read them
    min_pairs = 20
    est = correlate_block(x, 1.0, L, pairs="all", estimator=estimator, valid=valid, min_pairs=min_pairs)
    ref = _brute_masked(np.nan_to_num(x), valid, L, estimator, min_pairs)
    assert any(np.isnan(r).any() for r, _ in ref.values())  # the threshold is exercised
    for row, pair in enumerate(est.pairs):
        R, count = ref[pair]
        np.testing.assert_array_equal(est.pair_count[row], count)
        np.testing.assert_array_equal(np.isnan(est.R[row]), np.isnan(R))
        np.testing.assert_allclose(est.R[row], R, rtol=1e-10, atol=1e-12)


def test_min_pairs_default_is_documented_value():
    assert DEFAULT_MIN_PAIRS == 32  # documented in docs/correlation.md (common practice)
    x = np.random.default_rng(0).standard_normal(40)
    est = correlate_block(x, 1.0, 20, pairs="auto")
    k = np.abs(np.arange(-20, 21))
    np.testing.assert_array_equal(np.isnan(est.R[0]), 40 - k < 32)


def test_linear_detrend_uses_valid_samples_only():
    rng = np.random.default_rng(8)
    n = 300
    t = np.arange(n)
    x = 0.05 * t + 3.0 + rng.standard_normal(n)
    valid = rng.random(n) > 0.2
    spectra = channel_spectra(x, 1.0, 10, valid=valid, detrend="linear")
    coef = np.polyfit(t[valid], x[valid], 1)  # numpy least-squares line on the valid samples
    resid = x[valid] - np.polyval(coef, t[valid])
    assert spectra.mean_square[0] == pytest.approx(np.mean(resid**2), rel=1e-10)
    est = correlate_spectra(spectra, "auto", estimator="unbiased")
    assert est.R[0][10] == pytest.approx(np.mean(resid**2), rel=1e-10)


def test_band_limited_white_noise_matches_closed_form():
    # Band-pass white noise on [f1, f2]: rho(tau) = [sin(2 pi f2 tau) - sin(2 pi f1 tau)] /
    # [2 pi (f2 - f1) tau]  (Bendat & Piersol, Random Data, Sec. 5.2.4, from memory)
    rng = np.random.default_rng(21)
    n, fs, f1, f2 = 2**16, 20.0, 2.0, 4.0
    x = rng.standard_normal(n)
    est = correlate_block(x, fs, 2.0, pairs="auto", band_hz=(f1, f2))
    tau = est.lags_s
    with np.errstate(invalid="ignore", divide="ignore"):
        expected = (np.sin(2 * np.pi * f2 * tau) - np.sin(2 * np.pi * f1 * tau)) / (2 * np.pi * (f2 - f1) * tau)
    expected[len(tau) // 2] = 1.0
    # standard error ~ 1/sqrt(2 (f2 - f1) T) = 0.012 (Bendat & Piersol closed form); 5 sd
    np.testing.assert_allclose(est.coefficient[0], expected, atol=0.06)
    assert est.band_hz == (f1, f2)


def test_phat_peaks_at_the_delay_and_is_bounded():
    # Knapp & Carter 1976: with PHAT weighting the GCC of a pure delay is an impulse at the delay
    rng = np.random.default_rng(4)
    n, fs, delay = 8000, 100.0, 13
    coloured = scipy.signal.lfilter([1.0], [1.0, -0.95], rng.standard_normal(n + delay))
    a, b = coloured[delay:], coloured[:n] + 0.05 * rng.standard_normal(n)
    for weighting in ("phat", "scot"):
        est = correlate_block(np.column_stack([a, b]), fs, 0.5, pairs=[(0, 1)], weighting=weighting)
        psi = est.coefficient[0]
        assert est.lags_s[np.argmax(psi)] == pytest.approx(delay / fs)
        assert np.nanmax(np.abs(psi)) <= 1.0 + 1e-12
        assert psi.max() > 0.8
    plain = correlate_block(np.column_stack([a, b]), fs, 0.5, pairs=[(0, 1)])
    phat = correlate_block(np.column_stack([a, b]), fs, 0.5, pairs=[(0, 1)], weighting="phat")
    # whitening sharpens the peak: one lag off, the plain coefficient of AR(0.95) noise stays
    # near the peak (0.95^1) while PHAT falls to near zero
    i = int(np.argmax(phat.coefficient[0]))
    assert plain.coefficient[0][i + 1] / plain.coefficient[0][i] > 0.9
    assert phat.coefficient[0][i + 1] / phat.coefficient[0][i] < 0.2


def test_zero_variance_channel_gives_nan_coefficients_not_garbage():
    x = np.column_stack([np.ones(100) * 5.0, np.random.default_rng(0).standard_normal(100)])
    est = correlate_block(x, 1.0, 5, pairs="all")
    assert est.scale[est.pair_index(0, 0)] == 0.0
    assert np.all(np.isnan(est.coefficient[est.pair_index(0, 1)]))
    assert np.all(np.isfinite(est.coefficient[est.pair_index(1, 1)]))


def test_invalid_options_name_the_allowed_values():
    x = np.zeros((50, 2))
    with pytest.raises(ValueError, match="'biased', 'unbiased'"):
        correlate_block(x, 1.0, 5, estimator="fancy")
    with pytest.raises(ValueError, match="'mean', 'none', 'linear'"):
        correlate_block(x, 1.0, 5, detrend="quadratic")
    with pytest.raises(ValueError, match="'none', 'phat', 'scot'"):
        correlate_block(x, 1.0, 5, weighting="roth")
    with pytest.raises(ValueError, match="0..49"):
        correlate_block(x, 1.0, 60)
    with pytest.raises(ValueError, match="outside"):
        resolve_pairs([(0, 2)], 2)


def test_transform_lengths_avoid_wraparound():
    spectra = channel_spectra(np.zeros((1000, 1)), 100.0, 2.0)
    assert spectra.segment_fft_length >= spectra.segment_length + 2 * 200
    assert spectra.fft_length >= 1000 + 200
    assert spectra.mask_segment_spectra is None  # complete record: counts need no transform


@pytest.mark.parametrize("segment_length", [1, 7, 50, 64, 333, 1000])
def test_any_block_length_gives_the_direct_sums(segment_length):
    # overlap-save blocks, including a partial last block and blocks shorter than the lag range
    rng = np.random.default_rng(13)
    n, L = 333, 40
    x = rng.standard_normal((n, 2))
    valid = rng.random((n, 2)) > 0.1
    spectra = channel_spectra(x, 1.0, L, valid=valid, segment_length=segment_length)
    est = correlate_spectra(spectra, "all", estimator="unbiased", min_pairs=1)
    xm = np.where(valid, x - np.array([x[valid[:, j], j].mean() for j in range(2)]), 0.0)
    for row, (a, b) in enumerate(est.pairs):
        sums = _direct(xm[:, a], xm[:, b], L)
        counts = _direct(valid[:, a].astype(float), valid[:, b].astype(float), L)
        np.testing.assert_array_equal(est.pair_count[row], np.rint(counts))
        np.testing.assert_allclose(est.R[row], sums / counts, rtol=1e-9, atol=1e-12)


def test_full_resolution_path_agrees_with_block_path():
    # band (0, fs/2) keeps every bin: the full-length transform must give the same numbers
    rng = np.random.default_rng(14)
    x = rng.standard_normal((5000, 3))
    valid = rng.random((5000, 3)) > 0.05
    spectra = channel_spectra(x, 10.0, 3.0, valid=valid)
    assert spectra.n_segments > 1
    blocks = correlate_spectra(spectra, "all", estimator="unbiased")
    full = correlate_spectra(spectra, "all", estimator="unbiased", band_hz=(0.0, 5.0))
    np.testing.assert_allclose(full.R, blocks.R, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(full.scale, blocks.scale, rtol=1e-9)
    np.testing.assert_array_equal(full.pair_count, blocks.pair_count)


def test_input_arrays_are_not_modified():
    x = np.asfortranarray(np.random.default_rng(1).standard_normal((200, 2)) + 5.0)
    before = x.copy()
    correlate_block(x, 1.0, 10, detrend="linear")
    np.testing.assert_array_equal(x, before)


def test_pairs_by_name_resolves_strings_lists_usable_and_missing_channels():
    from corrtransforms.numerics.correlation import pairs_by_name

    names = ("a", "b", "c")
    # "all": every (i, j) with i <= j over the usable channels, row-major (as resolve_pairs)
    assert pairs_by_name("all", names) == resolve_pairs("all", 3)
    assert pairs_by_name("all", names, usable=[True, False, True]) == ((0, 0), (0, 2), (2, 2))
    assert pairs_by_name(None, names) == pairs_by_name("auto", names) == ((0, 0), (1, 1), (2, 2))
    listed = [("c", "a"), ("a", "x"), ("c", "a"), ("b", "b")]
    assert pairs_by_name(listed, names) == ((2, 0), (1, 1))  # order kept, duplicate and missing dropped
    assert pairs_by_name(listed, names, usable=[True, False, True]) == ((2, 0),)
    with pytest.raises(ValueError, match="does not hold"):
        pairs_by_name(listed, names, missing="raise")
