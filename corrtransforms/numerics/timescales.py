"""Time scales of an auto-correlation function: correlation time and envelope decay time.

- :func:`corr_time_s`: integral time scale, the integral of ``rho`` from lag 0 to its first zero
  crossing, with its standard error; :func:`integral_time_scale` the value alone and
  :func:`integral_weights` the trapezoid weights both use (the one home of this integral: the
  correlate stage's ``n_effective`` and screening's memory time use it too).
- :func:`decay_time_s`: lag at which the Hilbert envelope of ``rho`` first falls to ``1/e``.
The Hilbert transforms themselves are in :mod:`corrtransforms.numerics.envelope`.
The standard errors use the covariance of the estimation errors between lags of
:mod:`corrtransforms.numerics.bartlett` (errors at neighbouring lags are strongly correlated, so
treating them as independent understates the error of an integral or a fit several-fold).

Every function returns a value, its standard error and quality codes; bad numbers give NaN and a
code, never an exception.
"""

from __future__ import annotations

from typing import NamedTuple, Optional, Tuple

import numpy as np

from corrtransforms.numerics.bartlett import LagErrors, linear_functional_stderr
from corrtransforms.numerics.envelope import correlation_envelope, even_hilbert_transform, hilbert_row

#: quality codes of this module (code -> meaning)
QUALITY_CODES = {
    "nonfinite_correlation": "the correlation holds NaN or inf at the lags needed",
    "no_zero_crossing": "rho does not cross zero within max_lag; corr_time_s is the integral to max_lag, a lower bound",
    "no_envelope_crossing": "the envelope of rho does not fall to 1/e within max_lag",
    "too_few_lags": "fewer than 3 lags",
}


class TimeScale(NamedTuple):
    """A time-scale indicator: value and standard error in seconds, quality codes."""

    value: float
    stderr: float
    quality: Tuple[str, ...]


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


#: corr_time_s integrates to the first zero or to this many first-1/e lags, whichever comes first
CORR_TIME_EFOLDS = 5.0


def integral_weights(
    rho: np.ndarray, until: str = "first_zero", efolds: Optional[float] = None
) -> Tuple[np.ndarray, bool]:
    """Trapezoid weights (unit lag step) of the integral of ``rho`` from lag 0 to its first zero.

    Parameters
    ----------
    rho : ndarray, shape (L + 1,)
        Auto-correlation coefficient at lags 0..L, finite up to the crossing.
    until : {"first_zero", "max_lag"}
        Upper limit: the first zero crossing (linearly interpolated) or lag L.
    efolds : float, optional
        With ``until="first_zero"``: stop at ``efolds`` times the first ``1/e`` lag when that
        comes before the zero (None: no such limit).

    Returns
    -------
    weights : ndarray, shape (K,)
        ``sum_k weights_k rho_k`` is the integral in lag steps; ``K <= L + 1``.
    crossed : bool
        False when ``until="first_zero"`` and ``rho`` stays positive to lag L (the weights
        then integrate to L, a lower bound); True when the integral ends at the zero or at the
        ``efolds`` limit.

    Notes
    -----
    Trapezoid rule on lags ``0..k``, then the partial interval ``k..tau_0`` under the linear
    interpolation ``(1 - f) rho_k + f rho_{k+1}`` with ``tau_0 = k + f`` the interpolated zero.
    """
    end = _first_crossing(rho, 0.0) if until == "first_zero" else None
    if until == "first_zero" and efolds is not None:
        e_lag = _first_crossing(rho, float(np.exp(-1.0)))
        if e_lag is not None and efolds * e_lag < min(end if end is not None else np.inf, len(rho) - 1):
            end = efolds * e_lag
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
    return float((weights * lag_step_s) @ rho[: len(weights)])


