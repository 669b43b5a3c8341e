"""Segment statistics of records: the sequences the stationarity tests run on.

A record of ``n`` samples is cut into ``M`` equal segments of ``L = n // M`` samples (the last
``n - M L`` samples are not used); per segment come the mean, the mean square about the record's
overall mean and the kurtosis (:func:`segment_statistics_of_rows`, many records at once), or for
a pair of records the mean product about their means (:class:`SegmentCrossProducts`, every pair
of a window). The single-record functions are batches of one.

References
----------
J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Wiley 2010, Sect. 10.3.
"""

from __future__ import annotations

import dataclasses
from typing import Dict, Optional, Tuple

import numpy as np


@dataclasses.dataclass(frozen=True)
class SegmentStatistics:
    """Per-segment statistics of one record (or the cross-products of a pair).

    Attributes
    ----------
    segment_length : int
        Samples per segment; segment ``i`` spans samples ``i L .. (i + 1) L - 1`` and the last
        ``n - M L`` samples (fewer than M) are not used.
    valid_count : ndarray of int, shape (M,)
        Valid samples (both channels valid, for a pair) in each segment.
    mean : ndarray, shape (M,)
        Segment mean of the record (for a pair: of channel a).
    mean_product : ndarray, shape (M,)
        Segment mean square about the record's overall valid mean (for a pair: the segment mean
        cross-product of the two records about their means), NaN for a segment without samples.
    kurtosis : ndarray, shape (M,)
        Segment mean fourth power about the overall mean over the squared mean square (NaN for
        a pair).
    center : tuple of float
        The overall mean(s) removed.
    """

    segment_length: int
    valid_count: np.ndarray
    mean: np.ndarray
    mean_product: np.ndarray
    center: Tuple[float, ...]
    kurtosis: Optional[np.ndarray] = None

    @property
    def segments(self) -> int:
        return len(self.valid_count)


def _segment_layout(n_samples: int, segments: int) -> int:
    if segments < 1:
        raise ValueError(f"segments must be at least 1, got {segments}")
    length = n_samples // segments
    if length < 1:
        raise ValueError(f"{n_samples} samples cannot be split into {segments} segments")
    return length


def clean_record(values, valid):
    """A record and its mask as ``(x, m)``: ``x`` float with 0 where ``m`` (valid and finite) is False.

    Parameters
    ----------
    values : array_like, shape (n,)
    valid : array_like of bool, shape (n,), optional
        None means every finite sample.
    """
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise ValueError(f"values must be one-dimensional, got shape {x.shape}")
    m = np.isfinite(x) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(x))
    if m.shape != x.shape:
        raise ValueError(f"valid has shape {m.shape}, values {x.shape}")
    return np.where(m, x, 0.0), m


def segment_statistics(values, valid=None, segments: int = 20) -> SegmentStatistics:
    """Split a record into M equal segments; mean and mean square of each.

    Parameters
    ----------
    values : array_like, shape (n,)
        The record (samples where ``valid`` is False are ignored).
    valid : array_like of bool, shape (n,), optional
        Mask of valid samples; None means every finite sample.
    segments : int
        Number of segments ``M``.

    Returns
    -------
    SegmentStatistics
        :func:`segment_statistics_of_rows` of a batch of one.

    Notes
    -----
    With ``x_bar`` the valid mean of the record and ``S_i`` the valid samples of segment ``i``:
    ``mean_i = (1/|S_i|) sum_{S_i} x``, ``mean_product_i = (1/|S_i|) sum_{S_i} (x - x_bar)^2`` (the mean square),
    the segment estimate of ``R_xx(0)`` of the mean-removed record.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 10.3 (test for stationarity:
    divide the record into equal intervals, compute a mean square value for each).
    """
    x, m = clean_record(values, valid)
    return segment_statistics_of_rows(x[None, :], m[None, :], segments)[0]


def segment_statistics_of_rows(x: np.ndarray, m: np.ndarray, segments: int) -> list:
    """:func:`segment_statistics` of several records at once (rows of ``x``, masks ``m``).

    Parameters
    ----------
    x : ndarray, shape (rows, n)
        Records with 0 at invalid samples (as :func:`clean_record` returns them).
    m : ndarray of bool, shape (rows, n)
        Valid samples.
    segments : int
        Number of segments ``M``.

    Returns
    -------
    list of SegmentStatistics
        One per row. Every sum runs along the contiguous sample axis of its segment, so a row's
        figures do not depend on the other rows; the overall mean of a gappy row is the mean of
        its valid samples alone.
    """
    rows, n = x.shape
    length = _segment_layout(n, segments)
    used = length * segments
    complete = m.all(axis=1)
    if complete.all():
        centers = x.mean(axis=1)
        count = np.broadcast_to(np.full(segments, length), (rows, segments))
        deviation = x[:, :used].reshape(rows, segments, length) - centers[:, None, None]
    else:
        count = m[:, :used].reshape(rows, segments, length).sum(axis=2)
        centers = np.array([float(x[r][m[r]].mean()) if m[r].any() else 0.0 for r in range(rows)])
        deviation = np.where(m, x - centers[:, None], 0.0)[:, :used].reshape(rows, segments, length)
    squared = deviation * deviation
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x[:, :used].reshape(rows, segments, length).sum(axis=2) / count
        mean_square = squared.sum(axis=2) / count
        squared *= squared
        kurtosis = squared.sum(axis=2) / count / mean_square**2
    return [
        SegmentStatistics(length, count[r].copy(), mean[r], mean_square[r], (float(centers[r]),), kurtosis[r])
        for r in range(rows)
    ]


