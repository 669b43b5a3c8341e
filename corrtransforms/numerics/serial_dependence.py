"""Serial dependence of the baseline residuals and the one-step prediction errors the detectors use.

Window-to-window correlation of an indicator's residuals (an unmodelled covariate, slow
weather, thermal inertia) makes the CUSUM and EWMA charts, which assume independent values,
signal far too often. The residual-chart approach (Alwan & Roberts 1988; Montgomery 2009,
Section 10.4) fits a time-series model to the in-control residuals and charts what is not
predictable from the past: the one-step prediction errors, independent in control.

The model here separates the indicator's own variability from each window's estimation error::

    r_t = x_t + e_t,   x_t = phi x_{t-1} + a_t,   Var(x) = s_resid^2,   Var(e_t) = stderr_t^2

with ``r_t = value - expected``, ``a_t`` independent N(0, s_resid^2 (1 - phi^2)) and ``e_t``
independent of everything else. The one-step prediction errors of this linear Gaussian state
space model are those of the scalar Kalman filter (:func:`ar1_prediction_errors`): a window
with a large stderr has a small standardised prediction error (it cannot alarm on its own) and
hardly moves the predictor; a held window or a gap of g windows is a missing observation: the
predictor runs g steps ahead without an update (Harvey 1989, Section 3.4.7; Durbin & Koopman
2012, Section 4.10). With ``phi = 0`` the standardised prediction error is exactly the
error-aware ``z = r / sqrt(s_resid^2 + stderr^2)``.

- :func:`robust_lag_one_correlation`: robust lag-1 autocorrelation of standardised residuals
  in time order, from adjacent pairs only;
- :func:`latent_ar1_coefficient`: phi of the indicator's own variability from it;
- :func:`ar1_prediction_errors`: the standardised one-step prediction errors (batched);
- :func:`long_run_variance_factor`: ``(1 + phi) / (1 - phi)``, the alternative of widening the
  limits instead (compared in docs/shifts.md).

Only numpy and scipy are used.

References
----------
Alwan, L. C. & Roberts, H. V. (1988). Time-series modeling for statistical process control.
Journal of Business & Economic Statistics 6, 87-95.
Montgomery, D. C. (2009). Introduction to Statistical Quality Control, 6th ed., Wiley,
Section 10.4 (SPC with autocorrelated process data) (from memory).
Gnanadesikan, R. & Kettenring, J. R. (1972). Robust estimates, residuals, and outlier detection
with multiresponse data. Biometrics 28, 81-124 (the identity cov = (s_+^2 - s_-^2) / 4).
Ma, Y. & Genton, M. G. (2000). Highly robust estimation of the autocovariance function. Journal
of Time Series Analysis 21, 663-684 (the same identity for autocorrelations) (from memory).
Harvey, A. C. (1989). Forecasting, Structural Time Series Models and the Kalman Filter.
Cambridge University Press.
Durbin, J. & Koopman, S. J. (2012). Time Series Analysis by State Space Methods, 2nd ed., Oxford.
"""

from __future__ import annotations

import warnings
from typing import Tuple

import numpy as np

#: largest |phi| used; beyond it the AR(1) is too close to a random walk to standardise
PHI_LIMIT = 0.95
#: fewer adjacent baseline pairs than this: the dependence is not estimated (phi = 0 is used)
MIN_PAIRS = 30


def _mad_sq(x, axis=-1):
    """Squared normalised MAD along ``axis`` ignoring NaN (1.4826 = 1 / Phi^-1(3/4))."""
    median = np.nanmedian(x, axis=axis, keepdims=True)
    return np.square(1.482602218505602 * np.nanmedian(np.abs(x - median), axis=axis))


