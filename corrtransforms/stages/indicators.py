"""Condition indicators of one window: the rows of the (long) indicators table.

:func:`window_indicators` turns a :class:`~corrtransforms.records.WindowCorrelation` into
:class:`~corrtransforms.records.IndicatorRow` s:

========================  ==========  ==============================================
indicator                 subject     from
========================  ==========  ==============================================
``rms``                   channel     ``wc.rms`` / ``wc.rms_stderr`` (channel unit)
``corr_time_s``           channel     :func:`~corrtransforms.numerics.timescales.corr_time_s`
``decay_time_s``          channel     :func:`~corrtransforms.numerics.timescales.decay_time_s`
``mode_freq_hz``          mode name   :func:`~corrtransforms.numerics.modal_fit.fit_mode`
``mode_damping``          mode name   :func:`~corrtransforms.numerics.modal_fit.fit_mode`
``mode_freq_hz``,         mode name   ``wc.multichannel_modes`` (multi-channel entries,
``mode_damping``,                     :mod:`corrtransforms.stages.modes`)
``mode_mac``
``lag_s``                 ``a:b``     :func:`~corrtransforms.numerics.time_delay.estimate_lags`
``peak_coef``             ``a:b``     :func:`~corrtransforms.numerics.time_delay.estimate_lags`
``covariate_mean``        covariate   ``wc.covariates`` (stderr NaN)
========================  ==========  ==============================================

plus ``wc.extra_indicators`` (e.g. ``stationarity_p``) passed through. The quality column joins
the codes of the computation, the pair's own codes, ``wc.subject_quality`` of the subject (and of
``"*"``, codes for the whole window) and ``record_too_short`` when the pair behind the indicator
does not meet ``target_rel_error``. Bad numbers give NaN and a code, never an exception.
"""

from __future__ import annotations

import functools
from typing import Callable, Iterable, List, Optional, Tuple

import numpy as np
import pyarrow as pa

from corrtransforms import tables
from corrtransforms.config import AssetConfig
from corrtransforms.numerics.bartlett import LagErrors, subset_mismatch_variance
from corrtransforms.numerics.modal_fit import fit_mode
from corrtransforms.numerics.time_delay import LagEstimate, estimate_lag, estimate_lags
from corrtransforms.numerics.timescales import corr_time_s, decay_time_s
from corrtransforms.records import (
    IndicatorRow,
    ModeCorrelation,
    MultichannelMode,
    PairCorrelation,
    WindowCorrelation,
    quality_text,
)

#: quality codes added here (code -> meaning); the computations add their own
QUALITY_CODES = {
    "record_too_short": "the correlation behind the indicator misses [correlation] target_rel_error",
    "no_mode_correlation": "a configured mode has no band-limited correlation in this window",
    "no_covariate_samples": "the covariate had no valid samples in the window",
    "nonfinite_rms": "the rms or its standard error is not finite",
}

NAN = float("nan")
WHOLE_WINDOW = "*"


class IndicatorError(RuntimeError):
    """An indicator computation raised: names the window, the subject and the cause."""


def _pair_codes(pair: Optional[PairCorrelation]) -> Tuple[str, ...]:
    if pair is None:
        return ()
    codes = tuple(pair.quality)
    if not pair.meets_target:
        codes += ("record_too_short",)
    return codes


def _finite_or_nan(x) -> float:
    x = float(x)
    return x if np.isfinite(x) else NAN


