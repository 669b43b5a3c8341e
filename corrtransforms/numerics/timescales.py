"""Time scales of an auto-correlation function: correlation time and envelope decay time.

- :func:`corr_time_s`: integral time scale, the integral of ``rho`` from lag 0 to its first zero
  crossing, with its standard error; :func:`integral_time_scale` the value alone and
  :func:`integral_weights` the trapezoid weights both use (the one home of this integral: the
  correlate stage's ``n_effective`` and screening's memory time use it too).
- :func:`decay_time_s`: lag at which the Hilbert envelope of ``rho`` first falls to ``1/e``.
- :func:`correlation_envelope`: the Hilbert envelope itself (even extension for an auto pair).
- :func:`lag_error_covariance`: covariance of the estimation errors between lags (Bartlett),
  which every standard error of a functional of ``rho`` here needs: errors at neighbouring lags
  are strongly correlated, so treating them as independent understates the error of an integral
  or a fit several-fold.

Every function returns a value, its standard error and quality codes; bad numbers give NaN and a
code, never an exception.
"""
from __future__ import annotations

from typing import NamedTuple, Optional, Sequence, Tuple

import numpy as np
import scipy.fft
import scipy.signal

#: quality codes of this module (code -> meaning)
QUALITY_CODES = {
    "nonfinite_correlation": "the correlation holds NaN or inf at the lags needed",
    "no_zero_crossing": "rho does not cross zero within max_lag; corr_time_s is the integral to "
                        "max_lag, a lower bound",
    "no_envelope_crossing": "the envelope of rho does not fall to 1/e within max_lag",
    "too_few_lags": "fewer than 3 lags",
}

#: above this many lags the covariance matrix is built on every k-th lag (the lag errors are
#: smooth over the correlation time, so a linear functional changes by well under 1 %)
MAX_COVARIANCE_LAGS = 1024


class TimeScale(NamedTuple):
    """A time-scale indicator: value and standard error in seconds, quality codes."""

    value: float
    stderr: float
    quality: Tuple[str, ...]


def _even_extension(coefficient: np.ndarray) -> np.ndarray:
    """Lags 0..L -> -L..L of an even function."""
    return np.concatenate([coefficient[:0:-1], coefficient])


def correlation_envelope(coefficient, auto: bool = True) -> np.ndarray:
    """Hilbert envelope of a correlation function.

    Parameters
    ----------
    coefficient : array_like
        Lags 0..L of an auto-correlation (``auto=True``) or any lag range of a cross-correlation.
    auto : bool
        Build the analytic signal on the even extension -L..L (so lag 0 is not an edge) and
        return lags 0..L again.

    Returns
    -------
    ndarray
        ``|rho(tau) + i H[rho](tau)|``, same lags as ``coefficient``.

    Notes
    -----
    The analytic signal is formed with ``scipy.signal.hilbert`` (one-sided spectrum, Marple's
    discrete analytic signal). For a narrow-band correlation
    ``A(tau) cos(w tau + phi)`` with a slowly varying ``A`` the envelope is ``A`` (Bendat &
    Piersol [1]_, Sec. 13.1 (from memory)). For a correlation with much power near zero
    frequency (low-pass, e.g. ``exp(-|tau|/tau_c)``) the Hilbert transform does not vanish and
    the envelope lies above ``|rho|``: see :func:`decay_time_s`.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Ch. 13.
    .. [2] S. L. Marple, "Computing the discrete-time analytic signal via FFT", IEEE Trans.
       Signal Process. 47(9), 2600-2603, 1999.
    """
    rho = np.asarray(coefficient, dtype=float)
    if auto:
        full = _even_extension(rho)
        return np.abs(scipy.signal.hilbert(full))[len(rho) - 1:]
    return np.abs(scipy.signal.hilbert(rho))


def _lag_sums(rho: np.ndarray) -> np.ndarray:
    """``c(m) = sum_v rho_v rho_{v+m}`` of the even extension, for ``m = 0..2L`` (one FFT)."""
    L = len(rho) - 1
    full = _even_extension(rho)
    n_fft = scipy.fft.next_fast_len(2 * len(full), real=True)
    spectrum = scipy.fft.rfft(full, n_fft)
    return scipy.fft.irfft(spectrum * np.conj(spectrum), n_fft)[:2 * L + 1]


