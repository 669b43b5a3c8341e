"""Shared fixtures of the indicator tests: exact simulation of linear oscillators driven by white
noise, and correlation records built with the project's estimator.

Exact discretisation (zero-order sampling of the continuous-time stochastic state equation):
``x_{k+1} = Ad x_k + w_k`` with ``Ad = expm(A dt)`` and ``cov(w_k) = Qd = int_0^dt expm(A s) B Q
B^T expm(A^T s) ds``, both from one matrix exponential (Van Loan, "Computing integrals involving
the matrix exponential", IEEE Trans. Automatic Control 23(3), 395-404, 1978, Theorem 1). The
sampled process then has exactly the continuous process's correlation at the sample lags.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg

from corrtransforms.numerics.bartlett import bartlett_stderr
from corrtransforms.numerics.correlation import correlate_block


def sdof_correlation(lags_s, freq_hz, damping):
    """Exact auto-correlation coefficient of the displacement of a white-noise driven oscillator.

    rho(tau) = exp(-zeta wn |tau|) [cos(wd tau) + zeta / sqrt(1 - zeta^2) sin(wd |tau|)]
    (Bendat & Piersol, Random Data, 4th ed., Sec. 6.1 / Crandall & Mark, Random Vibration in
    Mechanical Systems, 1963, Sec. 2.6; from memory).
    """
    tau = np.abs(np.asarray(lags_s, dtype=float))
    wn = 2 * np.pi * freq_hz
    wd = wn * np.sqrt(1 - damping**2)
    return np.exp(-damping * wn * tau) * (np.cos(wd * tau) + damping / np.sqrt(1 - damping**2) * np.sin(wd * tau))


def modal_state_space(freqs_hz, dampings, rotation_rad=0.0):
    """Continuous state matrices of an n-DOF system (unit masses) with the given modes.

    K = Phi diag(wn^2) Phi^T and C = Phi diag(2 zeta wn) Phi^T with an orthonormal Phi (a plane
    rotation for two DOF), so the modes are exactly (freqs_hz, dampings); each DOF carries an
    independent unit white force.
    """
    wn = 2 * np.pi * np.asarray(freqs_hz, dtype=float)
    zeta = np.asarray(dampings, dtype=float)
    n = len(wn)
    if n == 2:
        c, s = np.cos(rotation_rad), np.sin(rotation_rad)
        phi = np.array([[c, -s], [s, c]])
    else:
        phi = np.eye(n)
    K = phi @ np.diag(wn**2) @ phi.T
    C = phi @ np.diag(2 * zeta * wn) @ phi.T
    A = np.block([[np.zeros((n, n)), np.eye(n)], [-K, -C]])
    B = np.vstack([np.zeros((n, n)), np.eye(n)])
    return A, B


def exact_discretisation(A, B, fs):
    """``(Ad, Qd, P)`` of dx = A x dt + B dW sampled at ``fs`` (Van Loan 1978, Theorem 1).

    ``Ad = expm(A dt)``, ``Qd`` the covariance of the state noise over one step and ``P`` the
    stationary state covariance (``P = Ad P Ad^T + Qd``).
    """
    dt = 1.0 / fs
    m = A.shape[0]
    big = np.zeros((2 * m, 2 * m))
    big[:m, :m] = -A
    big[:m, m:] = B @ B.T
    big[m:, m:] = A.T
    E = scipy.linalg.expm(big * dt)
    Ad = E[m:, m:].T
    Qd = Ad @ E[:m, m:]
    Qd = 0.5 * (Qd + Qd.T)
    P = scipy.linalg.solve_discrete_lyapunov(Ad, Qd)  # stationary covariance: no start transient
    return Ad, Qd, P


def simulate_state_space(A, B, fs, n_samples, rng, n_outputs=None):
    """Exact discretisation (Van Loan) of dx = A x dt + B dW; returns the first n_outputs states."""
    m = A.shape[0]
    Ad, Qd, P = exact_discretisation(A, B, fs)
    chol_q = np.linalg.cholesky(Qd + 1e-15 * np.eye(m) * np.trace(Qd))
    x = np.linalg.cholesky(P) @ rng.standard_normal(m)
    noise = rng.standard_normal((n_samples, m)) @ chol_q.T
    out = np.empty((n_samples, m))
    for k in range(n_samples):
        out[k] = x
        x = Ad @ x + noise[k]
    return out[:, : (n_outputs or m)]


def simulate_sdof(freq_hz, damping, fs, n_samples, rng):
    A, B = modal_state_space([freq_hz], [damping])
    return simulate_state_space(A, B, fs, n_samples, rng, n_outputs=1)[:, 0]


def simulate_ou(tau_c, fs, n_samples, rng):
    """First-order low-pass (Ornstein-Uhlenbeck) noise, rho = exp(-|tau|/tau_c): exact AR(1)."""
    import scipy.signal

    phi = np.exp(-1.0 / (fs * tau_c))
    e = rng.standard_normal(n_samples) * np.sqrt(1 - phi**2)
    e[0] = rng.standard_normal()  # stationary start
    return scipy.signal.lfilter([1.0], [1.0, -phi], e)


def auto_record(x, fs, max_lag_s, band_hz=None):
    """(coefficient 0..L, stderr 0..L) of one channel with the project's estimator."""
    est = correlate_block(np.asarray(x)[:, None], fs, max_lag_s, pairs="auto", band_hz=band_hz)
    L = est.max_lag
    rho = est.coefficient[0]
    se = bartlett_stderr(rho, rho, rho, est.pair_count[0])
    return rho[L:], se[L:]
