"""FFT estimate of auto- and cross-correlation functions of one window of sensor samples.

The estimator transforms every channel once (:func:`channel_spectra`) and then forms each
requested pair with one inverse FFT (:func:`correlate_spectra`); :func:`correlate_block` does
both. An auto-correlation is the cross-correlation of a channel with itself: one implementation.

Lag convention (everywhere in this package)::

    R_ab(tau) = E[a(t) b(t + tau)]

so a peak at positive ``tau`` means channel b lags channel a (b sees the same event later).
With ``scipy.signal.correlate`` the same numbers are ``correlate(b, a)`` at
``correlation_lags(len(b), len(a)) == k``.

Gappy records are handled by the masked estimator: the detrended data are set to zero where a
sample is missing and the validity mask is correlated alongside, so every lag knows its number of
valid sample pairs. Lags with fewer than ``min_pairs`` pairs are NaN, never garbage.
"""
from __future__ import annotations

import dataclasses
from typing import Optional, Sequence, Tuple, Union

import numpy as np
import scipy.fft

ESTIMATORS = ("biased", "unbiased")
DETRENDS = ("mean", "none", "linear")
WEIGHTINGS = ("none", "phat", "scot")
#: lags whose count of valid sample pairs is below this are NaN (common practice: below about
#: 30 pairs a coefficient's own sampling error exceeds ~0.18 and it carries little information)
DEFAULT_MIN_PAIRS = 32
#: memory bound of one batch of inverse transforms (complex spectra of several pairs), bytes
_BATCH_BYTES = 64 * 2**20

PairSpec = Union[str, Sequence[Tuple[int, int]]]


def _check_choice(name, value, allowed):
    if value not in allowed:
        raise ValueError(f"{name}={value!r}: must be one of " + ", ".join(repr(a) for a in allowed))


@dataclasses.dataclass(frozen=True)
class ChannelSpectra:
    """Fourier transforms of every channel of one window (the input of :func:`correlate_spectra`).

    Attributes
    ----------
    sample_rate_hz : float
        Sample rate ``fs``.
    n_samples : int
        Samples per channel on the window's grid (valid or not).
    max_lag : int
        Largest lag in samples, ``round(max_lag_s * fs)``.
    fft_length : int
        Transform length, ``scipy.fft.next_fast_len(n_samples + max_lag)``: long enough that
        no lag in ``-max_lag..max_lag`` wraps around.
    spectra : ndarray, shape (n_channels, fft_length // 2 + 1), complex
        ``rfft`` of the detrended records, zero where a sample is missing.
    mask_spectra : ndarray or None
        ``rfft`` of the validity masks; None when every sample is valid (pair counts are then
        ``n_samples - |k|`` and need no transform).
    valid_counts : ndarray of int, shape (n_channels,)
        Valid samples per channel.
    mean_square : ndarray, shape (n_channels,)
        Mean square of each detrended record over its valid samples, computed in the time
        domain (NaN for a channel with no valid sample); the reference of the R(0) check.
    detrend : str
        The detrending applied ("mean", "none" or "linear").
    """

    sample_rate_hz: float
    n_samples: int
    max_lag: int
    fft_length: int
    spectra: np.ndarray
    mask_spectra: Optional[np.ndarray]
    valid_counts: np.ndarray
    mean_square: np.ndarray
    detrend: str

    @property
    def n_channels(self) -> int:
        return int(self.spectra.shape[0])

    @property
    def lag_step_s(self) -> float:
        return 1.0 / self.sample_rate_hz

    def frequencies_hz(self) -> np.ndarray:
        """Frequencies of the ``spectra`` bins, ``k * fs / fft_length``."""
        return scipy.fft.rfftfreq(self.fft_length, d=1.0 / self.sample_rate_hz)

    def periodogram(self) -> np.ndarray:
        """One-sided periodogram of each channel, ``G(f) = 2 |X(f)|^2 / (N fs)`` (unit^2/Hz).

        ``N`` is the channel's count of valid samples; bins 0 and Nyquist are not doubled.
        """
        power = np.abs(self.spectra) ** 2
        power[:, 1:] *= 2.0
        if self.fft_length % 2 == 0:
            power[:, -1] /= 2.0
        counts = np.maximum(self.valid_counts, 1).astype(float)
        return power / (counts[:, None] * self.sample_rate_hz)


