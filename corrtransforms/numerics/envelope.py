"""Analytic signal and Hilbert envelope of correlation functions: one home for both.

An auto-correlation is given at lags ``0..L``; its analytic signal is formed on the even
extension ``-L..L`` (:func:`corrtransforms.numerics.correlation.even_extension`), so lag 0 is not
an edge of the transform, and lags ``0..L`` are returned. A cross-correlation is transformed on
the lags as given. Used by the decay time (:mod:`corrtransforms.numerics.timescales`), the
modal fit's start values and fitting range (:mod:`corrtransforms.numerics.modal_fit`) and the
lag peak's width (:mod:`corrtransforms.numerics.time_delay`).
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
        return scipy.signal.hilbert(even_extension(rho), axis=-1)[..., rho.shape[-1] - 1:]
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
