"""Memory time of a record: how long a segment must be for its statistics to be independent.

:func:`record_time_scales` estimates, for many records at once, the integral time scale and
the last lag at which ``|rho|`` still reaches ``1/e`` from one FFT auto-correlation each, with
sharp spectral lines removed (:func:`corrtransforms.numerics.spectra.spectral_lines`);
:func:`correlation_time_scales` is a batch of one. :func:`segments_for_record` applies the
independence rule (each segment :data:`INDEPENDENCE_FACTOR` memory times long, at least
:data:`MINIMUM_SEGMENTS` segments).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from typing import Optional, Tuple

import numpy as np
from scipy import fft as _fft

from corrtransforms.numerics.fft_threads import transform_threads
from corrtransforms.numerics.segments import clean_record
from corrtransforms.numerics.spectra import LINE_THRESHOLD, spectral_lines
from corrtransforms.numerics.timescales import integral_time_scale

#: a segment must be at least this many times longer than the record's memory time
INDEPENDENCE_FACTOR = 10.0
#: fewest segments a test is run on (the smallest N of the published percentage-point tables)
MINIMUM_SEGMENTS = 10


@dataclasses.dataclass(frozen=True)
class CorrelationTimeScales:
    """Time scales of a record's auto-correlation, for the segment-independence rule.

    Attributes
    ----------
    integral_time_s : float
        Integral of the auto-correlation coefficient from lag 0 to its first zero crossing.
    last_lag_above_inv_e_s : float
        Last lag (searched up to ``n/4``, interpolated) at which ``|rho|`` still reaches ``1/e``:
        the peaks of an oscillating ``rho`` trace its envelope. Not the indicator
        ``decay_time_s`` (the Hilbert envelope's first 1/e crossing,
        :func:`corrtransforms.numerics.timescales.decay_time_s`); was ``envelope_decay_s``.
    memory_s : float
        The larger of the two: the record's memory time.
    line_count : int
        Periodogram ordinates taken as sharp spectral lines (tones) and left out of both scales.
    degrees_of_freedom_per_sample : float
        Effective chi-square degrees of freedom of a mean square of a Gaussian record, per valid
        sample: ``1 / sum_{|k| <= K} rho_k^2`` (lines kept, ``K`` = three memory times).
    kurtosis : float
        Sample kurtosis of the whole mean-removed record (for information; the screening uses
        the median of the segments' kurtoses, which a short burst does not move).
    """

    integral_time_s: float
    last_lag_above_inv_e_s: float
    memory_s: float
    line_count: int
    degrees_of_freedom_per_sample: float
    kurtosis: float


def correlation_time_scales(
    values, valid=None, fs: float = 1.0, max_memory_s: Optional[float] = None
) -> CorrelationTimeScales:
    """Integral time scale and last lag with ``|rho| >= 1/e`` of a record, from one FFT auto-correlation.

    Parameters
    ----------
    values : array_like, shape (n,)
        The record.
    valid : array_like of bool, shape (n,), optional
        Mask of valid samples; gaps are handled by normalising each lag by its weighted pair count.
    fs : float
        Sample rate in Hz.
    max_memory_s : float, optional
        Longest memory time of interest. When given, lags are only computed, and the envelope
        searched, up to three times it (the reach of the degrees-of-freedom sum), so the
        transform is ``n + 3 max_memory_s fs`` points long instead of ``2n``; a ``memory_s``
        above ``max_memory_s`` is then a lower bound. Screening passes
        :func:`screening_memory_limit_s`: a longer memory leaves fewer than
        :data:`MINIMUM_SEGMENTS` segments, so the record is not screened either way. (An
        oscillating coefficient whose ``|rho|`` stays below ``1/e`` over the whole searched
        stretch beyond ``max_memory_s`` yet peaks above it later would need a half period above
        eight times ``max_memory_s``; its integral time up to the first zero then already exceeds
        ``max_memory_s``.)

    Returns
    -------
    CorrelationTimeScales

    Notes
    -----
    The mean-removed record ``x`` is tapered with a Hann window ``w`` (gaps are zero weight);
    with ``X = FFT(w x)`` zero-padded to at least ``2n``, the auto-correlation is
    ``R(k) = IFFT(|X|^2)(k) / IFFT(|W|^2)(k)`` where ``W = FFT(w m)``. Sharp lines (ordinates
    above ``LINE_THRESHOLD`` times the local median over 25 frequency resolutions, with their
    leakage) are replaced by that median, because a deterministic tone never decorrelates
    but its contribution to segment mean squares barely fluctuates. From the line-free spectrum
    come ``rho(k) = R(k) / R(0)`` and two scales: the last lag above 1/e, the largest lag
    (searched up to ``n/4``) at which ``|rho|`` still reaches ``1/e`` -- the peaks of an
    oscillating ``rho`` trace its envelope, so for a mode ``exp(-zeta omega_n tau) cos(...)``
    this is ``1 / (zeta omega_n)`` to within half a period, and for ``exp(-tau / theta)`` it is
    ``theta``; and the integral time scale ``T_I = int_0^{tau_0} rho(tau) dtau`` up to the first
    zero ``tau_0`` (common practice for a finite record).

    For a Gaussian record the mean square over ``T`` seconds has variance
    ``(2/T) int R^2(tau) dtau`` (Bendat & Piersol Sect. 8.2), i.e. ``nu = n / sum_k rho_k^2``
    degrees of freedom over ``n`` samples.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 5.2 (correlation functions),
    Sect. 8.2 (mean square estimates and their random error); section numbers from memory.
    """
    x, m = clean_record(values, valid)
    result = record_time_scales(x[None, :], m[None, :], fs, max_memory_s)[0]
    if isinstance(result, ValueError):
        raise result
    return result


def screening_memory_limit_s(
    record_s: float, factor: float = INDEPENDENCE_FACTOR, minimum: int = MINIMUM_SEGMENTS
) -> float:
    """Longest memory time at which a record of ``record_s`` seconds can still be screened.

    A memory time above ``record_s / (factor * minimum)`` leaves fewer than ``minimum`` segments
    (:func:`segments_for_record`), so :func:`correlation_time_scales` needs no lags beyond
    three times it (it searches that far, so a memory above the limit is still seen as such).
    """
    return float(record_s) / (float(factor) * int(minimum))


def _lag_limits(n: int, fs: float, max_memory_s: Optional[float]) -> Tuple[int, int, int]:
    """Transform length, last lag computed and last lag of the envelope search for ``n`` samples."""
    if max_memory_s is None:
        return _fft.next_fast_len(2 * n), n // 2, max(1, n // 4)
    limit = int(math.ceil(max_memory_s * fs)) + 1
    max_lag = max(1, min(n // 2, 3 * limit + 1))
    return _fft.next_fast_len(n + max_lag + 1), max_lag, max(1, min(n // 4, max_lag))


def record_time_scales(x: np.ndarray, m: np.ndarray, fs: float, max_memory_s: Optional[float] = None):
    """:func:`correlation_time_scales` of several records at once (rows of ``x``, masks ``m``).

    ``x`` holds the records with 0 at invalid samples (as
    :func:`corrtransforms.numerics.segments.clean_record` returns them). The transforms of all
    rows are done in one call each, and the taper's own transform once when every row has the
    same mask. Returns, per row, a CorrelationTimeScales or the ValueError that
    :func:`correlation_time_scales` raises for it.
    """
    fs = float(fs)
    n = x.shape[1]
    out: list = [None] * x.shape[0]
    rows, deviation, masks, kurtoses = _varying_rows(x, m, out)
    if not rows:
        return out
    same_mask = bool(np.all(masks == masks[:1]))
    hann = np.hanning(n + 2)[1:-1]
    taper = hann * (masks[:1] if same_mask else masks)
    size, max_lag, search = _lag_limits(n, fs, max_memory_s)
    deviation *= taper
    spectrum = _fft.rfft(deviation, size, axis=-1, workers=transform_threads())
    power = spectrum.real**2 + spectrum.imag**2
    if same_mask and masks[0].all():
        counts = _complete_taper_counts(n, size, max_lag)  # the same for every complete record
    else:
        counts = _taper_counts(taper, size, max_lag)
    lines, clean_rows = _line_free_power(power, size / n)
    # rows without a line: the clean spectrum is the spectrum itself (no second transform)
    with_lines = [k for k, _ in clean_rows]
    stacked = np.concatenate([power, np.stack([row for _, row in clean_rows])]) if clean_rows else power
    both = _fft.irfft(stacked, size, axis=-1, workers=transform_threads())[:, : max_lag + 1]
    full = both[: len(rows)] / counts
    clean_correlation = full.copy()
    if with_lines:
        clean_correlation[with_lines] = both[len(rows) :] / (counts if counts.shape[0] == 1 else counts[with_lines])
    for k, i in enumerate(rows):
        out[i] = _time_scales_from_correlation(
            full[k] / full[k, 0],
            clean_correlation[k] / clean_correlation[k, 0],
            search,
            max_lag,
            fs,
            int(lines[k].sum()),
            kurtoses[k],
        )
    return out


def _varying_rows(x: np.ndarray, m: np.ndarray, out: list):
    """Rows with at least 8 valid samples that vary: their indices, mean-removed records (0 at
    invalid samples), masks and kurtoses; ``out`` gets the ValueError of every other row."""
    c, n = x.shape
    counts_valid = m.sum(axis=1)
    ok = np.flatnonzero((counts_valid >= 8) if n >= 8 else np.zeros(c, bool))
    for i in range(c):
        if i not in ok:
            out[i] = ValueError("a record needs at least 8 valid samples")
    if not len(ok):
        return [], None, None, []
    # moments of all rows at once (x is 0 at invalid samples)
    count = counts_valid[ok].astype(float)
    centers = x[ok].sum(axis=1) / count
    deviation = x[ok] - centers[:, None]
    masks = m[ok]
    complete = masks.all(axis=1)
    if not complete.all():
        deviation[~masks] = 0.0
    squared = deviation * deviation
    second_all = squared.sum(axis=1) / count
    fourth_all = np.einsum("ij,ij->i", squared, squared) / count
    keep = []
    for k, row in enumerate(ok):
        if not second_all[k] > 0:
            out[row] = ValueError("the record does not vary")
        else:
            keep.append(k)
    if not keep:
        return [], None, None, []
    rows = [int(ok[k]) for k in keep]
    kurtoses = [float(fourth_all[k] / second_all[k] ** 2) for k in keep]
    if len(keep) < len(ok):
        deviation, masks = deviation[keep], masks[keep]
    return rows, deviation, masks, kurtoses


def _line_free_power(power: np.ndarray, bins_per_resolution: float):
    """Sharp spectral lines of each row of ``power`` and, for rows with lines, the spectrum with
    them replaced by their local median: ``(lines, [(row, clean power), ...])``.

    The lines are ordinates far above the local median over 25 frequency resolutions (the
    spectrum mirrored at zero and Nyquist frequency, so the median near the ends sees real
    neighbours), widened by the Hann main lobe.
    """
    median_width = int(2 * round(12 * bins_per_resolution) + 1)
    reach = int(math.ceil(3 * bins_per_resolution))
    lines = np.zeros(power.shape, dtype=bool)
    clean_rows = []
    for k in range(power.shape[0]):
        found, local_at_lines = spectral_lines(power[k], median_width, LINE_THRESHOLD, reach)
        lines[k] = found
        if found.any():
            clean = power[k].copy()
            clean[found] = local_at_lines
            clean_rows.append((k, clean))
    return lines, clean_rows


def _taper_counts(taper: np.ndarray, size: int, max_lag: int) -> np.ndarray:
    """Lag products of the taper(s) (rows), lags 0..max_lag, floored at 1e-12 of lag 0."""
    weight_spectrum = _fft.rfft(taper, size, axis=-1)
    counts = _fft.irfft(weight_spectrum.real**2 + weight_spectrum.imag**2, size, axis=-1)
    return np.maximum(counts[:, : max_lag + 1], 1e-12 * counts[:, :1])


@functools.lru_cache(maxsize=4)
def _complete_taper_counts(n: int, size: int, max_lag: int) -> np.ndarray:
    """:func:`_taper_counts` of the Hann taper of a complete record of ``n`` samples (cached,
    read-only: every complete window of a job has the same one)."""
    counts = _taper_counts(np.hanning(n + 2)[1:-1][None, :], size, max_lag)
    counts.setflags(write=False)
    return counts


def _time_scales_from_correlation(rho_full, rho, search, max_lag, fs, line_count, kurtosis):
    integral = integral_time_scale(rho, 1.0)  # in samples
    magnitude = np.abs(rho[: search + 1])
    above = np.nonzero(magnitude >= 1.0 / math.e)[0]
    last = int(above[-1])
    if last >= search:
        last_above = float(search)
    else:
        drop = magnitude[last] - magnitude[last + 1]
        last_above = last + ((magnitude[last] - 1.0 / math.e) / drop if drop > 0 else 0.0)
    memory_samples = max(integral, last_above)

    reach = int(min(max_lag, max(1, math.ceil(3 * memory_samples))))
    sum_rho_squared = float(rho_full[0] ** 2 + 2.0 * np.sum(rho_full[1 : reach + 1] ** 2))
    per_sample = 1.0 / sum_rho_squared
    return CorrelationTimeScales(integral / fs, last_above / fs, memory_samples / fs, line_count, per_sample, kurtosis)


def segments_for_record(
    record_s: float,
    memory_s: float,
    requested: int,
    factor: float = INDEPENDENCE_FACTOR,
    minimum: int = MINIMUM_SEGMENTS,
) -> int:
    """Number of segments a window can hold under the independence rule (0 if too short).

    Parameters
    ----------
    record_s : float
        Window length in seconds.
    memory_s : float
        Memory time of the record (:attr:`CorrelationTimeScales.memory_s`).
    requested : int
        Configured number of segments (``[screening] segments``).
    factor : float
        Each segment must be at least ``factor * memory_s`` long.
    minimum : int
        Fewest segments a test is run on.

    Returns
    -------
    int
        ``min(requested, floor(record_s / (factor * memory_s)))``, or 0 when that is below
        ``minimum``.

    Notes
    -----
    For an exponentially decaying correlation envelope of time constant ``theta``, adjacent
    segment mean squares of length ``T`` are correlated by about ``theta / (4 T)``, i.e. 0.025 at
    the default factor 10 (derivation in docs/stationarity.md).
    """
    if memory_s <= 0:
        possible = requested
    else:
        possible = int(math.floor(record_s / (factor * memory_s) + 1e-9))
    count = min(int(requested), possible)
    return count if count >= minimum else 0
