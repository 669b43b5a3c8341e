"""Record-length (random) error of correlation estimates, and validity checks of the estimates.

A correlation function estimated from a record of finite length ``T`` differs from the ensemble
correlation of the process. This module states how far, in two forms that answer different
questions:

- **per lag, general** (the ``stderr`` column): Bartlett's variance formula evaluated on the
  estimated coefficients themselves,
  :func:`corrtransforms.numerics.bartlett.bartlett_stderr`, with the pair count at each lag in
  place of ``n`` for gappy records. This is the figure to put on a coefficient at any lag.
- **closed form, one number per pair** (the ``rel_error`` column): Bendat & Piersol's
  bandwidth-limited white-noise formulas, :func:`mean_square_rel_error` ``1/sqrt(BT)`` and
  :func:`correlation_rel_error` ``[1 + rho^-2]^(1/2) / sqrt(2BT)``, with the statistical
  bandwidth ``B`` of :func:`statistical_bandwidth`. It is exact at zero lag and at the peak of
  a pure delay, but at other lags of a sinc-shaped correlation it can be off by about 20 %
  (:func:`correlation_random_error` is the general form of the same quantity).

It also gives the effective number of independent samples (:func:`effective_samples`), the
record length needed for a target error (:func:`required_record_length`), the bound for a
random-phase tone (:func:`tone_required_half_length`) and the validity checks
(:func:`auto_correlation_checks`), which return quality codes from :data:`QUALITY_CODES`. The
per-lag variance lives in :mod:`corrtransforms.numerics.bartlett`, the PSD and the tone finder
in :mod:`corrtransforms.numerics.spectra`.
"""

from __future__ import annotations

from typing import List

import numpy as np
from scipy.integrate import trapezoid

from corrtransforms.numerics.bartlett import bartlett_sums

#: quality codes of the correlate stage (code -> meaning); records.quality_text joins them
QUALITY_CODES = {
    "r0_mismatch": "R(0) of an auto-correlation differs from the mean square of the detrended record",
    "coefficient_exceeds_one": "some |rho| > 1 (possible with the unbiased estimator; a defect with the biased one)",
    "auto_not_even": "an auto-correlation is not even, R(-tau) != R(tau)",
    "negative_psd": "the spectrum of the biased auto-correlation (Parzen lag window) is negative somewhere",
    "few_pairs": "some lags had fewer valid sample pairs than min_pairs and are NaN",
    "max_lag_short": "the auto-correlation has not decayed within max_lag (|rho| > 0.2 in the last 10 % of lags): "
    "bandwidth, stderr and n_effective are then optimistic",
    "tone_record_short": "the record is shorter than the random-phase tone bound for the strongest sharp PSD peak",
}


