"""In-memory records passed between stages: small, picklable, array-valued.

- :class:`WindowBlock`: one window of samples on the nominal grid, what the read stage yields
  per planned window and the screen and correlate stages take.
- :class:`PairCorrelation`: one channel pair's correlation estimate in one window, with its
  record-length error metadata; one row of the correlations table.
- :class:`ModeCorrelation`: the band-limited auto-correlation of a configured mode's channel,
  the input of the modal fit.
- :class:`WindowCorrelation`: everything the correlate stage learned about one window; the input
  of the indicators stage.
- :class:`IndicatorRow`: one row of the (long) indicators table.

Lag convention everywhere: ``R_ab(tau) = E[a(t) b(t + tau)]``; a peak at positive ``tau`` means
channel b lags channel a. Lag ``i`` of an array is ``first_lag_s + i * lag_step_s``.
"""

from __future__ import annotations

import dataclasses
from typing import Mapping, NamedTuple, Optional, Tuple

import numpy as np

OK = "ok"


#: Quality codes that hold a window out of the shift detectors (the row is written, but neither
#: the baseline nor the detectors take it): the record is not stationary, or the value's standard
#: error cannot be trusted (a lag peak that the weighting made up, too few independent samples for
#: the error formulas, jackknife sub-records short against a mode's decay time). A code matches
#: when it starts with one of these prefixes.
HOLDING_CODES = ("nonstationary", "spurious_lag_peak", "few_effective_samples", "jackknife_records_short")


def holds_window(codes) -> bool:
    """True when any of ``codes`` holds the window out of the shift detectors (:data:`HOLDING_CODES`)."""
    return any(str(c).startswith(HOLDING_CODES) for c in codes)


def quality_text(codes) -> str:
    """Quality codes as stored in tables: "ok" when empty, else sorted unique codes joined by ";"."""
    unique = sorted({c for c in codes if c and c != OK})
    return ";".join(unique) if unique else OK


def quality_codes(text) -> Tuple[str, ...]:
    """The codes of a stored quality text (the inverse of :func:`quality_text`; () for "ok")."""
    if not text or text == OK:
        return ()
    return tuple(c for c in str(text).split(";") if c)


@dataclasses.dataclass(frozen=True)
class WindowBlock:
    """One window of samples on the nominal sample grid.

    Attributes
    ----------
    asset : str
        Name of the monitored asset (``[asset] name``).
    window_start_us : int
        Window start, microseconds since the epoch (UTC); windows align to the epoch.
    window_length_s : float
        Nominal window length in seconds (``[windows] length_s``).
    sample_rate_hz : float
        Nominal sample rate; sample ``i`` is at ``window_start + i / sample_rate_hz``.
    channels : tuple of str
        Channel names, in column order of ``values``.
    values : ndarray, shape (n_samples, n_channels), float64
        Samples. Entries where ``valid`` is False hold 0.0 and carry no information.
    valid : ndarray, shape (n_samples, n_channels), bool
        True where a finite sample was read at that grid point.
    covariates : mapping of str to float
        Window mean of each covariate channel (NaN when the window holds none of it).
    channel_quality : mapping of str to tuple of str
        Quality codes per channel found while reading (for example ``"clipped"``).
    sources : tuple of str
        The archive files the window was read from (for provenance and rejects).
    """

    asset: str
    window_start_us: int
    window_length_s: float
    sample_rate_hz: float
    channels: Tuple[str, ...]
    values: np.ndarray
    valid: np.ndarray
    covariates: Mapping[str, float] = dataclasses.field(default_factory=dict)
    channel_quality: Mapping[str, Tuple[str, ...]] = dataclasses.field(default_factory=dict)
    sources: Tuple[str, ...] = ()

    @property
    def n_samples(self) -> int:
        return int(self.values.shape[0])

    def coverage(self) -> np.ndarray:
        """Fraction of valid samples per channel, shape (n_channels,)."""
        if self.n_samples == 0:
            return np.zeros(len(self.channels))
        return self.valid.mean(axis=0)


