"""Per-lag variance of estimated correlation coefficients (Bartlett 1946) and its uses.

The random error of a correlation coefficient estimated from ``n`` samples, at every lag and
between lags, from the coefficients themselves:

- :func:`bartlett_sums` and :func:`bartlett_stderr`: the per-lag standard error of a pair's
  coefficient (auto or cross) at lags ``-L..L``, batched over pairs: the correlations' ``stderr``;
- :func:`large_lag_stderr`: Bartlett's large-lag interval (true coefficients zero beyond a lag);
- :func:`lag_sums`, :func:`bartlett_kernel`, :func:`bartlett_variance`: the covariance between
  the errors of an auto-correlation at two lags, and its diagonal;
- :func:`lag_error_covariance`, :func:`linear_functional_stderr`, :func:`kernel_quadratic_form`:
  what every standard error of a functional of ``rho`` (an integral, a fit) needs, because errors
  at neighbouring lags are strongly correlated; :func:`coarsen_lags` puts long lag ranges on
  every k-th lag first (:data:`MAX_COVARIANCE_LAGS`).

The two lag-sum forms are kept apart on purpose: :func:`bartlett_sums` gives only the sums the
diagonal of a pair's variance needs, for every lag of many pairs at once; :func:`lag_sums` gives
``c(m)`` at every ``m = 0..2L`` of one auto-correlation, which the off-diagonal covariance needs.
"""

from __future__ import annotations

import dataclasses
from typing import Optional, Sequence, Tuple, Union

import numpy as np
import scipy.fft
import scipy.signal

from corrtransforms.numerics.correlation import even_extension

#: above this many lags the covariance matrix is built on every k-th lag (the lag errors are
#: smooth over the correlation time, so a linear functional changes by well under 1 %)
#: lag indices: a sequence or an integer array
LagIndices = Union[Sequence[int], np.ndarray]

MAX_COVARIANCE_LAGS = 1024


def _finite_or_zero(x):
    return np.where(np.isfinite(x), x, 0.0)


def bartlett_sums(rho_ab, rho_aa, rho_bb):
    """Lag sums of Bartlett's variance formula for every lag, by FFT convolution.

    Parameters
    ----------
    rho_ab, rho_aa, rho_bb : array_like, shape (..., 2L + 1)
        Coefficients at lags ``-L..L`` (index ``i`` is lag ``i - L``); NaN counts as 0.

    Returns
    -------
    constant : ndarray, shape (...)
        ``A = sum_v rho_aa(v) rho_bb(v)``.
    reflected : ndarray, shape (..., 2L + 1)
        ``B(k) = sum_v rho_ab(k + v) rho_ab(k - v)``.
    mixed : ndarray, shape (..., 2L + 1)
        ``C(k) = sum_v [rho_aa(v) rho_ab(k + v) + rho_ab(-v) rho_bb(k + v)]``.
    square : ndarray, shape (...)
        ``E = sum_v [rho_ab(v)^2 + rho_aa(v)^2 / 2 + rho_bb(v)^2 / 2]``.

    Notes
    -----
    With ``rho_aa`` and ``rho_bb`` even, ``B(k) = (rho_ab * rho_ab)(2k)`` and
    ``C(k) = (rho_ab * (rho_aa + rho_bb))(k)`` are convolutions, computed for all lags at once
    with one real FFT of length ``next_fast_len(4L + 1)``; the sums run over the estimated lags
    ``|v| <= L`` (the coefficients beyond are taken as 0).
    """
    ab = _finite_or_zero(np.asarray(rho_ab, dtype=float))
    aa = _finite_or_zero(np.asarray(rho_aa, dtype=float))
    bb = _finite_or_zero(np.asarray(rho_bb, dtype=float))
    width = ab.shape[-1]
    L = (width - 1) // 2
    K = scipy.fft.next_fast_len(2 * width - 1, real=True)
    F_ab = scipy.fft.rfft(ab, n=K, axis=-1)
    F_sum = scipy.fft.rfft(aa + bb, n=K, axis=-1)
    # index j of a full convolution of two (2L+1)-arrays is lag j - 2L
    conv_ab_ab = scipy.fft.irfft(F_ab * F_ab, n=K, axis=-1)
    conv_mixed = scipy.fft.irfft(F_ab * F_sum, n=K, axis=-1)
    reflected = conv_ab_ab[..., 0 : 4 * L + 1 : 2]
    mixed = conv_mixed[..., L : 3 * L + 1]
    constant = (aa * bb).sum(axis=-1)
    square = (ab * ab + 0.5 * aa * aa + 0.5 * bb * bb).sum(axis=-1)
    return constant, reflected, mixed, square


