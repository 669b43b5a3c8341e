"""Time delay between two sensors from their cross-correlation peak, with its standard error.

:func:`estimate_lag` finds the peak of ``|rho_ab|`` (or of the generalised cross-correlation with
PHAT or SCOT weighting, Knapp & Carter 1976) within ``+/- max_lag``, refines it below the sample
spacing by band-limited (sinc) interpolation, and gives the lag, the coefficient at the peak,
both standard errors and quality codes. Lag convention: ``R_ab(tau) = E[a(t) b(t + tau)]``; a
positive lag means b lags a.

:func:`estimate_lags` does the same for all pairs of a window at once (one row per pair, the
same arithmetic, so every row equals :func:`estimate_lag` of its pair, which stays the per-pair
path a failing batch falls back to).
"""

from __future__ import annotations

import functools
from typing import List, NamedTuple, Optional, Tuple

import numpy as np
import scipy.fft
import scipy.signal
from scipy.signal.windows import parzen

from corrtransforms.numerics.bartlett import bartlett_stderr_at
from corrtransforms.numerics.correlation import WEIGHTINGS, even_extension
from corrtransforms.numerics.envelope import correlation_envelope
from corrtransforms.numerics.phase_noise import phase_moments

#: quality codes of this module (code -> meaning)
QUALITY_CODES = {
    "weak_peak": "|peak_coef| is below PEAK_Z standard errors: the peak is not clear of the noise",
    "peak_at_max_lag": "the largest |rho| sits at the edge of the search range; the true peak may lie "
    "beyond max_lag (lag_s is NaN)",
    "nonfinite_correlation": "NaN lags (too few sample pairs) inside the search range were taken as 0",
    "too_few_lags": "fewer than 3 lags in the search range",
    "spurious_lag_peak": "PHAT/SCOT weighting on a channel whose auto spectrum falls below PSD_FLOOR of its "
    "maximum somewhere in 0..fs/2 (the whitening divides by leakage or round-off "
    "there), and the weighted peak lies more than AGREEMENT_Z combined stderr from the "
    "unweighted peak (lag_s kept, window held out of the shift "
    "detectors)",
}

#: a peak is "clear" when |peak_coef| exceeds this many standard errors (common practice: about
#: the expected largest of a few thousand correlated Gaussian lag errors)
PEAK_Z = 4.0
#: a PHAT/SCOT peak is suspect when either channel's smoothed auto spectrum drops below this
#: fraction of its maximum at some frequency (common practice: a band about 27 dB down is where
#: the whitening starts to amplify leakage; measured in benchmarks/calibration.py: 0-20 Hz band
#: of a 0-50 Hz record at most 8e-4, broadband scenarios at least 0.08, AR(1) phi 0.9 plus
#: 10 % white noise about 4e-3)
PSD_FLOOR = 2e-3
#: where the spectrum has such a band, the weighted lag must lie within this many combined
#: standard errors ``sqrt(var_weighted + var_plain)`` of the unweighted lag (about the two-sided
#: 95 % point of a normal law; the two estimates share the data, so their difference varies
#: less than the sum and the test is lenient)
AGREEMENT_Z = 2.0
#: a frequency enters the lag's curvature when its estimated coherence exceeds what zero
#: coherence gives with this probability, Bonferroni over the resolution cells (common
#: practice: the 1 % level; 5 % without the correction let enough noise bins in to make the
#: stderr vary by a factor 4 between windows, measured on the broadband-noise test case)
COHERENCE_ALPHA = 0.01
#: sinc interpolation uses this many samples on each side of the peak sample
INTERPOLATION_HALF_WIDTH = 64
#: fine-grid points per sample on which the interpolated peak is searched
UPSAMPLE = 32


class LagEstimate(NamedTuple):
    """Result of :func:`estimate_lag` (seconds; coefficients dimensionless)."""

    lag_s: float
    lag_stderr_s: float
    peak_coef: float
    peak_coef_stderr: float
    peak_width_s: float
    quality: Tuple[str, ...]


def sinc_interpolate(values, positions, center: int, half_width: int = INTERPOLATION_HALF_WIDTH):
    """Band-limited (Whittaker-Shannon) interpolation of samples near ``center``.

    Parameters
    ----------
    values : array_like
        Samples on a unit grid (NaN taken as 0).
    positions : array_like
        Fractional indices at which to interpolate.
    center : int
        Index around which ``half_width`` samples on each side are used.

    Returns
    -------
    ndarray
        ``sum_j v_j sinc(x - j)`` over ``|j - center| <= half_width``.

    Notes
    -----
    Exact for a band-limited sequence up to the truncation of the series (Shannon [1]_). A
    zero-padded FFT ("spectral upsampling") of a segment is the same interpolator with the
    periodic (Dirichlet) kernel.

    References
    ----------
    .. [1] C. E. Shannon, "Communication in the presence of noise", Proc. IRE 37(1), 10-21, 1949.
    """
    v = np.nan_to_num(np.asarray(values, dtype=float))
    lo = max(0, center - half_width)
    hi = min(len(v), center + half_width + 1)
    j = np.arange(lo, hi)
    x = np.atleast_1d(np.asarray(positions, dtype=float))
    return np.sinc(x[:, None] - j[None, :]) @ v[lo:hi]


