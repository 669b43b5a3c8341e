"""Correlation time and decay time against closed forms, scipy.signal.hilbert and Monte Carlo."""

import numpy as np
import pytest
import scipy.optimize
import scipy.signal
import scipy.special

from corrtransforms.numerics.bartlett import bartlett_kernel, lag_error_covariance
from corrtransforms.numerics.envelope import correlation_envelope
from corrtransforms.numerics.timescales import corr_time_s, decay_time_s
from tests.support.indicator_fixtures import auto_record, sdof_correlation, simulate_ou

FS = 50.0


def _sdof_integral(t, fn, zeta):
    """Antiderivative of the exact oscillator correlation (closed form, integration by parts of
    exp(-a t) cos(b t) and exp(-a t) sin(b t); Gradshteyn & Ryzhik 2.663, from memory)."""
    wn = 2 * np.pi * fn
    a, b = zeta * wn, wn * np.sqrt(1 - zeta**2)
    e = np.exp(-a * t)
    cos_part = e * (b * np.sin(b * t) - a * np.cos(b * t)) / wn**2
    sin_part = e * (-a * np.sin(b * t) - b * np.cos(b * t)) / wn**2
    return cos_part + (a / b) * sin_part


def test_ou_exact_integral_matches_closed_form():
    # exp(-tau/tau_c) never crosses zero: the integral stops at 5 tau_e = 5 tau_c, where it is
    # tau_c (1 - exp(-5)) (closed form); trapezoid error (dt^2/12) [f'(5 tau_c) - f'(0)] = O(1e-5)
    # relative at dt = tau_c / 100
    tau_c, dt = 0.5, 0.005
    lags = np.arange(2001) * dt
    rho = np.exp(-lags / tau_c)
    result = corr_time_s(rho, np.full_like(rho, 0.01), dt)
    assert result.quality == ()
    assert result.value == pytest.approx(tau_c * (1 - np.exp(-5.0)), rel=1e-4)
    # a lag range shorter than 5 tau_c: the integral to max_lag, a lower bound, with its code
    short = corr_time_s(rho[:401], np.full(401, 0.01), dt)
    assert short.quality == ("no_zero_crossing",)
    assert short.value == pytest.approx(tau_c * (1 - np.exp(-lags[400] / tau_c)), rel=1e-4)


def test_sdof_exact_integral_to_first_zero_and_to_infinity():
    fn, zeta, dt = 2.0, 0.05, 1 / 400.0
    lags = np.arange(int(40 / dt) + 1) * dt
    rho = sdof_correlation(lags, fn, zeta)
    wn = 2 * np.pi * fn
    b = wn * np.sqrt(1 - zeta**2)
    tau0 = (np.pi - np.arctan(b / (zeta * wn))) / b  # first zero of cos bt + (a/b) sin bt
    first = corr_time_s(rho, np.full_like(rho, 0.01), dt)
    expected = _sdof_integral(tau0, fn, zeta) - _sdof_integral(0.0, fn, zeta)
    assert first.quality == ()
    assert first.value == pytest.approx(expected, rel=2e-4)
    # integral to infinity = 2 zeta / wn (Bendat & Piersol, integral time scale of the
    # white-noise driven oscillator; e^{-a L} = e^{-25} makes the truncation negligible)
    full = corr_time_s(rho, np.full_like(rho, 0.01), dt, until="max_lag")
    assert full.value == pytest.approx(2 * zeta / wn, rel=1e-3)


def _exponential_envelope_root():
    """1/e root of |e^-t + i H(t)|, H(t) = [e^-t Ei(t) + e^t E1(t)] / pi the Hilbert transform of
    exp(-|t|) (closed form; scipy.special.expi, exp1): 1.9134."""

    def envelope(t):
        h = (np.exp(-t) * scipy.special.expi(t) + np.exp(t) * scipy.special.exp1(t)) / np.pi
        return np.hypot(np.exp(-t), h)

    return scipy.optimize.brentq(lambda t: envelope(t) - np.exp(-1), 0.5, 5.0)