def bartlett_stderr(rho_ab, rho_aa, rho_bb, pair_count):
    """Standard error of an estimated correlation coefficient at every lag (Bartlett).

    Parameters
    ----------
    rho_ab : array_like, shape (..., 2L + 1)
        Estimated coefficient of the pair at lags ``-L..L``; for an auto pair pass the same
        array three times.
    rho_aa, rho_bb : array_like, shape (..., 2L + 1)
        Estimated auto-correlation coefficients of channels a and b at lags ``-L..L``.
    pair_count : array_like, shape (..., 2L + 1)
        Valid sample pairs at each lag, in place of ``n`` (Bartlett's ``n`` for a complete
        record; the large-``n`` formula does not distinguish ``n`` from ``n - |k|``).

    Returns
    -------
    ndarray, shape (..., 2L + 1)
        ``sqrt(var r_ab(k))``; NaN where the coefficient is NaN or no pairs exist.

    Notes
    -----
    Bartlett's formula for cross-correlation coefficients of jointly Gaussian stationary
    series (Box, Jenkins & Reinsel [2]_, Eq. (12.1.4), equation number from memory), with
    ``rho_ab(k) = corr(a_t, b_{t+k})``::

        n var r_ab(k) = sum_v { rho_aa(v) rho_bb(v) + rho_ab(k+v) rho_ab(k-v)
                              - 2 rho_ab(k) [rho_aa(v) rho_ab(k+v) + rho_ab(-v) rho_bb(k+v)]
                              + rho_ab(k)^2 [rho_ab(v)^2 + rho_aa(v)^2/2 + rho_bb(v)^2/2] }

    For ``a = b`` it reduces to Bartlett's 1946 formula for the auto-correlation [1]_
    (Box, Jenkins & Reinsel Eq. (2.1.13))::

        n var r_k = sum_v { rho_v^2 + rho_{v+k} rho_{v-k} - 4 rho_k rho_v rho_{v-k}
                            + 2 rho_v^2 rho_k^2 }

    The sums use the estimated coefficients (:func:`bartlett_sums`). Their sampling noise adds
    roughly ``(2L + 1) / n`` relative to the sums, so the figure is slightly conservative when
    ``L`` is not small against ``n``.

    References
    ----------
    .. [1] M. S. Bartlett, "On the theoretical specification and sampling properties of
       autocorrelated time-series", J. R. Stat. Soc. Suppl. 8(1), 27-41, 1946.
    .. [2] G. E. P. Box, G. M. Jenkins and G. C. Reinsel, *Time Series Analysis: Forecasting
       and Control*, 4th ed., Wiley, 2008, Eqs. (2.1.13) and (12.1.4) (from memory).
    """
    constant, reflected, mixed, square = bartlett_sums(rho_ab, rho_aa, rho_bb)
    return _stderr_from_sums(np.asarray(rho_ab, dtype=float), constant, reflected, mixed, square, pair_count)