def refine_peak(
    values, index: int, upsample: int = UPSAMPLE, half_width: int = INTERPOLATION_HALF_WIDTH
) -> Tuple[float, float]:
    """Sub-sample position and height of the peak of ``|values|`` near sample ``index``.

    Parameters
    ----------
    values : array_like
        Correlation samples.
    index : int
        The sample with the largest ``|value|``.
    upsample : int
        Fine-grid points per sample searched on ``index +/- 1``.

    Returns
    -------
    position, height : float
        Fractional index of the peak and the interpolated value there (signed).

    Notes
    -----
    Band-limited interpolation on a fine grid, then a parabola through the three fine-grid
    points around the fine maximum. A parabola through the three *original* samples is biased
    towards the nearest sample by up to about 0.1 sample on sharp peaks (Jacovitti & Scarano
    [1]_); on the fine grid its bias is below 1e-4 sample.

    References
    ----------
    .. [1] G. Jacovitti and G. Scarano, "Discrete time techniques for time delay estimation",
       IEEE Trans. Signal Process. 41(2), 525-533, 1993.
    """
    v = np.asarray(values, dtype=float)
    grid = index + np.linspace(-1.0, 1.0, 2 * upsample + 1)
    fine = sinc_interpolate(v, grid, index, half_width)
    sign = 1.0 if np.nan_to_num(v[index]) >= 0 else -1.0
    m = int(np.argmax(sign * fine))
    m = min(max(m, 1), len(fine) - 2)
    y0, y1, y2 = sign * fine[m - 1], sign * fine[m], sign * fine[m + 1]
    denom = y0 - 2 * y1 + y2
    offset = 0.5 * (y0 - y2) / denom if denom < 0 else 0.0
    position = grid[m] + offset / upsample
    height = float(sinc_interpolate(v, [position], index, half_width)[0])
    return float(position), height


def lag_variance(
    cross,
    peak_index: int,
    lag_step_s: float,
    record_s: float,
    auto_a=None,
    auto_b=None,
    weighting: str = "none",
    peak_coef: Optional[float] = None,
) -> float:
    """Small-error variance of the cross-correlation peak lag (Knapp & Carter; Carter).

    Parameters
    ----------
    cross : array_like, shape (2L + 1,)
        Unweighted coefficient ``rho_ab`` at lags ``-L..L``.
    peak_index : int
        Index of the peak sample in ``cross``.
    lag_step_s, record_s : float
        Lag spacing and record length ``T``.
    auto_a, auto_b : array_like, shape (L + 1,), optional
        Auto-correlation coefficients of a and b at lags 0..L. When missing, a coherence equal to
        ``peak_coef**2`` at every frequency is assumed: ``S_aa S_bb = |S_ab|^2 / peak_coef^2``.
    weighting : {"none", "phat", "scot"}
        The weighting whose peak is located.
    peak_coef : float, optional
        Needed when the autos are missing.

    Returns
    -------
    float
        ``var(tau_hat)`` in s^2 (NaN when it cannot be formed).

    Notes
    -----
    For jointly Gaussian records of length ``T`` and a peak of the (weighted) cross-correlation
    at the true delay, the first-order error ``d tau = -eps'(D) / R''(D)`` gives, with two-sided
    spectra and weighting ``psi(f)`` (Knapp & Carter [1]_ Eq. (16); Carter [2]_, from memory;
    re-derived from the Gaussian fourth-moment covariance of the estimate, Bendat & Piersol
    Eq. (8.101))::

        var(tau_hat) = int w^2 psi^2 [S_aa S_bb - |S_ab|^2] df / (T [int w^2 psi |S_ab| df]^2)

    with ``w = 2 pi f`` and ``S_aa S_bb - |S_ab|^2 = S_aa S_bb (1 - gamma^2)``. For a flat band
    ``0..B`` and flat coherence ``gamma^2`` without weighting it equals the Cramer-Rao bound
    ``3 (1 - gamma^2) / (8 pi^2 gamma^2 B^3 T)``. The spectra are Blackman-Tukey estimates from
    the correlation coefficients with a Parzen lag window of half-width ``M = L - |k_peak|``,
    the cross-correlation's window centred on the peak (so the delay does not shrink
    ``|S_ab|``); the Parzen window's non-negative spectral window keeps the estimated
    spectral matrix positive semi-definite, hence the numerator non-negative.

    References
    ----------
    .. [1] C. H. Knapp and G. C. Carter, "The generalized correlation method for estimation of
       time delay", IEEE Trans. Acoust., Speech, Signal Process. 24(4), 320-327, 1976.
    .. [2] G. C. Carter, "Coherence and time delay estimation", Proc. IEEE 75(2), 236-255, 1987.
    """
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting={weighting!r}: must be one of " + ", ".join(WEIGHTINGS))
    rho = np.nan_to_num(np.asarray(cross, dtype=float))[None, :]
    autos = [None if auto is None else np.nan_to_num(np.asarray(auto, dtype=float)) for auto in (auto_a, auto_b)]
    coef = np.array([float("nan") if peak_coef is None else float(peak_coef)])
    return float(
        _lag_variances(
            rho,
            np.array([int(peak_index)]),
            [0],
            lag_step_s,
            np.array([float(record_s)]),
            [autos[0]],
            [autos[1]],
            [weighting],
            coef,
        )[0]
    )


def envelope_width_s(values, index: int, lag_step_s: float) -> float:
    """Full width at half maximum of the Hilbert envelope of ``values`` around sample ``index``.

    A batch of one of the batched form (:func:`estimate_lags`); NaN when the envelope does not
    fall to half its value at ``index`` on both sides, or is not finite.
    """
    try:
        return float(
            _envelope_widths(
                np.nan_to_num(np.asarray(values, dtype=float))[None, :], np.array([int(index)]), lag_step_s
            )[0]
        )
    except ValueError:  # a non-finite envelope
        return float("nan")