@dataclasses.dataclass(frozen=True)
class CorrelationEstimate:
    """Correlation functions of several channel pairs at lags ``-L..L``.

    Attributes
    ----------
    pairs : tuple of (int, int)
        Channel index pairs ``(a, b)``; ``a == b`` is an auto-correlation.
    lags_s : ndarray, shape (2L + 1,)
        Lag of each column, ``k / fs`` for ``k = -L..L``.
    R : ndarray, shape (n_pairs, 2L + 1)
        Correlation ``R_ab(tau) = E[a(t) b(t + tau)]`` in unit_a * unit_b; NaN at lags with
        fewer than ``min_pairs`` valid sample pairs. For a weighted generalised
        cross-correlation, the weighted (unit-free) function.
    pair_count : ndarray of int, shape (n_pairs, 2L + 1)
        Number of valid sample pairs ``(a(t), b(t + tau))`` at each lag.
    coefficient : ndarray, shape (n_pairs, 2L + 1)
        ``rho_ab(tau) = R_ab(tau) / scale``.
    scale : ndarray, shape (n_pairs,)
        ``sqrt(R_aa(0) R_bb(0))`` (of the band-limited records when ``band_hz`` is given);
        NaN-free, 0 for a channel without variance (its coefficients are then NaN).
    sample_rate_hz : float
    estimator : str
    band_hz : tuple of float or None
    weighting : str
    min_pairs : int
    """

    pairs: Tuple[Tuple[int, int], ...]
    lags_s: np.ndarray
    R: np.ndarray
    pair_count: np.ndarray
    coefficient: np.ndarray
    scale: np.ndarray
    sample_rate_hz: float
    estimator: str = "biased"
    band_hz: Optional[Tuple[float, float]] = None
    weighting: str = "none"
    min_pairs: int = DEFAULT_MIN_PAIRS

    @property
    def max_lag(self) -> int:
        return (len(self.lags_s) - 1) // 2

    @property
    def lag_step_s(self) -> float:
        return 1.0 / self.sample_rate_hz

    def pair_index(self, a: int, b: int) -> int:
        """Row of pair ``(a, b)``; raises KeyError when it was not estimated."""
        try:
            return self.pairs.index((a, b))
        except ValueError:
            raise KeyError((a, b)) from None


def resolve_pairs(pairs: PairSpec, n_channels: int) -> Tuple[Tuple[int, int], ...]:
    """Channel index pairs from ``"all"``, ``"auto"`` or an explicit list.

    Parameters
    ----------
    pairs : {"all", "auto"} or sequence of (int, int)
        "all": every ``(i, j)`` with ``i <= j`` (autos included), in row-major order;
        "auto": ``(i, i)`` for every channel; a sequence is validated and kept in its order.
    n_channels : int

    Returns
    -------
    tuple of (int, int)
    """
    if isinstance(pairs, str):
        _check_choice("pairs", pairs, ("all", "auto"))
        if pairs == "auto":
            return tuple((i, i) for i in range(n_channels))
        return tuple((i, j) for i in range(n_channels) for j in range(i, n_channels))
    out = []
    for p in pairs:
        a, b = (int(p[0]), int(p[1]))
        if not (0 <= a < n_channels and 0 <= b < n_channels):
            raise ValueError(f"pair {tuple(p)!r} names a channel outside 0..{n_channels - 1}")
        out.append((a, b))
    return tuple(out)


def _detrend(values: np.ndarray, valid: np.ndarray, detrend: str) -> np.ndarray:
    """Detrended records, zero at invalid samples; trends fitted on valid samples only."""
    data = np.where(valid, values, 0.0)
    if detrend == "none":
        return data
    counts = valid.sum(axis=0).astype(float)
    safe = np.maximum(counts, 1.0)
    mean = data.sum(axis=0) / safe
    if detrend == "mean":
        return np.where(valid, values - mean, 0.0)
    # linear: least squares a + b t over the valid samples of each channel
    n = values.shape[0]
    t = (np.arange(n, dtype=float) - (n - 1) / 2.0)[:, None]
    mask = valid.astype(float)
    s1 = (t * mask).sum(axis=0)
    s2 = (t * t * mask).sum(axis=0)
    sty = (t * data).sum(axis=0)
    denom = counts * s2 - s1 * s1
    ok = (counts >= 2) & (denom > 0)
    slope = np.where(ok, (counts * sty - s1 * mean * counts) / np.where(ok, denom, 1.0), 0.0)
    intercept = mean - slope * s1 / safe
    return np.where(valid, values - intercept - slope * t, 0.0)