def bartlett_stderr_of_pairs(rho_pairs, rho_autos, a_rows, b_rows, pair_count) -> np.ndarray:
    """:func:`bartlett_stderr` of many pairs of one window, each channel's transform done once.

    Parameters
    ----------
    rho_pairs : array_like, shape (P, 2L + 1)
        The pairs' coefficients at lags ``-L..L``.
    rho_autos : array_like, shape (C, 2L + 1)
        The window's auto-correlation coefficients, one row per channel.
    a_rows, b_rows : array_like of int, shape (P,)
        Row of ``rho_autos`` of each pair's channels a and b.
    pair_count : array_like, shape (P, 2L + 1)
        As in :func:`bartlett_stderr`.

    Returns
    -------
    ndarray, shape (P, 2L + 1)
        Equal to ``bartlett_stderr(rho_pairs, rho_autos[a_rows], rho_autos[b_rows], pair_count)``
        to rounding (tests/stages/test_fast_paths.py).

    Notes
    -----
    :func:`bartlett_sums` transforms ``rho_aa + rho_bb`` of every pair; by linearity that is
    ``F_aa + F_bb`` of the channels' own transforms, done once per channel here, and an auto
    pair (its coefficient equal to its channel's row) reuses its channel's transform as ``F_ab``:
    of the 2P forward transforms of the pairwise form, ``C`` plus one per cross pair remain.
    """
    ab = _finite_or_zero(np.asarray(rho_pairs, dtype=float))
    autos = _finite_or_zero(np.asarray(rho_autos, dtype=float))
    a_rows, b_rows = np.asarray(a_rows, dtype=int), np.asarray(b_rows, dtype=int)
    width = ab.shape[-1]
    L = (width - 1) // 2
    K = scipy.fft.next_fast_len(2 * width - 1, real=True)
    F_auto = scipy.fft.rfft(autos, n=K, axis=-1)
    own = np.array([a == b and np.array_equal(ab[k], autos[a]) for k, (a, b) in enumerate(zip(a_rows, b_rows))])
    F_ab = np.empty((len(ab), F_auto.shape[-1]), dtype=complex)
    if own.any():
        F_ab[own] = F_auto[a_rows[own]]
    if (~own).any():
        F_ab[~own] = scipy.fft.rfft(ab[~own], n=K, axis=-1)
    conv_ab_ab = scipy.fft.irfft(F_ab * F_ab, n=K, axis=-1)
    conv_mixed = scipy.fft.irfft(F_ab * (F_auto[a_rows] + F_auto[b_rows]), n=K, axis=-1)
    reflected = conv_ab_ab[:, 0 : 4 * L + 1 : 2]
    mixed = conv_mixed[:, L : 3 * L + 1]
    # sum_v rho_aa(v) rho_bb(v) per pair, row by row: a matrix product (BLAS) rounds differently
    # with the number of channels, and a window's rows must not depend on which other channels
    # it has (tests/pipelines/test_reliability_matrix.py: a missing channel leaves the others'
    # rows bit-identical)
    constant = (autos[a_rows] * autos[b_rows]).sum(axis=-1)
    own_square = (autos * autos).sum(axis=-1)
    square = (ab * ab).sum(axis=-1) + 0.5 * own_square[a_rows] + 0.5 * own_square[b_rows]
    return _stderr_from_sums(np.asarray(rho_pairs, dtype=float), constant, reflected, mixed, square, pair_count)