def robust_lag_one_correlation(z, adjacent=None) -> Tuple[np.ndarray, np.ndarray]:
    """Robust lag-1 autocorrelation of standardised residuals in time order.

    Parameters
    ----------
    z : array_like, shape (..., n)
        Standardised baseline residuals in time order (NaN: not usable).
    adjacent : array_like of bool, shape (..., n - 1), optional
        True where windows ``i`` and ``i + 1`` are one window apart (default: all pairs). A pair
        across a gap or a held window is left out (it is not a lag-1 pair).

    Returns
    -------
    rho : ndarray, shape (...)
        ``(S+^2 - S-^2) / (S+^2 + S-^2)`` with ``S+-`` the normalised MAD of ``z_{i+1} +- z_i``
        over the usable pairs (NaN with fewer than 3 pairs); in [-1, 1].
    pairs : ndarray of int, shape (...)
        Usable pairs.

    Notes
    -----
    For a stationary pair of equal variance, ``Var(u + v) - Var(u - v) = 4 Cov(u, v)`` and the
    sum is ``4 Var``; with a robust scale in place of the standard deviation the ratio is a
    robust correlation (Gnanadesikan & Kettenring 1972; Ma & Genton 2000): a few disturbed
    baseline windows cannot fake or hide the dependence.
    """
    z = np.asarray(z, dtype=float)
    before, after = z[..., :-1], z[..., 1:]
    usable = np.isfinite(before) & np.isfinite(after)
    if adjacent is not None:
        usable &= np.asarray(adjacent, dtype=bool)
    pairs = usable.sum(axis=-1)
    plus = np.where(usable, after + before, np.nan)
    minus = np.where(usable, after - before, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows: fewer than 3 pairs anyway
        s_plus, s_minus = _mad_sq(plus), _mad_sq(minus)
        rho = (s_plus - s_minus) / (s_plus + s_minus)
    rho = np.where(pairs >= 3, rho, np.nan)
    return rho, pairs


def latent_ar1_coefficient(rho_z, resid_scale, total_scale) -> np.ndarray:
    """AR(1) coefficient of the indicator's own variability from the lag-1 correlation of z.

    Parameters
    ----------
    rho_z : array_like
        Lag-1 autocorrelation of ``z = r / sqrt(s_resid^2 + stderr^2)`` on the baseline.
    resid_scale, total_scale : array_like
        ``s_resid`` and the baseline's total residual scale (``s_resid^2 + median stderr^2``).

    Returns
    -------
    ndarray
        ``phi = rho_z total_scale^2 / s_resid^2`` clipped to ``[-PHI_LIMIT, PHI_LIMIT]``; 0 where
        it cannot be formed (``s_resid = 0``, NaN).

    Notes
    -----
    The windows' estimation errors are independent, so they dilute the correlation of
    consecutive residuals: ``Corr(r_t, r_{t+1}) = phi s_resid^2 / (s_resid^2 + stderr^2)``
    for a typical stderr (method of moments).
    """
    rho_z = np.asarray(rho_z, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        phi = rho_z * np.square(total_scale) / np.square(resid_scale)
    phi = np.where(np.isfinite(phi), phi, 0.0)
    return np.clip(phi, -PHI_LIMIT, PHI_LIMIT)


def innovation_scale(resid_scale, phi) -> np.ndarray:
    """Standard deviation of the AR(1) innovations, ``s_resid sqrt(1 - phi^2)``."""
    return np.asarray(resid_scale, dtype=float) * np.sqrt(1.0 - np.square(phi))


def long_run_variance_factor(phi) -> np.ndarray:
    """``(1 + phi) / (1 - phi)``: the variance of a sum of n AR(1) values over n times its
    marginal variance, for large n (Box, Jenkins & Reinsel 2008, Section 2.1.5, from memory)."""
    phi = np.asarray(phi, dtype=float)
    return (1.0 + phi) / (1.0 - phi)


def ar1_prediction_errors(resid, stderr, steps, phi, resid_scale, mean_start=0.0, var_start=None):
    """Standardised one-step prediction errors of the AR(1)-plus-estimation-error model.

    Parameters
    ----------
    resid : array_like, shape (..., n)
        ``value - expected`` of the windows the detectors use, in time order.
    stderr : array_like, shape (..., n)
        Their standard errors.
    steps : array_like of int, shape (..., n)
        Windows from the previous used window (1 for consecutive windows; g + 1 across g held
        or missing windows; for the first window, from the window of ``mean_start``).
    phi, resid_scale : float or array_like, shape (...)
        AR(1) coefficient and marginal scale ``s_resid`` of the indicator's own variability.
    mean_start, var_start : float or array_like, shape (...)
        Filtered mean and variance of ``x`` at the window before the first (after its update);
        ``var_start = None`` is the stationary start ``s_resid^2`` (no information), with
        ``mean_start = 0``.

    Returns
    -------
    errors : ndarray, shape (..., n)
        ``(r_t - m_t) / sqrt(P_t + stderr_t^2)``: N(0, 1) and independent in control.
    mean_end, var_end : ndarray, shape (...)
        Filtered mean and variance after the last window (the state to carry).

    Notes
    -----
    Scalar Kalman filter, per window: predict ``g`` steps,
    ``m_t = phi^g m``, ``P_t = phi^(2g) P + s_resid^2 (1 - phi^(2g))``; innovation
    ``r_t - m_t`` of variance ``F_t = P_t + stderr_t^2``; update with gain ``K = P_t / F_t``:
    ``m = m_t + K (r_t - m_t)``, ``P = P_t (1 - K)`` (Harvey 1989, eqs. 3.2.3a-b and 3.2.4,
    from memory). A missing observation is a prediction without an update (Durbin & Koopman
    2012, Section 4.10). The stderr enters only ``F_t`` and ``K``: a poor window has a small
    standardised error and a small gain.
    """
    r = np.asarray(resid, dtype=float)
    se2 = np.square(np.asarray(stderr, dtype=float))
    g = np.asarray(steps, dtype=float)
    phi = np.asarray(phi, dtype=float)
    s2 = np.square(np.asarray(resid_scale, dtype=float))
    lead = np.broadcast_shapes(r.shape[:-1], phi.shape, s2.shape)
    m = np.broadcast_to(np.asarray(mean_start, dtype=float), lead).copy()
    p = (
        np.broadcast_to(s2, lead) if var_start is None else np.broadcast_to(np.asarray(var_start, dtype=float), lead)
    ).copy()
    errors = np.empty(np.broadcast_shapes(r.shape, lead + r.shape[-1:]))
    g = np.broadcast_to(g, errors.shape)
    se2 = np.broadcast_to(se2, errors.shape)
    for t in range(r.shape[-1]):
        decay = phi ** g[..., t]
        m_t = decay * m
        p_t = decay * decay * p + s2 * (1.0 - decay * decay)
        f_t = p_t + se2[..., t]
        innovation = r[..., t] - m_t
        with np.errstate(invalid="ignore", divide="ignore"):
            errors[..., t] = np.where(f_t > 0, innovation / np.sqrt(f_t), np.nan)
            gain = np.where(f_t > 0, p_t / f_t, 0.0)
        m = m_t + gain * innovation
        p = p_t * (1.0 - gain)
    return errors, m, p