def bartlett_kernel(coefficient, lags: Sequence[int]) -> np.ndarray:
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
    c = _lag_sums(rho)
    i = idx[:, None]
    j = idx[None, :]
    ri = rho[idx][:, None]
    rj = rho[idx][None, :]
    return c[np.abs(j - i)] + c[i + j] - 2 * ri * c[j] - 2 * rj * c[i] + 2 * ri * rj * c[0]


def bartlett_variance(coefficient) -> np.ndarray:
    """Diagonal of :func:`bartlett_kernel` at every lag 0..L: ``n var r_k``."""
    rho = np.nan_to_num(np.asarray(coefficient, dtype=float))
    c = _lag_sums(rho)
    k = np.arange(len(rho))
    return np.clip(c[0] + c[2 * k] - 4 * rho * c[k] + 2 * rho ** 2 * c[0], 0.0, None)


def lag_error_covariance(coefficient, stderr, lags: Sequence[int]) -> np.ndarray:
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


def linear_functional_stderr(weights, coefficient, stderr, lags) -> float:
    """Standard error of ``sum_k weights_k rho(lags_k)`` with Bartlett-correlated lag errors.

    Parameters
    ----------
    weights : array_like
        Weight of each lag (e.g. trapezoid weights of an integral).
    coefficient, stderr : array_like, shape (L + 1,)
        As in :func:`lag_error_covariance`.
    lags : array_like of int
        Lag indices of the weights.

    Returns
    -------
    float
        ``sqrt(w^T Cov w)``; above :data:`MAX_COVARIANCE_LAGS` lags, the weights are summed
        onto every k-th lag first.
    """
    w = np.asarray(weights, dtype=float)
    idx = np.asarray(lags, dtype=int)
    if len(idx) == 0:
        return float("nan")
    stride = int(np.ceil(len(idx) / MAX_COVARIANCE_LAGS))
    if stride > 1:
        groups = np.arange(len(idx)) // stride
        w = np.bincount(groups, weights=w)
        idx = idx[::stride][:len(w)] + (stride - 1) // 2
        idx = np.minimum(idx, len(coefficient) - 1)
    cov = lag_error_covariance(coefficient, stderr, idx)
    return float(np.sqrt(max(w @ cov @ w, 0.0)))


def _first_crossing(values: np.ndarray, level: float, start: int = 0) -> Optional[float]:
    """Fractional index where ``values`` first falls to ``level`` (linear interpolation)."""
    below = np.nonzero(values[start:] <= level)[0]
    if len(below) == 0:
        return None
    k = start + int(below[0])
    if k == 0:
        return 0.0
    v0, v1 = values[k - 1], values[k]
    return (k - 1) + (v0 - level) / (v0 - v1)


#: upper limits of the integral time scale
UNTIL_CHOICES = ("first_zero", "max_lag")


def integral_weights(rho: np.ndarray, until: str = "first_zero") -> Tuple[np.ndarray, bool]:
    """Trapezoid weights (unit lag step) of the integral of ``rho`` from lag 0 to its first zero.

    Parameters
    ----------
    rho : ndarray, shape (L + 1,)
        Auto-correlation coefficient at lags 0..L, finite up to the crossing.
    until : {"first_zero", "max_lag"}
        Upper limit: the first zero crossing (linearly interpolated) or lag L.

    Returns
    -------
    weights : ndarray, shape (K,)
        ``sum_k weights_k rho_k`` is the integral in lag steps; ``K <= L + 1``.
    crossed : bool
        False when ``until="first_zero"`` and ``rho`` stays positive to lag L (the weights
        then integrate to L, a lower bound).

    Notes
    -----
    Trapezoid rule on lags ``0..k``, then the partial interval ``k..tau_0`` under the linear
    interpolation ``(1 - f) rho_k + f rho_{k+1}`` with ``tau_0 = k + f`` the interpolated zero.
    """
    end = _first_crossing(rho, 0.0) if until == "first_zero" else None
    crossed = end is not None
    if end is None:
        end = float(len(rho) - 1)
    k = int(np.floor(end))
    frac = end - k
    weights = np.ones(k + 1)
    weights[0] = weights[-1] = 0.5
    if k == 0:
        weights[:] = 0.0
    if frac > 0 and k + 1 < len(rho):
        # value at the crossing by linear interpolation: (1-frac) rho_k + frac rho_{k+1}
        weights = np.append(weights, 0.0)
        weights[k] += 0.5 * frac * (2 - frac)
        weights[k + 1] += 0.5 * frac * frac
    return weights, crossed