def _stderr_from_sums(rho, constant, reflected, mixed, square, pair_count) -> np.ndarray:
    """Bartlett's standard error from the sums of :func:`bartlett_sums`."""
    r = _finite_or_zero(rho)
    n_var = constant[..., None] + reflected - 2.0 * r * mixed + r * r * square[..., None]
    count = np.asarray(pair_count, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.maximum(n_var, 0.0) / count
    return np.where(np.isfinite(rho) & (count > 0), np.sqrt(var), np.nan)


def bartlett_stderr_at(rho_ab, rho_aa, rho_bb, index: int) -> float:
    """:func:`bartlett_stderr` of one pair at one lag index, for one sample pair (``n = 1``).

    Parameters
    ----------
    rho_ab, rho_aa, rho_bb : array_like, shape (2L + 1,)
        As in :func:`bartlett_stderr` (NaN counts as 0 in the sums).
    index : int
        Index into the lags ``-L..L`` (lag ``index - L``).

    Returns
    -------
    float
        ``sqrt(max(n var r_ab(k), 0))`` at that lag; NaN where ``rho_ab`` is not finite there.

    Notes
    -----
    The same sums as :func:`bartlett_sums` at one lag, as direct dot products:
    ``B(k) = sum_i ab_i ab_{2k - i}`` and ``C(k) = sum_i ab_i (aa + bb)_{k + L - i}`` (array
    indices); O(L) instead of four transforms of length ``4L + 1``, equal to rounding
    (tests/stages/test_fast_paths.py).
    """
    ab = _finite_or_zero(np.asarray(rho_ab, dtype=float))
    aa = _finite_or_zero(np.asarray(rho_aa, dtype=float))
    bb = _finite_or_zero(np.asarray(rho_bb, dtype=float))
    if not np.isfinite(float(np.asarray(rho_ab, dtype=float)[index])):
        return float("nan")
    width = len(ab)
    L = (width - 1) // 2
    k = int(index)
    i = np.arange(max(0, 2 * k - (width - 1)), min(width - 1, 2 * k) + 1)
    reflected = float(ab[i] @ ab[2 * k - i])
    j = np.arange(max(0, k - L), min(width - 1, k + L) + 1)
    mixed = float(ab[j] @ (aa + bb)[k + L - j])
    constant = float(aa @ bb)
    square = float(ab @ ab + 0.5 * (aa @ aa) + 0.5 * (bb @ bb))
    r = ab[k]
    return float(np.sqrt(max(constant + reflected - 2.0 * r * mixed + r * r * square, 0.0)))


def large_lag_stderr(rho, n):
    """Bartlett's large-lag standard error of auto-correlation coefficients at lags ``0..L``.

    Parameters
    ----------
    rho : array_like, shape (L + 1,)
        Estimated coefficients at lags 0..L (``rho[0] = 1``).
    n : int
        Record length in samples.

    Returns
    -------
    ndarray, shape (L + 1,)
        ``se[0] = 0``, ``se[1] = 1/sqrt(n)``, ``se[k] = sqrt((1 + 2 sum_{j<k} r_j^2) / n)``.

    Notes
    -----
    Bartlett's formula when the true coefficients vanish beyond lag ``k - 1`` (Box, Jenkins &
    Reinsel [1]_ Eq. (2.1.15), from memory). It is the interval statsmodels'
    ``acf(..., alpha=..., bartlett_confint=True)`` draws around ``r_k``; use it to judge whether
    ``r_k`` differs from zero, and :func:`bartlett_stderr` for the error of ``r_k`` itself.

    References
    ----------
    .. [1] G. E. P. Box, G. M. Jenkins and G. C. Reinsel, *Time Series Analysis*, 4th ed.,
       Wiley, 2008, Sec. 2.1.6.
    """
    r = np.asarray(rho, dtype=float)
    var = np.empty_like(r)
    var[0] = 0.0
    if len(r) > 1:
        var[1:] = 1.0 + 2.0 * np.concatenate([[0.0], np.cumsum(r[1:-1] ** 2)])
    return np.sqrt(var / float(n))


def lag_sums(rho: np.ndarray) -> np.ndarray:
    """``c(m) = sum_v rho_v rho_{v+m}`` of the even extension, for ``m = 0..2L`` (one FFT)."""
    L = len(rho) - 1
    full = even_extension(rho)
    n_fft = scipy.fft.next_fast_len(2 * len(full), real=True)
    spectrum = scipy.fft.rfft(full, n_fft)
    return scipy.fft.irfft(spectrum * np.conj(spectrum), n_fft)[: 2 * L + 1]


def bartlett_kernel(coefficient, lags: LagIndices) -> np.ndarray:
    """``n cov[r_i, r_j]`` of Bartlett's formula for an auto-correlation, at lag indices ``lags``.

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Auto-correlation coefficient at lags 0..L (estimated, or a model of it).
    lags : sequence of int
        Lag indices in 0..L.

    Returns
    -------
    ndarray, shape (len(lags), len(lags))

    Notes
    -----
    Bartlett's covariance of estimated auto-correlation coefficients of a Gaussian linear
    process ([1]_; Box, Jenkins & Reinsel [2]_, Eq. (2.1.12), from memory)::

        n cov[r_i, r_j] = sum_v { rho_v rho_{v+j-i} + rho_{v+j} rho_{v-i}
                                  - 2 rho_i rho_v rho_{v-j} - 2 rho_j rho_v rho_{v-i}
                                  + 2 rho_i rho_j rho_v^2 }
                        = c(j-i) + c(i+j) - 2 rho_i c(j) - 2 rho_j c(i) + 2 rho_i rho_j c(0)

    with ``c(m) = sum_v rho_v rho_{v+m}`` over the even extension ``-L..L`` (zero beyond).

    References
    ----------
    .. [1] M. S. Bartlett, "On the theoretical specification and sampling properties of
       autocorrelated time-series", J. R. Stat. Soc. Suppl. 8(1), 27-41, 1946.
    .. [2] G. E. P. Box, G. M. Jenkins and G. C. Reinsel, *Time Series Analysis*, 4th ed.,
       Wiley, 2008, Sec. 2.1.6.
    """
    rho = np.nan_to_num(np.asarray(coefficient, dtype=float))
    idx = np.asarray(lags, dtype=int)
    c = lag_sums(rho)
    i = idx[:, None]
    j = idx[None, :]
    ri = rho[idx][:, None]
    rj = rho[idx][None, :]
    return c[np.abs(j - i)] + c[i + j] - 2 * ri * c[j] - 2 * rj * c[i] + 2 * ri * rj * c[0]


def bartlett_variance(coefficient) -> np.ndarray:
    """Diagonal of :func:`bartlett_kernel` at every lag 0..L: ``n var r_k``."""
    rho = np.nan_to_num(np.asarray(coefficient, dtype=float))
    c = lag_sums(rho)
    k = np.arange(len(rho))
    return np.clip(c[0] + c[2 * k] - 4 * rho * c[k] + 2 * rho**2 * c[0], 0.0, None)


def lag_error_covariance(coefficient, stderr, lags: LagIndices) -> np.ndarray:
    """Covariance of the estimation errors of an auto-correlation at chosen lags (Bartlett).

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Estimated auto-correlation coefficient at lags 0..L (``rho[0] = 1``).
    stderr : array_like, shape (L + 1,)
        Standard error at each lag (the correlate stage's record-length error).
    lags : sequence of int
        Lag indices (0..L) at which the covariance is wanted.

    Returns
    -------
    ndarray, shape (len(lags), len(lags))
        ``cov[r_i, r_j] = s_i s_j C_ij`` with ``C_ij = K_ij / sqrt(K_ii K_jj)`` the error
        correlation of Bartlett's formula (:func:`bartlett_kernel`).

    Notes
    -----
    Only the correlation structure is taken from Bartlett's formula; the magnitudes come from
    ``stderr``, so gaps (pair counts) and the estimator's own error figure carry over. Lags with
    zero variance (lag 0 of a normalised coefficient) get zero rows.
    """
    s = np.nan_to_num(np.asarray(stderr, dtype=float))
    idx = np.asarray(lags, dtype=int)
    K = bartlett_kernel(coefficient, idx)
    d = np.sqrt(np.clip(np.diag(K), 0.0, None))
    scale = np.outer(d, d)
    with np.errstate(invalid="ignore", divide="ignore"):
        C = np.where(scale > 1e-12 * max(float(d.max(initial=0.0)) ** 2, 1e-300), K / scale, 0.0)
    np.fill_diagonal(C, np.where(d > 0, 1.0, 0.0))
    return C * np.outer(s[idx], s[idx])


@dataclasses.dataclass(frozen=True)
class LagErrors:
    """Bartlett's lag-error structure of one auto-correlation estimate, computed once for every
    linear functional of it (an integral time scale, a decay time's crossing, ...).

    Attributes
    ----------
    coefficient, stderr : ndarray, shape (L + 1,)
        The estimate and its standard errors, NaN as 0.
    sums : ndarray, shape (2L + 1,)
        ``c(m) = sum_v rho_v rho_{v+m}`` (:func:`lag_sums`).
    scale : ndarray, shape (L + 1,)
        ``d_k = sqrt(n var r_k)`` (:func:`bartlett_variance`).
    """

    coefficient: np.ndarray
    stderr: np.ndarray
    sums: np.ndarray
    scale: np.ndarray

    @classmethod
    def of(cls, coefficient, stderr) -> LagErrors:
        rho = np.nan_to_num(np.asarray(coefficient, dtype=float))
        c = lag_sums(rho)
        k = np.arange(len(rho))
        variance = np.clip(c[0] + c[2 * k] - 4 * rho * c[k] + 2 * rho**2 * c[0], 0.0, None)
        return cls(rho, np.nan_to_num(np.asarray(stderr, dtype=float)), c, np.sqrt(variance))


def linear_functional_stderr(weights, coefficient, stderr, lags, errors: Optional[LagErrors] = None) -> float:
    """Standard error of ``sum_k weights_k rho(lags_k)`` with Bartlett-correlated lag errors.

    Parameters
    ----------
    weights : array_like
        Weight of each lag (e.g. trapezoid weights of an integral).
    coefficient, stderr : array_like, shape (L + 1,)
        As in :func:`lag_error_covariance`.
    lags : array_like of int
        Lag indices of the weights.
    errors : LagErrors, optional
        ``LagErrors.of(coefficient, stderr)`` when already computed (several functionals of
        one estimate share it); None computes it.

    Returns
    -------
    float
        ``sqrt(w^T Cov w)``; above :data:`MAX_COVARIANCE_LAGS` lags, the weights are summed
        onto every k-th lag first (:func:`coarsen_lags`).
    """
    w = np.asarray(weights, dtype=float)
    idx = np.asarray(lags, dtype=int)
    if len(idx) == 0:
        return float("nan")
    w, idx = coarsen_lags(w, idx, len(coefficient))
    if errors is None or len(errors.coefficient) != len(coefficient):
        errors = LagErrors.of(coefficient, stderr)
    quadratic = _fast_functional_variance(w, errors, idx)
    if quadratic is None:
        cov = lag_error_covariance(coefficient, stderr, idx)
        quadratic = float(w @ cov @ w)
    return float(np.sqrt(max(quadratic, 0.0)))


def _fast_functional_variance(weights: np.ndarray, errors: LagErrors, lags: np.ndarray):
    """``w^T Cov w`` of :func:`linear_functional_stderr` without forming ``Cov``, or None when
    :func:`lag_error_covariance` would zero some off-diagonal entry (two lags of nearly zero
    Bartlett variance, other than exactly zero) and the matrix is needed.

    ``Cov = D_s K' D_s`` with ``K'_ij = K_ij / (d_i d_j)`` and ``d_i = sqrt(K_ii)``, so
    ``w^T Cov w = g^T K g`` with ``g_i = w_i s_i / d_i`` (0 where ``d_i = 0``, whose rows of
    ``Cov`` are 0), scattered onto the full lag grid ``0..L``. With Bartlett's kernel
    ``K = T + H - 2 r c^T - 2 c r^T + 2 c(0) r r^T`` (:func:`kernel_quadratic_form`)::

        g^T K g = sum_m c(|m|) a(m) + sum_s c(s) b(s) - 4 (g.r)(g.c) + 2 c(0) (g.r)^2

    with ``a`` the autocorrelation and ``b`` the self-convolution of ``g``, both from one
    transform of ``g``: O(L log L) instead of the O(m^2) matrix (at 1 001 lags about 100 times
    faster), the same number to rounding (tests/stages/test_fast_paths.py).
    """
    rho, c = errors.coefficient, errors.sums
    d = errors.scale[lags]
    positive = d > 0
    if not positive.any():
        return 0.0
    tiny = 1e-12 * max(float(d.max()) ** 2, 1e-300)
    smallest = np.partition(d[positive], 1)[:2] if positive.sum() > 1 else None
    if smallest is not None and float(smallest[0]) * float(smallest[1]) <= tiny:
        return None  # an off-diagonal entry the matrix form sets to 0 (its diagonal is 1 anyway)
    u = np.where(positive, weights * errors.stderr[lags] / np.where(positive, d, 1.0), 0.0)
    n = len(rho)
    g = np.bincount(lags, weights=u, minlength=n)
    size = scipy.fft.next_fast_len(2 * n - 1, real=True)
    spectrum = scipy.fft.rfft(g, size)
    auto = scipy.fft.irfft(spectrum.real**2 + spectrum.imag**2, size)[:n]
    self_convolution = scipy.fft.irfft(spectrum * spectrum, size)[: 2 * n - 1]
    toeplitz = c[0] * auto[0] + 2.0 * float(c[1:n] @ auto[1:n])
    hankel = float(c[: 2 * n - 1] @ self_convolution)
    g_rho, g_c = float(g @ rho), float(g @ c[:n])
    return toeplitz + hankel - 4.0 * g_rho * g_c + 2.0 * float(c[0]) * g_rho**2


def coarsen_lags(weights, lags, n_lags: int) -> Tuple[np.ndarray, np.ndarray]:
    """Sum weights of a long lag range onto every k-th lag (at most :data:`MAX_COVARIANCE_LAGS`).

    Parameters
    ----------
    weights : array_like, shape (m,) or (m, p)
        Weight of each lag (columns: several functionals at once).
    lags : array_like of int, shape (m,)
        Lag indices of the rows of ``weights``, consecutive.
    n_lags : int
        Lags of the coefficient (``L + 1``); nodes stay below it.

    Returns
    -------
    weights : ndarray, shape (ceil(m / k),) or (ceil(m / k), p)
        Sums of the weights over each run of ``k = ceil(m / MAX_COVARIANCE_LAGS)`` lags.
    nodes : ndarray of int
        The middle lag of each run. Unchanged input when ``k = 1``.

    Notes
    -----
    The lag errors are smooth over the correlation time, so a linear functional of them changes
    by well under 1 % (common practice).
    """
    w = np.asarray(weights, dtype=float)
    idx = np.asarray(lags, dtype=int)
    stride = int(np.ceil(len(idx) / MAX_COVARIANCE_LAGS))
    if stride <= 1:
        return w, idx
    groups = np.arange(len(idx)) // stride
    if w.ndim == 1:
        w = np.bincount(groups, weights=w)
    else:
        w = np.stack([np.bincount(groups, weights=w[:, m]) for m in range(w.shape[1])], axis=1)
    nodes = np.minimum(idx[::stride][: w.shape[0]] + (stride - 1) // 2, n_lags - 1)
    return w, nodes


def kernel_quadratic_form(model: np.ndarray, first: int, spacing: int, G: np.ndarray) -> np.ndarray:
    """``G^T K G`` for Bartlett's kernel ``K`` at the equally spaced lags ``first + spacing * k``.

    Notes
    -----
    With ``c(m) = sum_v rho_v rho_{v+m}`` (:func:`bartlett_kernel`),
    ``K = T + H - 2 r c^T - 2 c r^T + 2 c(0) r r^T`` where ``T_ij = c(|l_j - l_i|)`` is Toeplitz,
    ``H_ij = c(l_i + l_j)`` Hankel, ``r_i = rho(l_i)`` and ``c_i = c(l_i)``. On equally spaced
    lags ``T G`` is a convolution of ``G`` with ``c(spacing |d|)`` and ``H G`` a correlation
    with ``c(2 l_0 + spacing q)``, both by FFT (Golub & Van Loan, *Matrix Computations*, 4th ed.,
    Sec. 4.7.7, fast Toeplitz matrix-vector products; from memory): O(m log m) instead of the
    O(m^2) of forming ``K``; the same quadratic form to rounding.
    """
    rho = np.nan_to_num(np.asarray(model, dtype=float))
    c = lag_sums(rho)
    m = G.shape[0]
    nodes = first + spacing * np.arange(m)
    toeplitz = c[spacing * np.abs(np.arange(-(m - 1), m))][:, None]
    hankel = c[2 * first + spacing * np.arange(2 * m - 1)][:, None]
    KG = (
        scipy.signal.fftconvolve(toeplitz, G, axes=0)[m - 1 : 2 * m - 1]
        + scipy.signal.fftconvolve(hankel, G[::-1], axes=0)[m - 1 : 2 * m - 1]
    )
    g_rho = G.T @ rho[nodes]
    g_c = G.T @ c[nodes]
    meat = G.T @ KG - 2 * np.outer(g_rho, g_c) - 2 * np.outer(g_c, g_rho) + 2 * c[0] * np.outer(g_rho, g_rho)
    return 0.5 * (meat + meat.T)


def subset_mismatch_variance(
    peak_coef: float, lag_samples: float, pair_count: float, n_a: float, n_b: float, rho_aa, rho_bb
) -> float:
    """Variance that a coefficient at a non-zero lag gets from its numerator's sample subset.

    Parameters
    ----------
    peak_coef : float
        The (count-corrected) coefficient ``rho_ab`` at the lag.
    lag_samples : float
        The lag in samples (rounded to the nearest integer ``m``; 0 gives 0).
    pair_count : float
        Sample pairs ``C_ab`` behind the lag product sum.
    n_a, n_b : float
        Valid samples of channels a and b (the pair counts at lag 0 of their auto pairs).
    rho_aa, rho_bb : array_like, shape (L + 1,)
        Auto-correlation coefficients at lags 0..L.

    Returns
    -------
    float
        ``rho^2 G (Q_a + Q_b) / (2 N^2)``; 0 when ``m = 0`` or no pair is lost.

    Notes
    -----
    The coefficient is ``sum_{S_m} a_t b_{t+m} / C`` over the pairs ``S_m`` with both samples
    valid, divided by ``sqrt(s_a^2 s_b^2)`` taken over *all* ``N`` valid samples. Bartlett's
    formula (:func:`bartlett_stderr`) holds for a coefficient whose numerator and denominator
    use the same samples; here the ``D = N - C`` samples missing from the numerator sit in
    runs of ``m`` at the ``G = D / m`` gap edges (the last ``m`` valid samples of ``a`` before
    each gap, the first ``m`` of ``b`` after it). Writing the coefficient as the one on ``S_m``
    times ``sqrt(s_a^2(S_m) s_b^2(S_m) / (s_a^2 s_b^2))`` and expanding the variance ratio to
    first order (``s^2(S_m) - s^2 = (D/N)(s^2 - s^2(edges))``, with ``var s^2(edges) / sigma^4
    = 2 sum_{t,t' in edges} rho^2(t - t') / D^2`` for Gaussian data, Bartlett 1946 / Bendat &
    Piersol, *Random Data*, 4th ed., Sec. 8.2.2, from memory) gives the extra variance above,
    with ``Q = sum_{i,j < m} rho(i - j)^2`` one run's sum and the runs of a and b taken as
    independent of each other and of the coefficient's own error (gaps longer than the
    correlation time; an approximation, measured on the calibration matrix's gappy record:
    docs/calibration.md). Near ``|rho| = 1`` Bartlett's variance, ``(1 - rho^2)^2``-like, is small
    and this term is what remains; without gaps ``G = 1`` and the term is ``O(m^2 / N^2)``.
    """
    m = int(round(abs(float(lag_samples))))
    n = float(np.sqrt(float(n_a) * float(n_b)))
    lost = n - float(pair_count)
    if m == 0 or not np.isfinite(lost) or lost <= 0 or n <= 0 or not np.isfinite(peak_coef):
        return 0.0
    runs = lost / m
    q = 0.0
    for rho in (rho_aa, rho_bb):
        r = _finite_or_zero(np.asarray(rho, dtype=float))[: min(m, len(rho))]
        d = np.arange(len(r))
        q += float(m + 2.0 * np.sum((m - d[1:]) * r[1:] ** 2))
    return float(peak_coef) ** 2 * runs * q / (2.0 * n * n)
