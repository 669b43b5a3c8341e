"""Spectra from correlations, and the sharp spectral lines (tones) in them.

- :func:`lag_window_psd`: one-sided PSD of a correlation at lags ``-L..L`` (Parzen lag window,
  Blackman-Tukey), for the statistical bandwidth and the validity checks of the correlate stage;
- :func:`medians_at`: the local median background of a spectrum, the shared core of the two
  line tests below;
- :func:`strongest_tone`: the strongest sharp peak of each periodogram, for the random-phase
  tone bound of the correlations table (:data:`TONE_FALSE_ALARM`, :func:`tone_ratio`);
- :func:`spectral_lines`: every sharp line of a periodogram with its leakage, for screening,
  which replaces them by their local median before it measures the record's memory.

The two tests answer different questions and keep their own rules (one peak against the larger
median beside its main lobe with a gamma threshold; every ordinate against a centred running
median with a fixed ratio :data:`LINE_THRESHOLD`); the background both use is
:func:`medians_at`.
"""

from __future__ import annotations

from typing import Optional, Tuple

import numpy as np
import scipy.fft
from scipy import ndimage as _ndimage
from scipy.signal.windows import parzen

#: probability that a broadband periodogram bin passes the sharp-peak test (common practice:
#: so small that noise never passes; for one block it is the 20 dB rule, ratio 100 to the median)
TONE_FALSE_ALARM = 1e-30


#: a periodogram ordinate this many times above its local median is a sharp spectral line
LINE_THRESHOLD = 50.0


def lag_window_psd(R, fs: float) -> Tuple[np.ndarray, np.ndarray]:
    """One-sided PSD from an auto- or cross-product correlation at lags ``-L..L`` (Parzen window).

    Parameters
    ----------
    R : array_like, shape (..., 2L + 1)
        Correlation at lags ``-L..L`` (NaN counts as 0).
    fs : float
        Sample rate in Hz.

    Returns
    -------
    frequencies_hz : ndarray, shape (M/2 + 1,)
        ``0..fs/2`` in steps of ``fs / M``, ``M = 2 next_fast_len(L + 1)``.
    psd : ndarray, shape (..., M/2 + 1)
        ``G(f) = 2 S(f)`` with ``S(f) = dt sum_k w(k) R(k) exp(-2 pi i f k dt)`` (real part);
        its trapezoidal integral over ``0..fs/2`` equals ``R(0)`` exactly.

    Notes
    -----
    Blackman-Tukey estimate with the Parzen lag window ``w`` [1]_ (Sec. 6.2, from memory).
    The Parzen spectral window is non-negative, so for a biased (positive semi-definite)
    auto-correlation estimate the result is ``>= 0`` up to round-off: a negative value shows a
    defective estimate.

    References
    ----------
    .. [1] M. B. Priestley, *Spectral Analysis and Time Series*, Academic Press, 1981,
       Sec. 6.2.3 (Parzen window).
    """
    R = np.asarray(R, dtype=float)
    R = np.where(np.isfinite(R), R, 0.0)
    width = R.shape[-1]
    L = (width - 1) // 2
    M = 2 * scipy.fft.next_fast_len(L + 1)
    w = parzen(width, sym=True) if width > 1 else np.ones(1)
    seq = np.zeros(R.shape[:-1] + (M,))
    weighted = R * w
    seq[..., : L + 1] = weighted[..., L:]
    if L:
        seq[..., M - L :] = weighted[..., :L]
    S = scipy.fft.rfft(seq, axis=-1).real / fs
    return scipy.fft.rfftfreq(M, d=1.0 / fs), 2.0 * S


def medians_at(power, centres, offsets) -> np.ndarray:
    """Local medians of a spectrum: the median of ``power[..., centres + offsets]``.

    Parameters
    ----------
    power : ndarray, shape (m,) or (rows, m)
        Spectral ordinates: one spectrum, or one spectrum per row.
    centres : ndarray of int, shape (k,)
        Centres in the one spectrum, or one centre per row (``k = rows``).
    offsets : ndarray of int, shape (w,)
        Ordinates relative to the centre that form the window (all inside ``0..m-1``).

    Returns
    -------
    ndarray, shape (k,)
        ``numpy.median`` of the gathered ordinates of each window.

    Notes
    -----
    The background level against which both line tests of this module compare an ordinate:
    :func:`strongest_tone` takes it on either side of a peak, :func:`spectral_lines` on a window
    centred on each candidate of the mirror-padded spectrum.
    """
    P = np.asarray(power)
    windows = np.asarray(centres, dtype=int)[:, None] + np.asarray(offsets, dtype=int)
    if P.ndim == 1:
        return np.median(P[windows], axis=1)
    return np.median(P[np.arange(P.shape[0])[:, None], windows], axis=1)


def tone_ratio(n_averaged: int, false_alarm: float = TONE_FALSE_ALARM) -> float:
    """Peak-to-median ratio a sharp peak must exceed in a periodogram averaged over K blocks.

    Parameters
    ----------
    n_averaged : int
        Number ``K`` of averaged blocks (1 for a raw periodogram).
    false_alarm : float
        Probability that a bin of a smooth (broadband) spectrum exceeds the ratio.

    Returns
    -------
    float
        ``q / m`` with ``q`` the upper ``false_alarm`` quantile and ``m`` the median of
        ``Gamma(K, 1/K)``: 99.7 for K = 1, 10.1 for K = 10.

    Notes
    -----
    A periodogram bin of a Gaussian record is ``S(f) chi^2_2 / 2``; the average of K blocks is
    ``S(f) Gamma(K, 1/K)`` [1]_ (Sec. 11.5, from memory).

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010.
    """
    from scipy.stats import gamma

    K = max(int(n_averaged), 1)
    return float(gamma.isf(false_alarm, K, scale=1.0 / K) / gamma.median(K, scale=1.0 / K))