def _channel_rows(wc: WindowCorrelation, config: AssetConfig, channel: str, common) -> List[IndicatorRow]:
    auto = wc.auto(channel)
    base = _pair_codes(auto) + common(channel)
    rms = float(wc.rms.get(channel, NAN))
    rms_sd = float(wc.rms_stderr.get(channel, NAN))
    rms_codes = base + (("nonfinite_rms",) if not (np.isfinite(rms) and np.isfinite(rms_sd)) else ())
    start = wc.window_start_us
    rows = [
        IndicatorRow(
            start,
            channel,
            "rms",
            _finite_or_nan(rms),
            _finite_or_nan(rms_sd),
            config.channels.unit(channel),
            quality_text(rms_codes),
        )
    ]
    if auto is None:
        return rows
    # on the count-corrected coefficient: with gaps the biased estimator's lags are low by
    # C(k) / C(0) (calibration matrix, gappy record: corr_time_s bias -0.34 stderr)
    coefficient, stderr = _located_coefficient(wc, config, auto)
    errors = LagErrors.of(coefficient, stderr)  # one lag-error structure for both time scales
    ct = corr_time_s(coefficient, stderr, auto.lag_step_s, errors=errors)
    dt = decay_time_s(coefficient, stderr, auto.lag_step_s, auto=True, errors=errors)
    rows.append(
        IndicatorRow(
            start,
            channel,
            "corr_time_s",
            _finite_or_nan(ct.value),
            _finite_or_nan(ct.stderr),
            "s",
            quality_text(base + ct.quality),
        )
    )
    rows.append(
        IndicatorRow(
            start,
            channel,
            "decay_time_s",
            _finite_or_nan(dt.value),
            _finite_or_nan(dt.stderr),
            "s",
            quality_text(base + dt.quality),
        )
    )
    return rows


def _band(band_hz) -> Tuple[float, float]:
    """A configured or recorded band as the (low, high) pair the modal fit takes."""
    return float(band_hz[0]), float(band_hz[1])


def _mode_rows(wc: WindowCorrelation, mode_name: str, channel: str, band_hz, common) -> List[IndicatorRow]:
    found: Optional[ModeCorrelation] = next((m for m in wc.modes if m.mode == mode_name), None)
    base = _pair_codes(wc.auto(channel)) + common(mode_name)
    start = wc.window_start_us
    if found is None:
        codes = quality_text(base + ("no_mode_correlation",))
        return [
            IndicatorRow(start, mode_name, "mode_freq_hz", NAN, NAN, "Hz", codes),
            IndicatorRow(start, mode_name, "mode_damping", NAN, NAN, "", codes),
        ]
    fit = fit_mode(found.coefficient, found.stderr, found.lag_step_s, _band(found.band_hz or band_hz))
    codes = quality_text(base + tuple(found.quality) + fit.quality)
    return [
        IndicatorRow(
            start,
            mode_name,
            "mode_freq_hz",
            _finite_or_nan(fit.freq_hz),
            _finite_or_nan(fit.freq_stderr_hz),
            "Hz",
            codes,
        ),
        IndicatorRow(
            start, mode_name, "mode_damping", _finite_or_nan(fit.damping), _finite_or_nan(fit.damping_stderr), "", codes
        ),
    ]


def _multichannel_rows(wc: WindowCorrelation, found: MultichannelMode, common) -> List[IndicatorRow]:
    """mode_freq_hz, mode_damping and mode_mac of one multi-channel mode."""
    codes = quality_text(tuple(found.quality) + common(found.mode))
    start = wc.window_start_us
    damping_codes = quality_text(tuple(found.quality) + tuple(found.damping_quality) + common(found.mode))
    values = (
        ("mode_freq_hz", found.freq_hz, found.freq_stderr_hz, "Hz", codes),
        ("mode_damping", found.damping, found.damping_stderr, "", damping_codes),
        ("mode_mac", found.mac, found.mac_stderr, "", codes),
    )
    return [
        IndicatorRow(start, found.mode, name, _finite_or_nan(v), _finite_or_nan(se), unit, row_codes)
        for name, v, se, unit, row_codes in values
    ]


def _lag_inputs(wc: WindowCorrelation, config: AssetConfig, pair: PairCorrelation):
    """The pair's located function, weighting and the two channels' auto coefficients."""
    auto_a, auto_b = wc.auto(pair.channel_a), wc.auto(pair.channel_b)
    weighted = pair.weighted_coefficient
    return (
        weighted,
        config.correlation.weighting if weighted is not None else "none",
        None if auto_a is None else auto_a.coefficient,
        None if auto_b is None else auto_b.coefficient,
    )