def corr_time_s(
    coefficient, stderr, lag_step_s: float, until: str = "first_zero", errors: Optional[LagErrors] = None
) -> TimeScale:
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
    errors : LagErrors, optional
        ``LagErrors.of(coefficient, stderr)`` when the caller has it (shared with
        :func:`decay_time_s` of the same estimate); None computes it.

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
    coefficients, ``var_w = w^T Cov w`` with trapezoid weights ``w`` and Bartlett's lag-error
    covariance (:func:`corrtransforms.numerics.bartlett.lag_error_covariance`). The end point
    is random too: the first-order argument that it adds nothing because ``rho(tau_0) = 0``
    fails where the estimate crosses zero in its noise (the tail of a low-pass correlation, a
    white channel), which the calibration matrix showed (coverage 0.80-0.90). The crossing
    moves by ``sd(tau_0) = sd(rho(tau_0)) / |rho'(tau_0)|`` (capped at ``tau_0``) over an
    interval whose coefficients carry the error ``sd(rho(tau_0))``, so
    ``var = var_w + [sd(rho(tau_0)) sd(tau_0)]^2`` (a heuristic bound of the end interval's
    contribution, common practice; no term when rho does not cross zero).

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
    weights, crossed = integral_weights(rho, until, CORR_TIME_EFOLDS if until == "first_zero" else None)
    quality = ("no_zero_crossing",) if until == "first_zero" and not crossed else ()
    weights *= lag_step_s
    lags = np.arange(len(weights))
    value = float(weights @ rho[lags])
    if not np.all(np.isfinite(s[lags])):
        return TimeScale(value, float("nan"), quality)
    err = linear_functional_stderr(weights, rho, s, lags, errors)
    if crossed:
        err = float(np.hypot(err, _end_point_stderr(rho, s, lag_step_s, CORR_TIME_EFOLDS)))
    return TimeScale(value, err, quality)


def _crossing_sd(rho: np.ndarray, s: np.ndarray, lag_step_s: float, at: float) -> Tuple[float, float]:
    """(sd of rho, sd of the crossing lag in seconds) at the fractional lag ``at`` where rho
    crosses a level: ``sd(tau) = sd(rho(tau)) / |rho'(tau)|``, at most ``tau`` itself."""
    k = min(int(np.floor(at)), len(rho) - 2)
    frac = at - k
    sd_rho = (1 - frac) * s[k] + frac * s[k + 1]
    slope = abs(rho[k + 1] - rho[k]) / lag_step_s
    tau = at * lag_step_s
    return float(sd_rho), float(min(sd_rho / slope, tau) if slope > 0 else tau)


def _end_point_stderr(rho: np.ndarray, s: np.ndarray, lag_step_s: float, efolds: Optional[float] = None) -> float:
    """Error of the integral from the random position of its end point.

    At the first zero: the crossing moves by ``sd(tau_0) = sd(rho(tau_0)) / |rho'(tau_0)|``
    (at most ``tau_0`` itself), and the end interval it adds or removes holds coefficients
    whose error is ``sd(rho(tau_0))``: ``sd_end = sd(rho(tau_0)) * sd(tau_0)``. At the limit
    ``efolds * tau_e`` (``tau_e`` the first 1/e lag, crossed steeply): the limit moves by
    ``efolds * sd(tau_e)`` over an integrand ``rho(end)``: ``sd_end = |rho(end)| efolds sd(tau_e)``.
    """
    end = _first_crossing(rho, 0.0)
    if efolds is not None:
        e_lag = _first_crossing(rho, float(np.exp(-1.0)))
        if e_lag is not None and efolds * e_lag < min(end if end is not None else np.inf, len(rho) - 1):
            _, sd_e = _crossing_sd(rho, s, lag_step_s, e_lag)
            limit = efolds * e_lag
            j = min(int(np.floor(limit)), len(rho) - 2)
            g = limit - j
            return float(abs((1 - g) * rho[j] + g * rho[j + 1]) * efolds * sd_e)
    if end is None:  # no crossing: no end point, no end term
        return 0.0
    sd_rho, sd_tau = _crossing_sd(rho, s, lag_step_s, end)
    return sd_rho * sd_tau


