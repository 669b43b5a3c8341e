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

Two exact ways to the same lag sums are used:

- full band (the usual case): the record is cut into blocks of ``S`` samples; each channel's
  blocks and its blocks extended by ``L`` samples on both sides are transformed once at length
  ``Q >= S + 2L`` (overlap-save); per pair the block cross-spectra are summed and inverse
  transformed once. No lag in ``-L..L`` wraps around, and the short transforms make this about
  40 % faster than one transform of length ``n + L`` (benchmarks/bench_correlation.py);
- band-limited or weighted correlation (modal fits, time-delay estimation) needs the
  cross-spectrum at full resolution: one transform per involved channel at length
  ``next_fast_len(n + L)``, computed on demand and cached, then one inverse transform per pair.
"""

from __future__ import annotations

import dataclasses
from typing import Optional, Sequence, Tuple, Union

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import as_strided

ESTIMATORS = ("biased", "unbiased")
DETRENDS = ("mean", "none", "linear")
PRECISIONS = ("float64", "float32")
WEIGHTINGS = ("none", "phat", "scot")
#: lags whose count of valid sample pairs is below this are NaN (common practice: below about
#: 30 pairs a coefficient's own sampling error exceeds ~0.18 and it carries little information)
DEFAULT_MIN_PAIRS = 32
#: memory bound of one batch of inverse transforms (complex spectra of several pairs), bytes
_BATCH_BYTES = 4 * 2**20

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
        Largest lag ``L`` in samples, ``round(max_lag_s * fs)``.
    segment_length : int
        Block length ``S`` of the overlap-save transforms.
    segment_fft_length : int
        Their transform length ``Q = next_fast_len(S + 2L)``.
    segment_spectra : ndarray, shape (n_channels, n_segments, Q // 2 + 1), complex
        ``rfft`` of each block ``x[iS : iS + S]`` of the detrended record (0 where missing).
    extended_spectra : ndarray, shape (n_channels, n_segments, Q // 2 + 1), complex
        ``rfft`` of each extended block ``x[iS - L : iS + S + L]`` (0 outside the record).
    mask_segment_spectra, mask_extended_spectra : ndarray or None
        The same transforms of the validity masks; None when every sample is valid (pair
        counts are then ``n_samples - |k|`` and need no transform).
    valid_counts : ndarray of int, shape (n_channels,)
        Valid samples per channel.
    mean_square : ndarray, shape (n_channels,)
        Mean square of each detrended record over its valid samples, computed in the time
        domain (NaN for a channel with no valid sample); the reference of the R(0) check.
    variance : ndarray, shape (n_channels,)
        Variance of each channel's valid samples about their mean; 0 for a flat channel.
    channel_mean : ndarray, shape (n_channels,)
        Mean of each channel's valid samples.
    records : ndarray, shape (n_channels, n_samples)
        The detrended records, 0 where a sample is missing (for the full-length transforms).
    valid_rows : ndarray of bool, shape (n_channels, n_samples), or None
        Validity masks as rows; None for a complete record.
    detrend : str
        The detrending applied ("mean", "none" or "linear").
    """

    sample_rate_hz: float
    n_samples: int
    max_lag: int
    segment_length: int
    segment_fft_length: int
    segment_spectra: np.ndarray
    extended_spectra: np.ndarray
    mask_segment_spectra: Optional[np.ndarray]
    mask_extended_spectra: Optional[np.ndarray]
    valid_counts: np.ndarray
    mean_square: np.ndarray
    variance: np.ndarray
    channel_mean: np.ndarray
    records: np.ndarray
    valid_rows: Optional[np.ndarray]
    detrend: str
    _full_cache: dict = dataclasses.field(default_factory=dict, compare=False, repr=False)

    @property
    def n_channels(self) -> int:
        return int(self.segment_spectra.shape[0])

    @property
    def n_segments(self) -> int:
        return int(self.segment_spectra.shape[1])

    @property
    def complete(self) -> bool:
        return self.valid_rows is None

    @property
    def precision(self) -> str:
        """``"float64"`` or ``"float32"``: the precision of the block transforms and their lag sums."""
        return "float32" if self.segment_spectra.dtype == np.complex64 else "float64"

    @property
    def round_off_rtol(self) -> float:
        """Relative tolerance of the validity checks of lag sums from these transforms.

        Common practice: about 100 times the largest relative round-off measured on 10-minute
        windows (float64: below 1e-13, so 1e-6 as before; float32: below 1.2e-7 of R(0) in
        ``tests/numerics/test_transform_precision.py``, so 1e-5).
        """
        return 1e-5 if self.precision == "float32" else 1e-6

    @property
    def lag_step_s(self) -> float:
        return 1.0 / self.sample_rate_hz

    @property
    def fft_length(self) -> int:
        """Length ``M = next_fast_len(n + L)`` of the full-resolution transforms."""
        return scipy.fft.next_fast_len(self.n_samples + self.max_lag, real=True)

    def full_spectra(self, channels: Sequence[int], mask: bool = False) -> np.ndarray:
        """``rfft`` at length :attr:`fft_length` of the records (or masks) of some channels.

        Computed on first use and cached; shape (len(channels), M // 2 + 1).
        """
        missing = [c for c in dict.fromkeys(channels) if (c, mask) not in self._full_cache]
        if missing:
            if mask:
                rows = (
                    np.ones((len(missing), self.n_samples))
                    if self.valid_rows is None
                    else self.valid_rows[missing].astype(float)
                )
            else:
                rows = self.records[missing]
            spectra = scipy.fft.rfft(rows, n=self.fft_length, axis=-1)
            for k, c in enumerate(missing):
                self._full_cache[(c, mask)] = spectra[k]
        return np.stack([self._full_cache[(c, mask)] for c in channels])

    def full_frequencies_hz(self) -> np.ndarray:
        """Frequencies of the :meth:`full_spectra` bins, ``k * fs / M``."""
        return scipy.fft.rfftfreq(self.fft_length, d=1.0 / self.sample_rate_hz)

    def frequencies_hz(self) -> np.ndarray:
        """Frequencies of the :meth:`periodogram` bins, ``k * fs / Q``."""
        return scipy.fft.rfftfreq(self.segment_fft_length, d=1.0 / self.sample_rate_hz)

    def periodogram(self) -> np.ndarray:
        """Block-averaged one-sided periodogram of each channel (unit^2/Hz).

        ``G(f) = 2 sum_i |X_i(f)|^2 / (N fs)`` over the blocks ``X_i`` of
        :attr:`segment_spectra` (Bartlett's averaged periodogram, rectangular window, zero
        padded to ``Q``); ``N`` is the channel's count of valid samples.
        """
        power = np.einsum("csf,csf->cf", self.segment_spectra.real, self.segment_spectra.real)
        power += np.einsum("csf,csf->cf", self.segment_spectra.imag, self.segment_spectra.imag)
        counts = np.maximum(self.valid_counts, 1).astype(float)
        return power * (2.0 / (counts[:, None] * self.sample_rate_hz))


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