@pytest.mark.parametrize("max_lag_tau_c", [5, 10, 20])
def test_decay_time_of_an_exponential_is_the_analytic_root_whatever_max_lag(max_lag_tau_c):
    # acceptance: within 1 % of the analytic 1.9134 tau_c at every max_lag from 5 to 20 tau_c
    # (the circular FFT transform gave 1.71 / 1.85 / 1.90 tau_c)
    tau_c, dt = 0.2, 0.2 / 50
    lags = np.arange(int(round(max_lag_tau_c * tau_c / dt)) + 1) * dt
    value = decay_time_s(np.exp(-lags / tau_c), np.full_like(lags, 0.01), dt).value
    root = _exponential_envelope_root()
    assert root == pytest.approx(1.9134, abs=1e-3)
    assert value / tau_c == pytest.approx(root, rel=0.005)


def test_decay_time_does_not_move_with_max_lag():
    tau_c, dt = 0.2, 1 / FS
    values = [
        decay_time_s(
            np.exp(-np.arange(int(m * tau_c * FS) + 1) * dt / tau_c), np.full(int(m * tau_c * FS) + 1, 0.01), dt
        ).value
        for m in (5, 20)
    ]
    assert values[0] == pytest.approx(values[1], rel=0.01)


def test_decay_time_of_a_lightly_damped_mode_is_the_free_decay_constant():
    # narrow band: envelope ~ exp(-zeta wn tau), 1/e at 1/(zeta wn) (free-decay time constant,
    # Bendat & Piersol, Random Data, 4th ed., Sec. 13.1 (from memory))
    fn, zeta, dt = 2.0, 0.02, 1 / FS
    for n_lags in (501, 1001, 2001):
        rho = sdof_correlation(np.arange(n_lags) * dt, fn, zeta)
        result = decay_time_s(rho, np.full_like(rho, 0.01), dt)
        assert result.value == pytest.approx(1 / (zeta * 2 * np.pi * fn), rel=0.01)


def test_decay_time_stderr_covers_on_simulated_ou_windows():
    # Monte Carlo: 160 OU windows (tau_c = 0.2 s, 60 s = 300 tau_c), truth the analytic root
    # 1.9134 tau_c; error propagated through the Hilbert transform with Bartlett's (1946)
    # lag-error covariance. 95 % nominal; binomial sd at n = 160 is 1.7 %, tolerance 3 sd
    tau_c, n, windows = 0.2, 3000, 160
    rng = np.random.default_rng(21)
    x = simulate_ou(tau_c, FS, n * windows, rng)
    truth = _exponential_envelope_root() * tau_c
    z = []
    for k in range(windows):
        rho, se = auto_record(x[k * n : (k + 1) * n], FS, 10 * tau_c)
        d = decay_time_s(rho, se, 1 / FS)
        z.append((d.value - truth) / d.stderr)
    coverage = np.mean(np.abs(z) < 1.96)
    assert 0.95 - 3 * 0.017 < coverage < 0.95 + 3 * 0.017, coverage


def test_envelope_of_decaying_cosine_is_its_exponential():
    # Bedrosian: H[A(t) cos(w t)] = A(t) sin(w t) when A is low-pass and w above its band
    dt, a, w = 0.01, 0.3, 2 * np.pi * 3.0
    lags = np.arange(2001) * dt
    env = correlation_envelope(np.exp(-a * lags) * np.cos(w * lags))
    middle = slice(50, 1000)
    np.testing.assert_allclose(env[middle], np.exp(-a * lags[middle]), rtol=0.01)


def test_simulated_ou_corr_time_decay_time_and_stderr_against_scatter():
    # OU noise with tau_c = 0.2 s (exact AR(1) discretisation), 30 windows of 120 s
    tau_c, n, windows = 0.2, 6000, 30
    rng = np.random.default_rng(11)
    x = simulate_ou(tau_c, FS, n * windows, rng)
    corr, corr_sd, decay, decay_sd, naive = [], [], [], [], []
    for k in range(windows):
        rho, se = auto_record(x[k * n : (k + 1) * n], FS, 10 * tau_c)
        c = corr_time_s(rho, se, 1 / FS)
        d = decay_time_s(rho, se, 1 / FS)
        corr.append(c.value), corr_sd.append(c.stderr), decay.append(d.value), decay_sd.append(d.stderr)
        upto = int(np.ceil(c.value * FS))
        naive.append(np.sqrt(np.sum((se[:upto] / FS) ** 2)))
    corr, decay = np.array(corr), np.array(decay)
    # integral to the first zero of the estimate: tau_c up to the estimator's bias (~1/sqrt(n))
    assert np.median(corr) == pytest.approx(tau_c, rel=0.1)
    assert np.median(decay) == pytest.approx(_exponential_envelope_root() * tau_c, rel=0.1)
    # error propagation with Bartlett's lag covariance agrees with the scatter (factor 1.5;
    # measured 1.37: the random end point of a noisy crossing adds a little);
    # treating lag errors as independent understates it several-fold
    ratio = np.std(corr, ddof=1) / np.median(corr_sd)
    assert 1 / 1.5 < ratio < 1.5, ratio
    assert np.std(corr, ddof=1) / np.median(naive) > 5  # measured: 26
    ratio_decay = np.std(decay, ddof=1) / np.median(decay_sd)
    assert 1 / 2 < ratio_decay < 2, ratio_decay


