"""Simulators shared by the tests: exact in distribution, with their sources beside them."""

import numpy as np
import scipy.linalg
from scipy.signal import lfilter


def simulate_ar1(phi, n, reps, rng):
    """Stationary AR(1) x_t = phi x_{t-1} + e_t, columns independent; var e = 1."""
    e = rng.standard_normal((n, reps))
    e[0] /= np.sqrt(1 - phi**2)  # stationary start: var x_0 = 1 / (1 - phi^2)
    return lfilter([1.0], [1.0, -phi], e, axis=0)


def simulate_oscillator(n, reps, fs, fn, zeta, rng):
    """Displacement of x'' + 2 zeta wn x' + wn^2 x = w(t) (white w), exact discretisation.

    Transition Phi = expm(A dt); discrete noise covariance by Van Loan's method
    (C. F. Van Loan, IEEE Trans. Autom. Control 23(3), 1978, Theorem 1); stationary start from
    the continuous Lyapunov equation A P + P A' + G G' = 0.
    """
    wn = 2 * np.pi * fn
    A = np.array([[0.0, 1.0], [-(wn**2), -2 * zeta * wn]])
    GG = np.array([[0.0, 0.0], [0.0, 1.0]])
    dt = 1.0 / fs
    F = scipy.linalg.expm(np.block([[-A, GG], [np.zeros((2, 2)), A.T]]) * dt)
    Phi = F[2:, 2:].T
    Q = Phi @ F[:2, 2:]
    P = scipy.linalg.solve_continuous_lyapunov(A, -GG)
    chol_q = np.linalg.cholesky(0.5 * (Q + Q.T))
    state = np.linalg.cholesky(P) @ rng.standard_normal((2, reps))
    x = np.empty((n, reps))
    for t in range(n):
        x[t] = state[0]
        state = Phi @ state + chol_q @ rng.standard_normal((2, reps))
    return x, Phi, P


def oscillator_rho(tau, fn, zeta):
    """rho(tau) = exp(-zeta wn |tau|) [cos wd tau + zeta / sqrt(1 - zeta^2) sin wd |tau|]
    (Bendat & Piersol, Random Data, Sec. 6.1.x; Crandall & Mark 1963, from memory)."""
    wn = 2 * np.pi * fn
    wd = wn * np.sqrt(1 - zeta**2)
    t = np.abs(tau)
    return np.exp(-zeta * wn * t) * (np.cos(wd * t) + zeta / np.sqrt(1 - zeta**2) * np.sin(wd * t))
