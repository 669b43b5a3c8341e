"""Modal frequency and damping against the exact oscillator correlation, simulated oscillators
(exact discretisation), scipy.optimize.curve_fit, and the scatter across windows."""

import numpy as np
import pytest
import scipy.optimize

from corrtransforms.numerics.modal_fit import decaying_cosine, fit_decaying_cosine, fit_mode
from tests.support.indicator_fixtures import (
    auto_record,
    modal_state_space,
    sdof_correlation,
    simulate_sdof,
    simulate_state_space,
)

FS = 50.0


@pytest.mark.parametrize("fn, zeta", [(2.0, 0.02), (5.0, 0.005), (1.0, 0.1)])
def test_exact_sdof_correlation_is_fitted_to_1e6(fn, zeta):
    # exact correlation exp(-zeta wn tau)[cos wd tau + zeta/sqrt(1-zeta^2) sin wd tau]
    # (Bendat & Piersol Sec. 6.1, from memory) = decaying cosine with A = 1/sqrt(1-zeta^2),
    # phi = -arcsin(zeta) (trigonometric identity)
    lags = np.arange(int(30 * FS) + 1) / FS
    rho = sdof_correlation(lags, fn, zeta)
    stderr = np.full_like(rho, 0.01)
    fit = fit_mode(rho, stderr, 1 / FS, (0.7 * fn, 1.3 * fn))
    assert fit.quality == ()
    assert fit.freq_hz == pytest.approx(fn, rel=1e-6)
    assert fit.damping == pytest.approx(zeta, rel=1e-6)
    assert fit.amplitude == pytest.approx(1 / np.sqrt(1 - zeta**2), rel=1e-6)
    assert fit.phase_rad == pytest.approx(-np.arcsin(zeta), abs=1e-6)


def test_least_squares_agrees_with_curve_fit():
    rng = np.random.default_rng(2)
    rho, se = auto_record(simulate_sdof(2.0, 0.02, FS, 30000, rng), FS, 20.0, band_hz=(1.5, 2.5))
    lags = np.arange(50, 440)
    tau, y, sigma = lags / FS, rho[lags], se[lags]
    start = [1.0, 1.98, 0.03, 0.1]
    bounds = ([0, 1.0, 1e-6, -2 * np.pi], [np.inf, 3.0, 0.95, 2 * np.pi])
    ours, ok = fit_decaying_cosine(tau, y, sigma, start, bounds)
    # independent reference: scipy.optimize.curve_fit, numerical Jacobian, same weights
    theirs, _ = scipy.optimize.curve_fit(
        decaying_cosine, tau, y, p0=start, sigma=sigma, absolute_sigma=True, bounds=bounds, xtol=1e-14, ftol=1e-14
    )
    assert ok
    np.testing.assert_allclose(ours[1:3], theirs[1:3], rtol=1e-5)


