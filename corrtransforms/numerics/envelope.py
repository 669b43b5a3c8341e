"""Analytic signal and Hilbert envelope of correlation functions: one home for both.

An auto-correlation is given at lags ``0..L``; its analytic signal is formed on the even
extension ``-L..L`` (:func:`corrtransforms.numerics.correlation.even_extension`), so lag 0 is not
an edge of the transform, and lags ``0..L`` are returned. A cross-correlation is transformed on
the lags as given. Used by the
modal fit's start values and fitting range (:mod:`corrtransforms.numerics.modal_fit`) and the
lag peak's width (:mod:`corrtransforms.numerics.time_delay`).

:func:`even_hilbert_transform` and :func:`hilbert_row` are the non-circular (linear-convolution)
Hilbert transform of an auto-correlation's even extension, used by the decay time
(:mod:`corrtransforms.numerics.timescales`): the circular FFT transform above sees periodic
copies of the record at +-2L, which for a low-pass correlation moves the envelope's 1/e point
with max_lag (1.71 / 1.85 / 1.90 tau_c at L = 5 / 10 / 20 tau_c for exp(-|tau|/tau_c)); the
linear transform gives 1.915 / 1.913 / 1.913 tau_c. The circular form is kept for the modal
fit and the lag peak, whose results do not change.
"""

from __future__ import annotations

import numpy as np
import scipy.signal

from corrtransforms.numerics.correlation import even_extension


def analytic_correlation(coefficient, auto: bool = True) -> np.ndarray:
    """Analytic signal ``rho(tau) + i H[rho](tau)`` of correlation functions (rows: last axis).

    Parameters
    ----------
    coefficient : array_like, shape (..., K)
        Lags 0..L of auto-correlations (``auto=True``, ``K = L + 1``) or any lag range of
        cross-correlations (``auto=False``).
    auto : bool
        Build the analytic signal on the even extension -L..L and return lags 0..L again.

    Returns
    -------
    ndarray of complex, shape (..., K)

    Notes
    -----
    ``scipy.signal.hilbert`` along the last axis (one-sided spectrum, Marple's discrete
    analytic signal [1]_); each row is transformed on its own, so a row of a batch equals the
    row alone.

    References
    ----------
    .. [1] S. L. Marple, "Computing the discrete-time analytic signal via FFT", IEEE Trans.
       Signal Process. 47(9), 2600-2603, 1999.
    """
    rho = np.asarray(coefficient, dtype=float)
    if auto:
        return scipy.signal.hilbert(even_extension(rho), axis=-1)[..., rho.shape[-1] - 1 :]
    return scipy.signal.hilbert(rho, axis=-1)


def correlation_envelope(coefficient, auto: bool = True) -> np.ndarray:
    """Hilbert envelope of a correlation function.

    Parameters
    ----------
    coefficient : array_like, shape (..., K)
        Lags 0..L of an auto-correlation (``auto=True``) or any lag range of a cross-correlation;
        several rows along the last axis at once.
    auto : bool
        Build the analytic signal on the even extension -L..L (so lag 0 is not an edge) and
        return lags 0..L again.

    Returns
    -------
    ndarray
        ``|rho(tau) + i H[rho](tau)|``, same lags as ``coefficient``.

    Notes
    -----
    ``|analytic_correlation(coefficient, auto)|``. For a narrow-band correlation
    ``A(tau) cos(w tau + phi)`` with a slowly varying ``A`` the envelope is ``A`` (Bendat &
    Piersol [1]_, Sec. 13.1 (from memory)). For a correlation with much power near zero
    frequency (low-pass, e.g. ``exp(-|tau|/tau_c)``) the Hilbert transform does not vanish and
    the envelope lies above ``|rho|``: see
    :func:`corrtransforms.numerics.timescales.decay_time_s`.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Ch. 13.
    """
    return np.abs(analytic_correlation(coefficient, auto=auto))


def _hilbert_kernel(offsets: np.ndarray) -> np.ndarray:
    """Discrete Hilbert kernel ``h[n] = 2 / (pi n)`` for odd ``n``, 0 for even ``n``."""
    n = np.asarray(offsets)
    odd = (n % 2) == 1
    return np.where(odd, 2.0 / (np.pi * np.where(odd, n, 1)), 0.0)


def even_hilbert_transform(coefficient) -> np.ndarray:
    """Hilbert transform of an auto-correlation's even extension, by linear convolution.

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Auto-correlation coefficient at lags 0..L; zero is assumed beyond lag L.

    Returns
    -------
    ndarray, shape (L + 1,)
        ``H[rho](k) = sum_{j=-L..L} h[k - j] rho(|j|)`` at lags ``k = 0..L``.

    Notes
    -----
    ``h[n] = 2 / (pi n)`` for odd ``n`` and 0 otherwise is the impulse response of the ideal
    discrete Hilbert transformer (Oppenheim & Schafer [1]_, Eq. (12.66) (from memory)); the sum
    is evaluated as a full (non-circular) convolution (``scipy.signal.fftconvolve``), which is
    what ``scipy.signal.hilbert`` of the even extension tends to under unlimited zero padding.
    No periodic copy of the record enters, so the result does not depend on ``L`` except
    through the part of ``rho`` beyond it.

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal Processing*, 3rd ed.,
       Pearson, 2010, Sec. 12.4.
    """
    rho = np.asarray(coefficient, dtype=float)
    L = len(rho) - 1
    extension = even_extension(rho)
    kernel = _hilbert_kernel(np.arange(-2 * L, 2 * L + 1))
    full = scipy.signal.fftconvolve(extension, kernel, mode="full")
    return full[3 * L : 4 * L + 1]


def hilbert_row(lag: int, n_lags: int) -> np.ndarray:
    """Weights of ``H[rho](lag)`` on ``rho`` at lags ``0..n_lags-1`` (:func:`even_hilbert_transform`).

    Returns
    -------
    ndarray, shape (n_lags,)
        ``g_j = h[lag - j] + h[lag + j]`` for ``j >= 1`` and ``g_0 = h[lag]``, so that
        ``H[rho](lag) = g @ rho``: the linear functional whose error the decay time propagates.
    """
    j = np.arange(n_lags)
    row = _hilbert_kernel(lag - j) + _hilbert_kernel(lag + j)
    row[0] = _hilbert_kernel(np.array([lag]))[0]
    return row