def decay_time_s(
    coefficient,
    stderr,
    lag_step_s: float,
    auto: bool = True,
    level: float = float(np.exp(-1.0)),
    errors: Optional[LagErrors] = None,
) -> TimeScale:
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
    errors : LagErrors, optional
        As in :func:`corr_time_s`.

    Returns
    -------
    TimeScale
        Value and standard error in seconds; NaN and ``no_envelope_crossing`` when the envelope
        stays above the level to lag L.

    Notes
    -----
    ``E(tau) = |rho(tau) + i H[rho](tau)|`` with, for an auto-correlation, the non-circular
    Hilbert transform of the even extension
    (:func:`corrtransforms.numerics.envelope.even_hilbert_transform`: linear convolution with the
    discrete Hilbert kernel, i.e. ``scipy.signal.hilbert`` with unlimited zero padding); the
    crossing ``tau_e`` is interpolated linearly between lags. For a narrow-band response, e.g.
    the correlation ``exp(-zeta w_n tau)[cos w_d tau + zeta/sqrt(1-zeta^2) sin w_d tau]`` of a
    lightly damped oscillator, ``tau_e ~ 1/(zeta w_n)`` (the free-decay time constant). For a
    low-pass correlation the envelope exceeds ``|rho|``: for ``exp(-|tau|/tau_c)`` it reaches
    ``1/e`` at ``1.9134 tau_c``, the root of ``|e^-t + i H(t)| = 1/e`` with
    ``H(t) = [e^-t Ei(t) + e^t E1(t)] / pi``; the estimate is within 0.1 % of it for any
    ``max_lag >= 5 tau_c`` (the circular FFT transform used before gave 1.71 / 1.85 / 1.90
    ``tau_c`` at ``L = 5 / 10 / 20 tau_c``). ``auto=False`` keeps the circular envelope of
    :func:`corrtransforms.numerics.envelope.correlation_envelope` and the error
    ``sd(rho)/|E'|`` at the crossing.

    Standard error by first-order propagation through the crossing: the envelope at the
    interpolated crossing is a smooth function of the coefficients,
    ``dE_k = (rho_k d rho_k + H_k d H_k) / E_k`` with ``d H_k = g_k . d rho``
    (:func:`corrtransforms.numerics.envelope.hilbert_row`), so::

        sd(tau_e) = sqrt(w^T Cov w) / |E'(tau_e)|,
        w = (1 - f) dE_k/d rho + f dE_{k+1}/d rho

    with the slope ``E'`` from the secant over ``tau_e +/- 25 %`` (:func:`_secant_slope`)
    with Bartlett's lag-error covariance ``Cov``
    (:func:`corrtransforms.numerics.bartlett.linear_functional_stderr`); lag 0 is 1 without
    error and ``H_0 = 0``, so the level ``E_0 / e`` is fixed.

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
    if not auto:
        return _circular_decay_time(rho, s, lag_step_s, level)
    hilbert = even_hilbert_transform(rho)
    envelope = np.hypot(rho, hilbert)
    cross = _first_crossing(envelope, level * envelope[0])
    if cross is None:
        return TimeScale(float("nan"), float("nan"), ("no_envelope_crossing",))
    k = min(int(np.floor(cross)), len(rho) - 2)
    frac = cross - k
    slope = _secant_slope(envelope, k, cross) / lag_step_s
    weights = (1 - frac) * _envelope_gradient(rho, hilbert, envelope, k) + frac * _envelope_gradient(
        rho, hilbert, envelope, k + 1
    )
    lags = np.arange(len(rho))
    if np.all(np.isfinite(s)) and slope != 0:
        err = linear_functional_stderr(weights, rho, s, lags, errors) / abs(slope)
    else:
        err = float("inf") if slope == 0 else float("nan")
    return TimeScale(float(cross * lag_step_s), float(err), ())


#: half-width, as a fraction of the crossing lag, of the secant that gives the envelope's slope
SLOPE_SPAN = 0.25


def _secant_slope(envelope: np.ndarray, k: int, cross: float) -> float:
    """The envelope's slope at the crossing (per lag step), from the secant over
    ``cross +/- SLOPE_SPAN * cross`` lags (at least one lag each side).

    The one-lag difference at the crossing is itself noisy, and its noise is correlated with the
    crossing's own error (a window whose envelope falls early falls steeply there), so windows
    that missed got the smallest stderrs: on the calibration matrix the oscillators and the gappy
    record covered 0.90-0.92 with a scatter 1.0-1.05 times the stderr; with the secant 0.93-0.95
    (the 25 % span chosen among 0, 10 % and 25 %; common practice, no published source).
    """
    h = max(1, int(round(SLOPE_SPAN * cross)))
    lo, hi = max(0, k - h + 1), min(len(envelope) - 1, k + h)
    return float(envelope[hi] - envelope[lo]) / (hi - lo)


def _envelope_gradient(rho, hilbert, envelope, k: int) -> np.ndarray:
    """``d E_k / d rho_j`` for ``E_k = |rho_k + i H_k|`` (:func:`even_hilbert_transform`)."""
    gradient = hilbert[k] * hilbert_row(k, len(rho))
    gradient[k] += rho[k]
    return gradient / envelope[k]


def _circular_decay_time(rho, s, lag_step_s: float, level: float) -> TimeScale:
    """Decay time of a cross-correlation (lags as given, circular envelope, from its peak)."""
    envelope = correlation_envelope(rho, auto=False)
    start = int(np.argmax(envelope))
    cross = _first_crossing(envelope, level * envelope[start], start=start)
    if cross is None:
        return TimeScale(float("nan"), float("nan"), ("no_envelope_crossing",))
    k = min(int(np.floor(cross)), len(rho) - 2)
    slope = (envelope[k + 1] - envelope[k]) / lag_step_s
    frac = cross - k
    sd_env = (1 - frac) * s[k] + frac * s[k + 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        err = float(sd_env / abs(slope)) if slope != 0 else float("inf")
    return TimeScale(float((cross - start) * lag_step_s), err, ())