def _located_coefficient(wc: WindowCorrelation, config: AssetConfig, pair: PairCorrelation):
    """The pair's coefficient and stderr on which its peak is located and read (a cross pair) or
    its time scales are computed (an auto pair).

    With the biased estimator each lag's sum is divided by ``sqrt(N_a N_b)`` whatever the number
    of sample pairs ``C_ab(k)`` behind it, so ``E[rho] = rho_true(k) C_ab(k) / sqrt(N_a N_b)``: a
    tilt towards lag 0 on records with gaps (``C_ab`` falls with ``|k|`` on the scale of the
    gaps), which moved lag_s by 2.5 standard errors and peak_coef by 9 on the calibration
    matrix's gappy record (20 % missing in bursts). The peak is located on the count-corrected
    coefficient ``rho(k) sqrt(N_a N_b) / C_ab(k)`` (the unbiased estimate's shape, Bendat &
    Piersol, *Random Data*, 4th ed., Eq. (8.92), from memory) with its stderr scaled alike; the
    stored table keeps the biased estimate. Without gaps the factor is ``N / (N - |k|)``, so
    peak_coef is now the estimate of the true peak, not of ``(1 - |D| / T)`` times it. The
    unbiased estimator and weighted (PHAT/SCOT) functions are used as they are.
    """
    coefficient = np.asarray(pair.coefficient, dtype=float)
    stderr = np.asarray(pair.stderr, dtype=float)
    auto_a, auto_b = wc.auto(pair.channel_a), wc.auto(pair.channel_b)
    counts = None if pair.pair_count is None else np.asarray(pair.pair_count, dtype=float)
    if (
        config.correlation.estimator != "biased"
        or auto_a is None
        or auto_b is None
        or counts is None
        or counts.shape != coefficient.shape
    ):
        return coefficient, stderr
    n_ab = np.sqrt(float(auto_a.pair_count[0]) * float(auto_b.pair_count[0]))
    with np.errstate(divide="ignore", invalid="ignore"):
        factor = np.where(counts > 0, n_ab / counts, np.nan)
    return coefficient * factor, stderr * factor


def _with_subset_mismatch(wc: WindowCorrelation, pair: PairCorrelation, estimate: LagEstimate) -> LagEstimate:
    """``estimate`` with the peak coefficient's stderr widened by the numerator-subset term.

    The peak's lag product sum runs over the ``C_ab(k)`` pairs with both samples valid while the
    normalisation takes every valid sample; on records with gaps in bursts that mismatch adds
    :func:`~corrtransforms.numerics.bartlett.subset_mismatch_variance` to Bartlett's variance
    (the calibration matrix's gappy record, peak 0.98: coverage 0.860 with Bartlett's alone, 0.978 with it).
    Rows without pair counts, autos, or a finite lag and stderr are returned unchanged.
    """
    auto_a, auto_b = wc.auto(pair.channel_a), wc.auto(pair.channel_b)
    if (
        pair.pair_count is None
        or auto_a is None
        or auto_b is None
        or auto_a.pair_count is None
        or auto_b.pair_count is None
        or not np.isfinite(estimate.lag_s)
        or not np.isfinite(estimate.peak_coef_stderr)
        or not pair.lag_step_s > 0
    ):
        return estimate
    counts = np.asarray(pair.pair_count, dtype=float)
    position = (estimate.lag_s - pair.first_lag_s) / pair.lag_step_s
    if counts.ndim != 1 or not 0 <= position <= len(counts) - 1:
        return estimate
    count = float(np.interp(position, np.arange(len(counts)), counts))
    extra = subset_mismatch_variance(
        estimate.peak_coef,
        estimate.lag_s / pair.lag_step_s,
        count,
        float(auto_a.pair_count[0]),
        float(auto_b.pair_count[0]),
        auto_a.coefficient,
        auto_b.coefficient,
    )
    if extra <= 0:
        return estimate
    return estimate._replace(peak_coef_stderr=float(np.sqrt(estimate.peak_coef_stderr**2 + extra)))