def even_extension(coefficient) -> np.ndarray:
    """Lags ``0..L`` of an even function (an auto-correlation) -> lags ``-L..L``.

    Parameters
    ----------
    coefficient : array_like, shape (..., L + 1)

    Returns
    -------
    ndarray, shape (..., 2L + 1)
        ``[rho_L, ..., rho_1, rho_0, rho_1, ..., rho_L]``: the layout of a cross pair's lags.
    """
    rho = np.asarray(coefficient)
    return np.concatenate([rho[..., :0:-1], rho], axis=-1)


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


def pairs_by_name(pairs, names: Sequence[str], usable=None, missing: str = "skip") -> Tuple[Tuple[int, int], ...]:
    """Channel index pairs of a configured pair list, by channel name: the one pair resolution.

    Parameters
    ----------
    pairs : None, {"all", "auto"} or sequence of (str, str)
        None means "auto". "all" and "auto" as in :func:`resolve_pairs`, over the usable channels;
        a sequence names the channels of each pair, kept in its order, duplicates dropped.
    names : sequence of str
        The window's channel names (index order).
    usable : array_like of bool, optional
        Channels that may take part; None means all. A listed pair with an unusable channel is
        left out (the reader has emitted a reject for that channel).
    missing : {"skip", "raise"}
        A listed pair naming a channel not in ``names``: left out, or a ValueError.

    Returns
    -------
    tuple of (int, int)
    """
    names = tuple(names)
    used = [i for i in range(len(names)) if usable is None or usable[i]]
    if pairs is None:
        pairs = "auto"
    if isinstance(pairs, str):
        return tuple((used[a], used[b]) for a, b in resolve_pairs(pairs, len(used)))
    _check_choice("missing", missing, ("skip", "raise"))
    index = {name: i for i, name in enumerate(names)}
    out = []
    for pair in pairs:
        a, b = pair
        ia, ib = index.get(a), index.get(b)
        if ia is None or ib is None:
            if missing == "raise":
                absent = a if ia is None else b
                raise ValueError(
                    f"pair {tuple(pair)!r} names channel {absent!r}, which the window does not "
                    f"hold (channels: {', '.join(names)})"
                )
            continue
        if usable is not None and not (usable[ia] and usable[ib]):
            continue
        if (ia, ib) not in out:
            out.append((ia, ib))
    return tuple(out)