def segment_cross_products(values_a, values_b, valid_a=None, valid_b=None, segments: int = 20) -> SegmentStatistics:
    """Segment mean cross-products of two records (joint stationarity).

    Parameters
    ----------
    values_a, values_b : array_like, shape (n,)
        The two records on the same sample grid.
    valid_a, valid_b : array_like of bool, shape (n,), optional
        Masks; a sample counts when it is valid in both records.
    segments : int
        Number of segments ``M``.

    Returns
    -------
    SegmentStatistics
        ``mean_product`` holds ``(1/|S_i|) sum_{S_i} (a - a_bar)(b - b_bar)``, the segment
        estimate of ``R_ab(0)``; ``mean`` holds the segment means of ``a``.
        :class:`SegmentCrossProducts` of a window of these two records.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 10.3 (joint stationarity is
    tested on the segments' cross-products as on the mean squares).
    """
    a, ma = clean_record(values_a, valid_a)
    b, mb = clean_record(values_b, valid_b)
    if a.shape != b.shape:
        raise ValueError(f"records differ in length: {a.shape} and {b.shape}")
    return SegmentCrossProducts(np.stack([a, b]), np.stack([ma, mb])).statistics(0, 1, segments)


class SegmentCrossProducts:
    """Segment mean cross-products of every pair of a window's records.

    Parameters
    ----------
    records : ndarray, shape (channels, n)
        Records with 0 at invalid samples (:func:`clean_record`).
    valid : ndarray of bool, shape (channels, n)
        Valid samples.

    Notes
    -----
    Pairs of two complete records: for every segment count asked for, the mean-removed records
    are cut into segments once and the segment sums of every product ``(a - a_bar)(b - b_bar)``
    come from one batched matrix product. A pair with a gap counts only the samples valid in
    both records, with the means of those samples removed, summed per pair.
    """

    def __init__(self, records: np.ndarray, valid: np.ndarray):
        self._records = records
        self._valid = valid
        self._complete: np.ndarray = np.asarray(valid.all(axis=1))
        self._deviation: Optional[np.ndarray] = None
        self._by_count: Dict[int, Tuple[int, np.ndarray, np.ndarray, np.ndarray]] = {}

    def statistics(self, a: int, b: int, segments: int) -> SegmentStatistics:
        """The :class:`SegmentStatistics` of pair ``(a, b)`` (rows) for ``segments`` segments."""
        if not (self._complete[a] and self._complete[b]):
            return self._gappy_pair(a, b, segments)
        if self._deviation is None:
            self._centers = self._records.mean(axis=1)
            self._deviation = self._records - self._centers[:, None]
        deviation = self._deviation
        assert deviation is not None
        if segments not in self._by_count:
            n = self._records.shape[1]
            length = _segment_layout(n, segments)
            used = length * segments
            pieces = deviation[:, :used].reshape(-1, segments, length).transpose(1, 0, 2)
            products = np.matmul(pieces, pieces.transpose(0, 2, 1)) / length  # (segments, c, c)
            means = self._records[:, :used].reshape(-1, segments, length).sum(axis=2) / length
            self._by_count[segments] = (length, np.full(segments, length), products, means)
        length, count, products, means = self._by_count[segments]
        return SegmentStatistics(
            length,
            count,
            means[a],
            products[:, a, b].copy(),
            (float(self._centers[a]), float(self._centers[b])),
            np.full(segments, np.nan),
        )

    def _gappy_pair(self, ia: int, ib: int, segments: int) -> SegmentStatistics:
        a, b = self._records[ia], self._records[ib]
        both = self._valid[ia] & self._valid[ib]
        length = _segment_layout(len(a), segments)
        used = length * segments
        count = both[:used].reshape(segments, length).sum(axis=1)
        center_a = float(a[both].mean()) if both.any() else 0.0
        center_b = float(b[both].mean()) if both.any() else 0.0
        product = np.where(both, (a - center_a) * (b - center_b), 0.0)[:used].reshape(segments, length)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(both, a, 0.0)[:used].reshape(segments, length).sum(axis=1) / count
            cross = product.sum(axis=1) / count
        return SegmentStatistics(length, count, mean, cross, (center_a, center_b), np.full(segments, np.nan))