def integral_time_scale(coefficient, lag_step_s: float) -> float:
    """Integral time scale ``T_I = int_0^{tau_0} rho(tau) dtau`` up to the first zero crossing.

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Auto-correlation coefficient at lags ``0..L``; non-finite lags count as 0.
    lag_step_s : float
        Lag step ``dt``.

    Returns
    -------
    float
        ``T_I`` in seconds (:func:`integral_weights`: trapezoid rule, linear interpolation to
        the crossing; the whole range when ``rho`` stays positive). The value of
        :func:`corr_time_s` without its standard error, for a coefficient that may hold NaN.

    Notes
    -----
    Stopping at the first zero crossing is common practice: beyond it the estimate is mostly
    noise, and for oscillatory correlations the full integral tends to zero. For an AR(1)
    sequence ``rho_k = phi^k`` summed without a crossing, the trapezoid rule gives
    ``T_I = dt (1 + phi) / (2 (1 - phi))``, the exact discrete result.

    References
    ----------
    .. [1] H. Tennekes and J. L. Lumley, *A First Course in Turbulence*, MIT Press, 1972,
       Sec. 6.4 (integral scale and averaging time).
    """
    rho = np.asarray(coefficient, dtype=float)
    rho = np.where(np.isfinite(rho), rho, 0.0)
    if len(rho) < 2:
        return 0.0
    weights, _ = integral_weights(rho)
    return float((weights * lag_step_s) @ rho[:len(weights)])


def corr_time_s(coefficient, stderr, lag_step_s: float, until: str = "first_zero") -> TimeScale:
    """Integral time scale of an auto-correlation: integral of rho from 0 to its first zero.

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Auto-correlation coefficient at lags ``0..L`` (``lag k = k * lag_step_s``).
    stderr : array_like, shape (L + 1,)
        Standard error of each coefficient.
    lag_step_s : float
        Lag spacing (the sample period).
    until : {"first_zero", "max_lag"}
        Upper limit: the first zero crossing (the indicator ``corr_time_s``) or lag L.

    Returns
    -------
    TimeScale
        Value and standard error in seconds; quality ``no_zero_crossing`` when rho stays
        positive to lag L (the value is then the integral to L, a lower bound).

    Notes
    -----
    Trapezoid rule on the lag grid, the last interval ending at the linearly interpolated zero
    crossing ``tau_0``::

        T_int = int_0^tau_0 rho(tau) d tau

    For a process with an exponential correlation ``exp(-|tau|/tau_c)`` (first-order low-pass,
    Ornstein-Uhlenbeck) ``T_int -> tau_c``; the integral to infinity of the correlation of a
    white-noise driven oscillator is ``2 zeta / omega_n`` (Bendat & Piersol [1]_, Sec. 5.2;
    Taylor's integral scale [2]_). Standard error: the integral is linear in the
    coefficients, ``var = w^T Cov w`` with trapezoid weights ``w`` and Bartlett's lag-error
    covariance (:func:`lag_error_covariance`); the random position of ``tau_0`` adds nothing to
    first order because ``rho(tau_0) = 0``.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010.
    .. [2] G. I. Taylor, "Diffusion by continuous movements", Proc. London Math. Soc. s2-20,
       196-212, 1922.
    """
    rho = np.asarray(coefficient, dtype=float)
    s = np.asarray(stderr, dtype=float)
    if until not in UNTIL_CHOICES:
        raise ValueError(f"until={until!r}: must be one of 'first_zero', 'max_lag'")
    if rho.shape != s.shape or rho.ndim != 1:
        raise ValueError(f"coefficient {rho.shape} and stderr {s.shape} must be 1-d of equal length")
    if len(rho) < 3:
        return TimeScale(float("nan"), float("nan"), ("too_few_lags",))
    if until == "first_zero":
        finite_prefix = np.isfinite(rho)
        end = _first_crossing(np.where(finite_prefix, rho, np.inf), 0.0)
        # NaN before the crossing spoils the integral
        stop = len(rho) if end is None else int(np.ceil(end)) + 1
        if not np.all(finite_prefix[:stop]):
            return TimeScale(float("nan"), float("nan"), ("nonfinite_correlation",))
    elif not np.all(np.isfinite(rho)):
        return TimeScale(float("nan"), float("nan"), ("nonfinite_correlation",))
    weights, crossed = integral_weights(rho, until)
    quality = ("no_zero_crossing",) if until == "first_zero" and not crossed else ()
    weights *= lag_step_s
    lags = np.arange(len(weights))
    value = float(weights @ rho[lags])
    err = linear_functional_stderr(weights, rho, s, lags) if np.all(np.isfinite(s[lags])) else float("nan")
    return TimeScale(value, err, quality)