def channel_spectra(values, fs: float, max_lag_s: float, valid=None,
                    detrend: str = "mean") -> ChannelSpectra:
    """One real FFT per channel of the detrended, masked records and of their masks.

    Parameters
    ----------
    values : array_like, shape (n_samples, n_channels) or (n_samples,)
        Samples on a uniform grid. Non-finite entries are treated as missing.
    fs : float
        Sample rate in Hz.
    max_lag_s : float
        Largest lag wanted, in seconds; ``L = round(max_lag_s * fs)`` samples, ``0 <= L < n``.
    valid : array_like of bool, same shape as ``values``, optional
        True where a sample is valid. None (the default) means every finite sample is valid.
    detrend : {"mean", "none", "linear"}
        Trend removed from each channel, fitted on its valid samples only.

    Returns
    -------
    ChannelSpectra

    Notes
    -----
    With ``x`` the detrended record (0 where missing) and ``m`` its mask, zero-padded to
    ``M = next_fast_len(n + L)``, the circular correlation ``IDFT(conj(X_a) X_b)[k]`` equals the
    linear sum ``sum_t x_a(t) x_b(t + k)`` for every ``|k| <= L``: a circular wrap-around term
    would need ``|k| >= M - n + 1 > L`` [1]_.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data: Analysis and Measurement Procedures*,
       4th ed., Wiley, 2010, Sec. 11.4.2 (correlation estimates via FFT with zero padding).
    """
    _check_choice("detrend", detrend, DETRENDS)
    values = np.asarray(values, dtype=float)
    if values.ndim == 1:
        values = values[:, None]
    if values.ndim != 2:
        raise ValueError(f"values must have shape (n_samples, n_channels), got {values.shape}")
    finite = np.isfinite(values)
    if valid is None:
        valid = finite
    else:
        valid = np.asarray(valid, dtype=bool)
        if valid.ndim == 1:
            valid = valid[:, None]
        if valid.shape != values.shape:
            raise ValueError(f"valid has shape {valid.shape}, values {values.shape}")
        valid = valid & finite
    n = values.shape[0]
    if not fs > 0:
        raise ValueError(f"fs={fs!r}: must be a positive sample rate in Hz")
    max_lag = int(round(max_lag_s * fs))
    if not 0 <= max_lag < n:
        raise ValueError(f"max_lag_s={max_lag_s!r} is {max_lag} samples: must be in 0..{n - 1}")
    clean = np.where(valid, values, 0.0)
    x = _detrend(clean, valid, detrend)
    counts = valid.sum(axis=0).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_square = np.where(counts > 0, (x * x).sum(axis=0) / counts, np.nan)
    fft_length = scipy.fft.next_fast_len(n + max_lag, real=True)
    spectra = scipy.fft.rfft(x, n=fft_length, axis=0).T.copy()
    mask_spectra = None
    if not valid.all():
        mask_spectra = scipy.fft.rfft(valid.astype(float), n=fft_length, axis=0).T.copy()
    return ChannelSpectra(sample_rate_hz=float(fs), n_samples=n, max_lag=max_lag,
                          fft_length=fft_length, spectra=spectra, mask_spectra=mask_spectra,
                          valid_counts=counts, mean_square=mean_square, detrend=detrend)


def _zero_lag(power: np.ndarray, fft_length: int) -> np.ndarray:
    """``(1/M) sum over all M bins`` of a spectrum given by its rfft half (Parseval)."""
    weights = np.full(power.shape[-1], 2.0)
    weights[0] = 1.0
    if fft_length % 2 == 0:
        weights[-1] = 1.0
    return (power * weights).sum(axis=-1) / fft_length


def _lag_columns(max_lag: int, fft_length: int) -> np.ndarray:
    return np.arange(-max_lag, max_lag + 1) % fft_length


def _smooth(power: np.ndarray, width: int) -> np.ndarray:
    """Moving average over ``width`` frequency bins (reflecting at the ends)."""
    if width <= 1:
        return power
    from scipy.ndimage import uniform_filter1d

    return uniform_filter1d(power, size=width, axis=-1, mode="reflect")


