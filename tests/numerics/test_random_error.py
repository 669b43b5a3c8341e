"""Record-length error metadata against statsmodels, closed forms and Monte-Carlo simulation;
validity invariants as hypothesis property tests."""

import numpy as np
import pytest
import scipy.integrate
import scipy.linalg
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from statsmodels.tsa.stattools import acf, ccf

from corrtransforms.numerics import random_error as err
from corrtransforms.numerics.bartlett import bartlett_stderr, large_lag_stderr
from corrtransforms.numerics.correlation import channel_spectra, correlate_block, correlate_spectra
from corrtransforms.numerics.spectra import lag_window_psd, strongest_tone, tone_ratio
from corrtransforms.numerics.timescales import integral_time_scale
from tests.support.simulators import oscillator_rho, simulate_ar1, simulate_oscillator

# ------------------------------------------------------------------------------------------
# statsmodels


@pytest.mark.filterwarnings("ignore:acf currently returns:FutureWarning")
def test_biased_auto_and_large_lag_interval_match_statsmodels_acf():
    rng = np.random.default_rng(1)
    x = simulate_ar1(0.7, 500, 1, rng)[:, 0]
    L = 30
    est = correlate_block(x, 1.0, L, pairs="auto")
    r = est.coefficient[0][L:]
    ref, confint = acf(x, nlags=L, adjusted=False, fft=False, alpha=0.05, bartlett_confint=True)
    np.testing.assert_allclose(r, ref, rtol=1e-10, atol=1e-12)
    # statsmodels' interval: r_k -/+ z (1 + 2 sum_{j<k} r_j^2)/N, the large-lag Bartlett form
    z = scipy.stats.norm.ppf(0.975)
    np.testing.assert_allclose(large_lag_stderr(r, len(x)), (confint[:, 1] - ref) / z, rtol=1e-10)
    # the general per-lag figure is a different quantity: at lag 1 of AR(1) it is
    # sqrt((1 - phi^2)/N) (Box, Jenkins & Reinsel Eq. 2.1.16), below the large-lag 1/sqrt(N)
    full = est.coefficient[0]
    se = bartlett_stderr(full, full, full, est.pair_count[0])[L:]
    assert se[1] < large_lag_stderr(r, len(x))[1]