def decay_time_s(coefficient, stderr, lag_step_s: float, auto: bool = True,
                 level: float = float(np.exp(-1.0))) -> TimeScale:
    """Lag at which the Hilbert envelope of a correlation function first falls to ``1/e``.

    Parameters
    ----------
    coefficient : array_like, shape (L + 1,)
        Correlation coefficient at lags 0..L (auto pair: the envelope is built on the even
        extension -L..L, so lag 0 is not an edge of the transform).
    stderr : array_like, shape (L + 1,)
        Standard error of each coefficient.
    lag_step_s : float
        Lag spacing.
    auto : bool
        True for an auto-correlation (even extension); False uses the lags as given.
    level : float
        Envelope level, default ``1/e``.

    Returns
    -------
    TimeScale
        Value and standard error in seconds; NaN and ``no_envelope_crossing`` when the envelope
        stays above the level to lag L.

    Notes
    -----
    ``E(tau) = |rho(tau) + i H[rho](tau)|`` (:func:`correlation_envelope`); the crossing
    ``tau_e`` is interpolated linearly between lags. For a narrow-band response, e.g. the
    correlation ``exp(-zeta w_n tau)[cos w_d tau + zeta/sqrt(1-zeta^2) sin w_d tau]`` of a
    lightly damped oscillator, ``tau_e ~ 1/(zeta w_n)`` (the free-decay time constant).
    For a low-pass correlation the envelope exceeds ``|rho|``: for ``exp(-|tau|/tau_c)``
    on ``|tau| <= 10 tau_c`` the envelope reaches ``1/e`` at ``1.86 tau_c`` (1.71 for
    ``L = 5 tau_c``, 1.90 for ``L = 20 tau_c``), because the Hilbert transform of a function
    with a non-zero integral decays only like ``1/tau``. Use ``corr_time_s`` (which is
    ``tau_c`` there) for broadband channels; ``decay_time_s`` is consistent from window to
    window for a fixed ``max_lag``, which is what trending needs.

    Standard error by first-order propagation through the crossing::

        sd(tau_e) = sd(E(tau_e)) / |E'(tau_e)|,   sd(E(tau_e)) ~ sd(rho(tau_e))

    (the envelope error at a lag is the in-phase error ``cos(phi) d rho + sin(phi) dH`` and the
    Hilbert transform keeps the variance of band-pass noise).

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Ch. 13 (Hilbert
       transforms, envelope of correlation functions).
    """
    rho = np.asarray(coefficient, dtype=float)
    s = np.asarray(stderr, dtype=float)
    if rho.shape != s.shape or rho.ndim != 1:
        raise ValueError(f"coefficient {rho.shape} and stderr {s.shape} must be 1-d of equal length")
    if len(rho) < 3:
        return TimeScale(float("nan"), float("nan"), ("too_few_lags",))
    if not np.all(np.isfinite(rho)):
        return TimeScale(float("nan"), float("nan"), ("nonfinite_correlation",))
    envelope = correlation_envelope(rho, auto=auto)
    start = int(np.argmax(envelope)) if not auto else 0
    level_abs = level * envelope[start]
    cross = _first_crossing(envelope, level_abs, start=start)
    if cross is None:
        return TimeScale(float("nan"), float("nan"), ("no_envelope_crossing",))
    k = min(int(np.floor(cross)), len(rho) - 2)
    slope = (envelope[k + 1] - envelope[k]) / lag_step_s
    frac = cross - k
    sd_env = (1 - frac) * s[k] + frac * s[k + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        err = float(sd_env / abs(slope)) if slope != 0 else float("inf")
    return TimeScale(float((cross - start) * lag_step_s), err, ())