def correlate_spectra(spectra: ChannelSpectra, pairs: PairSpec = "all", estimator: str = "biased",
                      band_hz: Optional[Tuple[float, float]] = None, weighting: str = "none",
                      min_pairs: int = DEFAULT_MIN_PAIRS) -> CorrelationEstimate:
    """Correlation functions of channel pairs from their spectra: one inverse FFT per pair.

    Parameters
    ----------
    spectra : ChannelSpectra
        From :func:`channel_spectra`.
    pairs : {"all", "auto"} or sequence of (int, int)
        See :func:`resolve_pairs`. ``(a, a)`` is the auto-correlation of channel a.
    estimator : {"biased", "unbiased"}
        "biased" divides the lag sums by ``sqrt(N_a N_b)`` (``N`` = valid samples of a channel;
        ``n`` for complete records); "unbiased" divides by the pair count at each lag.
    band_hz : (float, float), optional
        Keep only the cross-spectrum in ``low <= f <= high`` (band-limited correlation, e.g. the
        input of a modal fit by NExT). The scale is then that of the band-limited records.
        None (the default) keeps every frequency.
    weighting : {"none", "phat", "scot"}
        Generalised cross-correlation weighting of Knapp & Carter [2]_ (for time-delay
        estimation). "phat": ``1/|G_ab|``; "scot": ``1/sqrt(G_aa G_bb)`` with auto-spectra
        smoothed over ``M / (2L + 1)`` bins. With a weighting, ``R`` is the weighted function and
        ``coefficient`` is it divided by its Cauchy-Schwarz bound ``sum W |G_ab| / M`` (so
        ``|coefficient| <= 1``, with 1 for a pure delay); no count correction applies.
    min_pairs : int
        Lags with fewer valid sample pairs are NaN. Default :data:`DEFAULT_MIN_PAIRS`.

    Returns
    -------
    CorrelationEstimate
        Lags ``-L..L`` for every pair.

    Notes
    -----
    With the detrended, zero-filled records ``x`` and masks ``m`` [1]_::

        S_ab(k) = sum_t x_a(t) x_b(t + k) = IDFT(conj(X_a) X_b)[k]
        C_ab(k) = sum_t m_a(t) m_b(t + k) = IDFT(conj(M_a) M_b)[k]     (pair count)
        biased:   R_ab(k) = S_ab(k) / sqrt(N_a N_b)
        unbiased: R_ab(k) = S_ab(k) / C_ab(k)
        rho_ab(k) = R_ab(k) / sqrt(R_aa(0) R_bb(0)),   R_aa(0) = sum x_a^2 / N_a

    For a complete record this is the textbook estimate, Bendat & Piersol [1]_ Eqs. (8.92)
    (unbiased, ``1/(N - r)``) and (11.99) (biased, ``1/N``). The biased masked estimate keeps
    ``|rho| <= 1`` (Cauchy-Schwarz) and a non-negative spectrum.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Secs. 8.4 and
       11.4 (equation numbers from memory).
    .. [2] C. H. Knapp and G. C. Carter, "The generalized correlation method for estimation of
       time delay", IEEE Trans. Acoust., Speech, Signal Process. 24(4), 320-327, 1976, Table I.
    """
    _check_choice("estimator", estimator, ESTIMATORS)
    _check_choice("weighting", weighting, WEIGHTINGS)
    pair_list = resolve_pairs(pairs, spectra.n_channels)
    L, M, n = spectra.max_lag, spectra.fft_length, spectra.n_samples
    columns = _lag_columns(L, M)
    lags_s = np.arange(-L, L + 1) / spectra.sample_rate_hz
    n_pairs = len(pair_list)
    X = spectra.spectra
    band = None
    if band_hz is not None:
        low, high = float(band_hz[0]), float(band_hz[1])
        if not 0 <= low < high:
            raise ValueError(f"band_hz={band_hz!r}: must be (low, high) with 0 <= low < high")
        f = spectra.frequencies_hz()
        band = (f >= low) & (f <= high)
        band_hz = (low, high)

    power = np.abs(X) ** 2
    if band is not None:
        zero_lag_sum = _zero_lag(power * band, M)
    else:
        zero_lag_sum = _zero_lag(power, M)
    counts_ch = spectra.valid_counts.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        R0 = np.where(counts_ch > 0, zero_lag_sum / np.maximum(counts_ch, 1.0), 0.0)

    smoothed = None
    if weighting == "scot":
        smoothed = _smooth(power, max(1, M // (2 * L + 1)))

    a_idx = np.array([p[0] for p in pair_list], dtype=int)
    b_idx = np.array([p[1] for p in pair_list], dtype=int)
    sums = np.empty((n_pairs, 2 * L + 1))
    bounds = np.ones(n_pairs)
    batch = max(1, _BATCH_BYTES // (X.shape[1] * 16))
    for start in range(0, n_pairs, batch):
        sl = slice(start, start + batch)
        cross = np.conj(X[a_idx[sl]]) * X[b_idx[sl]]
        if band is not None:
            cross *= band
        if weighting != "none":
            if weighting == "phat":
                magnitude = np.abs(cross)
                tiny = 1e-12 * magnitude.max(axis=-1, keepdims=True) + 1e-300
                w = np.where(magnitude > tiny, 1.0 / np.maximum(magnitude, tiny), 0.0)
            else:
                denom = np.sqrt(smoothed[a_idx[sl]] * smoothed[b_idx[sl]])
                tiny = 1e-12 * denom.max(axis=-1, keepdims=True) + 1e-300
                w = np.where(denom > tiny, 1.0 / np.maximum(denom, tiny), 0.0)
            bounds[sl] = _zero_lag(w * np.abs(cross), M)
            cross *= w
        sums[sl] = scipy.fft.irfft(cross, n=M, axis=-1)[:, columns]

    if spectra.mask_spectra is None:
        counts = np.broadcast_to((n - np.abs(np.arange(-L, L + 1))).astype(np.int64),
                                 (n_pairs, 2 * L + 1)).copy()
    else:
        Mk = spectra.mask_spectra
        counts = np.empty((n_pairs, 2 * L + 1), dtype=np.int64)
        for start in range(0, n_pairs, batch):
            sl = slice(start, start + batch)
            cross = np.conj(Mk[a_idx[sl]]) * Mk[b_idx[sl]]
            counts[sl] = np.rint(scipy.fft.irfft(cross, n=M, axis=-1)[:, columns]).astype(np.int64)
        np.maximum(counts, 0, out=counts)

    few = counts < max(int(min_pairs), 1)
    if weighting != "none":
        R = sums
        scale = bounds
    else:
        if estimator == "biased":
            divisor = np.sqrt(counts_ch[a_idx] * counts_ch[b_idx])[:, None]
        else:
            divisor = counts.astype(float)
        with np.errstate(invalid="ignore", divide="ignore"):
            R = np.where(few, np.nan, sums / np.where(divisor > 0, divisor, 1.0))
        scale = np.sqrt(R0[a_idx] * R0[b_idx])
    with np.errstate(invalid="ignore", divide="ignore"):
        coefficient = np.where(scale[:, None] > 0, R / np.where(scale > 0, scale, 1.0)[:, None], np.nan)
    if weighting != "none":
        coefficient = np.where(few, np.nan, coefficient)
        R = np.where(few, np.nan, R)
    return CorrelationEstimate(pairs=pair_list, lags_s=lags_s, R=R, pair_count=counts,
                               coefficient=coefficient, scale=scale,
                               sample_rate_hz=spectra.sample_rate_hz, estimator=estimator,
                               band_hz=band_hz, weighting=weighting, min_pairs=int(min_pairs))


def correlate_block(values, fs: float, max_lag_s: float, pairs: PairSpec = "all",
                    estimator: str = "biased", detrend: str = "mean", valid=None,
                    band_hz: Optional[Tuple[float, float]] = None, weighting: str = "none",
                    min_pairs: int = DEFAULT_MIN_PAIRS) -> CorrelationEstimate:
    """Correlation functions of a block of samples: :func:`channel_spectra` then
    :func:`correlate_spectra`.

    Parameters
    ----------
    values : array_like, shape (n_samples, n_channels) or (n_samples,)
        Samples on a uniform grid; non-finite entries are missing.
    fs : float
        Sample rate in Hz.
    max_lag_s : float
        Largest lag in seconds.
    pairs : {"all", "auto"} or sequence of (int, int)
        Pairs wanted; ``(a, a)`` is an auto-correlation. Default "all".
    estimator : {"biased", "unbiased"}
    detrend : {"mean", "none", "linear"}
    valid : array_like of bool, optional
        Validity mask; None means every finite sample.
    band_hz, weighting, min_pairs
        As in :func:`correlate_spectra`.

    Returns
    -------
    CorrelationEstimate

    Notes
    -----
    ``R_ab(tau) = E[a(t) b(t + tau)]``: a peak at positive tau means b lags a. The estimate of
    pair (a, b) at lag k equals ``scipy.signal.correlate(b, a)`` at
    ``correlation_lags(n, n) == k`` divided by the estimator's divisor.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Sec. 8.4.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> a = rng.standard_normal(2000)
    >>> b = np.roll(a, 5)          # b lags a by 5 samples
    >>> est = correlate_block(np.column_stack([a, b]), fs=100.0, max_lag_s=0.1, pairs=[(0, 1)])
    >>> float(est.lags_s[np.argmax(est.coefficient[0])])
    0.05
    """
    spectra = channel_spectra(values, fs, max_lag_s, valid=valid, detrend=detrend)
    return correlate_spectra(spectra, pairs, estimator=estimator, band_hz=band_hz,
                             weighting=weighting, min_pairs=min_pairs)