def strongest_tone(
    frequencies_hz,
    periodogram,
    n_averaged: int = 1,
    ratio: Optional[float] = None,
    half_width_bins: Optional[int] = None,
    exclude_bins: int = 3,
):
    """Frequency of the strongest sharp peak of each periodogram (NaN when there is none).

    Parameters
    ----------
    frequencies_hz : array_like, shape (K,)
    periodogram : array_like, shape (n_channels, K) or (K,)
    n_averaged : int
        Blocks averaged in the periodogram (sets the default ``ratio``).
    ratio : float, optional
        A peak is sharp when it exceeds ``ratio`` times the larger of the medians of the
        ``half_width_bins`` bins on each side of it (beyond ``exclude_bins`` of its main lobe).
        None means :func:`tone_ratio` ``(n_averaged)``.
    half_width_bins : int, optional
        None means ``max(32, K // 100)``.
    exclude_bins : int
        Bins next to the peak left out of the medians (its own main lobe).

    Returns
    -------
    frequency_hz : ndarray, shape (n_channels,)
    peak_ratio : ndarray, shape (n_channels,)

    Notes
    -----
    Only the highest bin (at least ``half_width_bins`` from either end) is tested, against the
    larger of its two side medians (:func:`medians_at`: the main lobe of the peak is left out, so
    a tone does not raise its own background). Common practice; see :data:`TONE_FALSE_ALARM`.
    """
    if ratio is None:
        ratio = tone_ratio(n_averaged)
    P = np.atleast_2d(np.asarray(periodogram, dtype=float))
    f = np.asarray(frequencies_hz, dtype=float)
    K = P.shape[-1]
    W = int(half_width_bins) if half_width_bins is not None else max(32, K // 100)
    lo, hi = W + exclude_bins, K - W - exclude_bins
    if hi <= lo:
        return np.full(P.shape[0], np.nan), np.full(P.shape[0], np.nan)
    rows = np.arange(P.shape[0])
    k = lo + np.argmax(P[:, lo:hi], axis=1)
    offsets = np.arange(W)
    left = medians_at(P, k, offsets - exclude_bins - W)
    right = medians_at(P, k, offsets + exclude_bins + 1)
    background = np.maximum(left, right)
    peak = P[rows, k]
    with np.errstate(invalid="ignore", divide="ignore"):
        peak_ratio = np.where(background > 0, peak / np.where(background > 0, background, 1.0), np.nan)
    freq = np.where(peak_ratio >= ratio, f[k], np.nan)
    return freq, peak_ratio


def spectral_lines(power, width: int, threshold: float = LINE_THRESHOLD, reach: int = 0):
    """Sharp lines of a spectrum: ordinates above ``threshold`` times their running median.

    Parameters
    ----------
    power : ndarray, shape (m,)
        Spectral ordinates (a periodogram).
    width : int
        Odd length of the running median (the spectrum is mirrored at both ends, as
        ``scipy.ndimage.median_filter(power, width, mode="mirror")`` does).
    threshold : float
        An ordinate is a line when ``power > threshold * max(median, 1e-300)``.
    reach : int
        Each line is widened by this many ordinates on either side (its leakage).

    Returns
    -------
    lines : ndarray of bool, shape (m,)
        The widened lines.
    local : ndarray, shape (lines.sum(),)
        The running median at the line ordinates, in order: the values that replace them.

    Notes
    -----
    Exactly the result of the full running median, at a fraction of its cost: the median of a
    window is never below the same order statistic of any superset of the window (removing
    elements can only raise the ``k``-th smallest), so the ``(width // 2)``-th smallest of each
    block of ``width`` ordinates together with its neighbours is a lower bound for the median of
    every window centred in that block. Only ordinates above ``threshold`` times that bound can be
    lines; the median is computed exactly there and at the widened lines. With a bound far below
    the median (a steep spectrum), too many candidates fall back to the full running median.
    """
    power = np.asarray(power, dtype=float)
    m = len(power)
    half = int(width) // 2
    width = 2 * half + 1

    def widened(found):
        if reach and found.any():
            return _ndimage.binary_dilation(found, structure=np.ones(2 * reach + 1, dtype=bool))
        return found

    def from_full_median():
        local = _ndimage.median_filter(power, size=width, mode="mirror")
        found = widened(power > threshold * np.maximum(local, 1e-300))
        return found, local[found]

    if m <= width:
        return from_full_median()
    padded = np.pad(power, half, mode="reflect")  # numpy "reflect" is ndimage "mirror"
    blocks = -(-m // width)
    # block j holds centres j*width .. j*width + width - 1; their windows span padded[j*width :
    # j*width + 2*width - 1] (padded at the end with +inf, which only lowers the bound)
    span = np.full(blocks * width + 2 * half, np.inf)
    span[: len(padded)] = padded
    superset = np.lib.stride_tricks.as_strided(
        span, shape=(blocks, 2 * width - 1), strides=(span.strides[0] * width, span.strides[0])
    )
    bound = np.partition(superset, half, axis=1)[:, half]
    bound_per_bin = np.repeat(bound, width)[:m]
    candidates = np.flatnonzero(power > threshold * np.maximum(bound_per_bin, 1e-300))
    if len(candidates) > m // 8:
        return from_full_median()
    found = np.zeros(m, dtype=bool)
    centred = np.arange(width)  # window c of the padded spectrum is centred on ordinate c
    if len(candidates):
        median = medians_at(padded, candidates, centred)
        found[candidates[power[candidates] > threshold * np.maximum(median, 1e-300)]] = True
    if not found.any():
        return found, np.empty(0)
    found = widened(found)
    return found, medians_at(padded, np.flatnonzero(found), centred)