def estimate_lag(
    coefficient,
    stderr,
    first_lag_s: float,
    lag_step_s: float,
    record_s: float,
    weighted_coefficient=None,
    weighting: str = "none",
    auto_a=None,
    auto_b=None,
    max_lag_s: Optional[float] = None,
    peak_z: float = PEAK_Z,
) -> LagEstimate:
    """Lag of the cross-correlation peak, its standard error and the peak coefficient.

    Parameters
    ----------
    coefficient, stderr : array_like, shape (2L + 1,)
        Cross-correlation coefficient ``rho_ab`` and its standard error at lags
        ``first_lag_s + i * lag_step_s`` (``-L..L``).
    first_lag_s, lag_step_s : float
        Lag grid.
    record_s : float
        Record length ``T`` (valid samples), for the lag's standard error.
    weighted_coefficient : array_like, optional
        Generalised cross-correlation (PHAT or SCOT) on the same lags; when given its peak
        locates the delay. None uses ``coefficient``.
    weighting : {"none", "phat", "scot"}
        The weighting of ``weighted_coefficient`` (for the standard error).
    auto_a, auto_b : array_like, optional
        Auto-correlation coefficients (lags 0..L) of the two channels, for the standard error.
    max_lag_s : float, optional
        Search ``|lag| <= max_lag_s``; None searches every lag.
    peak_z : float
        ``weak_peak`` below ``peak_z`` standard errors; default :data:`PEAK_Z`.

    Returns
    -------
    LagEstimate

    Notes
    -----
    ``k* = argmax |rho_w(k)|``, refined by :func:`refine_peak` (band-limited interpolation, no
    parabola bias); ``peak_coef = rho_ab(tau*)`` (unweighted, interpolated) with the standard
    error of Bartlett's formula at ``tau*`` itself (``_peak_coef_stderrs``; linear
    interpolation of ``stderr`` when the autos are missing); ``sd(lag_s)`` from :func:`lag_variance`.
    ``peak_width_s`` is the full width at half maximum of the Hilbert envelope of the located
    function: how sharp the peak is (a narrow-band source gives a broad, oscillating peak; PHAT
    whitening sharpens it). A batch of one of :func:`estimate_lags`.

    References
    ----------
    .. [1] C. H. Knapp and G. C. Carter, "The generalized correlation method for estimation of
       time delay", IEEE Trans. Acoust., Speech, Signal Process. 24(4), 320-327, 1976.
    .. [2] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 5.1
       (time delay from the cross-correlation peak).
    """
    rho = np.asarray(coefficient, dtype=float)
    s = np.asarray(stderr, dtype=float)
    if rho.shape != s.shape or rho.ndim != 1:
        raise ValueError(f"coefficient {rho.shape} and stderr {s.shape} must be 1-d of equal length")
    return estimate_lags(
        rho[None, :],
        s[None, :],
        first_lag_s,
        lag_step_s,
        [record_s],
        weighted_coefficient=None if weighted_coefficient is None else [weighted_coefficient],
        weighting=weighting,
        auto_a=[auto_a],
        auto_b=[auto_b],
        max_lag_s=max_lag_s,
        peak_z=peak_z,
    )[0]


# --------------------------------------------------------------------------------------------
# Batched form: every cross pair of a window at once (one row per pair); the per-pair functions
# above are batches of one of it.
# --------------------------------------------------------------------------------------------

#: offsets (in samples) of the fine grid searched by :func:`refine_peak` around the peak sample
_FINE_OFFSETS = np.linspace(-1.0, 1.0, 2 * UPSAMPLE + 1)
#: ``sinc(grid - j)`` for the default fine grid and the default half-width, as a function of the
#: sample offset ``j - k`` only: ``k + t`` is exact for the grid's multiples of 1/32, so these are
#: the very numbers :func:`sinc_interpolate` computes for an interior peak sample ``k``
_SINC_FINE = np.sinc(
    _FINE_OFFSETS[:, None] - np.arange(-INTERPOLATION_HALF_WIDTH, INTERPOLATION_HALF_WIDTH + 1)[None, :]
)
_WINDOW_OFFSETS = np.arange(-INTERPOLATION_HALF_WIDTH, INTERPOLATION_HALF_WIDTH + 1)


@functools.lru_cache(maxsize=64)
def _parzen(length: int) -> np.ndarray:
    """``scipy.signal.windows.parzen(length)``, computed once per length (read-only)."""
    window = parzen(length)
    window.flags.writeable = False
    return window


def _row_arrays(rows, count: int, length: Optional[int], what: str, clean: bool = False):
    """``rows`` (None, one 2-d array, or a sequence of 1-d arrays / None) as a list of ``count``
    float arrays or None (``nan_to_num`` of them when ``clean``); the same input object gives
    the same array object (for reuse by identity)."""
    if rows is None:
        return [None] * count
    if isinstance(rows, np.ndarray):
        if rows.ndim != 2 or rows.shape[0] != count:
            raise ValueError(f"{what} {rows.shape} must have one row per pair ({count})")
        rows = list(rows.astype(float, copy=False))
    else:
        rows = list(rows)
    if len(rows) != count:
        raise ValueError(f"{what}: {len(rows)} entries for {count} pairs")
    converted = {}
    out: list = []
    for row in rows:
        if row is None:
            out.append(None)
            continue
        key = id(row)
        if key not in converted:
            array = np.asarray(row, dtype=float)
            if array.ndim != 1 or (length is not None and array.shape != (length,)):
                raise ValueError(
                    f"{what} row {array.shape} must be 1-d" + (f" of length {length}" if length is not None else "")
                )
            converted[key] = (row, np.nan_to_num(array) if clean else array)  # `row` kept alive: ids stay unique
        out.append(converted[key][1])
    return out


def _interior_rows(center: np.ndarray, n: int) -> Tuple[np.ndarray, np.ndarray]:
    """Rows whose ``center +/- INTERPOLATION_HALF_WIDTH`` lies inside ``0..n-1`` (batched with one
    kernel shape) and the others (interpolated one by one, with the truncated series)."""
    interior = (center - INTERPOLATION_HALF_WIDTH >= 0) & (center + INTERPOLATION_HALF_WIDTH + 1 <= n)
    return np.nonzero(interior)[0], np.nonzero(~interior)[0]