def _detrend_rows(rows: np.ndarray, n: int, valid_rows: Optional[np.ndarray], counts: np.ndarray, detrend: str):
    """Detrend each row (channel) of ``rows`` in place; returns channel means and variances.

    ``rows`` has shape (n_channels, >= n) and holds the samples in ``[:, :n]`` with 0 at
    invalid samples (the zero padding beyond ``n`` stays 0). ``valid_rows`` is None for a
    complete record. Trends are fitted on valid samples only.
    """
    complete = valid_rows is None
    body = rows[:, :n]
    counts = counts.astype(float)
    safe = np.maximum(counts, 1.0)
    mean = body.sum(axis=1) / safe
    if detrend == "none":
        centred = body - mean[:, None]
        if not complete:
            centred *= valid_rows
        variance = np.einsum("ij,ij->i", centred, centred) / safe
        return mean, np.where(counts > 0, variance, np.nan)
    body -= mean[:, None]
    if not complete:
        body *= valid_rows
    variance = np.where(counts > 0, np.einsum("ij,ij->i", body, body) / safe, np.nan)
    if detrend == "linear":
        # least squares a + b t over the valid samples of each channel (body is now y - mean)
        t = np.arange(n, dtype=float) - (n - 1) / 2.0
        if complete:
            s1 = np.zeros(len(counts))
            s2 = np.full(len(counts), float(np.dot(t, t)))
        else:
            s1 = np.einsum("ij,j->i", valid_rows, t, dtype=float)  # type: ignore[arg-type]
            s2 = np.einsum("ij,j->i", valid_rows, t * t, dtype=float)  # type: ignore[arg-type]
        sty = np.einsum("ij,j->i", body, t)
        denom = counts * s2 - s1 * s1
        ok = (counts >= 2) & (denom > 0)
        slope = np.where(ok, counts * sty / np.where(ok, denom, 1.0), 0.0)
        offset = -slope * s1 / safe
        body -= offset[:, None] + slope[:, None] * t[None, :]
        if not complete:
            body *= valid_rows
    return mean, variance


def default_segment_length(n_samples: int, max_lag: int) -> int:
    """Block length of the overlap-save transforms: ``min(n, max(6 L, 2048))``.

    Common practice: blocks a few times the lag range. With ``L = 1000`` six times ``L`` was
    the fastest of 4L..14L on the benchmark window (8 channels, 60 000 samples).
    """
    return int(min(n_samples, max(6 * max_lag, 2048)))


