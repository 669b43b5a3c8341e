"""Shared fixtures of the multi-channel mode tests: chains and modal systems of several degrees of
freedom, their true modes from the eigenvalues of the state matrix, and many white-noise driven
records simulated at once (exact discretisation, :func:`indicator_fixtures.exact_discretisation`).

The true modes: the continuous state matrix ``A = [[0, I], [-M^-1 K, -M^-1 C]]`` has eigenvalues
``lambda = -zeta w_n +/- i w_n sqrt(1 - zeta^2)`` (``w_n = |lambda|``, ``zeta = -Re(lambda) /
|lambda|``) and eigenvectors whose displacement half is the complex mode shape (Ewins, *Modal
Testing*, 2nd ed., 2000, Sec. 2.4; from memory). They come from ``scipy.linalg.eig``.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np
import scipy.linalg

from corrtransforms.numerics.correlation import block_lag_sums, channel_spectra, resolve_pairs
from tests.support.indicator_fixtures import exact_discretisation


class TrueModes(NamedTuple):
    freq_hz: np.ndarray
    damping: np.ndarray
    shapes: np.ndarray  # (n_modes, n_dof) complex, displacement part of the eigenvectors


def chain_system(masses, springs, dampers):
    """State matrices of a fixed-free chain: spring and damper j join mass j-1 (ground for j = 0)
    and mass j; each mass carries an independent unit white force."""
    m = np.asarray(masses, dtype=float)
    n = len(m)
    K = _chain_matrix(np.asarray(springs, dtype=float), n)
    C = _chain_matrix(np.asarray(dampers, dtype=float), n)
    return _second_order(np.diag(m), K, C)


def _chain_matrix(values, n):
    out = np.zeros((n, n))
    for j in range(n):
        out[j, j] += values[j]
        if j > 0:
            out[j - 1, j - 1] += values[j]
            out[j - 1, j] -= values[j]
            out[j, j - 1] -= values[j]
    return out


def _second_order(M, K, C):
    n = M.shape[0]
    Minv = np.linalg.inv(M)
    A = np.block([[np.zeros((n, n)), np.eye(n)], [-Minv @ K, -Minv @ C]])
    B = np.vstack([np.zeros((n, n)), Minv])
    return A, B


def modal_system(freqs_hz, dampings, shapes):
    """Unit masses with prescribed modes: ``K = Phi diag(w^2) Phi^T``, ``C = Phi diag(2 zeta w) Phi^T``
    for an orthonormal ``Phi`` (columns = real mode shapes)."""
    w = 2 * np.pi * np.asarray(freqs_hz, dtype=float)
    phi = np.asarray(shapes, dtype=float)
    K = phi @ np.diag(w**2) @ phi.T
    C = phi @ np.diag(2 * np.asarray(dampings, dtype=float) * w) @ phi.T
    return _second_order(np.eye(len(w)), K, C)


def true_modes(A) -> TrueModes:
    """Frequencies (Hz), damping ratios and complex displacement shapes from ``eig(A)``, by frequency."""
    n = A.shape[0] // 2
    lam, vec = scipy.linalg.eig(A)
    upper = lam.imag > 0
    lam, vec = lam[upper], vec[:n, upper]
    order = np.argsort(np.abs(lam))
    lam, vec = lam[order], vec[:, order]
    return TrueModes(np.abs(lam) / (2 * np.pi), -lam.real / np.abs(lam), vec.T.copy())


def simulate_records(A, B, fs, n_samples, rng, n_records, n_outputs):
    """``n_records`` independent stationary records of the first ``n_outputs`` states, shape
    (n_records, n_samples, n_outputs): the exact recursion ``x_{k+1} = Ad x_k + w_k`` run for all
    records at once."""
    m = A.shape[0]
    Ad, Qd, P = exact_discretisation(A, B, fs)
    chol_q = np.linalg.cholesky(Qd + 1e-15 * np.eye(m) * np.trace(Qd))
    x = np.linalg.cholesky(P) @ rng.standard_normal((m, n_records))
    out = np.empty((n_samples, n_outputs, n_records))
    chunk = 2000
    for start in range(0, n_samples, chunk):
        stop = min(start + chunk, n_samples)
        noise = chol_q @ rng.standard_normal((stop - start, m, n_records))
        for k in range(stop - start):
            out[start + k] = x[:n_outputs]
            x = Ad @ x + noise[k]
    return np.ascontiguousarray(out.transpose(2, 0, 1))


def window_lag_sums(record, fs, max_lag_s, n_segments):
    """(pairs, block sums, block counts) of one record (n_samples, n_channels), every ordered pair,
    with the window cut into ``n_segments`` blocks."""
    n = record.shape[0]
    spectra = channel_spectra(record, fs, max_lag_s, segment_length=-(-n // n_segments))
    pairs = resolve_pairs("all", record.shape[1])
    sums, counts = block_lag_sums(spectra, pairs)
    return pairs, sums, counts


def exact_sequence(A, B, fs, n_lags, n_outputs):
    """``Lambda_k = E[y(t + k dt) y(t)^T] = C Ad^k P C^T`` of the sampled process (exact)."""
    Ad, _, P = exact_discretisation(A, B, fs)
    C = np.eye(A.shape[0])[:n_outputs]
    out = np.empty((n_lags, n_outputs, n_outputs))
    power = np.eye(A.shape[0])
    for k in range(n_lags):
        out[k] = C @ power @ P @ C.T
        power = Ad @ power
    return out