def _batched_lag_estimates(
    wc: WindowCorrelation, config: AssetConfig, pairs: List[PairCorrelation]
) -> List[Optional[LagEstimate]]:
    """:func:`estimate_lags` of the cross pairs, batched over pairs on the same lag grid.

    A group whose batched call raises (malformed arrays, non-finite numbers) gives None for its
    pairs, which then go through :func:`estimate_lag` one by one, so a failure stays with its
    subject. Each batched estimate equals the per-pair one.
    """
    out: List[Optional[LagEstimate]] = [None] * len(pairs)
    groups: dict = {}
    for i, pair in enumerate(pairs):
        try:
            key = (len(pair.coefficient), float(pair.first_lag_s), float(pair.lag_step_s))
        except Exception:  # noqa: BLE001 - left to the per-pair path, which reports it
            continue
        groups.setdefault(key, []).append(i)
    for (_, first_lag_s, lag_step_s), members in groups.items():
        try:
            inputs = [_lag_inputs(wc, config, pairs[i]) for i in members]
            weightings = {w for _, w, _, _ in inputs if w != "none"}
            if len(weightings) > 1:
                continue
            located = [_located_coefficient(wc, config, pairs[i]) for i in members]
            estimates = estimate_lags(
                np.array([c for c, _ in located], dtype=float),
                np.array([e for _, e in located], dtype=float),
                first_lag_s,
                lag_step_s,
                [pairs[i].record_s for i in members],
                weighted_coefficient=[w for w, _, _, _ in inputs],
                weighting=weightings.pop() if weightings else "none",
                auto_a=[a for _, _, a, _ in inputs],
                auto_b=[b for _, _, _, b in inputs],
                max_lag_s=config.correlation.max_lag_s,
            )
        except Exception:  # noqa: BLE001 - the per-pair path isolates and reports the failure
            continue
        for i, estimate in zip(members, estimates):
            out[i] = estimate
    return out


def _pair_rows(
    wc: WindowCorrelation, config: AssetConfig, pair: PairCorrelation, common, estimate: Optional[LagEstimate] = None
) -> List[IndicatorRow]:
    subject = pair.subject
    if estimate is None:  # the per-pair path
        weighted, weighting, auto_a, auto_b = _lag_inputs(wc, config, pair)
        coefficient, stderr = _located_coefficient(wc, config, pair)
        estimate = estimate_lag(
            coefficient,
            stderr,
            pair.first_lag_s,
            pair.lag_step_s,
            pair.record_s,
            weighted_coefficient=weighted,
            weighting=weighting,
            auto_a=auto_a,
            auto_b=auto_b,
            max_lag_s=config.correlation.max_lag_s,
        )
    estimate = _with_subset_mismatch(wc, pair, estimate)
    codes = quality_text(_pair_codes(pair) + common(subject) + estimate.quality)
    start = wc.window_start_us
    return [
        IndicatorRow(
            start, subject, "lag_s", _finite_or_nan(estimate.lag_s), _finite_or_nan(estimate.lag_stderr_s), "s", codes
        ),
        IndicatorRow(
            start,
            subject,
            "peak_coef",
            _finite_or_nan(estimate.peak_coef),
            _finite_or_nan(estimate.peak_coef_stderr),
            "",
            codes,
        ),
    ]