@pytest.mark.parametrize("adjusted", [False, True])
def test_cross_coefficients_match_statsmodels_ccf_both_lag_signs(adjusted):
    rng = np.random.default_rng(2)
    n, D, L = 600, 4, 12
    s = simulate_ar1(0.5, n + D, 1, rng)[:, 0]
    x = s[D:]
    y = s[:n] + 0.3 * rng.standard_normal(n)  # y lags x by D
    estimator = "unbiased" if adjusted else "biased"
    est = correlate_block(np.column_stack([x, y]), 1.0, L, pairs=[(0, 1)], estimator=estimator)
    rho = est.coefficient[0]
    # statsmodels' ccf has no negative lags; ccf(y, x)[k] = corr(y_{t+k}, x_t) = our rho_xy(+k),
    # and ccf(x, y)[k] = corr(x_{t+k}, y_t) = our rho_xy(-k)
    positive = ccf(y, x, adjusted=adjusted, fft=False, nlags=L + 1)
    negative = ccf(x, y, adjusted=adjusted, fft=False, nlags=L + 1)
    np.testing.assert_allclose(rho[L:], positive, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(rho[: L + 1][::-1], negative, rtol=1e-10, atol=1e-12)
    assert int(np.argmax(positive)) == D


# ------------------------------------------------------------------------------------------
# Bartlett's formula: closed forms


@pytest.mark.parametrize("phi", [0.3, 0.6, -0.8])
def test_bartlett_of_ar1_equals_its_exact_closed_form(phi):
    # N var r_k = (1 + phi^2)(1 - phi^2k)/(1 - phi^2) - 2 k phi^2k
    # (Box, Jenkins & Reinsel, Time Series Analysis, Eq. 2.1.16, from memory; also Bartlett 1946)
    L, N = 200, 1000
    k = np.arange(-L, L + 1)
    rho = phi ** np.abs(k)
    se = bartlett_stderr(rho, rho, rho, np.full(2 * L + 1, N))
    kk = np.arange(0, 40)
    exact = (1 + phi**2) * (1 - phi ** (2 * kk)) / (1 - phi**2) - 2 * kk * phi ** (2 * kk)
    np.testing.assert_allclose(N * se[L + kk] ** 2, exact, rtol=1e-9, atol=1e-12)


def test_bartlett_cross_of_independent_ar1_pair():
    # independent series: N var r_xy(k) = sum_v rho_xx(v) rho_yy(v) = (1 + p q)/(1 - p q)
    # for AR(1) with parameters p and q (Box, Jenkins & Reinsel Eq. 12.1.5, from memory)
    p, q, L, N = 0.7, 0.4, 150, 500
    k = np.arange(-L, L + 1)
    se = bartlett_stderr(np.zeros(2 * L + 1), p ** np.abs(k), q ** np.abs(k), np.full(2 * L + 1, N))
    np.testing.assert_allclose(N * se**2, (1 + p * q) / (1 - p * q), rtol=1e-10)


def test_bartlett_cross_of_a_pure_delay_equals_the_shifted_auto():
    # b(t) = a(t - D): r_ab(k) is r_aa(k - D), so its variance is the auto's at lag k - D
    phi, L, D, N = 0.8, 120, 9, 1000
    k = np.arange(-L, L + 1)
    rho_aa = phi ** np.abs(k)
    rho_ab = phi ** np.abs(k - D)
    se_ab = bartlett_stderr(rho_ab, rho_aa, rho_aa, np.full(2 * L + 1, N))
    se_aa = bartlett_stderr(rho_aa, rho_aa, rho_aa, np.full(2 * L + 1, N))
    inner = slice(L - 40, L + 40)
    np.testing.assert_allclose(se_ab[L - 40 + D : L + 40 + D], se_aa[inner], rtol=1e-8, atol=1e-7)


# ------------------------------------------------------------------------------------------
# Monte-Carlo calibration of the per-lag standard error (fixed seeds)


def _coverage(est, rho_true, se):
    return (np.abs(est.coefficient - rho_true) <= 1.96 * se).mean(axis=0)


def test_stderr_coverage_ar1():
    rng = np.random.default_rng(20240601)
    phi = 0.6
    x = simulate_ar1(phi, 2000, 1000, rng)
    est = correlate_block(x, 1.0, 50, pairs="auto")
    L = est.max_lag
    se = bartlett_stderr(est.coefficient, est.coefficient, est.coefficient, est.pair_count)
    cover = _coverage(est, phi ** np.abs(np.arange(-L, L + 1)), se)
    for k in (1, 2, 3, 5, 10):
        assert 0.93 <= cover[L + k] <= 0.97, (k, cover[L + k])


def test_stderr_coverage_oscillator():
    rng = np.random.default_rng(7)
    fs, fn, zeta = 10.0, 1.0, 0.05
    x, _, _ = simulate_oscillator(6000, 1000, fs, fn, zeta, rng)
    est = correlate_block(x, fs, 15.0, pairs="auto")
    L = est.max_lag
    se = bartlett_stderr(est.coefficient, est.coefficient, est.coefficient, est.pair_count)
    cover = _coverage(est, oscillator_rho(est.lags_s, fn, zeta), se)
    for k in (2, 5, 10, 20, 40):
        assert 0.93 <= cover[L + k] <= 0.97, (k, cover[L + k])


def test_stderr_coverage_cross_pair_with_delay():
    rng = np.random.default_rng(99)
    phi, n, reps, D, noise = 0.5, 2000, 600, 3, 0.7
    s = simulate_ar1(phi, n + D, reps, rng)
    a = s[D:]
    b = s[:n] + noise * np.sqrt(1 / (1 - phi**2)) * rng.standard_normal((n, reps))
    values = np.concatenate([a, b], axis=1)
    pairs = [(i, reps + i) for i in range(reps)]
    spectra = channel_spectra(values, 1.0, 20)
    cross = correlate_spectra(spectra, pairs)
    autos = correlate_spectra(spectra, "auto")
    L = cross.max_lag
    se = bartlett_stderr(cross.coefficient, autos.coefficient[:reps], autos.coefficient[reps:], cross.pair_count)
    k = np.arange(-L, L + 1)
    rho_true = phi ** np.abs(k - D) / np.sqrt(1 + noise**2)  # closed form of the construction
    cover = _coverage(cross, rho_true, se)
    for lag in (D, D - 2, D + 1, D + 5, -4):
        assert 0.93 <= cover[L + lag] <= 0.97, (lag, cover[L + lag])


# ------------------------------------------------------------------------------------------
# closed forms of correlation functions, bandwidth and errors


def test_oscillator_discretisation_reproduces_the_closed_form():
    fs, fn, zeta = 10.0, 1.3, 0.03
    _, Phi, P = simulate_oscillator(1, 1, fs, fn, zeta, np.random.default_rng(0))
    k = np.arange(0, 80)
    exact = np.array([(np.linalg.matrix_power(Phi, j) @ P)[0, 0] / P[0, 0] for j in k])
    np.testing.assert_allclose(exact, oscillator_rho(k / fs, fn, zeta), atol=1e-10)
    # var x = 1 / (4 zeta wn^3) for unit white-noise intensity (Crandall & Mark 1963, from memory)
    assert P[0, 0] == pytest.approx(1 / (4 * zeta * (2 * np.pi * fn) ** 3), rel=1e-10)


def test_estimated_oscillator_and_low_pass_correlations_follow_closed_forms():
    rng = np.random.default_rng(12)
    fs, fn, zeta = 20.0, 2.0, 0.04
    x, _, _ = simulate_oscillator(40000, 1, fs, fn, zeta, rng)
    est = correlate_block(x, fs, 4.0, pairs="auto")
    se = bartlett_stderr(est.coefficient, est.coefficient, est.coefficient, est.pair_count)
    zscore = (est.coefficient - oscillator_rho(est.lags_s, fn, zeta)) / np.where(se > 0, se, 1)
    assert np.max(np.abs(zscore)) < 4.5
    # first-order low-pass noise (AR(1) = its exact discretisation): rho = exp(-|tau|/tau_c)
    tau_c, fs2 = 0.5, 50.0
    phi = np.exp(-1 / (fs2 * tau_c))
    y = simulate_ar1(phi, 50000, 1, rng)
    est2 = correlate_block(y, fs2, 2.0, pairs="auto")
    se2 = bartlett_stderr(est2.coefficient, est2.coefficient, est2.coefficient, est2.pair_count)
    z2 = (est2.coefficient - np.exp(-np.abs(est2.lags_s) / tau_c)) / np.where(se2 > 0, se2, 1)
    assert np.max(np.abs(z2)) < 4.5


def test_statistical_bandwidth_closed_forms():
    # low-pass G(f) = 1 / (1 + (2 pi f tau_c)^2): B_s = 1 / (2 tau_c) (Bendat & Piersol Sec. 8.2)
    tau_c = 0.05
    f = np.linspace(0, 5000.0, 2_000_001)
    G = 1 / (1 + (2 * np.pi * f * tau_c) ** 2)
    assert err.statistical_bandwidth(f, G) == pytest.approx(1 / (2 * tau_c), rel=2e-3)
    # ideal band-limited white noise of bandwidth B: B_s = B
    box = ((f >= 100) & (f <= 130)).astype(float)
    assert err.statistical_bandwidth(f, box) == pytest.approx(30.0, rel=1e-3)
    # from an estimated AR(1) correlation: lag-domain exact form B = 1 / (2 dt (1+phi^2)/(1-phi^2))
    rng = np.random.default_rng(5)
    phi, fs = 0.8, 100.0
    y = simulate_ar1(phi, 200000, 1, rng)
    est = correlate_block(y, fs, 1.0, pairs="auto")
    freqs, psd = lag_window_psd(est.R[0], fs)
    assert np.trapezoid(psd, freqs) == pytest.approx(est.R[0][est.max_lag], rel=1e-9)  # = R(0)
    expected = 1 / (2 / fs * (1 + phi**2) / (1 - phi**2))
    assert err.statistical_bandwidth(freqs, psd) == pytest.approx(expected, rel=0.03)


def test_general_and_closed_form_errors_for_band_limited_white_noise():
    # rho(tau) = sinc(2 B tau). General variance integral: var R/R(0)^2 = [1 + rho(2 tau)]/(2BT);
    # Bendat & Piersol closed form: [1 + rho(tau)^2]/(2BT). Equal at tau = 0 and where
    # rho(2 tau) = rho(tau)^2; at tau = 1/(4B) the closed form is sqrt(1.405) = 1.185x larger.
    B, fs, L, N = 5.0, 40.0, 4000, 100000
    T = N / fs
    tau = np.arange(-L, L + 1) / fs
    rho = np.sinc(2 * B * tau)
    count = np.full(2 * L + 1, N)
    general = err.correlation_random_error(rho, rho, rho, count)
    closed = err.correlation_rel_error(rho, B, T)
    zero, quarter = L, L + int(fs / (4 * B))
    np.testing.assert_allclose(general[zero], 1 / np.sqrt(B * T), rtol=1e-3)  # exact at zero lag
    np.testing.assert_allclose(closed[zero], 1 / np.sqrt(B * T), rtol=1e-12)
    np.testing.assert_allclose(
        general[quarter], np.sqrt((1 + np.sinc(4 * B * tau[quarter])) / (2 * B * T)) / rho[quarter], rtol=1e-3
    )
    assert closed[quarter] / general[quarter] == pytest.approx(np.sqrt(1 + (2 / np.pi) ** 2), rel=2e-3)
    # pure-delay peak: b(t) = a(t - D) gives rho_ab(tau) = rho(tau - D); closed form exact there
    D = 37
    rho_ab = np.sinc(2 * B * (tau - D / fs))
    general_delay = err.correlation_random_error(rho_ab, rho, rho, count)
    np.testing.assert_allclose(general_delay[L + D], err.correlation_rel_error(1.0, B, T), rtol=1e-3)


def test_mean_square_error_closed_form_against_simulation():
    # eps = 1/sqrt(BT) for band-limited white noise (Bendat & Piersol Sec. 8.2)
    rng = np.random.default_rng(31)
    n, reps, fs, B = 4000, 800, 20.0, 2.5
    spectrum = np.fft.rfft(rng.standard_normal((n, reps)), axis=0)
    f = np.fft.rfftfreq(n, 1 / fs)
    spectrum[f > B] = 0.0
    x = np.fft.irfft(spectrum, n=n, axis=0)
    ms = np.mean(x**2, axis=0)
    simulated = ms.std() / ms.mean()
    assert simulated == pytest.approx(err.mean_square_rel_error(B, n / fs), rel=0.08)  # 800 reps: ~2.5 % sd


def test_required_record_length_inverts_the_closed_forms():
    assert err.required_record_length(10.0, 0.05) == pytest.approx(40.0)  # 1/(B eps^2)
    T = err.required_record_length(10.0, 0.05, rho=0.5)
    assert err.correlation_rel_error(0.5, 10.0, T) == pytest.approx(0.05)
    assert err.mean_square_rel_error(10.0, 40.0) == pytest.approx(0.05)


def test_effective_samples_of_ar1():
    # variance of the mean of AR(1): sigma^2 (1 + phi)/(N (1 - phi)) (Box, Jenkins & Reinsel
    # Sec. 2.1.5, from memory), i.e. N_eff = N (1 - phi)/(1 + phi)
    phi, N, dt = 0.9, 10000, 0.01
    rho = phi ** np.arange(0, 600)
    T_I = integral_time_scale(rho, dt)
    assert T_I == pytest.approx(dt * (1 + phi) / (2 * (1 - phi)), rel=1e-9)
    assert err.effective_samples(N * dt, T_I, N) == pytest.approx(N * (1 - phi) / (1 + phi), rel=1e-9)
    # from an estimate (integrated to its first zero crossing)
    y = simulate_ar1(phi, N, 1, np.random.default_rng(3))
    est = correlate_block(y, 1 / dt, 3.0, pairs="auto")
    T_hat = integral_time_scale(est.coefficient[0][est.max_lag :], dt)
    assert T_hat == pytest.approx(T_I, rel=0.25)
    # white noise: T_I = dt/2, N_eff = N
    assert err.effective_samples(N * dt, dt / 2, N) == pytest.approx(N)


# ------------------------------------------------------------------------------------------
# random-phase tone


@pytest.mark.parametrize("T, tau, theta", [(3.0, 0.4, 0.3), (7.7, -1.1, 2.0), (0.9, 2.5, -1.2)])
def test_tone_time_average_matches_quadrature_and_samples(T, tau, theta):
    A, w0 = 1.7, 2.3
    x = lambda t: A * np.cos(w0 * t + theta)  # noqa: E731
    quad, _ = scipy.integrate.quad(lambda t: x(t) * x(t + tau), -T, T, limit=200)
    formula = err.tone_time_average(A, w0, T, tau, theta)
    assert formula == pytest.approx(quad / (2 * T), rel=1e-9, abs=1e-12)  # scipy quadrature
    t = np.linspace(-T, T, 400001)  # simulation: sampled tone, trapezoidal time average
    sampled = np.trapezoid(x(t) * x(t + tau), t) / (2 * T)
    assert formula == pytest.approx(sampled, abs=1e-8)


def test_tone_bound_ten_over_w0_keeps_error_within_five_percent():
    w0 = 3.0
    T = err.tone_required_half_length(w0, 0.05)
    assert T == pytest.approx(10 / w0)
    tau, theta = np.meshgrid(np.linspace(-5, 5, 201), np.linspace(0, np.pi, 181))
    error = err.tone_time_average(1.0, w0, T, tau, theta) - 0.5 * np.cos(w0 * tau)
    assert np.max(np.abs(error)) / 0.5 <= 0.05
    # and the estimator sees that error: sampled tone correlated over a 2T record
    fs, theta0 = 200.0, 0.7
    t = np.arange(-T, T, 1 / fs)
    est = correlate_block(np.cos(w0 * t + theta0), fs, 0.0, pairs="auto", detrend="none")
    assert est.R[0][0] == pytest.approx(float(err.tone_time_average(1.0, w0, T, 0.0, theta0)), abs=2e-3)


def test_strongest_tone_found_in_noise_and_absent_without_tone():
    rng = np.random.default_rng(17)
    n, fs = 20000, 50.0
    t = np.arange(n) / fs
    noise = rng.standard_normal((n, 4))
    noise[:, 1] += 0.5 * np.cos(2 * np.pi * 7.3 * t + 1.0)
    spectra = channel_spectra(noise, fs, 1.0)
    assert spectra.n_segments > 4  # a block-averaged periodogram
    freq, _ = strongest_tone(spectra.frequencies_hz(), spectra.periodogram(), n_averaged=spectra.n_segments)
    assert freq[1] == pytest.approx(7.3, abs=fs / spectra.segment_fft_length)
    assert np.isnan(freq[[0, 2, 3]]).all()
    # the threshold keeps the false-alarm probability of a broadband bin fixed:
    # Gamma(K, 1/K) quantiles (scipy.stats.gamma); K = 1 gives the 20 dB rule
    assert tone_ratio(1) == pytest.approx(100, rel=0.01)
    assert tone_ratio(10) < tone_ratio(2) < tone_ratio(1)


# ------------------------------------------------------------------------------------------
# validity checks and their invariants


def test_checks_flag_invalid_estimates():
    L = 5
    good = 0.5 ** np.abs(np.arange(-L, L + 1))
    freqs, psd = lag_window_psd(good, 1.0)
    assert err.auto_correlation_checks(good, 1.0, psd) == []
    assert "r0_mismatch" in err.auto_correlation_checks(good, 1.2, psd)
    odd = good.copy()
    odd[L + 1] = 0.9
    assert "auto_not_even" in err.auto_correlation_checks(odd, 1.0, psd)
    above = good * 1.0
    above[[L - 2, L + 2]] = 1.3
    assert "coefficient_exceeds_one" in err.auto_correlation_checks(above, 1.0, psd)
    not_psd = np.zeros(2 * L + 1)
    not_psd[L] = 1.0
    not_psd[[L - 1, L + 1]] = 0.95
    not_psd[[L - 2, L + 2]] = -0.95  # not positive semi-definite: spectrum negative somewhere
    _, bad_psd = lag_window_psd(not_psd, 1.0)
    assert "negative_psd" in err.auto_correlation_checks(not_psd, 1.0, bad_psd)


@st.composite
def gappy_blocks(draw):
    n = draw(st.integers(40, 160))
    c = draw(st.integers(1, 3))
    values = draw(arrays(np.float64, (n, c), elements=st.floats(-1e3, 1e3, allow_nan=False)))
    nan_mask = draw(arrays(np.bool_, (n, c), elements=st.booleans()))
    x = np.where(nan_mask & (np.arange(n)[:, None] % 3 == 0), np.nan, values)
    L = draw(st.integers(0, n // 3))
    detrend = draw(st.sampled_from(["mean", "none", "linear"]))
    segment_length = draw(st.one_of(st.none(), st.integers(1, n)))
    return x, L, detrend, segment_length


@settings(max_examples=150, deadline=None)
@given(gappy_blocks())
def test_biased_estimate_satisfies_validity_invariants(case):
    x, L, detrend, segment_length = case
    spectra = channel_spectra(x, 2.0, L / 2.0, detrend=detrend, segment_length=segment_length)
    est = correlate_spectra(spectra, "all", min_pairs=1)
    n = x.shape[0]
    k = np.abs(np.arange(-L, L + 1))
    assert np.all(est.pair_count <= n - k) and np.all(est.pair_count >= 0)
    for row, (a, b) in enumerate(est.pairs):
        if est.scale[row] <= 1e-9 * np.nanmax(np.abs(x)) ** 2 or np.nanmax(np.abs(x)) == 0:
            continue  # zero-variance channel: coefficients are NaN by design
        rho = est.coefficient[row]
        finite = np.isfinite(rho)
        assert np.all(np.abs(rho[finite]) <= 1 + 1e-9)  # Cauchy-Schwarz for the biased estimate
        if a == b:
            _, psd = lag_window_psd(est.R[row], 2.0)
            assert err.auto_correlation_checks(est.R[row], spectra.mean_square[a], psd) == []
        se = bartlett_stderr(
            rho, est.coefficient[est.pairs.index((a, a))], est.coefficient[est.pairs.index((b, b))], est.pair_count[row]
        )
        assert np.all(se[finite & (est.pair_count[row] > 0)] >= 0)


@settings(max_examples=40, deadline=None)
@given(arrays(np.float64, st.integers(2, 60), elements=st.floats(-1, 1)), st.floats(1e-3, 10), st.integers(1, 10000))
def test_effective_samples_stay_within_one_and_n(rho_tail, dt, n):
    rho = np.concatenate([[1.0], rho_tail])
    T_I = integral_time_scale(rho, dt)
    # reference: np.trapezoid to the last lag before the first rho <= 0, plus the triangle to
    # the linearly interpolated zero (closed form of the trapezoid rule's last piece)
    below = np.nonzero(rho <= 0)[0]
    if len(below) == 0:
        reference = np.trapezoid(rho, dx=dt)
    else:
        k = int(below[0])
        reference = np.trapezoid(rho[:k], dx=dt) + 0.5 * rho[k - 1] * rho[k - 1] / (rho[k - 1] - rho[k]) * dt
    assert T_I == pytest.approx(reference, rel=1e-9, abs=1e-12 * dt)
    value = err.effective_samples(n * dt, T_I, n)
    assert 1.0 <= value <= n


@pytest.mark.parametrize("n", [40, 160])
def test_coefficient_at_lag_zero_is_one_for_tiny_mean_squares(n):
    """rho(0) = 1 exactly in theory (Cauchy-Schwarz bound attained); a record of values near
    1e-79 has a mean square near 1e-159, whose square is subnormal: the normalisation must not
    go through it (the property test above found rho(0) = 1 + 8e-8 there)."""
    x = np.zeros((n, 1))
    x[0, 0] = 3.3159812e-79
    est = correlate_spectra(channel_spectra(x, 2.0, 0.0, detrend="mean"), "all", min_pairs=1)
    assert est.coefficient[0][0] == pytest.approx(1.0, abs=1e-12)
