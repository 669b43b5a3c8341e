"""The unit of work between reading and correlating: one window of one asset's samples.

A :class:`WindowBlock` is what the read stage yields per planned window: the samples snapped onto
the nominal grid, a mask of the valid ones, the covariates averaged over the window and the quality
codes found while reading. Everything downstream (correlation, indicators, screening) takes one.
"""
from __future__ import annotations

import dataclasses
from typing import Mapping, NamedTuple, Tuple

import numpy as np


class WindowKey(NamedTuple):
    """Small, deterministic key of a window: the asset's name and the window start.

    ``window_start_us`` is microseconds since the Unix epoch, UTC. Tuples of str and int encode
    deterministically, so grouping by this key is stable across workers.
    """

    asset: str
    window_start_us: int


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
    def key(self) -> WindowKey:
        return WindowKey(self.asset, self.window_start_us)

    @property
    def n_samples(self) -> int:
        return int(self.values.shape[0])

    def coverage(self) -> np.ndarray:
        """Fraction of valid samples per channel, shape (n_channels,)."""
        if self.n_samples == 0:
            return np.zeros(len(self.channels))
        return self.valid.mean(axis=0)