def window_indicators_and_failures(
    wc: WindowCorrelation, config: AssetConfig
) -> Tuple[List[IndicatorRow], List[Tuple[str, str]]]:
    """Indicator rows of one window, isolating failures per subject.

    Parameters
    ----------
    wc : WindowCorrelation
        The correlate stage's result for one window.
    config : AssetConfig
        Units, modes, weighting and max_lag.

    Returns
    -------
    rows : list of IndicatorRow
    failures : list of (subject, detail)
        Subjects whose computation raised (malformed input or a defect); their rows are missing
        and the Beam transform turns each into a reject ``indicator_failed``.
    """
    rows: List[IndicatorRow] = []
    failures: List[Tuple[str, str]] = []
    whole = tuple(wc.subject_quality.get(WHOLE_WINDOW, ()))

    def common(subject: str) -> Tuple[str, ...]:
        return tuple(wc.subject_quality.get(subject, ())) + whole

    def attempt(subject: str, make: Callable[[], List[IndicatorRow]]):
        try:
            rows.extend(make())
        except Exception as err:  # noqa: BLE001 - every failure becomes a reject
            failures.append((subject, f"{type(err).__name__}: {err}"))

    for channel in wc.channels:
        attempt(channel, functools.partial(_channel_rows, wc, config, channel, common))
    for mode in config.modes:
        if not mode.is_multichannel:
            attempt(mode.name, functools.partial(_mode_rows, wc, mode.name, mode.channel, mode.band_hz, common))
    for found in wc.multichannel_modes:
        attempt(found.mode, functools.partial(_multichannel_rows, wc, found, common))
    cross = [pair for pair in wc.pairs if not pair.is_auto]
    batched = _batched_lag_estimates(wc, config, cross)
    for pair, estimate in zip(cross, batched):
        attempt(pair.subject, functools.partial(_pair_rows, wc, config, pair, common, estimate))
    for name, value in sorted(wc.covariates.items()):
        v = _finite_or_nan(value)
        codes = common(name) + (() if np.isfinite(v) else ("no_covariate_samples",))
        rows.append(
            IndicatorRow(
                wc.window_start_us, name, "covariate_mean", v, NAN, config.channels.unit(name), quality_text(codes)
            )
        )
    rows.extend(wc.extra_indicators)
    return rows, failures


def window_indicators(wc: WindowCorrelation, config: AssetConfig) -> List[IndicatorRow]:
    """Indicator rows of one window (see the module docstring for the list).

    Parameters
    ----------
    wc : WindowCorrelation
        The correlate stage's result for one window.
    config : AssetConfig
        The asset's configuration (units, modes, weighting, max_lag).

    Returns
    -------
    list of IndicatorRow

    Raises
    ------
    IndicatorError
        When a subject's computation raised (malformed input, not bad numbers: those give NaN
        and a quality code). :func:`window_indicators_and_failures` returns the other subjects'
        rows and the failures instead.
    """
    rows, failures = window_indicators_and_failures(wc, config)
    if failures:
        subject, detail = failures[0]
        raise IndicatorError(f"window {wc.window_start_us} subject {subject!r}: {detail}")
    return rows


def indicator_table(rows: Iterable[IndicatorRow]) -> pa.Table:
    """Arrow table of indicator rows with exactly the :data:`corrtransforms.tables.INDICATORS` schema.

    Parameters
    ----------
    rows : iterable of IndicatorRow

    Returns
    -------
    pyarrow.Table
        Columns built column-wise; ``window_start`` as ``timestamp[us, UTC]``.
    """
    rows = list(rows)
    schema = tables.INDICATORS
    columns = [
        pa.array([r.window_start_us for r in rows], type=pa.int64()).cast(schema.field("window_start").type),
        pa.array([r.subject for r in rows], type=pa.string()),
        pa.array([r.indicator for r in rows], type=pa.string()),
        pa.array([float(r.value) for r in rows], type=pa.float64()),
        pa.array([float(r.stderr) for r in rows], type=pa.float64()),
        pa.array([r.unit for r in rows], type=pa.string()),
        pa.array([r.quality for r in rows], type=pa.string()),
    ]
    return pa.Table.from_arrays(columns, schema=schema)
