"""The truths of benchmarks/calibration.py against outside references (not the tool's coverage).

Each check is small and fast: the generators really produce the law whose closed form the
calibration matrix uses as its truth.
"""

import math

import numpy as np
import scipy.fft
import scipy.linalg
import scipy.optimize
import scipy.special
from statsmodels.tsa.stattools import acf

from benchmarks import calibration as cal


def test_ar1_sample_autocorrelation_matches_phi_power_k():
    # reference: statsmodels.tsa.stattools.acf of a long record vs rho(k) = phi^k
    # (Box, Jenkins & Reinsel Sec. 3.2.4); 200 000 samples give sd(r_k) < 0.01 at phi = 0.9
    rng = np.random.default_rng(1)
    phi = 0.9
    x = cal.ar1_records(rng, 200_000, phi)
    r = acf(x, nlags=10, fft=True)
    assert np.allclose(r, cal.ar1_autocorrelation(phi, np.arange(11)), atol=0.02)
    assert abs(np.std(x) - cal.ar1_rms(1.0, phi)) < 0.05 * cal.ar1_rms(1.0, phi)


def test_oscillator_model_correlation_is_the_closed_form():
    # reference: the exact correlation of the state-space model, first row of expm(F tau) P,
    # against rho(tau) of the white-noise driven oscillator (Bendat & Piersol Sec. 6.1, from memory)
    osc = cal.Oscillator(2.0, 0.03, 20.0)
    wn = 2 * math.pi * osc.freq_hz
    F = np.array([[0.0, 1.0], [-wn * wn, -2 * osc.damping * wn]])
    _, _, P = osc.matrices()
    tau = np.arange(0, 200) / osc.fs
    model = np.array([(scipy.linalg.expm(F * t) @ P)[0, 0] for t in tau]) / P[0, 0]
    assert np.allclose(model, cal.sdof_autocorrelation(tau, osc.freq_hz, osc.damping), atol=1e-10)


def test_oscillator_record_has_the_model_autocorrelation():
    # reference: statsmodels acf of a long simulated record vs the closed form at a few lags
    osc = cal.Oscillator(2.0, 0.05, 20.0)
    x = osc.record(np.random.default_rng(2), 200_000)
    lags = np.arange(0, 30)
    r = acf(x, nlags=lags[-1], fft=True)
    assert np.allclose(r, cal.sdof_autocorrelation(lags / osc.fs, osc.freq_hz, osc.damping), atol=0.03)
    assert abs(np.var(x) - 1.0) < 0.05


def test_envelope_decay_time_of_an_exponential_is_the_hilbert_root():
    # reference: the 1/e root of |e^-t + i H(t)| with H(t) = [e^-t Ei(t) + e^t E1(t)] / pi, the
    # Hilbert transform of exp(-|t|) (scipy.special.expi, exp1); 1.9134 t_c
    def envelope(t):
        h = (np.exp(-t) * scipy.special.expi(t) + np.exp(t) * scipy.special.exp1(t)) / np.pi
        return math.hypot(math.exp(-t), h)

    root = scipy.optimize.brentq(lambda t: envelope(t) - math.exp(-1), 0.5, 5.0)
    dt = 0.01
    tau = np.arange(0, 200 + dt / 2, dt)
    assert abs(cal.envelope_decay_time(np.exp(-tau), dt) - root) < 2e-3
    assert abs(root - 1.9134) < 1e-3


def test_integral_to_first_zero_matches_closed_forms():
    # reference: geometric series, trapezoid of phi^k over 0..J = dt [(1 - phi^(J+1))/(1 - phi) - (1 + phi^J)/2],
    # J = floor(5 tau_e), tau_e the interpolated first lag with phi^k <= 1/e (k_e = ceil(-1/ln phi)),
    # plus the partial trapezoid from J to 5 tau_e under linear interpolation
    phi, dt, L = 0.9, 0.1, 100
    rho = phi ** np.arange(L + 1)
    k_e = math.ceil(-1 / math.log(phi))
    tau_e = (k_e - 1) + (phi ** (k_e - 1) - math.exp(-1)) / (phi ** (k_e - 1) - phi**k_e)
    limit = 5 * tau_e
    J, g = math.floor(limit), limit - math.floor(limit)
    at_limit = (1 - g) * phi**J + g * phi ** (J + 1)
    expected = dt * ((1 - phi ** (J + 1)) / (1 - phi) - 0.5 * (1 + phi**J)) + dt * 0.5 * g * (phi**J + at_limit)
    assert math.isclose(cal.integral_to_first_zero(rho, dt), expected, rel_tol=1e-12)
    # and within 1 % of the continuous t_c (1 - e^-5), t_c = -dt / ln(phi)
    assert math.isclose(expected, -dt / math.log(phi) * (1 - math.exp(-5)), rel_tol=0.01)
    # reference: linear rho = 1 - tau/2 crosses zero at tau = 2 exactly: integral 1
    tau = np.arange(0, 3.05, 0.1)
    assert math.isclose(cal.integral_to_first_zero(1 - tau / 2, 0.1), 1.0, rel_tol=1e-9)


def test_circular_delay_is_exact_and_autocovariance_matches():
    # reference: an integer delay of the periodic sequence equals np.roll; its autocovariance is
    # irfft(psd) / M (checked by the average periodic sample autocovariance over draws)
    n = 256
    psd = cal.flat_psd(n // cal.PAD, 100.0, (0.0, 20.0))
    m = 2 * (len(psd) - 1)
    x = cal.circular_process(np.random.default_rng(3), psd, m, (0.0, 0.03), 100.0)
    assert np.allclose(x[:, 1], np.roll(x[:, 0], 3), atol=1e-12)
    rng = np.random.default_rng(4)
    draws = np.stack([cal.circular_process(rng, psd, m, (0.0,), 100.0)[:, 0] for _ in range(2000)])
    spectra = np.abs(scipy.fft.rfft(draws, axis=1)) ** 2
    sample = scipy.fft.irfft(spectra.mean(axis=0), m) / m
    truth = cal.circular_autocovariance(psd)
    assert np.allclose(sample[:10], truth[:10], atol=0.05 * truth[0])


def test_burst_gaps_lose_the_stated_fraction():
    # reference: the renewal process's long-run missing fraction 0.2 (mean gap / mean cycle)
    valid = cal.burst_gaps(np.random.default_rng(5), 500_000)
    assert abs(1 - valid.mean() - 0.2) < 0.01