def test_bartlett_kernel_of_white_noise_is_identity():
    # white noise: n cov[r_i, r_j] = delta_ij for i, j >= 1 (Bartlett 1946; Box-Jenkins 2.1.13)
    rho = np.zeros(21)
    rho[0] = 1.0
    K = bartlett_kernel(rho, np.arange(1, 21))
    np.testing.assert_allclose(K, np.eye(20), atol=1e-12)
    # AR(1), lag 1: n var r_1 = 1 - phi^2 (Box, Jenkins & Reinsel Eq. (2.1.15), from memory)
    phi = 0.6
    rho = phi ** np.arange(200)
    assert bartlett_kernel(rho, [1])[0, 0] == pytest.approx(1 - phi**2, rel=1e-9)
    cov = lag_error_covariance(rho, np.full(200, 0.1), [0, 1, 2])
    assert cov[0, 0] == 0 and cov[1, 1] == pytest.approx(0.01)


def test_bad_numbers_give_nan_and_code():
    rho = np.exp(-np.arange(50) / 10.0)
    rho[3] = np.nan
    assert corr_time_s(rho, np.ones(50), 0.1).quality == ("nonfinite_correlation",)
    assert np.isnan(decay_time_s(rho, np.ones(50), 0.1).value)
    assert corr_time_s(np.ones(2), np.ones(2), 0.1).quality == ("too_few_lags",)
    assert decay_time_s(np.ones(50), np.ones(50), 0.1).quality == ("no_envelope_crossing",)
    with pytest.raises(ValueError):
        corr_time_s(np.ones(5), np.ones(4), 0.1)


def test_envelope_of_rows_equals_scipy_hilbert_row_by_row():
    # reference: scipy.signal.hilbert of the even extension (auto) or of the lags as given
    # (cross), one row at a time; the batched call must give the same bits per row
    from corrtransforms.numerics.envelope import analytic_correlation

    rng = np.random.default_rng(12)
    rows = rng.standard_normal((4, 60))
    for r in rows:
        full = np.concatenate([r[:0:-1], r])
        np.testing.assert_array_equal(analytic_correlation(r), scipy.signal.hilbert(full)[59:])
    np.testing.assert_array_equal(
        correlation_envelope(rows, auto=False), np.stack([np.abs(scipy.signal.hilbert(r)) for r in rows])
    )
    np.testing.assert_array_equal(correlation_envelope(rows), np.stack([correlation_envelope(r) for r in rows]))


def test_corr_time_stderr_covers_on_simulated_ou_windows():
    # Monte Carlo: 160 OU windows (tau_c = 0.2 s, 120 s, 300 effective samples); truth the
    # trapezoid integral of phi^k to infinity, dt (1 + phi) / (2 (1 - phi)) (closed form);
    # error: Bartlett's (1946) lag covariance plus the random end point (measured 0.94, 0.92
    # without the end-point term). 95 % nominal; binomial sd 1.7 % at n = 160, tolerance 3 sd
    tau_c, n, windows = 0.2, 6000, 160
    x = simulate_ou(tau_c, FS, n * windows, np.random.default_rng(22))
    phi = np.exp(-1 / (FS * tau_c))
    truth = (1 + phi) / (2 * (1 - phi)) / FS
    z = []
    for k in range(windows):
        rho, se = auto_record(x[k * n : (k + 1) * n], FS, 10 * tau_c)
        c = corr_time_s(rho, se, 1 / FS)
        z.append((c.value - truth) / c.stderr)
    coverage = np.mean(np.abs(z) < 1.96)
    assert 0.95 - 3 * 0.017 < coverage < 0.95 + 3 * 0.017, coverage