def _block_transforms(rows: np.ndarray, max_lag: int, segment_length: int, fft_length: int, dtype=np.float64):
    """rfft of the blocks ``[iS, iS + S)`` and of the extended blocks ``[iS - L, iS + S + L)``,
    computed in ``dtype`` (float64, or float32 for complex64 transforms)."""
    c, n = rows.shape
    L, S = max_lag, segment_length
    n_segments = -(-n // S)
    padded = np.zeros((c, n_segments * S + 2 * L), dtype=dtype)
    padded[:, L : L + n] = rows
    blocks = padded[:, L : L + n_segments * S].reshape(c, n_segments, S)
    extended = as_strided(
        padded,
        shape=(c, n_segments, S + 2 * L),
        strides=(padded.strides[0], S * padded.strides[1], padded.strides[1]),
        writeable=False,
    )
    return (scipy.fft.rfft(blocks, n=fft_length, axis=-1), scipy.fft.rfft(extended, n=fft_length, axis=-1))


def _values_and_mask(values, valid) -> Tuple[np.ndarray, np.ndarray]:
    """Samples as ``(n_samples, n_channels)`` floats and the mask of valid, finite samples."""
    values = np.asarray(values, dtype=float)
    if values.ndim == 1:
        values = values[:, None]
    if values.ndim != 2:
        raise ValueError(f"values must have shape (n_samples, n_channels), got {values.shape}")
    finite = np.isfinite(values)
    if valid is None:
        return values, finite
    valid = np.asarray(valid, dtype=bool)
    if valid.ndim == 1:
        valid = valid[:, None]
    if valid.shape != values.shape:
        raise ValueError(f"valid has shape {valid.shape}, values {values.shape}")
    return values, valid & finite


def _lag_and_segment_samples(n: int, fs: float, max_lag_s: float, segment_length) -> Tuple[int, int]:
    """``max_lag`` and the segment length in samples, checked against the record's ``n``."""
    if not fs > 0:
        raise ValueError(f"fs={fs!r}: must be a positive sample rate in Hz")
    max_lag = int(round(max_lag_s * fs))
    if not 0 <= max_lag < n:
        raise ValueError(f"max_lag_s={max_lag_s!r} is {max_lag} samples: must be in 0..{n - 1}")
    S = default_segment_length(n, max_lag) if segment_length is None else int(segment_length)
    if not 1 <= S:
        raise ValueError(f"segment_length={segment_length!r}: must be a positive number of samples")
    return max_lag, min(S, n)


def channel_spectra(
    values,
    fs: float,
    max_lag_s: float,
    valid=None,
    detrend: str = "mean",
    segment_length: Optional[int] = None,
    precision: str = "float64",
) -> ChannelSpectra:
    """Real FFTs of every channel's detrended, masked record and of its mask.

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
    segment_length : int, optional
        Block length ``S`` of the overlap-save transforms; None means
        :func:`default_segment_length`. Any value gives the same correlations.
    precision : {"float64", "float32"}
        Precision of the block transforms (complex128 or complex64) and so of the lag sums
        :func:`correlate_spectra` takes from them. Detrending, the mean squares, the masks'
        transforms (pair counts must be exact integers) and the full-length transforms of
        :meth:`ChannelSpectra.full_spectra` stay float64 either way. float32 is about 2.5 times
        faster; its lag sums differ from float64's by about 1e-7 of ``R(0)`` (single precision's
        unit round-off 6e-8 times a small factor, measured in
        ``tests/numerics/test_transform_precision.py``).

    Returns
    -------
    ChannelSpectra

    Notes
    -----
    With ``x`` the detrended record (0 where missing), ``u_i`` its block
    ``x[iS : iS + S]`` and ``v_i`` the extended block ``x[iS - L : iS + S + L]``, both
    zero-padded to ``Q >= S + 2L``::

        sum_t x_a(t) x_b(t + k) = sum_i IDFT(conj(U_a,i) V_b,i)[k + L],   |k| <= L

    exactly: index ``j + k + L`` of ``v_i`` stays below ``S + 2L <= Q``, so nothing wraps
    around (overlap-save sectioning [1]_ applied to correlation [2]_). The same holds for the
    masks, which gives the pair counts.

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal Processing*, 3rd ed.,
       Pearson, 2010, Sec. 8.7.3 (block convolution, overlap-save).
    .. [2] J. S. Bendat and A. G. Piersol, *Random Data: Analysis and Measurement Procedures*,
       4th ed., Wiley, 2010, Sec. 11.4.2 (correlation estimates via FFT with zero padding).
    """
    _check_choice("detrend", detrend, DETRENDS)
    _check_choice("precision", precision, PRECISIONS)
    values, valid = _values_and_mask(values, valid)
    n = values.shape[0]
    max_lag, S = _lag_and_segment_samples(n, fs, max_lag_s, segment_length)
    Q = scipy.fft.next_fast_len(S + 2 * max_lag, real=True)
    complete = bool(valid.all())
    # channels as contiguous rows (transforms along the last axis of contiguous rows are
    # several times faster than along axis 0)
    valid_rows: Optional[np.ndarray] = None
    if complete:
        rows = np.array(values.T, order="C", copy=True)  # detrended in place below
        counts = np.full(values.shape[1], n, dtype=np.int64)
    else:
        valid_rows = np.ascontiguousarray(valid.T)
        rows = np.where(valid_rows, values.T, 0.0)
        counts = valid_rows.sum(axis=1).astype(np.int64)
    channel_mean, variance = _detrend_rows(rows, n, valid_rows, counts, detrend)
    if detrend == "mean":
        mean_square = variance
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_square = np.where(counts > 0, np.einsum("ij,ij->i", rows, rows) / np.maximum(counts, 1), np.nan)
    blocks, extended = _block_transforms(rows, max_lag, S, Q, np.dtype(precision))
    mask_blocks = mask_extended = None
    if valid_rows is not None:
        mask_blocks, mask_extended = _block_transforms(valid_rows.astype(float), max_lag, S, Q)
    return ChannelSpectra(
        sample_rate_hz=float(fs),
        n_samples=n,
        max_lag=max_lag,
        segment_length=S,
        segment_fft_length=Q,
        segment_spectra=blocks,
        extended_spectra=extended,
        mask_segment_spectra=mask_blocks,
        mask_extended_spectra=mask_extended,
        valid_counts=counts,
        mean_square=mean_square,
        variance=variance,
        channel_mean=channel_mean,
        records=rows,
        valid_rows=valid_rows,
        detrend=detrend,
    )


def _zero_lag(power: np.ndarray, fft_length: int) -> np.ndarray:
    """``(1/M) sum over all M bins`` of a spectrum given by its rfft half (Parseval)."""
    weights = np.full(power.shape[-1], 2.0)
    weights[0] = 1.0
    if fft_length % 2 == 0:
        weights[-1] = 1.0
    return (power * weights).sum(axis=-1) / fft_length


def _take_lags(circular: np.ndarray, max_lag: int, out: np.ndarray) -> None:
    """Copy lags ``-L..L`` of circular correlations (last axis) into ``out``."""
    out[..., max_lag:] = circular[..., : max_lag + 1]
    if max_lag:
        out[..., :max_lag] = circular[..., -max_lag:]


def _smooth(power: np.ndarray, width: int) -> np.ndarray:
    """Moving average over ``width`` frequency bins (reflecting at the ends)."""
    if width <= 1:
        return power
    from scipy.ndimage import uniform_filter1d

    return uniform_filter1d(power, size=width, axis=-1, mode="reflect")


def correlate_spectra(
    spectra: ChannelSpectra,
    pairs: PairSpec = "all",
    estimator: str = "biased",
    band_hz: Optional[Tuple[float, float]] = None,
    weighting: str = "none",
    min_pairs: int = DEFAULT_MIN_PAIRS,
) -> CorrelationEstimate:
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

        S_ab(k) = sum_t x_a(t) x_b(t + k)        C_ab(k) = sum_t m_a(t) m_b(t + k)

    computed for the full band as ``sum_i IDFT(conj(U_a,i) V_b,i)[k + L]`` over the
    overlap-save blocks of :func:`channel_spectra` (one inverse FFT per pair), and with
    ``band_hz`` or a weighting as ``IDFT(W conj(X_a) X_b)[k]`` from full-length transforms
    (one inverse FFT per pair); then::

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
    L = spectra.max_lag
    a_idx = np.array([p[0] for p in pair_list], dtype=int)
    b_idx = np.array([p[1] for p in pair_list], dtype=int)
    band_hz = _checked_band(band_hz)
    counts_ch = spectra.valid_counts.astype(float)
    bounds = np.ones(len(pair_list))
    if band_hz is None and weighting == "none":
        sums = _block_sums(
            spectra.segment_spectra, spectra.extended_spectra, a_idx, b_idx, spectra.segment_fft_length, L
        )
        R0 = np.where(counts_ch > 0, np.nan_to_num(spectra.mean_square), 0.0)
    else:
        sums, R0, bounds = _full_sums(spectra, a_idx, b_idx, band_hz, weighting)
    counts = _pair_counts(spectra, a_idx, b_idx)
    R, coefficient, scale = _normalised(
        sums, counts, counts_ch, R0, bounds, a_idx, b_idx, estimator, weighting, counts < max(int(min_pairs), 1)
    )
    return CorrelationEstimate(
        pairs=pair_list,
        lags_s=np.arange(-L, L + 1) / spectra.sample_rate_hz,
        R=R,
        pair_count=counts,
        coefficient=coefficient,
        scale=scale,
        sample_rate_hz=spectra.sample_rate_hz,
        estimator=estimator,
        band_hz=band_hz,
        weighting=weighting,
        min_pairs=int(min_pairs),
    )


def _checked_band(band_hz):
    """``band_hz`` as a ``(low, high)`` float pair, or None."""
    if band_hz is None:
        return None
    low, high = float(band_hz[0]), float(band_hz[1])
    if not 0 <= low < high:
        raise ValueError(f"band_hz={band_hz!r}: must be (low, high) with 0 <= low < high")
    return (low, high)


def _pair_counts(spectra: ChannelSpectra, a_idx, b_idx) -> np.ndarray:
    """Valid sample pairs of every pair at lags ``-L..L`` (``n - |k|`` for complete records)."""
    L, n = spectra.max_lag, spectra.n_samples
    if spectra.complete:
        return np.broadcast_to((n - np.abs(np.arange(-L, L + 1))).astype(np.int64), (len(a_idx), 2 * L + 1)).copy()
    counts = np.rint(
        _block_sums(
            spectra.mask_segment_spectra, spectra.mask_extended_spectra, a_idx, b_idx, spectra.segment_fft_length, L
        )
    ).astype(np.int64)
    np.maximum(counts, 0, out=counts)
    return counts


def _normalised(sums, counts, counts_ch, R0, bounds, a_idx, b_idx, estimator: str, weighting: str, few):
    """``(R, coefficient, scale)`` of the lag sums: the estimator's divisor, then the coefficient
    ``R / sqrt(R_aa(0) R_bb(0))`` (a weighted correlation: ``sums`` over its ``bounds``); NaN at
    lags with too few pairs (``few``)."""
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
        # the product of the roots, not the root of the product: for tiny mean squares (below
        # about 1e-154) R_aa(0) R_bb(0) is subnormal and loses digits (|rho(0)| of 1 + 1e-7)
        scale = np.sqrt(R0[a_idx]) * np.sqrt(R0[b_idx])
    with np.errstate(invalid="ignore", divide="ignore"):
        coefficient = np.where(scale[:, None] > 0, R / np.where(scale > 0, scale, 1.0)[:, None], np.nan)
    if weighting != "none":
        coefficient = np.where(few, np.nan, coefficient)
        R = np.where(few, np.nan, R)
    return R, coefficient, scale


def _block_sums(blocks, extended, a_idx, b_idx, fft_length, L):
    """``sum_t x_a(t) x_b(t + k)`` for ``k = -L..L`` from the overlap-save block transforms."""
    n_pairs = len(a_idx)
    sums = np.empty((n_pairs, 2 * L + 1))
    conj_blocks = np.conj(blocks)
    n_freq = blocks.shape[-1]
    batch = max(1, _BATCH_BYTES // (n_freq * blocks.dtype.itemsize))
    accumulated = np.empty((min(batch, n_pairs), n_freq), dtype=blocks.dtype)
    products = np.empty(blocks.shape[1:], dtype=blocks.dtype)
    for start in range(0, n_pairs, batch):
        stop = min(start + batch, n_pairs)
        for k in range(start, stop):
            np.multiply(conj_blocks[a_idx[k]], extended[b_idx[k]], out=products)
            np.add.reduce(products, axis=0, out=accumulated[k - start])
        sums[start:stop] = scipy.fft.irfft(accumulated[: stop - start], n=fft_length, axis=-1)[:, : 2 * L + 1]
    return sums


def _full_sums(spectra: ChannelSpectra, a_idx, b_idx, band_hz, weighting):
    """Lag sums from full-resolution cross-spectra (band-limited and/or weighted)."""
    L, M = spectra.max_lag, spectra.fft_length
    involved = sorted(set(a_idx.tolist()) | set(b_idx.tolist()))
    row = {c: k for k, c in enumerate(involved)}
    X = spectra.full_spectra(involved)
    power = X.real**2 + X.imag**2
    band = None
    counts_ch = spectra.valid_counts.astype(float)
    R0 = np.where(counts_ch > 0, np.nan_to_num(spectra.mean_square), 0.0)
    if band_hz is not None:
        f = spectra.full_frequencies_hz()
        band = (f >= band_hz[0]) & (f <= band_hz[1])
        R0 = np.zeros(spectra.n_channels)
        R0[involved] = np.where(
            counts_ch[involved] > 0, _zero_lag(power * band, M) / np.maximum(counts_ch[involved], 1.0), 0.0
        )
    smoothed = _smooth(power, max(1, M // (2 * L + 1))) if weighting == "scot" else None
    ra = np.array([row[a] for a in a_idx], dtype=int)
    rb = np.array([row[b] for b in b_idx], dtype=int)
    n_pairs = len(a_idx)
    sums = np.empty((n_pairs, 2 * L + 1))
    bounds = np.ones(n_pairs)
    conj_X = np.conj(X)
    batch = max(1, _BATCH_BYTES // (X.shape[1] * 16))
    buffer = np.empty((min(batch, n_pairs), X.shape[1]), dtype=complex)
    for start in range(0, n_pairs, batch):
        stop = min(start + batch, n_pairs)
        cross = buffer[: stop - start]
        for k in range(start, stop):
            np.multiply(conj_X[ra[k]], X[rb[k]], out=cross[k - start])
        if band is not None:
            cross *= band
        if weighting != "none":
            if weighting == "phat":
                denom = np.abs(cross)
            else:
                assert smoothed is not None  # computed above for SCOT
                denom = np.sqrt(smoothed[ra[start:stop]] * smoothed[rb[start:stop]])
            tiny = 1e-12 * denom.max(axis=-1, keepdims=True) + 1e-300
            w = np.where(denom > tiny, 1.0 / np.maximum(denom, tiny), 0.0)
            bounds[start:stop] = _zero_lag(w * np.abs(cross), M)
            cross *= w
        _take_lags(scipy.fft.irfft(cross, n=M, axis=-1), L, sums[start:stop])
    return sums, R0, bounds


def correlate_block(
    values,
    fs: float,
    max_lag_s: float,
    pairs: PairSpec = "all",
    estimator: str = "biased",
    detrend: str = "mean",
    valid=None,
    band_hz: Optional[Tuple[float, float]] = None,
    weighting: str = "none",
    min_pairs: int = DEFAULT_MIN_PAIRS,
) -> CorrelationEstimate:
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
    return correlate_spectra(
        spectra, pairs, estimator=estimator, band_hz=band_hz, weighting=weighting, min_pairs=min_pairs
    )


def block_lag_sums(spectra: ChannelSpectra, pairs: PairSpec = "all") -> Tuple[np.ndarray, np.ndarray]:
    """Lag sums and pair counts of every overlap-save block separately (the window's sub-records).

    Parameters
    ----------
    spectra : ChannelSpectra
        From :func:`channel_spectra`; its ``segment_length`` sets the sub-records (blocks
        ``[iS, iS + S)``).
    pairs : {"all", "auto"} or sequence of (int, int)
        See :func:`resolve_pairs`.

    Returns
    -------
    sums : ndarray, shape (n_pairs, n_segments, 2L + 1)
        ``S_ab,i(k) = sum_{t in block i} x_a(t) x_b(t + k)`` for ``k = -L..L``; ``t + k`` may
        leave the block (the extended block supplies it), so the blocks' sums add up to the
        window's lag sums exactly.
    counts : ndarray of int, same shape
        Valid sample pairs ``(a(t), b(t + k))`` with ``t`` in block i.

    Notes
    -----
    The per-block terms of the overlap-save identity of :func:`channel_spectra`,
    ``IDFT(conj(U_a,i) V_b,i)[k + L]``, before they are summed over ``i``. Sub-record estimates
    of this kind feed resampling variance estimates (the delete-one-block jackknife of a
    window's modal parameters).
    """
    pair_list = resolve_pairs(pairs, spectra.n_channels)
    L, Q, S, n = spectra.max_lag, spectra.segment_fft_length, spectra.segment_length, spectra.n_samples
    K = spectra.n_segments
    sums = np.empty((len(pair_list), K, 2 * L + 1))
    counts = np.empty((len(pair_list), K, 2 * L + 1), dtype=np.int64)
    lags = np.arange(-L, L + 1)
    start = np.arange(K)[:, None] * S
    stop = np.minimum(start + S, n)
    complete_counts = np.maximum(0, np.minimum(stop, n - lags) - np.maximum(start, -lags))
    for p, (a, b) in enumerate(pair_list):
        products = np.conj(spectra.segment_spectra[a]) * spectra.extended_spectra[b]
        sums[p] = scipy.fft.irfft(products, n=Q, axis=-1)[:, : 2 * L + 1]
        if spectra.complete:
            counts[p] = complete_counts
        else:
            assert spectra.mask_segment_spectra is not None and spectra.mask_extended_spectra is not None
            mask_products = np.conj(spectra.mask_segment_spectra[a]) * spectra.mask_extended_spectra[b]
            counts[p] = np.maximum(np.rint(scipy.fft.irfft(mask_products, n=Q, axis=-1)[:, : 2 * L + 1]), 0)
    return sums, counts
