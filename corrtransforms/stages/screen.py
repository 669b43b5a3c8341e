"""Stationarity screening of one window: is the record (and each pair jointly) stationary?

Every time-average estimate of this project assumes that within a window the process is
stationary and ergodic. This module tests that assumption per window, the way Bendat & Piersol
describe it: split the record into ``M`` equal segments, compute a statistic per segment (mean
square, mean, or for a pair the mean cross-product) and test the sequence of segment statistics
for a trend or a change with distribution-free tests.

Tests per channel (each on the sequence of segment statistics, two-sided):

- reverse arrangements test on the segment mean squares (monotonic trend),
- runs test about the median on the segment mean squares (clustering, slow swings),
- variance outlier test on the segment mean squares: the largest (or smallest) segment mean
  square against the pooled others, with the segments' chi-square sampling distribution of
  ``nu`` effective degrees of freedom taken from the record's own auto-correlation
  (transient bursts or drop-outs, which rank tests for trend cannot see),
- reverse arrangements test on the segment means (drift or step of the mean).

Per cross pair: reverse arrangements and runs tests on the segment mean cross-products
(joint stationarity).

The p-values of a subject are combined with Bonferroni's inequality: ``p = min(1, k * min p_i)``
with ``k`` tests, so the probability that a stationary subject is flagged stays at or below
``alpha``. A pair row combines three such p-values, its joint test's and its two channels', with
Sidak's correction, ``p_row = 1 - (1 - min p)^3``, and is flagged when ``p_row <= alpha``: its
false-flag rate under stationarity stays at or below ``alpha`` too (it was the union of three
tests at ``alpha`` each, 6-14 % of stationary pair rows).

Segments must be roughly independent: each segment is made at least
:data:`~corrtransforms.numerics.record_memory.INDEPENDENCE_FACTOR` times longer than the
record's memory time (the larger of the integral time scale and the last lag at which ``|rho|``
of its auto-correlation reaches ``1/e``, with sharp spectral lines removed). When the window
is too short for the configured number of segments, fewer are used, down to
:data:`MINIMUM_SEGMENTS`; below that the subject gets the quality code
``"window_too_short_for_screening"`` and no flag.

This module is the window orchestration only: which subjects and pairs, their segment counts,
the Bonferroni combination, the indicator rows and the Rejects. The numerics live below it:
the tests in :mod:`corrtransforms.numerics.rank_tests`, the segment statistics in
:mod:`corrtransforms.numerics.segments`, the memory time and the independence rule in
:mod:`corrtransforms.numerics.record_memory`. The Beam layer wires :func:`screen_window` into
the correlate stage.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Dict, Mapping, Optional, Tuple

import numpy as np

from corrtransforms.numerics.correlation import pairs_by_name
from corrtransforms.numerics.rank_tests import (
    OutlierTestResult,
    reverse_arrangements_test,
    runs_test,
    variance_outlier_test,
)
from corrtransforms.numerics.record_memory import (
    MINIMUM_SEGMENTS,
    CorrelationTimeScales,
    correlation_time_scales,
    record_time_scales,
    screening_memory_limit_s,
    segments_for_record,
)
from corrtransforms.numerics.segments import (
    SegmentCrossProducts,
    SegmentStatistics,
    clean_record,
    segment_cross_products,
    segment_statistics_of_rows,
)
from corrtransforms.records import IndicatorRow, quality_text
from corrtransforms.rejects import WHOLE_WINDOW, Reject, iso_utc

#: quality code of a subject whose screening test is significant at ``alpha``
QUALITY_NONSTATIONARY = "nonstationary"
#: quality code of a subject whose window cannot hold MINIMUM_SEGMENTS independent segments
QUALITY_TOO_SHORT = "window_too_short_for_screening"
#: quality code of a subject that could not be screened at all (no variation, no valid samples)
QUALITY_NOT_SCREENED = "not_screened_no_variation"

#: a segment with a smaller fraction of valid samples is left out of the sequence
MIN_SEGMENT_COVERAGE = 0.5
#: number of tests combined (Bonferroni) for a channel and for a cross pair
CHANNEL_TESTS = 4
PAIR_TESTS = 2
INDICATOR = "stationarity_p"


# --------------------------------------------------------------------------------------------
# Screening one window


@dataclasses.dataclass(frozen=True)
class SubjectScreening:
    """Screening result of one channel or one cross pair ``"a:b"``.

    ``p_value`` is the Bonferroni-combined p of the subject's own tests (NaN when not screened);
    For a pair, ``p_value`` and ``flagged`` are the Sidak family test over the joint test and
    its two channels (:func:`sidak_family_p`).
    """

    subject: str
    segments: int
    segment_s: float
    memory_s: float
    p_value: float
    flagged: bool
    quality: Tuple[str, ...]
    #: p-value of each test by name, e.g. {"reverse_arrangements_mean_square": 0.4, ...}
    test_p_values: Mapping[str, float] = dataclasses.field(default_factory=dict)
    #: statistic of each test by name (reverse arrangements A, runs R, variance ratio F)
    test_statistics: Mapping[str, float] = dataclasses.field(default_factory=dict)


@dataclasses.dataclass(frozen=True)
class WindowScreening:
    """Screening of one window: indicator rows, quality codes, and whether to exclude it.

    Attributes
    ----------
    window_start_us : int
        Window start, microseconds since the epoch (UTC).
    subjects : mapping of str to SubjectScreening
        Per channel and per cross pair ``"a:b"``.
    indicators : tuple of IndicatorRow
        ``stationarity_p`` per subject (value NaN and a quality code when not screened).
    subject_quality : mapping of str to tuple of str
        Quality codes per subject, to merge into the correlation and indicator rows
        (``"nonstationary"``, ``"window_too_short_for_screening"``, ``"not_screened_no_variation"``).
    excluded : bool
        True when ``[screening] action = "exclude"`` and any subject is flagged: the window's
        rows must not be written nor feed baselines or detectors.
    rejects : tuple of Reject
        One ``nonstationary_window`` reject for the whole window when excluded.
    """

    window_start_us: int
    subjects: Mapping[str, SubjectScreening]
    indicators: Tuple[IndicatorRow, ...]
    subject_quality: Mapping[str, Tuple[str, ...]]
    excluded: bool
    rejects: Tuple[Reject, ...]

    @property
    def flagged_subjects(self) -> Tuple[str, ...]:
        return tuple(s for s, r in self.subjects.items() if r.flagged)


def _usable(statistics: SegmentStatistics) -> np.ndarray:
    return (statistics.valid_count >= MIN_SEGMENT_COVERAGE * statistics.segment_length) & np.isfinite(
        statistics.mean_product
    )


def _not_screened(subject, code, memory_s=float("nan")) -> SubjectScreening:
    return SubjectScreening(subject, 0, float("nan"), memory_s, float("nan"), False, (code,))


def screen_channel(
    values, valid, sample_rate_hz: float, segments: int = 20, alpha: float = 0.05, subject: str = ""
) -> SubjectScreening:
    """Screen one record for stationarity (four tests, Bonferroni-combined).

    Parameters
    ----------
    values, valid : array_like, shape (n,)
        The record and its mask of valid samples.
    sample_rate_hz : float
        Sample rate in Hz.
    segments : int
        Requested number of segments ``M`` (reduced by the independence rule).
    alpha : float
        Significance level of the combined two-sided test.
    subject : str
        Name carried into the result.

    Returns
    -------
    SubjectScreening
        Tests (keys of ``test_p_values``): ``reverse_arrangements_mean_square``,
        ``runs_mean_square``, ``variance_outlier_mean_square``, ``reverse_arrangements_mean``;
        ``p_value = min(1, 4 min p)``; flagged when ``p_value <= alpha``.

    Notes
    -----
    See the module docstring and docs/stationarity.md for the choice of tests. The segment means
    get no runs test: for a record without power at zero frequency (an accelerometer) adjacent
    segment means are negatively correlated (about -1/2), which makes a runs test on them reject
    far too often, while the reverse arrangements test only becomes conservative.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 and 10.3.
    """
    x, m = clean_record(values, valid)
    if not _enough_to_screen(m):
        return _not_screened(subject, QUALITY_NOT_SCREENED)
    try:
        scales = correlation_time_scales(x, m, sample_rate_hz, screening_memory_limit_s(len(x) / float(sample_rate_hz)))
    except ValueError:
        return _not_screened(subject, QUALITY_NOT_SCREENED)
    return _screen_record(x, m, sample_rate_hz, segments, alpha, subject, scales)


def _enough_to_screen(m: np.ndarray) -> bool:
    return int(m.sum()) >= max(8, 2 * MINIMUM_SEGMENTS)


def _screen_record(
    x,
    m,
    sample_rate_hz: float,
    segments: int,
    alpha: float,
    subject: str,
    scales: CorrelationTimeScales,
    stats: Optional[SegmentStatistics] = None,
) -> SubjectScreening:
    """The tests of :func:`screen_channel` on a cleaned record whose time scales are known
    (``stats``: its segment statistics for the segment count the independence rule gives, when
    already computed)."""
    record_s = len(x) / float(sample_rate_hz)
    count = segments_for_record(record_s, scales.memory_s, segments)
    if count == 0:
        return _not_screened(subject, QUALITY_TOO_SHORT, scales.memory_s)
    if stats is None:
        stats = segment_statistics_of_rows(x[None, :], m[None, :], count)[0]
    usable = _usable(stats)
    if usable.sum() < MINIMUM_SEGMENTS:
        return _not_screened(subject, QUALITY_TOO_SHORT, scales.memory_s)
    mean_square = stats.mean_product[usable]
    means = stats.mean[usable]
    # chi-square degrees of freedom of each segment mean square: Gaussian value, lowered by
    # 2 / (kurtosis - 1) for a heavy-tailed record (exact for independent samples); the median
    # of the segment kurtoses is not moved by a burst in one or two segments
    kurtosis = float(np.median(np.asarray(stats.kurtosis)[usable]))
    dof = stats.valid_count[usable] * scales.degrees_of_freedom_per_sample * 2.0 / (max(kurtosis, 3.0) - 1.0)
    ra_ms = reverse_arrangements_test(mean_square)
    runs_ms = runs_test(mean_square)
    ra_mean = reverse_arrangements_test(means)
    if np.all(mean_square > 0):
        outlier = variance_outlier_test(mean_square, dof)
    else:
        outlier = OutlierTestResult(int(np.argmin(mean_square)), 0.0, 0.0, len(mean_square))
    p_values = {
        "reverse_arrangements_mean_square": ra_ms.p_value,
        "runs_mean_square": runs_ms.p_value,
        "variance_outlier_mean_square": outlier.p_value,
        "reverse_arrangements_mean": ra_mean.p_value,
    }
    statistics = {
        "reverse_arrangements_mean_square": ra_ms.statistic,
        "runs_mean_square": runs_ms.statistic,
        "variance_outlier_mean_square": outlier.variance_ratio,
        "reverse_arrangements_mean": ra_mean.statistic,
    }
    p_value = min(1.0, CHANNEL_TESTS * min(p_values.values()))
    flagged = p_value <= alpha
    return SubjectScreening(
        subject,
        int(usable.sum()),
        stats.segment_length / float(sample_rate_hz),
        scales.memory_s,
        p_value,
        flagged,
        (QUALITY_NONSTATIONARY,) if flagged else (),
        p_values,
        statistics,
    )


def screen_pair(
    values_a,
    valid_a,
    values_b,
    valid_b,
    sample_rate_hz: float,
    segments: int,
    alpha: float = 0.05,
    subject: str = "",
    memory_s: float = 0.0,
) -> SubjectScreening:
    """Joint stationarity test of a pair on its segment mean cross-products.

    Parameters
    ----------
    values_a, valid_a, values_b, valid_b : array_like, shape (n,)
        The two records and their masks.
    sample_rate_hz : float
        Sample rate in Hz.
    segments : int
        Number of segments, already reduced by the independence rule of both channels.
    alpha : float
        Significance level of the combined test.
    subject : str
        ``"a:b"``.
    memory_s : float
        Memory time carried into the result (the larger of the two channels').

    Returns
    -------
    SubjectScreening
        Tests ``reverse_arrangements_cross_product`` and ``runs_cross_product``;
        ``p_value = min(1, 2 min p)``. ``flagged`` here is the joint test only; the caller adds
        the channels' flags.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 10.3 (joint stationarity).
    """
    stats = segment_cross_products(values_a, values_b, valid_a, valid_b, segments)
    return _screen_cross_products(stats, sample_rate_hz, alpha, subject, memory_s)


def _screen_cross_products(
    stats: SegmentStatistics, sample_rate_hz: float, alpha: float, subject: str, memory_s: float
) -> SubjectScreening:
    """The tests of :func:`screen_pair` on the pair's segment cross-products."""
    usable = _usable(stats)
    if usable.sum() < MINIMUM_SEGMENTS:
        return _not_screened(subject, QUALITY_TOO_SHORT, memory_s)
    cross = stats.mean_product[usable]
    ra = reverse_arrangements_test(cross)
    runs = runs_test(cross)
    p_values = {"reverse_arrangements_cross_product": ra.p_value, "runs_cross_product": runs.p_value}
    p_value = min(1.0, PAIR_TESTS * min(p_values.values()))
    flagged = p_value <= alpha
    return SubjectScreening(
        subject,
        int(usable.sum()),
        stats.segment_length / float(sample_rate_hz),
        memory_s,
        p_value,
        flagged,
        (QUALITY_NONSTATIONARY,) if flagged else (),
        p_values,
        {"reverse_arrangements_cross_product": ra.statistic, "runs_cross_product": runs.statistic},
    )


def _pairs_of(block, pairs) -> Tuple[Tuple[str, ...], Tuple[Tuple[str, str], ...]]:
    """The channels to screen (in order of first appearance) and the cross pairs of ``pairs``."""
    names = tuple(block.channels)
    resolved = pairs_by_name(pairs, names, missing="raise")
    channels = tuple(names[i] for i in dict.fromkeys(c for pair in resolved for c in pair))
    return channels, tuple((names[a], names[b]) for a, b in resolved if a != b)


def screen_window(block, screening_config, pairs=None) -> WindowScreening:
    """Stationarity screening of one window: each channel, and each cross pair jointly.

    Parameters
    ----------
    block : corrtransforms.records.WindowBlock
        The window's samples and mask.
    screening_config : corrtransforms.config.ScreeningConfig
        ``enabled``, ``segments`` (M, default 20), ``alpha`` (default 0.05) and ``action``
        (``"flag"`` or ``"exclude"``).
    pairs : None, "auto", "all" or sequence of (a, b)
        The pairs being correlated; an auto pair ``(a, a)`` screens channel ``a``, a cross pair
        ``(a, b)`` screens both channels and the pair jointly. None or "auto": every channel of
        the block, no cross pairs.

    Returns
    -------
    WindowScreening
        With ``enabled = false``: no subjects, no rows, not excluded.

    Notes
    -----
    A channel is flagged when ``min(1, 4 min p_i) <= alpha`` over its four tests; a cross pair
    row is flagged when the Sidak family p of its joint test ``min(1, 2 min p_i)`` and its two
    channels' p-values, ``1 - (1 - min p)^k`` (``k`` the screened members), is at most
    ``alpha`` (:func:`sidak_family_p`). The pair's ``stationarity_p`` row carries that family
    p-value (the joint test's own p is ``test_p_values["joint_cross_product"]``). A subject
    whose window is too short for ``MINIMUM_SEGMENTS`` independent segments gets a NaN value and the quality code
    ``"window_too_short_for_screening"``, never a flag. A cross pair uses the smaller of its
    channels' segment counts.

    References
    ----------
    J. S. Bendat and A. G. Piersol, Random Data, 4th ed., Sect. 4.5.2 and 10.3.
    """
    start = int(block.window_start_us)
    if not screening_config.enabled:
        return WindowScreening(start, {}, (), {}, False, ())
    alpha = float(screening_config.alpha)
    channels, cross = _pairs_of(block, pairs)
    index = {name: i for i, name in enumerate(block.channels)}
    records, valid_rows = _clean_rows(block)
    results = _screen_channels(block, records, valid_rows, channels, index, screening_config.segments, alpha)
    cross_products = SegmentCrossProducts(records, valid_rows)
    for a, b in cross:
        results[f"{a}:{b}"] = _screen_cross_pair(
            block, cross_products, index, a, b, results[a], results[b], screening_config.segments, alpha
        )
    return _window_result(block, results, screening_config.action, alpha)


def _clean_rows(block):
    """Every channel of the window cleaned once, as contiguous rows: ``(records, valid)`` with
    ``records`` 0 where a sample is invalid or not finite."""
    values_rows = np.ascontiguousarray(np.asarray(block.values, dtype=float).T)
    valid_rows = np.ascontiguousarray(np.asarray(block.valid, dtype=bool).T)
    finite = np.isfinite(values_rows)
    if valid_rows.all() and finite.all():
        return values_rows, valid_rows
    valid_rows = valid_rows & finite  # a new array: one channel's transpose is a view of the block
    return np.where(valid_rows, values_rows, 0.0), valid_rows


def _screen_channels(
    block, records, valid_rows, channels, index, segments: int, alpha: float
) -> Dict[str, SubjectScreening]:
    """:func:`screen_channel` of every channel: the time scales of all channels in one batch, the
    segment statistics of the complete channels batched by segment count."""
    fs = float(block.sample_rate_hz)
    eligible = [name for name in channels if _enough_to_screen(valid_rows[index[name]])]
    rows = [index[name] for name in eligible]
    limit = screening_memory_limit_s(block.n_samples / fs)
    scales = dict(zip(eligible, record_time_scales(records[rows], valid_rows[rows], fs, limit))) if rows else {}
    complete = valid_rows.all(axis=1)
    by_count: Dict[int, list] = {}
    for name, found in scales.items():
        if not isinstance(found, ValueError) and complete[index[name]]:
            count = segments_for_record(block.n_samples / fs, found.memory_s, segments)
            if count:
                by_count.setdefault(count, []).append(name)
    segment_stats: Dict[str, SegmentStatistics] = {}
    for count, names in by_count.items():
        members = [index[nm] for nm in names]
        segment_stats.update(zip(names, segment_statistics_of_rows(records[members], valid_rows[members], count)))
    results: Dict[str, SubjectScreening] = {}
    for name in channels:
        i = index[name]
        found = scales.get(name)
        if found is None or isinstance(found, ValueError):
            results[name] = _not_screened(name, QUALITY_NOT_SCREENED)
        else:
            results[name] = _screen_record(
                records[i], valid_rows[i], fs, segments, alpha, name, found, segment_stats.get(name)
            )
    return results


def _screen_cross_pair(
    block,
    cross_products: SegmentCrossProducts,
    index,
    a: str,
    b: str,
    ra: SubjectScreening,
    rb: SubjectScreening,
    segments: int,
    alpha: float,
) -> SubjectScreening:
    """The joint test of pair ``a:b`` with the flags of its two channels propagated."""
    fs = float(block.sample_rate_hz)
    subject = f"{a}:{b}"
    memory = (
        float(np.nanmax([ra.memory_s, rb.memory_s]))
        if not (math.isnan(ra.memory_s) and math.isnan(rb.memory_s))
        else float("nan")
    )
    if ra.segments == 0 or rb.segments == 0:
        code = QUALITY_NOT_SCREENED if QUALITY_NOT_SCREENED in ra.quality + rb.quality else QUALITY_TOO_SHORT
        joint = _not_screened(subject, code, memory)
    else:
        count = segments_for_record(block.n_samples / fs, memory, segments)
        if count == 0:
            joint = _not_screened(subject, QUALITY_TOO_SHORT, memory)
        else:
            stats = cross_products.statistics(index[a], index[b], count)
            joint = _screen_cross_products(stats, fs, alpha, subject, memory)
    return _pair_row_family(joint, ra, rb, alpha)


def sidak_family_p(p_values) -> float:
    """Sidak-combined p of the finite ``p_values``: ``1 - (1 - min p)^k`` (NaN when none).

    Under the null of each test and independence between them, ``P[family p <= alpha] = alpha``
    exactly; for positively dependent tests it is at most ``alpha`` (Sidak 1967).
    """
    finite = [float(p) for p in p_values if math.isfinite(p)]
    if not finite:
        return float("nan")
    return 1.0 - (1.0 - min(finite)) ** len(finite)


def _pair_row_family(
    joint: SubjectScreening, ra: SubjectScreening, rb: SubjectScreening, alpha: float
) -> SubjectScreening:
    """A pair row's flag: Sidak family test over its joint test and its two channels' tests."""
    family_p = sidak_family_p((joint.p_value, ra.p_value, rb.p_value))
    flagged = bool(family_p <= alpha)
    quality = tuple(c for c in joint.quality if c != QUALITY_NONSTATIONARY)
    if flagged:
        quality = quality + (QUALITY_NONSTATIONARY,)
    p_values = dict(joint.test_p_values, joint_cross_product=joint.p_value)
    return dataclasses.replace(joint, p_value=family_p, flagged=flagged, quality=quality, test_p_values=p_values)


def _window_result(block, results: Dict[str, SubjectScreening], action: str, alpha: float) -> WindowScreening:
    """The window's ``stationarity_p`` rows, quality codes, and its reject when excluded."""
    start = int(block.window_start_us)
    rows = tuple(
        IndicatorRow(start, s, INDICATOR, float(r.p_value), float("nan"), "", quality_text(r.quality))
        for s, r in results.items()
    )
    subject_quality = {s: tuple(r.quality) for s, r in results.items()}
    flagged_subjects = [s for s, r in results.items() if r.flagged]
    excluded = action == "exclude" and bool(flagged_subjects)
    rejects: Tuple[Reject, ...] = ()
    if excluded:
        detail = "; ".join(
            f"{s}: p={results[s].p_value:.3g} over {results[s].segments} segments of {results[s].segment_s:.4g} s"
            for s in flagged_subjects
        )
        rejects = (
            Reject(
                stage="screen",
                source=iso_utc(start),
                subject=WHOLE_WINDOW,
                reason="nonstationary_window",
                detail=f"alpha={alpha:g}; flagged {detail}",
                asset=block.asset,
                window_start_us=start,
            ),
        )
    return WindowScreening(start, results, rows, subject_quality, excluded, rejects)