def correlation_random_error(rho_ab, rho_aa, rho_bb, pair_count):
    """Normalised random error of the correlation estimate ``R_ab`` at every lag (general form).

    Parameters
    ----------
    rho_ab, rho_aa, rho_bb, pair_count : array_like, shape (..., 2L + 1)
        As in :func:`corrtransforms.numerics.bartlett.bartlett_stderr`.

    Returns
    -------
    ndarray, shape (..., 2L + 1)
        ``eps[R_ab(k)] = sd[R_ab(k)] / |R_ab(k)|`` (inf where ``rho_ab(k) = 0``).

    Notes
    -----
    For Gaussian records the variance of the time-average estimate is [1]_ (Eq. (8.101),
    from memory) ::

        var R_ab(tau) = (1/T) int [R_aa(xi) R_bb(xi) + R_ab(xi + tau) R_ab(tau - xi)] dxi

    evaluated here as a lag sum of the estimated coefficients with the pair count for ``T fs``.
    For bandwidth-limited white noise of bandwidth ``B`` it is exact where
    :func:`correlation_rel_error` (``[1 + rho^-2]^(1/2) / sqrt(2BT)``) is only exact at zero lag
    and at a pure-delay peak: for the sinc correlation the general form gives
    ``[1 + rho(2 tau)] / (2BT)`` for ``var R / R(0)^2`` where the closed form gives
    ``[1 + rho(tau)^2] / (2BT)``.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 8.4.
    """
    rho = np.asarray(rho_ab, dtype=float)
    constant, reflected, _, _ = bartlett_sums(rho_ab, rho_aa, rho_bb)
    count = np.asarray(pair_count, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        sd = np.sqrt(np.maximum(constant[..., None] + reflected, 0.0) / count)
        return np.where(np.isfinite(rho) & (count > 0), sd / np.abs(rho), np.nan)


def statistical_bandwidth(frequencies_hz, psd_a, psd_b=None):
    """Statistical bandwidth ``B`` of a one-sided PSD (or of a pair of PSDs).

    Parameters
    ----------
    frequencies_hz : array_like, shape (K,)
        Uniform frequency grid from 0.
    psd_a : array_like, shape (..., K)
        One-sided PSD ``G_aa(f)``.
    psd_b : array_like, shape (..., K), optional
        ``G_bb(f)`` of the second channel of a pair; None means ``psd_a`` (an auto pair).

    Returns
    -------
    ndarray or float
        ``B_s = (int G_aa df)(int G_bb df) / int G_aa G_bb df`` in Hz (trapezoid rule).

    Notes
    -----
    Bendat & Piersol's statistical bandwidth [1]_ (Eq. (8.52), from memory) is
    ``B_s = (int G df)^2 / int G^2 df``; it equals ``B`` for bandwidth-limited white noise of
    bandwidth ``B`` and ``1 / (2 tau_c)`` for first-order low-pass noise of time constant
    ``tau_c``. By Parseval ``int_{-inf}^{inf} R^2 dtau = R(0)^2 / (2 B_s)``, which is what makes
    ``1/sqrt(B_s T)`` the normalised random error of a mean square. For a cross pair the
    product ``G_aa G_bb`` plays the role of ``G^2`` (the same step for
    ``int R_aa R_bb dtau``); both definitions agree when the channels share one band.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 8.2.
    """
    f = np.asarray(frequencies_hz, dtype=float)
    Ga = np.asarray(psd_a, dtype=float)
    Gb = Ga if psd_b is None else np.asarray(psd_b, dtype=float)
    num = trapezoid(Ga, f, axis=-1) * trapezoid(Gb, f, axis=-1)
    den = trapezoid(Ga * Gb, f, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)


def mean_square_rel_error(bandwidth_hz, record_s):
    """Normalised random error of a mean-square (``R(0)``) estimate: ``1 / sqrt(B T)``.

    Parameters
    ----------
    bandwidth_hz : float or ndarray
        Statistical bandwidth ``B``.
    record_s : float or ndarray
        Record length ``T``.

    Returns
    -------
    float or ndarray

    Notes
    -----
    Closed form for bandwidth-limited white noise (Bendat & Piersol [1]_ Eq. (8.61),
    from memory); exact for Gaussian records in terms of the statistical bandwidth.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 8.2.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        return 1.0 / np.sqrt(np.asarray(bandwidth_hz, dtype=float) * np.asarray(record_s, dtype=float))


def correlation_rel_error(rho, bandwidth_hz, record_s):
    """Closed-form normalised random error of ``R_ab(tau)``: ``[1 + rho^-2]^(1/2) / sqrt(2 B T)``.

    Parameters
    ----------
    rho : float or ndarray
        Correlation coefficient at the lag (at the peak for the ``rel_error`` column).
    bandwidth_hz, record_s : float or ndarray
        ``B`` and ``T``.

    Returns
    -------
    float or ndarray

    Notes
    -----
    Bendat & Piersol [1]_ Eq. (8.112) (from memory), for bandwidth-limited white noise. It is
    exact at zero lag of an auto-correlation (where it gives ``1/sqrt(BT)``) and at the peak of
    a pure delay; at other lags of a sinc-shaped correlation the general variance integral
    (:func:`correlation_random_error`) can differ from it by about 20 %.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 8.4.
    """
    r = np.asarray(rho, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(1.0 + 1.0 / (r * r)) / np.sqrt(
            2.0 * np.asarray(bandwidth_hz, dtype=float) * np.asarray(record_s, dtype=float)
        )


def required_record_length(bandwidth_hz, target_rel_error, rho=None):
    """Record length ``T`` at which the closed-form error equals a target.

    Parameters
    ----------
    bandwidth_hz : float or ndarray
        ``B``.
    target_rel_error : float
        Target normalised random error ``eps`` (for example 0.05).
    rho : float or ndarray, optional
        Coefficient at the lag of interest; None means the mean square (zero lag of an auto).

    Returns
    -------
    float or ndarray
        ``1 / (B eps^2)`` for the mean square, ``(1 + rho^-2) / (2 B eps^2)`` at a lag.

    Notes
    -----
    Inverts :func:`mean_square_rel_error` and :func:`correlation_rel_error` (Bendat & Piersol
    [1]_, Sec. 8.2 and 8.4).

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010.
    """
    B = np.asarray(bandwidth_hz, dtype=float)
    eps2 = float(target_rel_error) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        if rho is None:
            return 1.0 / (B * eps2)
        r = np.asarray(rho, dtype=float)
        return (1.0 + 1.0 / (r * r)) / (2.0 * B * eps2)


def effective_samples(record_s, integral_scale_s, n_samples):
    """Effective number of independent samples ``N_eff = T / (2 T_I)``, within ``[1, n]``.

    Parameters
    ----------
    record_s : float
        Record length ``T``.
    integral_scale_s : float
        Integral time scale ``T_I`` (:func:`corrtransforms.numerics.timescales.integral_time_scale`).
    n_samples : int
        Samples in the record (the upper bound; white noise has ``T_I = dt/2``).

    Returns
    -------
    float

    Notes
    -----
    The variance of a time average of a process with integral scale ``T_I`` is
    ``2 T_I sigma^2 / T`` for ``T >> T_I`` [1]_ (Eq. (6.4.x), from memory), the variance of a
    mean of ``T / (2 T_I)`` independent samples. For AR(1) this is ``n (1 - phi) / (1 + phi)``.

    References
    ----------
    .. [1] H. Tennekes and J. L. Lumley, *A First Course in Turbulence*, MIT Press, 1972,
       Sec. 6.4.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.asarray(record_s, dtype=float) / (2.0 * np.asarray(integral_scale_s, dtype=float))
    n = np.asarray(n_samples, dtype=float)
    value = np.where(np.isfinite(value) & (value > 0), value, n)
    return np.clip(value, 1.0, n)


def tone_time_average(amplitude, angular_frequency, half_length_s, lag_s, phase):
    """Time-average correlation of a random-phase tone over ``[-T, T]`` (exact).

    Parameters
    ----------
    amplitude : float
        ``A`` of ``x(t) = A cos(w0 t + theta)``.
    angular_frequency : float
        ``w0`` in rad/s.
    half_length_s : float
        ``T``; the average runs over ``t`` in ``[-T, T]``.
    lag_s : float or ndarray
        ``tau``.
    phase : float or ndarray
        ``theta``.

    Returns
    -------
    float or ndarray
        ``(A^2/2) [cos(w0 tau) + sin(2 w0 T)/(2 w0 T) cos(w0 tau + 2 theta)]``.

    Notes
    -----
    ``x(t) x(t + tau) = (A^2/2) [cos(w0 tau) + cos(2 w0 t + w0 tau + 2 theta)]``. The first
    term is the ensemble correlation ``R(tau)``; the average of the second over ``[-T, T]`` is
    ``(A^2/2) cos(w0 tau + 2 theta) sin(2 w0 T) / (2 w0 T)``, the finite-time error [1]_.
    """
    A2 = 0.5 * float(amplitude) ** 2
    w0, T = float(angular_frequency), float(half_length_s)
    tau = np.asarray(lag_s, dtype=float)
    return A2 * (np.cos(w0 * tau) + np.sin(2 * w0 * T) / (2 * w0 * T) * np.cos(w0 * tau + 2 * np.asarray(phase)))


def tone_required_half_length(angular_frequency, target_rel_error=0.05):
    """Averaging half-length ``T`` that keeps a random-phase tone's error within ``eps R(0)``.

    Parameters
    ----------
    angular_frequency : float or ndarray
        ``w0`` in rad/s of the tone (the strongest sharp PSD peak).
    target_rel_error : float
        ``eps``; the default 0.05 gives the textbook ``T >= 10 / w0``.

    Returns
    -------
    float or ndarray
        ``T = 1 / (2 eps w0)``; the record ``[-T, T]`` is ``2T = 1 / (eps w0)`` long.

    Notes
    -----
    From :func:`tone_time_average`, the error relative to ``R(0) = A^2/2`` is
    ``sin(2 w0 T)/(2 w0 T) cos(w0 tau + 2 theta)``, whose magnitude is at most ``1/(2 w0 T)``
    for every lag and phase (``|sin| <= 1``, ``|cos| <= 1``). Requiring ``1/(2 w0 T) <= eps``
    gives ``T >= 1/(2 eps w0)``, i.e. ``T >= 10 / w0`` for 5 % [1]_.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 5.1
       (sine wave with random phase; from memory).
    """
    with np.errstate(divide="ignore"):
        return 1.0 / (2.0 * float(target_rel_error) * np.asarray(angular_frequency, dtype=float))


def auto_correlation_checks(R_auto, mean_square, biased_psd, rtol: float = 1e-6) -> List[str]:
    """Validity checks of one estimated auto-correlation; returns quality codes (empty if valid).

    Parameters
    ----------
    R_auto : array_like, shape (2L + 1,)
        The estimated auto-correlation at lags ``-L..L``.
    mean_square : float
        Mean square of the detrended record's valid samples, computed in the time domain.
    biased_psd : array_like
        :func:`corrtransforms.numerics.spectra.lag_window_psd` of the biased estimate (for the
        unbiased estimator: the pair counts times ``R`` over ``N``).
    rtol : float
        Relative tolerance of the checks (round-off of the FFT is ~1e-13).

    Returns
    -------
    list of str
        Codes from :data:`QUALITY_CODES`: "r0_mismatch", "coefficient_exceeds_one",
        "auto_not_even", "negative_psd".

    Notes
    -----
    Properties of every auto-correlation function [1]_ (Sec. 5.1): ``R(0)`` is the mean square,
    ``|R(tau)| <= R(0)``, ``R(-tau) = R(tau)``, and the spectrum is non-negative (the biased
    estimate is positive semi-definite, and so is its product with a Parzen lag window). They
    are reported, not fixed.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010.
    """
    R = np.asarray(R_auto, dtype=float)
    L = (len(R) - 1) // 2
    R0 = R[L]
    codes = []
    if not np.isfinite(R0) or abs(R0 - mean_square) > rtol * abs(mean_square) + 1e-300:
        codes.append("r0_mismatch")
    finite = np.isfinite(R)
    if np.any(np.abs(R[finite]) > R0 * (1.0 + rtol)):
        codes.append("coefficient_exceeds_one")
    both = finite & finite[::-1]
    if np.any(np.abs(R - R[::-1])[both] > rtol * abs(R0)):
        codes.append("auto_not_even")
    G = np.asarray(biased_psd, dtype=float)
    if G.size and G.min() < -rtol * max(G.max(), 0.0):
        codes.append("negative_psd")
    return codes