@dataclasses.dataclass
class PairCorrelation:
    """Correlation estimate of one pair (a == b for an auto-correlation) in one window.

    ``coefficient`` spans lags 0..L for an auto pair and -L..L for a cross pair.
    """

    channel_a: str
    channel_b: str
    first_lag_s: float
    lag_step_s: float
    coefficient: np.ndarray
    stderr: np.ndarray
    pair_count: np.ndarray
    scale: float
    coverage: float
    bandwidth_hz: float
    record_s: float
    rel_error: float
    required_record_s: float
    meets_target: bool
    bandwidth_time: float = float("nan")
    n_effective: float = float("nan")
    tone_freq_hz: float = float("nan")
    tone_required_record_s: float = float("nan")
    quality: Tuple[str, ...] = ()
    #: generalised cross-correlation with the configured weighting ("phat"/"scot"), same lags
    #: as ``coefficient``; None when the weighting is "none" or the pair is an auto pair
    weighted_coefficient: Optional[np.ndarray] = None

    @property
    def is_auto(self) -> bool:
        return self.channel_a == self.channel_b

    @property
    def subject(self) -> str:
        return self.channel_a if self.is_auto else f"{self.channel_a}:{self.channel_b}"

    def lags_s(self) -> np.ndarray:
        return self.first_lag_s + self.lag_step_s * np.arange(len(self.coefficient))


@dataclasses.dataclass
class ModeCorrelation:
    """Band-limited auto-correlation coefficient (lags 0..L) of a mode's channel in one window."""

    mode: str
    channel: str
    band_hz: Tuple[float, float]
    lag_step_s: float
    coefficient: np.ndarray
    stderr: np.ndarray
    record_s: float
    quality: Tuple[str, ...] = ()

    def lags_s(self) -> np.ndarray:
        return self.lag_step_s * np.arange(len(self.coefficient))


@dataclasses.dataclass
class MultichannelMode:
    """A multi-channel mode identified in one window (:mod:`corrtransforms.stages.modes`).

    ``shape`` is normalised so component ``reference_index`` is ``1 + 0j`` (the largest component
    of the configured reference shape, else the baseline reference's channel, else the window
    shape's largest); ``mac`` compares it with the configured reference shape, else the baseline
    reference shape (NaN while neither exists). Values are NaN when no pole was found.
    """

    mode: str
    channels: Tuple[str, ...]
    freq_hz: float
    freq_stderr_hz: float
    damping: float
    damping_stderr: float
    mac: float
    mac_stderr: float
    shape: np.ndarray
    shape_stderr_real: np.ndarray
    shape_stderr_imag: np.ndarray
    reference_index: int
    quality: Tuple[str, ...] = ()
    #: codes of the damping value only (its mode_damping row adds them to ``quality``):
    #: ``jackknife_records_short`` (:mod:`corrtransforms.stages.modes`)
    damping_quality: Tuple[str, ...] = ()


@dataclasses.dataclass
class WindowCorrelation:
    """All correlation results of one window, plus what indicators and screening need."""

    asset: str
    window_start_us: int
    sample_rate_hz: float
    n_samples: int
    channels: Tuple[str, ...]
    #: root mean square of each channel's detrended record, in the channel's unit
    rms: Mapping[str, float]
    #: standard error of each rms value (record-length error)
    rms_stderr: Mapping[str, float]
    pairs: Tuple[PairCorrelation, ...]
    modes: Tuple[ModeCorrelation, ...] = ()
    #: multi-channel modes identified in the window (one per such [[modes]] entry)
    multichannel_modes: Tuple[MultichannelMode, ...] = ()
    covariates: Mapping[str, float] = dataclasses.field(default_factory=dict)
    #: quality codes per subject (channel, "a:b" pair or mode name) added by later stages,
    #: e.g. screening's "nonstationary"
    subject_quality: Mapping[str, Tuple[str, ...]] = dataclasses.field(default_factory=dict)
    #: extra indicator rows produced by earlier stages (e.g. stationarity_p from screening)
    extra_indicators: Tuple[IndicatorRow, ...] = ()

    def auto(self, channel: str) -> Optional[PairCorrelation]:
        for p in self.pairs:
            if p.is_auto and p.channel_a == channel:
                return p
        return None


class IndicatorRow(NamedTuple):
    """One row of the indicators table (window_start in us since the epoch, UTC)."""

    window_start_us: int
    subject: str
    indicator: str
    value: float
    stderr: float
    unit: str
    quality: str