def _window_fits(x, n, band, max_lag_s=20.0):
    return [
        fit_mode(*auto_record(x[k * n : (k + 1) * n], FS, max_lag_s, band_hz=band), 1 / FS, band)
        for k in range(len(x) // n)
    ]


def test_simulated_sdof_frequency_damping_and_stderr():
    # white-noise driven oscillator, fn = 2 Hz, zeta = 0.02, exact discretisation (Van Loan);
    # 24 windows of 600 s; NExT band 1.5-2.5 Hz
    fn, zeta, n = 2.0, 0.02, 30000
    x = simulate_sdof(fn, zeta, FS, 24 * n, np.random.default_rng(3))
    fits = _window_fits(x, n, (1.5, 2.5))
    assert all(f.quality == () for f in fits)
    freq = np.array([f.freq_hz for f in fits])
    damping = np.array([f.damping for f in fits])
    assert np.median(freq) == pytest.approx(fn, rel=0.005)
    assert np.median(damping) == pytest.approx(zeta, rel=0.15)
    # reported stderr consistent with the scatter across windows (factor 1.5); with 80 windows
    # the ratios are 0.89 (frequency) and 0.94 (damping)
    for values, errors in ((freq, [f.freq_stderr_hz for f in fits]), (damping, [f.damping_stderr for f in fits])):
        ratio = np.std(values, ddof=1) / np.median(errors)
        assert 1 / 1.5 < ratio < 1.5, ratio


def test_two_mode_system_each_mode_from_its_band():
    # 2-DOF system (unit masses, rotated mode shapes) with modes 1.5 Hz / 2 % and 6 Hz / 3 %,
    # independent white forces on both masses; one sensor on mass 1 sees both modes
    modes = [(1.5, 0.02), (6.0, 0.03)]
    A, B = modal_state_space([m[0] for m in modes], [m[1] for m in modes], rotation_rad=0.6)
    n = 15000
    x = simulate_state_space(A, B, FS, 12 * n, np.random.default_rng(4), n_outputs=1)[:, 0]
    for (fn, zeta), band in zip(modes, [(1.0, 2.0), (5.0, 7.0)]):
        fits = _window_fits(x, n, band, max_lag_s=15.0)
        assert np.median([f.freq_hz for f in fits]) == pytest.approx(fn, rel=0.005)
        assert np.median([f.damping for f in fits]) == pytest.approx(zeta, rel=0.15)


def test_quality_codes_instead_of_garbage():
    lags = np.arange(501) / FS
    rho = sdof_correlation(lags, 2.0, 0.02)
    se = np.full_like(rho, 0.01)
    out = fit_mode(rho, se, 1 / FS, (20.0, 26.0))
    assert out.quality == ("band_outside_nyquist",) and np.isnan(out.freq_hz)
    short = fit_mode(rho[:30], se[:30], 1 / FS, (1.5, 2.5))  # 0.6 s: about one period
    assert "too_few_cycles" in short.quality and np.isnan(short.damping)
    unweighted = fit_mode(rho, np.full_like(rho, np.nan), 1 / FS, (1.5, 2.5))
    assert unweighted.quality == ("no_stderr",) and np.isnan(unweighted.damping_stderr)
    assert unweighted.damping == pytest.approx(0.02, rel=1e-6)
    noise = np.random.default_rng(0).standard_normal(501) * 0.05
    noise[0] = 1.0
    junk = fit_mode(noise, np.full(501, 0.05), 1 / FS, (1.5, 2.5))
    assert np.isnan(junk.freq_hz) and junk.quality
    with pytest.raises(ValueError):
        fit_mode(rho, se[:-1], 1 / FS, (1.5, 2.5))


@pytest.mark.parametrize("start, count", [(40, 300), (5, 2600)])  # contiguous, and strided (> 1024 lags)
def test_correlated_meat_equals_the_dense_bartlett_quadratic_form(start, count):
    # Bartlett (1946); Box, Jenkins & Reinsel Eq. (2.1.12), from memory:
    # n cov[r_i, r_j] = sum_v rho_v rho_{v+j-i} + rho_{v+j} rho_{v-i} - 2 rho_i rho_v rho_{v-j}
    #                   - 2 rho_j rho_v rho_{v-i} + 2 rho_i rho_j rho_v^2, summed here with
    # numpy.correlate over the even extension, as a dense matrix
    from corrtransforms.numerics.bartlett import MAX_COVARIANCE_LAGS
    from corrtransforms.numerics.modal_fit import _correlated_meat

    rng = np.random.default_rng(4)
    L = 3000
    model = decaying_cosine(np.arange(L + 1) / FS, 1.0, 2.0, 0.01, -0.01)
    model[0] = 1.0
    lags = np.arange(start, start + count)
    Jw = rng.normal(size=(count, 4))
    sig = rng.uniform(0.5, 2.0, count)
    stride = int(np.ceil(count / MAX_COVARIANCE_LAGS))
    if stride > 1:  # the function's grouping of neighbouring lags, repeated here
        groups = np.arange(count) // stride
        G = np.stack([np.bincount(groups, weights=Jw[:, m] / sig) for m in range(4)], axis=1)
        nodes = lags[::stride] + (stride - 1) // 2
    else:
        G, nodes = Jw / sig[:, None], lags
    even = np.concatenate([model[:0:-1], model])
    c = np.correlate(even, even, "full")[2 * L :]  # c(m) = sum_v rho_v rho_{v+m}, m = 0..2L
    i, j = nodes[:, None], nodes[None, :]
    kernel = c[np.abs(j - i)] + c[i + j] - 2 * model[i] * c[j] - 2 * model[j] * c[i] + 2 * model[i] * model[j] * c[0]
    expected = 0.3**2 * G.T @ kernel @ G
    got = _correlated_meat(Jw, model, lags, sig, 0.3)
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-9 * np.abs(expected).max())