def _refine_peaks(located_clean: np.ndarray, located: np.ndarray, peak_index: np.ndarray):
    """:func:`refine_peak` positions of every row (interior rows batched, rows near the ends
    one by one); ``located_clean`` is ``nan_to_num(located)``."""
    count, n = located_clean.shape
    position = np.empty(count)
    rows, edge_rows = _interior_rows(peak_index, n)
    if len(rows):
        k = peak_index[rows]
        samples = located_clean[rows[:, None], k[:, None] + _WINDOW_OFFSETS[None, :]]
        # stacked matrix-vector products: per row the same product as `matrix @ vector`
        fine = np.matmul(_SINC_FINE, samples[:, :, None])[:, :, 0]
        sign = np.where(located_clean[rows, k] >= 0, 1.0, -1.0)
        signed = sign[:, None] * fine
        m = np.clip(np.argmax(signed, axis=1), 1, fine.shape[1] - 2)
        line = np.arange(len(rows))
        y0, y1, y2 = signed[line, m - 1], signed[line, m], signed[line, m + 1]
        denom = y0 - 2 * y1 + y2
        with np.errstate(divide="ignore", invalid="ignore"):
            offset = np.where(denom < 0, 0.5 * (y0 - y2) / denom, 0.0)
        grid = k + _FINE_OFFSETS[m]
        position[rows] = grid + offset / UPSAMPLE
    for row in edge_rows:
        position[row] = refine_peak(located[row], int(peak_index[row]))[0]
    return position


def _interpolate_at(
    values_clean: np.ndarray, values: np.ndarray, position: np.ndarray, center: np.ndarray
) -> np.ndarray:
    """:func:`sinc_interpolate` of every row at its one ``position`` around ``center``."""
    count, n = values_clean.shape
    out = np.empty(count)
    rows, edge_rows = _interior_rows(center, n)
    if len(rows):
        j = center[rows, None] + _WINDOW_OFFSETS[None, :]
        kernel = np.sinc(position[rows, None] - j)
        samples = values_clean[rows[:, None], j]
        out[rows] = np.matmul(kernel[:, None, :], samples[:, :, None])[:, 0, 0]
    for row in edge_rows:
        out[row] = sinc_interpolate(values[row], [position[row]], int(center[row]))[0]
    return out


def _envelope_widths(located_clean: np.ndarray, peak_index: np.ndarray, lag_step_s: float) -> np.ndarray:
    """:func:`envelope_width_s` of every row: one Hilbert transform along the rows, the
    half-maximum crossings found by masks instead of walking."""
    count, n = located_clean.shape
    env = correlation_envelope(located_clean, auto=False)
    if not np.all(np.isfinite(env)):
        raise ValueError("the Hilbert envelope is not finite: only the per-pair path takes such rows")
    line = np.arange(count)
    half = 0.5 * env[line, peak_index]
    lag_index = np.arange(n)[None, :]
    stop = ~(env > half[:, None])  # where the walk of envelope_width_s stops
    left = np.where(stop & (lag_index <= peak_index[:, None]), lag_index, -1).max(axis=1)
    left = np.maximum(left, 0)
    right = np.where(stop & (lag_index >= peak_index[:, None]), lag_index, n).min(axis=1)
    right = np.minimum(right, n - 1)
    e_left, e_right = env[line, left], env[line, right]
    with np.errstate(divide="ignore", invalid="ignore"):
        e_left_in, e_right_in = env[line, np.minimum(left + 1, n - 1)], env[line, np.maximum(right - 1, 0)]
        cross_right = right + (half - e_right) / (e_right_in - e_right) * ((right - 1) - right)
        cross_left = left + (half - e_left) / (e_left_in - e_left) * ((left + 1) - left)
        width = (cross_right - cross_left) * lag_step_s
    bad = ~(half > 0) | (e_left > half) | (e_right > half)
    return np.where(bad, np.nan, width)


def _lag_variances(
    rho_clean: np.ndarray,
    peak_index: np.ndarray,
    rows,
    lag_step_s: float,
    record_s: np.ndarray,
    autos_a,
    autos_b,
    weightings,
    peak_coef: np.ndarray,
    offset: Optional[np.ndarray] = None,
) -> np.ndarray:
    """:func:`lag_variance` of the given rows: the real transforms of rows with the same length
    in one call, each channel's auto spectrum for a half-width once (autos reused by identity).
    ``rho_clean`` and the autos are already ``nan_to_num``-ed; ``offset`` (samples, default 0)
    is each row's refined peak position minus ``peak_index``."""
    count, n = rho_clean.shape
    L = (n - 1) // 2
    variance = np.full(count, np.nan)
    groups: dict = {}
    for row in rows:
        half = L - abs(int(peak_index[row]) - L)
        a, b = autos_a[row], autos_b[row]
        if a is not None and b is not None:
            half = min(half, len(a) - 1, len(b) - 1)
        if half < 4 or not record_s[row] > 0:
            continue
        if a is None or b is None:
            coef = float(peak_coef[row])
            if not np.isfinite(coef) or coef == 0:
                continue
        groups.setdefault(scipy.fft.next_fast_len(8 * half, real=False), []).append((row, half))
    for n_fft, members in groups.items():
        segments = np.zeros((len(members), n_fft))
        auto_slot: dict = {}
        for line, (row, half) in enumerate(members):
            # the lags k-half..k+half tapered, lag k at index 0
            center = int(peak_index[row])
            part = rho_clean[row, center - half : center + half + 1] * _parzen(2 * half + 1)
            segments[line, : half + 1] = part[half:]
            segments[line, n_fft - half :] = part[:half]
            if autos_a[row] is not None and autos_b[row] is not None:
                for auto in (autos_a[row], autos_b[row]):
                    auto_slot.setdefault((id(auto), half), (auto, half))
        S_ab = scipy.fft.rfft(segments, axis=1)
        S_ab *= lag_step_s  # in place: the same products as lag_step_s * S_ab
        mag_ab = np.abs(S_ab)
        aligned = _peak_aligned_real_part(S_ab, rho_clean, peak_index, offset, members, n_fft)
        del S_ab
        auto_keys = list(auto_slot)
        if auto_keys:
            auto_segments = np.zeros((len(auto_keys), n_fft))
            for line, key in enumerate(auto_keys):
                auto, half = auto_slot[key]
                a = auto[: half + 1] * _parzen(2 * half + 1)[half:]
                auto_segments[line, : half + 1] = a
                auto_segments[line, n_fft - half :] = a[:0:-1]
            auto_spectra = np.clip(lag_step_s * scipy.fft.rfft(auto_segments, axis=1).real, 0, None)
            auto_line = {key: line for line, key in enumerate(auto_keys)}
        product = np.empty_like(mag_ab)
        for line, (row, half) in enumerate(members):
            a, b = autos_a[row], autos_b[row]
            if a is not None and b is not None:
                product[line] = auto_spectra[auto_line[(id(a), half)]] * auto_spectra[auto_line[(id(b), half)]]
            else:
                gamma2 = min(float(peak_coef[row]) ** 2, 0.999)
                product[line] = mag_ab[line] ** 2 / gamma2
            aligned[line] *= _coherent_bins(mag_ab[line], product[line], half, record_s[row] / lag_step_s)
        numerator, curvature = _variance_sums(
            mag_ab, aligned, product, [weightings[row] for row, _ in members], n_fft, lag_step_s
        )
        for line, (row, _) in enumerate(members):
            if curvature[line] > 0:
                variance[row] = float(numerator[line] / (record_s[row] * curvature[line] ** 2))
    return variance


def _coherent_bins(mag_ab: np.ndarray, product: np.ndarray, half: int, samples: float) -> np.ndarray:
    """Bins whose estimated coherence ``|S_ab|^2 / (S_aa S_bb)`` exceeds what noise alone reaches
    with probability :data:`COHERENCE_ALPHA`.

    The curvature sums the aligned real part over these bins only. Outside the source's band
    that real part is noise of mean zero, but ``w^2`` weights it most, so summing it over the
    whole band left the curvature, hence the stderr, noisy from window to window (and now and
    then of the wrong sign). The selection does not bias the sum: for circular noise the
    estimate's magnitude, which selects, is independent of its phase, which sets the real part.
    Under zero coherence the smoothed estimate is ``Beta(1, nu/2 - 1)`` distributed (Carter
    1987, from memory): the threshold is ``1 - (alpha / M)^(1 / (nu/2 - 1))``, Bonferroni over
    the about ``M`` (the half-width) resolution cells of 0..fs/2, since a single selected noise
    cell near Nyquist, weighted by ``w^2``, can outweigh the whole signal band; ``nu = 2 N /
    sum_k w_k^2`` the degrees of freedom of a Blackman-Tukey estimate with lag window ``w``
    (Priestley, *Spectral Analysis and Time Series*, 1981, Sec. 6.2, from memory; 3.71 N / M
    for the Parzen window)."""
    nu = 2.0 * samples / float(np.sum(_parzen(2 * half + 1) ** 2))
    if nu <= 4:
        return np.ones(len(mag_ab), dtype=bool)
    threshold = 1.0 - (COHERENCE_ALPHA / half) ** (1.0 / (nu / 2.0 - 1.0))
    return mag_ab**2 > threshold * product


def _peak_aligned_real_part(S_ab, rho_clean, peak_index, offset, members, n_fft: int) -> np.ndarray:
    """``Re(S_ab exp(i w delta)) * sign(rho at the peak)`` of each member row: the cross spectrum
    of the segment centred on the peak sample, turned so that the refined peak (``delta`` samples
    from the centre) is at zero lag, signed so that the peak is positive.

    Its integral against ``w^2 psi`` is the curvature of the (weighted) cross-correlation at its
    peak. The magnitude ``|S_ab|`` overstates it: where the coherence is small (sensor noise
    outside the source's band) the estimated ``|S_ab|`` is about ``sqrt(S_aa S_bb / nu)`` of pure
    noise, always positive, and ``w^2`` weights those bands most, so the lag's variance came out
    2-5x too small at long ``max_lag`` (benchmarks/calibration.py, scenario delay_broadband_long).
    The real part of the aligned spectrum is the signal's ``|S_ab|`` plus noise of mean zero."""
    f = scipy.fft.rfftfreq(n_fft)  # cycles per sample
    out = np.empty(S_ab.shape)
    for line, (row, _) in enumerate(members):
        delta = 0.0 if offset is None else float(offset[row])
        sign = -1.0 if rho_clean[row, int(peak_index[row])] < 0 else 1.0
        out[line] = sign * (S_ab[line] * np.exp(2j * np.pi * f * delta)).real
    return out


def _variance_sums(mag_ab: np.ndarray, aligned: np.ndarray, product: np.ndarray, kinds, n_fft: int, lag_step_s: float):
    """Numerator ``int w^2 psi^2 [S_aa S_bb - |S_ab|^2] df`` and curvature
    ``int w^2 psi Re(S_ab e^{i w delta}) df`` (``aligned``, :func:`_peak_aligned_real_part`) of
    :func:`lag_variance` for rows of one transform length (``kinds``: each row's weighting)."""
    f = scipy.fft.rfftfreq(n_fft, lag_step_s)
    w2 = (2 * np.pi * f) ** 2
    w2[1 : (n_fft + 1) // 2] *= 2.0
    df = 1.0 / (n_fft * lag_step_s)
    excess = mag_ab**2  # then, in place: clip(product - |S_ab|^2, 0, None)
    np.subtract(product, excess, out=excess)
    np.clip(excess, 0, None, out=excess)
    if all(kind == "none" for kind in kinds):
        # psi = 1: w2 * psi**2 and w2 * psi are w2 exactly
        excess *= w2
        return np.sum(excess, axis=1) * df, np.sum(w2 * aligned, axis=1) * df
    tiny = 1e-9 * (mag_ab.max(axis=1) + 1e-300)
    psi = np.ones_like(mag_ab)
    kind = np.array(kinds)
    phat, scot = kind == "phat", kind == "scot"
    if scot.any():
        psi[scot] = 1.0 / np.maximum(np.sqrt(product[scot]), tiny[scot, None])
    numerator = np.sum(w2 * psi**2 * excess, axis=1) * df
    curvature = np.sum(w2 * psi * aligned, axis=1) * df
    if phat.any():
        numerator[phat], curvature[phat] = _phase_only_sums(aligned[phat], product[phat], w2, df)
    return numerator, curvature


def _phase_only_sums(aligned: np.ndarray, product: np.ndarray, w2: np.ndarray, df: float):
    """Numerator and curvature of a PHAT row: the weighted correlation keeps one phase per raw
    bin, so a bin of coherence ``gamma`` adds ``w^2 2 E[sin^2 theta]`` to the numerator and
    ``w^2 E[cos theta]`` to the curvature (:mod:`corrtransforms.numerics.phase_noise`); both
    tend to Knapp & Carter's ``w^2 (1 - gamma^2) / gamma^2`` and ``w^2`` where the coherence is
    high, and stay bounded where it is zero. ``gamma`` is estimated by the aligned real part over
    ``sqrt(S_aa S_bb)``: of mean zero in a band of pure noise, where ``|S_ab| / sqrt(S_aa S_bb)``
    is about ``sqrt(1 / nu)`` of noise."""
    root = np.sqrt(product)
    with np.errstate(invalid="ignore", divide="ignore"):
        coherence = np.where(root > 0, aligned / np.where(root > 0, root, 1.0), 0.0)
    mean_cos, mean_sin2 = phase_moments(coherence)
    return np.sum(w2 * 2.0 * mean_sin2, axis=1) * df, np.sum(w2 * mean_cos, axis=1) * df


def auto_spectrum_floor(auto) -> float:
    """Smallest over largest value of the Blackman-Tukey auto spectrum of ``auto`` on 0..fs/2.

    Parameters
    ----------
    auto : array_like, shape (L + 1,)
        Auto-correlation coefficients at lags 0..L (NaN taken as 0).

    Returns
    -------
    float
        ``min S / max S`` with ``S`` the transform of ``auto`` tapered by a Parzen lag window of
        half-width ``L`` (non-negative spectral window, so ``S >= 0`` up to round-off); NaN when
        ``L < 4`` or ``max S <= 0``.

    Notes
    -----
    Blackman-Tukey estimate (Bendat & Piersol, *Random Data*, 4th ed., Sec. 11.5, from memory);
    a band with no power shows only the Parzen window's leakage (sidelobes falling as ``f^-4``),
    orders of magnitude below the occupied band. PHAT and SCOT divide by these values.
    """
    a = np.nan_to_num(np.asarray(auto, dtype=float))
    half = len(a) - 1
    if a.ndim != 1 or half < 4:
        return float("nan")
    n_fft = scipy.fft.next_fast_len(8 * half, real=True)
    segment = np.zeros(n_fft)
    tapered = a * _parzen(2 * half + 1)[half:]
    segment[: half + 1] = tapered
    segment[n_fft - half :] = tapered[:0:-1]
    spectrum = scipy.fft.rfft(segment).real
    peak = spectrum.max()
    return float(max(spectrum.min(), 0.0) / peak) if peak > 0 else float("nan")


def _empty_band_rows(autos_a, autos_b, weightings) -> np.ndarray:
    """Rows with a PHAT/SCOT weighting and a channel whose :func:`auto_spectrum_floor` is below
    :data:`PSD_FLOOR` (each channel's spectrum computed once, autos reused by identity)."""
    floors = {}
    out = np.zeros(len(weightings), dtype=bool)
    for row, kind in enumerate(weightings):
        if kind == "none":
            continue
        for auto in (autos_a[row], autos_b[row]):
            if auto is None:
                continue
            if id(auto) not in floors:
                floors[id(auto)] = auto_spectrum_floor(auto)
            if floors[id(auto)] < PSD_FLOOR:
                out[row] = True
    return out


def _shifted(values_clean: np.ndarray, delta: float) -> np.ndarray:
    """``values(m + delta)`` at every sample ``m``: :func:`sinc_interpolate` with the samples
    ``m +/- INTERPOLATION_HALF_WIDTH`` (zero beyond the ends), as one correlation."""
    offsets = np.arange(-INTERPOLATION_HALF_WIDTH, INTERPOLATION_HALF_WIDTH + 1)
    padded = np.pad(values_clean, INTERPOLATION_HALF_WIDTH)
    return np.correlate(padded, np.sinc(delta - offsets), mode="valid")


def _peak_coef_stderrs(rho_clean, stderr, position, at_edge, autos_a, autos_b, fallback) -> np.ndarray:
    """Standard error of ``rho_ab`` at the fractional peak ``position`` of every row.

    Bartlett's variance (:func:`~corrtransforms.numerics.bartlett.bartlett_stderr`) evaluated at
    the peak itself: the cross-correlation is resampled on the grid shifted by the sub-sample
    offset ``delta = position - k`` (``k`` the nearest sample), so that grid's sample ``k`` is
    the peak, and the sums of Bartlett's formula are taken there (the sums over the integer
    lags ``v`` of products of band-limited coefficients are the ones of the shifted grid, and
    sums of squares do not depend on the shift). The magnitude keeps the stored stderr's pair
    count and estimator: ``s_peak = s(k) * b_shifted(k) / b(k)``, ``b`` Bartlett's figure for one
    sample pair. Rows without both autos, at the edge, or with ``b(k) = 0`` keep ``fallback``
    (the linear interpolation of the stored stderr).
    """
    out = np.array(fallback, dtype=float)
    count, n = rho_clean.shape
    for row in range(count):
        a, b = autos_a[row], autos_b[row]
        if at_edge[row] or a is None or b is None or len(a) != len(b) or 2 * len(a) - 1 != n:
            continue
        k = int(np.rint(position[row]))
        if not 0 <= k < n or not np.isfinite(stderr[row, k]):
            continue
        aa, bb = even_extension(a), even_extension(b)
        plain = bartlett_stderr_at(rho_clean[row], aa, bb, k)
        at_peak = bartlett_stderr_at(_shifted(rho_clean[row], float(position[row] - k)), aa, bb, k)
        if plain > 0 and np.isfinite(at_peak):
            out[row] = float(stderr[row, k] * at_peak / plain)
    return out


def _disagrees_with_plain(
    rho, rho_clean, idx, rows, position, variance, record, autos_a, autos_b, lag_step_s: float
) -> np.ndarray:
    """For the given weighted rows: does the weighted peak lie more than :data:`AGREEMENT_Z`
    combined standard errors from the peak of the unweighted ``rho``?

    Both estimate the same delay, so their difference has at most the variance
    ``var_weighted + var_plain``; a whitening that divides by near-empty bins moves the peak far
    outside it (in benchmarks/calibration.py's band-limited case to about zero lag). A row whose
    unweighted peak is at the edge of the search range or whose variances are not finite counts
    as disagreeing: nothing vouches for its weighted peak.
    """
    if len(rows) == 0:
        return np.zeros(0, dtype=bool)
    plain_clean = rho_clean[rows]
    k = idx[np.argmax(np.abs(plain_clean[:, idx]), axis=1)]
    at_edge = (k == idx[0]) | (k == idx[-1])
    plain_position = _refine_peaks(plain_clean, rho[rows], k)
    none = ["none"] * len(rows)
    plain_variance = _lag_variances(
        plain_clean,
        k,
        np.flatnonzero(~at_edge),
        lag_step_s,
        record[rows],
        [autos_a[i] for i in rows],
        [autos_b[i] for i in rows],
        none,
        np.full(len(rows), np.nan),
        plain_position - k,
    )
    gap = np.abs(position[rows] - plain_position) * lag_step_s
    with np.errstate(invalid="ignore"):
        agrees = gap <= AGREEMENT_Z * np.sqrt(variance[rows] + plain_variance)
    return ~agrees | at_edge


def _lag_rows(coefficient, stderr, record_s, weighted_coefficient, weighting: str, auto_a, auto_b):
    """The inputs of :func:`estimate_lags` checked and as arrays: ``(rho, stderr, weighted rows,
    located, autos_a, autos_b, record_s)``, ``located`` the rows whose peak is searched."""
    rho = np.asarray(coefficient, dtype=float)
    s = np.asarray(stderr, dtype=float)
    if rho.ndim != 2 or rho.shape != s.shape:
        raise ValueError(f"coefficient {rho.shape} and stderr {s.shape} must be 2-d of equal shape")
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting={weighting!r}: must be one of " + ", ".join(WEIGHTINGS))
    count, n = rho.shape
    weighted = _row_arrays(weighted_coefficient, count, n, "weighted_coefficient")
    if any(w is not None for w in weighted):
        located = np.array([rho[i] if w is None else w for i, w in enumerate(weighted)]).reshape(rho.shape)
    else:
        located = rho
    autos_a = _row_arrays(auto_a, count, None, "auto_a", clean=True)
    autos_b = _row_arrays(auto_b, count, None, "auto_b", clean=True)
    record = np.broadcast_to(np.asarray(record_s, dtype=float), (count,))
    return rho, s, weighted, located, autos_a, autos_b, record


def estimate_lags(
    coefficient,
    stderr,
    first_lag_s: float,
    lag_step_s: float,
    record_s,
    weighted_coefficient=None,
    weighting: str = "none",
    auto_a=None,
    auto_b=None,
    max_lag_s: Optional[float] = None,
    peak_z: float = PEAK_Z,
) -> List[LagEstimate]:
    """:func:`estimate_lag` of many channel pairs on one lag grid at once (one row per pair).

    Parameters
    ----------
    coefficient, stderr : array_like, shape (n_pairs, 2L + 1)
        Cross-correlation coefficients ``rho_ab`` and their standard errors, one pair per row,
        at lags ``first_lag_s + i * lag_step_s``.
    first_lag_s, lag_step_s : float
        The lag grid shared by every row.
    record_s : float or array_like, shape (n_pairs,)
        Record length ``T`` of each pair.
    weighted_coefficient : array_like, optional
        None (every row locates on ``coefficient``), an array of the shape of ``coefficient``,
        or a sequence of one 1-d array or None per pair (None: that row locates on its
        ``coefficient`` with weighting "none").
    weighting : {"none", "phat", "scot"}
        The weighting of the weighted rows.
    auto_a, auto_b : sequence of array_like or None, optional
        Per pair the auto-correlation coefficients (lags 0..L) of its two channels, or None.
        Listing the same array object for several pairs computes that channel's auto spectrum
        once per half-width instead of once per pair.
    max_lag_s, peak_z : float, optional
        As in :func:`estimate_lag`.

    Returns
    -------
    list of LagEstimate
        One per row, in row order; a row does not depend on the others (stacked matrix-vector
        products, row-wise transforms and sums). A row holding an infinite value gets NaN and
        ``nonfinite_correlation``.

    Raises
    ------
    ValueError
        Malformed input (shapes, weighting) or a non-finite peak position or envelope; callers
        that isolate failures per pair call :func:`estimate_lag` pair by pair.

    Notes
    -----
    The formulas of :func:`estimate_lag`, :func:`refine_peak`, :func:`lag_variance` and
    :func:`envelope_width_s`. For a peak sample ``k`` at least ``INTERPOLATION_HALF_WIDTH`` lags
    from both ends, the kernel ``sinc(k + t_m - j)`` depends on ``j - k`` and the grid offset
    ``t_m`` only (exact multiples of 1/32), so one 65 x 129 kernel serves every row.

    References
    ----------
    .. [1] C. H. Knapp and G. C. Carter, "The generalized correlation method for estimation of
       time delay", IEEE Trans. Acoust., Speech, Signal Process. 24(4), 320-327, 1976.
    .. [2] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 5.1.
    """
    rho, s, weighted, located, autos_a, autos_b, record = _lag_rows(
        coefficient, stderr, record_s, weighted_coefficient, weighting, auto_a, auto_b
    )
    weightings = [("none" if w is None else weighting) for w in weighted]
    count, n = rho.shape
    nan = float("nan")
    if count == 0:
        return []
    lags = first_lag_s + lag_step_s * np.arange(n)
    search = np.ones(n, dtype=bool) if max_lag_s is None else np.abs(lags) <= max_lag_s + 1e-9 * lag_step_s
    idx = np.nonzero(search)[0]
    if len(idx) < 3:
        return [LagEstimate(nan, nan, nan, nan, nan, ("too_few_lags",))] * count
    infinite = np.isinf(located).any(axis=1) | np.isinf(rho).any(axis=1)
    if infinite.any():  # no peak can be located: NaN and the code, the other rows as usual
        out = [LagEstimate(nan, nan, nan, nan, nan, ("nonfinite_correlation",))] * count
        finite_rows = np.flatnonzero(~infinite)
        found = estimate_lags(
            rho[finite_rows],
            s[finite_rows],
            first_lag_s,
            lag_step_s,
            record[finite_rows],
            weighted_coefficient=[weighted[i] for i in finite_rows],
            weighting=weighting,
            auto_a=[autos_a[i] for i in finite_rows],
            auto_b=[autos_b[i] for i in finite_rows],
            max_lag_s=max_lag_s,
            peak_z=peak_z,
        )
        for i, estimate in zip(finite_rows, found):
            out[i] = estimate
        return out
    return _finite_row_estimates(
        rho, s, located, idx, record, autos_a, autos_b, weightings, first_lag_s, lag_step_s, peak_z
    )


def _finite_row_estimates(
    rho, s, located, idx, record, autos_a, autos_b, weightings, first_lag_s: float, lag_step_s: float, peak_z: float
) -> List[LagEstimate]:
    """The steps of :func:`estimate_lags` on rows without infinite values: peak sample in the
    search range ``idx``, refined position, peak coefficient and its stderr, lag variance, width."""
    count, n = rho.shape
    nan = float("nan")
    nonfinite = ~(np.all(np.isfinite(located[:, idx]), axis=1) & np.all(np.isfinite(rho[:, idx]), axis=1))
    located_clean = np.nan_to_num(located)
    k = idx[np.argmax(np.abs(located_clean[:, idx]), axis=1)]
    at_edge = (k == idx[0]) | (k == idx[-1])
    position = _refine_peaks(located_clean, located, k)
    position = np.where(at_edge, k.astype(float), position)
    if not np.all(np.isfinite(position)):
        bad = int(np.nonzero(~np.isfinite(position))[0][0])
        raise ValueError(f"row {bad}: the peak position is not finite (infinite correlation values?)")
    rho_clean = np.nan_to_num(rho)
    peak_coef = _interpolate_at(rho_clean, rho, position, k)
    j = np.clip(np.floor(position).astype(int), 0, n - 2)
    frac = position - j
    line = np.arange(count)
    peak_sd = (1 - frac) * s[line, j] + frac * s[line, j + 1]
    peak_sd = _peak_coef_stderrs(rho_clean, s, position, at_edge, autos_a, autos_b, peak_sd)
    weak = np.isfinite(peak_sd) & (np.abs(peak_coef) < peak_z * peak_sd)
    variance = _lag_variances(
        rho_clean, k, np.nonzero(~at_edge)[0], lag_step_s, record, autos_a, autos_b, weightings, peak_coef, position - k
    )
    width = _envelope_widths(located_clean, k, lag_step_s)
    suspect = _empty_band_rows(autos_a, autos_b, weightings)
    suspect[suspect] = _disagrees_with_plain(
        rho, rho_clean, idx, np.flatnonzero(suspect), position, variance, record, autos_a, autos_b, lag_step_s
    )
    out = []
    for i in range(count):
        quality = []
        if nonfinite[i]:
            quality.append("nonfinite_correlation")
        if at_edge[i]:
            quality.append("peak_at_max_lag")
        if weak[i]:
            quality.append("weak_peak")
        if suspect[i]:
            quality.append("spurious_lag_peak")
        edge = bool(at_edge[i])
        out.append(
            LagEstimate(
                nan if edge else float(first_lag_s + position[i] * lag_step_s),
                nan if edge else float(np.sqrt(variance[i])),
                float(peak_coef[i]),
                float(peak_sd[i]),
                float(width[i]),
                tuple(quality),
            )
        )
    return out
