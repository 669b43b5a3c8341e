"""Error-aware shift detection on one indicator series, with state carried between nightly runs.

For one (subject, indicator) series in time order, :func:`detect_shifts`

1. accumulates the baseline sample (``[baseline]``: a period of local days or the first N
   windows); windows inside or before the baseline get state ``"baseline"`` and, inside it, a
   provisional ``expected``/``z`` from a model of the baseline windows seen before them,
   refitted each time the sample has grown by 10 % (:func:`provisional_refit_point`);
2. at the end of the baseline fits the baseline model
   (:func:`corrtransforms.numerics.covariate_model.fit_baseline_model`: median/MAD, or a robust
   regression on the compensated covariates);
3. afterwards computes, per window, ``expected``, the error-aware standardised residual
   ``z = (value - expected) / sqrt(s_resid^2 + stderr^2)`` and runs the two-sided tabular CUSUM
   and the EWMA chart (:mod:`corrtransforms.numerics.detectors`) on ``z``; state ``"shifted"`` while a
   configured detector is beyond its limit, ``"normal"`` otherwise.

Rules:

- A window whose value, stderr or z is not finite, or whose quality contains ``nonstationary``
  (stationarity screening flag), is *held*: its row is written (with ``detector_held``) but it
  does not update the detector statistics, so it can neither start nor prolong a shift; the
  statistics and the state are carried from the previous window. Held windows also stay out of
  the baseline sample.
- Fewer fitted baseline windows than ``[baseline] min_windows``: every later row carries
  ``baseline_too_short``, the detector statistics are NaN and the state stays ``"normal"``.
- The series is processed one local day at a time (``[archive] timezone``) and the
  :class:`ShiftState` after each day is returned. A backfill is exactly the nightly sequence:
  resuming from day D-1's state over day D gives bit-identical rows, also while the baseline is
  still accumulating (the state then carries the baseline sample).

The state record, its serialisation, the choice of the state to resume and the settings digest
live in :mod:`corrtransforms.stages.state`; the episodes summary of a shifts table in
:mod:`corrtransforms.stages.summaries`.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any, Dict, Iterable, List, Mapping, NamedTuple, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa

from corrtransforms import tables
from corrtransforms.numerics.arl import (
    SECONDS_PER_YEAR,
    limit_for_estimated_parameters,
    limit_for_run_length,
    run_length_for_budget,
)
from corrtransforms.numerics.covariate_model import BaselineModel, fit_baseline_model
from corrtransforms.numerics.detectors import cusum_path, cusum_run_lengths, cusum_run_sums, ewma_limits, ewma_path
from corrtransforms.numerics.robust import robust_location_scale
from corrtransforms.numerics.serial_dependence import (
    MIN_PAIRS,
    ar1_prediction_errors,
    innovation_scale,
    latent_ar1_coefficient,
    robust_lag_one_correlation,
)
from corrtransforms.records import IndicatorRow, holds_window, quality_codes, quality_text
from corrtransforms.rejects import Reject, iso_utc
from corrtransforms.stages.state import (
    ACCUMULATING,
    BASELINE,
    FITTED,
    NORMAL,
    SHIFTED,
    IncompleteSampleError,
    ShiftState,
    StateMismatchError,
    attach_sample,
    covariate_model_of,
    resume_or_start,
    select_resume_state,
    settings_digest,
    states_table,
)
from corrtransforms.timeutil import day_date, day_number, local_days

COVARIATE_INDICATOR = "covariate_mean"
STAGE = "shifts"

#: quality codes added by shift detection (besides the input row's own codes and the model's)
QUALITY_CODES = {
    "before_baseline": "window before the configured baseline period; not used",
    "not_in_baseline_sample": "window inside the baseline period left out of the baseline sample (held)",
    "value_missing": "the indicator value is NaN or infinite; the window is held",
    "stderr_missing": "the indicator's standard error is NaN or infinite; the window is held",
    "covariate_missing": "a compensated covariate is missing; its baseline median was used",
    "detector_held": "the window did not update the detector statistics (state carried)",
    "baseline_too_short": "fewer baseline windows than [baseline] min_windows; no alarms",
    "covariate_constant": "a covariate did not vary over the baseline; it was left out of the model",
    "covariate_model_unfitted": "too few baseline windows with all covariates; the median model was used",
    "knee_not_in_baseline": (
        "[shifts] model = hinge: the baseline shows no knee (too few windows on one side of it, or "
        "no significant bend); the linear model was used"
    ),
    "dependence_not_estimated": (
        f"fewer than {MIN_PAIRS} adjacent baseline windows (or a state from before "
        "the dependence was fitted): the residuals are taken as independent (phi 0)"
    ),
}


#: growth of the baseline sample, as a fraction, after which the provisional model is refitted
PROVISIONAL_REFIT_GROWTH = 0.10


def provisional_refit_point(first: int, count: int, growth: Optional[float] = None) -> int:
    """Size of the baseline sample at the provisional model's last refit.

    Parameters
    ----------
    first : int
        Smallest sample for a provisional model (3, or ``3 + covariates * order``).
    count : int
        Baseline windows in the sample so far (``count >= first``).
    growth : float, optional
        Relative growth of the sample between refits (default
        :data:`PROVISIONAL_REFIT_GROWTH`; 0 refits at every window).

    Returns
    -------
    int
        The largest refit point ``<= count`` of the schedule ``n_0 = first``,
        ``n_{k+1} = n_k + max(1, ceil(growth * n_k))``.

    Notes
    -----
    The schedule depends only on the count of sample windows, which the state carries, so a
    nightly run resumed from a state and a backfill refit at the same points and give the same
    rows. With growth g there are about ``log(count / first) / log(1 + g)`` refits (64 for 2 000
    windows at g = 0.1), so the baseline phase costs O(n log n) instead of the O(n^2) of a refit
    per window. Common practice (geometric refit schedule); no published source.
    """
    growth = PROVISIONAL_REFIT_GROWTH if growth is None else float(growth)
    if count < first:
        raise ValueError(f"count = {count} is below the first refit point {first}")
    point = first
    while True:
        following = point + max(1, math.ceil(growth * point))
        if following > count:
            return point
        point = following


def period_position(day: int, windows_seen: int, baseline_config) -> str:
    """Where a window lies relative to the baseline: "before", "inside" or "after".

    Parameters
    ----------
    day : int
        Local day of the window (:func:`corrtransforms.timeutil.local_days`).
    windows_seen : int
        Windows of the series processed before this one.
    baseline_config : corrtransforms.config.BaselineConfig
        ``[baseline]``: a period of days (inclusive) or a count of windows from the first one
        (100 when neither is given, as in :func:`corrtransforms.config.parse_config`).

    Returns
    -------
    str
    """
    if baseline_config.by_dates:
        if day < day_number(baseline_config.start):
            return "before"
        return "inside" if day <= day_number(baseline_config.end) else "after"
    count = 100 if baseline_config.windows is None else baseline_config.windows  # config default
    return "inside" if windows_seen < count else "after"


# --------------------------------------------------------------------------------------------
# Core per-series processing


class _Columns:
    """Per-row output columns, appended day by day."""

    NAMES = (
        "window_start",
        "value",
        "stderr",
        "expected",
        "resid_scale",
        "z",
        "cusum_pos",
        "cusum_neg",
        "ewma",
        "ewma_limit",
        "state",
        "onset",
        "direction",
        "shift_size",
        "detector",
        "first_alarm",
        "quality",
    )

    def __init__(self):
        self.parts = {name: [] for name in self.NAMES}

    def add(self, **columns):
        for name in self.NAMES:
            self.parts[name].append(columns[name])

    def add_without_detectors(self, state, window_start, value, stderr, expected, resid_scale, z, quality):
        """Rows whose windows do not run the detectors (baseline windows, or a series whose
        baseline is too short): NaN statistics, no onset, direction, size or alarm."""
        n = len(window_start)
        nan = np.full(n, np.nan)
        self.add(
            window_start=window_start,
            value=value,
            stderr=stderr,
            expected=expected,
            resid_scale=resid_scale,
            z=z,
            cusum_pos=nan,
            cusum_neg=nan,
            ewma=nan,
            ewma_limit=nan,
            state=[state] * n,
            onset=[None] * n,
            direction=np.zeros(n, np.int8),
            shift_size=nan,
            detector=[None] * n,
            first_alarm=[None] * n,
            quality=quality,
        )

    def joined(self, name, dtype=None):
        parts = self.parts[name]
        if not parts:
            return np.zeros(0, dtype=dtype or float)
        if dtype is object:
            return [v for p in parts for v in p]
        return np.concatenate(parts).astype(dtype) if dtype else np.concatenate(parts)


def _timestamps(values: Sequence[Optional[int]]) -> pa.Array:
    return pa.array([None if v is None else int(v) for v in values], type=pa.int64()).cast(tables.TIMESTAMP)


def _is_nonstationary(codes: Tuple[str, ...]) -> bool:
    return holds_window(codes)


def _standardised_residuals(model: BaselineModel, v, se, x):
    """``expected``, covariate-missing flags, residuals and ``z = r / sqrt(s_resid^2 + stderr^2)``
    of windows after the baseline (z is NaN where the denominator is not positive)."""
    expected, covariate_missing = model.predict(x, n=len(v))
    resid = v - expected
    with np.errstate(invalid="ignore", divide="ignore"):
        denominator = np.sqrt(model.resid_scale**2 + se * se)
        z = np.where(denominator > 0, resid / denominator, np.nan)
    return expected, covariate_missing, resid, z


def window_steps(times_us, hop_us: float, previous_us: Optional[int] = None) -> np.ndarray:
    """Windows between consecutive used windows, ``max(1, round(dt / hop))``; the first counts
    from ``previous_us`` (1 when None). A gap or a held window makes a step larger than 1."""
    t = np.asarray(times_us, dtype=np.int64)
    before = np.concatenate(([t[0] - hop_us if previous_us is None else previous_us], t[:-1])) if t.size else t
    return np.maximum(1, np.rint((t - before) / hop_us)).astype(np.int64)


def _fitted_quality(
    model: BaselineModel, v, se, codes, covariate_missing, usable, stage_codes: Tuple[str, ...] = ()
) -> List[str]:
    """Quality text of each window after the baseline: its own codes, the model's, and this
    stage's (``value_missing``, ``stderr_missing``, ``covariate_missing``, ``detector_held``)."""
    model_codes = tuple(model.quality) + (() if model.too_short else tuple(stage_codes))
    quality = []
    for j in range(len(v)):
        extra = list(model_codes)
        if not np.isfinite(v[j]):
            extra.append("value_missing")
        if not np.isfinite(se[j]):
            extra.append("stderr_missing")
        if covariate_missing[j]:
            extra.append("covariate_missing")
        if not usable[j] and not model.too_short:
            extra.append("detector_held")
        quality.append(quality_text(codes[j] + tuple(extra)))
    return quality


class _DetectorPaths(NamedTuple):
    """Detector statistics over the used windows of one day (see :mod:`corrtransforms.numerics.detectors`)."""

    upper: np.ndarray  # C+
    lower: np.ndarray  # C-
    n_upper: np.ndarray  # windows of C+'s current run above zero
    n_lower: np.ndarray
    sum_upper: np.ndarray  # sum of value - expected over C+'s current run
    sum_lower: np.ndarray
    ewma: np.ndarray
    limit: np.ndarray  # EWMA control limit (exact, time-varying)


@dataclasses.dataclass
class _Decisions:
    """Per used window: the state and the alarm bookkeeping written into its row."""

    state: List[str] = dataclasses.field(default_factory=list)
    onset: List[Optional[int]] = dataclasses.field(default_factory=list)
    direction: List[int] = dataclasses.field(default_factory=list)
    size: List[float] = dataclasses.field(default_factory=list)
    detector: List[Optional[str]] = dataclasses.field(default_factory=list)
    first_alarm: List[Optional[int]] = dataclasses.field(default_factory=list)
    start_upper: List[Optional[int]] = dataclasses.field(default_factory=list)
    start_lower: List[Optional[int]] = dataclasses.field(default_factory=list)

    def add(self, state, onset, direction, size, detector, first_alarm) -> None:
        self.state.append(state)
        self.onset.append(onset)
        self.direction.append(direction)
        self.size.append(size)
        self.detector.append(detector)
        self.first_alarm.append(first_alarm)


def _run_start(lengths, carried: Optional[int], times, j: int) -> Optional[int]:
    """Start (us) of the CUSUM run ending at used window ``j``: None when the statistic is zero,
    ``carried`` (the state's run start) when the run began before this day."""
    if lengths[j] == 0:
        return None
    first = j - int(lengths[j]) + 1
    return int(times[first]) if first >= 0 else carried


def _carried(start_value, values, carry) -> np.ndarray:
    """Numeric column over all windows: used windows take their value, held ones the previous
    one (``carry[i]`` = used windows up to i; 0 = the incoming state's ``start_value``)."""
    return np.concatenate(([start_value], np.asarray(values, dtype=float)))[carry]


def _carried_list(start_value, values, carry) -> list:
    """:func:`_carried` for a column of Python values (text, optional timestamps)."""
    table = [start_value] + list(values)
    return [table[c] for c in carry]


class _SeriesRun:
    """Day-by-day processing of one series (the engine of :func:`detect_shifts`)."""

    def __init__(self, config, state: ShiftState):
        self.config = config
        self.state = state
        s = config.shifts
        self.k, self.h = s.cusum_k, s.cusum_h
        self.smoothing, self.width = s.ewma_lambda, s.ewma_L
        self.use_cusum = s.detector in ("cusum", "both")
        self.use_ewma = s.detector in ("ewma", "both")
        self.p = len(state.covariates)
        self._limits_from_state()
        self.columns = _Columns()
        self.day_states: List[ShiftState] = []
        # provisional model of the baseline phase: (sample size at its fit, model); refitted
        # on the schedule of provisional_refit_point, from the prefix of the carried sample
        self.provisional: Optional[Tuple[int, BaselineModel]] = None
        self.provisional_fits = 0
        # windows that entered the baseline sample in this run: the baseline_sample rows
        self.new_sample: List[Tuple[int, float, float, Tuple[float, ...]]] = []

    # -- baseline -----------------------------------------------------------------------------
    def _sample_arrays(self):
        st = self.state
        x = np.asarray(st.sample_covariates, dtype=float).reshape(len(st.sample_value), self.p) if self.p else None
        return np.asarray(st.sample_value, dtype=float), np.asarray(st.sample_stderr, dtype=float), x

    def _fit(self) -> BaselineModel:
        values, stderr, x = self._sample_arrays()
        return fit_baseline_model(
            values,
            stderr,
            x,
            self.state.covariates,
            self.config.baseline.min_windows,
            self.state.order,
            self.state.hinge,
        )

    def _limits_from_state(self):
        """CUSUM h and EWMA L in use: widened for the baseline's error once fitted (the
        configured ones for a state written before that)."""
        s, st = self.config.shifts, self.state
        self.hop_us = 1e6 * (self.config.windows.hop_s if st.window_spacing_s is None else st.window_spacing_s)
        self.h = s.cusum_h if st.cusum_h_used is None else float(st.cusum_h_used)
        self.width = s.ewma_L if st.ewma_L_used is None else float(st.ewma_L_used)

    def _finalize(self):
        st = self.state
        st.model = self._fit()
        st.phase = FITTED
        self._fit_dependence()
        st.sample_value, st.sample_stderr, st.sample_covariates, st.sample_window_start = [], [], [], []
        st.state = NORMAL

    def _fit_dependence(self):
        """AR(1) of the baseline residuals, the scale of their prediction errors, the predictor
        after the last baseline window and the limits widened for the baseline's error
        (:mod:`corrtransforms.numerics.serial_dependence`, :func:`limit_for_estimated_parameters`)."""
        st, model, s = self.state, self.state.model, self.config.shifts
        values, stderr, x = self._sample_arrays()
        if model.too_short or values.size < 2:
            return
        times = np.asarray(st.sample_window_start, dtype=np.int64)
        if times.size == values.size:  # one prediction step: the series' own window spacing
            st.window_spacing_s = float(np.median(np.diff(times))) / 1e6
            self.hop_us = st.window_spacing_s * 1e6
        # a sample carried by a state from before the window starts were kept: taken as adjacent
        steps = window_steps(times, self.hop_us) if times.size == values.size else np.ones(values.size, dtype=np.int64)
        expected, _ = model.predict(x, n=values.size)
        resid = values - expected
        with np.errstate(invalid="ignore", divide="ignore"):
            z = resid / np.sqrt(model.resid_scale**2 + stderr * stderr)
        rho, pairs = robust_lag_one_correlation(z, steps[1:] == 1)
        phi = float(latent_ar1_coefficient(rho, model.resid_scale, model.scale)) if pairs >= MIN_PAIRS else 0.0
        errors, mean, var = ar1_prediction_errors(resid, stderr, steps, phi, model.resid_scale)
        _, ratio, _ = robust_location_scale(errors)
        ratio = ratio if np.isfinite(ratio) and ratio > 0 else 1.0
        st.dependence_phi, st.dependence_pairs, st.innovation_ratio = phi, int(pairs), float(ratio)
        st.innovation_scale = float(innovation_scale(model.resid_scale, phi)) * float(ratio)
        st.predictor_mean, st.predictor_var = float(mean), float(var)
        st.predictor_window_start = int(times[-1]) if times.size == values.size else None
        if s.detector in ("cusum", "both"):
            st.cusum_h_used = limit_for_estimated_parameters("cusum", s.cusum_h, model.n, k=s.cusum_k)
        if s.detector in ("ewma", "both"):
            st.ewma_L_used = limit_for_estimated_parameters("ewma", s.ewma_L, model.n, smoothing=s.ewma_lambda)
        self._limits_from_state()

    def _prediction_errors(self, resid, stderr, times):
        """Standardised one-step prediction errors of the used windows, continuing the carried
        predictor across held windows and gaps, divided by the baseline's innovation ratio."""
        st = self.state
        if not len(times):
            return np.zeros(0)
        steps = window_steps(times, self.hop_us, st.predictor_window_start)
        errors, mean, var = ar1_prediction_errors(
            resid, stderr, steps, st.dependence_phi, st.model.resid_scale, st.predictor_mean, st.predictor_var
        )
        st.predictor_mean, st.predictor_var = float(mean), float(var)
        st.predictor_window_start = int(times[-1])
        return errors / st.innovation_ratio

    def _baseline_window(self, t, v, se, codes, x, day):
        """One window while the baseline accumulates; returns its row values."""
        st = self.state
        position = period_position(day, st.windows_seen, self.config.baseline)
        extra = []
        expected = resid_scale = z = float("nan")
        count = len(st.sample_value)
        needed = 3 + self.p * st.order + int(st.hinge) if self.p else 3
        if position == "inside" and count >= needed:
            point = provisional_refit_point(needed, count)
            if self.provisional is None or self.provisional[0] != point:
                values, stderr, xs = self._sample_arrays()
                fitted = fit_baseline_model(
                    values[:point],
                    stderr[:point],
                    None if xs is None else xs[:point],
                    st.covariates,
                    self.config.baseline.min_windows,
                    st.order,
                    st.hinge,
                )
                self.provisional = (point, fitted)
                self.provisional_fits += 1
            model = self.provisional[1]
            exp_arr, missing = model.predict(None if x is None else x[None, :], n=1)
            expected, resid_scale = float(exp_arr[0]), model.resid_scale
            denominator = math.sqrt(resid_scale**2 + se**2) if np.isfinite(se) else float("nan")
            if denominator > 0 and np.isfinite(v):
                z = (v - expected) / denominator
            if missing[0]:
                extra.append("covariate_missing")
        if not np.isfinite(v):
            extra.append("value_missing")
        if not np.isfinite(se):
            extra.append("stderr_missing")
        if position == "before":
            extra.append("before_baseline")
        else:
            usable = np.isfinite(v) and np.isfinite(se) and not _is_nonstationary(codes)
            if usable:
                st.sample_value.append(float(v))
                st.sample_stderr.append(float(se))
                st.sample_window_start.append(int(t))
                if self.p:
                    st.sample_covariates.extend(float(c) for c in x)
                self.new_sample.append((int(t), float(v), float(se), tuple(float(c) for c in x) if self.p else ()))
            else:
                extra.append("not_in_baseline_sample")
        st.windows_seen += 1
        return expected, resid_scale, z, quality_text(codes + tuple(extra))

    # -- one day --------------------------------------------------------------------------------
    def process_day(self, t, v, se, codes, x, day):
        """Windows of one local day: baseline windows first, the rest after the fit; appends the
        rows to :attr:`columns` and the state after the day to :attr:`day_states`."""
        st = self.state
        baseline = self.config.baseline
        n = len(t)
        base_rows = []
        i = 0
        while i < n and st.phase == ACCUMULATING:
            if period_position(day, st.windows_seen, baseline) == "after":
                self._finalize()
                break
            base_rows.append(self._baseline_window(t[i], v[i], se[i], codes[i], None if x is None else x[i], day))
            i += 1
            if not baseline.by_dates and st.windows_seen >= baseline.windows:
                self._finalize()
        if base_rows:
            expected, resid_scale, z, quality = (list(c) for c in zip(*base_rows))
            m = len(base_rows)
            self.columns.add_without_detectors(
                BASELINE,
                t[:m],
                v[:m],
                se[:m],
                np.asarray(expected, float),
                np.asarray(resid_scale, float),
                np.asarray(z, float),
                quality,
            )
        if i < n:
            self._fitted_windows(t[i:], v[i:], se[i:], codes[i:], None if x is None else x[i:])
        if st.phase == ACCUMULATING and baseline.by_dates and day >= day_number(baseline.end):
            self._finalize()
        st.window_start_us = int(t[-1])
        st.local_day = int(day)
        self.day_states.append(st.snapshot())

    def _fitted_windows(self, t, v, se, codes, x):
        """Windows after the baseline: ``expected``, ``z``, the detectors and the state per window.

        Held windows (z not finite, or flagged nonstationary) keep their row but do not update
        the statistics: they carry the previous window's values (:func:`_carried`).
        """
        st = self.state
        model = st.model
        n = len(t)
        st.windows_seen += n
        expected, covariate_missing, resid, z = _standardised_residuals(model, v, se, x)
        nonstationary = np.array([_is_nonstationary(c) for c in codes], dtype=bool)
        usable = np.isfinite(z) & ~nonstationary
        stage_codes = ("dependence_not_estimated",) if st.dependence_pairs < MIN_PAIRS else ()
        quality = _fitted_quality(model, v, se, codes, covariate_missing, usable, stage_codes)
        resid_scale = np.full(n, model.resid_scale)
        if model.too_short:
            st.state = NORMAL
            self.columns.add_without_detectors(NORMAL, t, v, se, expected, resid_scale, z, quality)
            return
        errors = self._prediction_errors(resid[usable], se[usable], t[usable])
        paths = self._detector_paths(errors, resid[usable])
        decisions = self._decide_windows(paths, resid[usable], t[usable])
        # rows: used windows take their values, held windows carry the previous ones
        carry = np.concatenate(([0], np.cumsum(usable)))[1:]  # 0 = from the incoming state
        self.columns.add(
            window_start=t,
            value=v,
            stderr=se,
            expected=expected,
            resid_scale=resid_scale,
            z=z,
            cusum_pos=_carried(st.cusum_pos, paths.upper, carry),
            cusum_neg=_carried(st.cusum_neg, paths.lower, carry),
            ewma=_carried(st.ewma, paths.ewma, carry),
            ewma_limit=_carried(st.ewma_limit, paths.limit, carry),
            state=_carried_list(st.state, decisions.state, carry),
            onset=_carried_list(st.onset, decisions.onset, carry),
            direction=_carried(st.direction, decisions.direction, carry).astype(np.int8),
            shift_size=_carried(st.shift_size, decisions.size, carry),
            detector=_carried_list(st.detector, decisions.detector, carry),
            first_alarm=_carried_list(st.first_alarm, decisions.first_alarm, carry),
            quality=quality,
        )
        if paths.upper.size:
            self._keep_last(paths, decisions)

    def _detector_paths(self, z, resid) -> _DetectorPaths:
        """CUSUM and EWMA statistics of the standardised prediction errors ``z`` of the used
        windows, continued from the carried state."""
        st = self.state
        upper, lower = cusum_path(z, self.k, st.cusum_pos, st.cusum_neg)
        n_upper = cusum_run_lengths(upper, st.run_count_pos)
        n_lower = cusum_run_lengths(lower, st.run_count_neg)
        return _DetectorPaths(
            upper=upper,
            lower=lower,
            n_upper=n_upper,
            n_lower=n_lower,
            sum_upper=cusum_run_sums(resid, n_upper, st.run_resid_pos),
            sum_lower=cusum_run_sums(resid, n_lower, st.run_resid_neg),
            ewma=ewma_path(z, self.smoothing, st.ewma),
            limit=ewma_limits(st.ewma_count + 1 + np.arange(z.size), self.smoothing, self.width, exact=True),
        )

    def _decide_windows(self, paths: _DetectorPaths, resid, times) -> _Decisions:
        """State, onset, direction, size, detectors and first alarm of each used window.

        A window is shifted while a configured detector is beyond its limit; its direction is
        the side that signals (the larger CUSUM side when both do). An episode is a run of
        shifted windows of one direction: a reversal while shifted starts a new one (new
        ``first_alarm``). The onset estimate is the first window of that side's current CUSUM
        run (the window itself when only the EWMA signals); within an episode the earliest
        estimate is kept, so ``onset <= first_alarm`` in every shifted row. The size is the mean
        residual over the current CUSUM run.
        """
        st = self.state
        out = _Decisions()
        previous, first_alarm = st.state, st.first_alarm
        previous_direction, previous_onset = st.direction, st.onset
        for j in range(paths.upper.size):
            out.start_upper.append(_run_start(paths.n_upper, st.run_start_pos, times, j))
            out.start_lower.append(_run_start(paths.n_lower, st.run_start_neg, times, j))
            cusum_up = self.use_cusum and paths.upper[j] > self.h
            cusum_down = self.use_cusum and paths.lower[j] > self.h
            ewma_up = self.use_ewma and paths.ewma[j] > paths.limit[j]
            ewma_down = self.use_ewma and paths.ewma[j] < -paths.limit[j]
            up, down = cusum_up or ewma_up, cusum_down or ewma_down
            if not (up or down):
                previous, first_alarm, previous_direction, previous_onset = NORMAL, None, 0, None
                out.add(NORMAL, None, 0, float("nan"), None, None)
                continue
            direction = 1 if (up and not down) or (up and down and paths.upper[j] >= paths.lower[j]) else -1
            lengths, sums, starts = (
                (paths.n_upper, paths.sum_upper, out.start_upper)
                if direction > 0
                else (paths.n_lower, paths.sum_lower, out.start_lower)
            )
            if lengths[j] > 0:
                onset, size = starts[j], float(sums[j] / lengths[j])
            else:
                onset, size = int(times[j]), float(resid[j])
            names = [name for name, on in (("cusum", cusum_up or cusum_down), ("ewma", ewma_up or ewma_down)) if on]
            if previous == SHIFTED and direction == previous_direction:  # the episode goes on
                onset = onset if previous_onset is None or onset is None else min(onset, previous_onset)
            else:  # a new episode: the first shifted window, or a reversal of direction
                first_alarm = int(times[j])
            previous, previous_direction, previous_onset = SHIFTED, direction, onset
            out.add(SHIFTED, onset, direction, size, "+".join(names), first_alarm)
        return out

    def _keep_last(self, paths: _DetectorPaths, decisions: _Decisions) -> None:
        """Carry the statistics and decisions of the last used window in the state."""
        st = self.state
        last = paths.upper.size - 1
        st.cusum_pos, st.cusum_neg = float(paths.upper[last]), float(paths.lower[last])
        st.run_count_pos, st.run_count_neg = int(paths.n_upper[last]), int(paths.n_lower[last])
        st.run_resid_pos, st.run_resid_neg = float(paths.sum_upper[last]), float(paths.sum_lower[last])
        st.run_start_pos, st.run_start_neg = decisions.start_upper[last], decisions.start_lower[last]
        st.ewma, st.ewma_count = float(paths.ewma[last]), st.ewma_count + paths.upper.size
        st.ewma_limit = float(paths.limit[last])
        st.state, st.onset, st.direction = decisions.state[last], decisions.onset[last], decisions.direction[last]
        st.shift_size, st.detector = decisions.size[last], decisions.detector[last]
        st.first_alarm = decisions.first_alarm[last]

    # -- output ---------------------------------------------------------------------------------
    def sample_table(self, subject, indicator, unit) -> pa.Table:
        """BASELINE_SAMPLE rows of the windows that entered the baseline sample in this run."""
        rows = self.new_sample
        return pa.Table.from_arrays(
            [
                pa.array([r[0] for r in rows], pa.int64()).cast(tables.TIMESTAMP),
                pa.array([subject] * len(rows), pa.string()),
                pa.array([indicator] * len(rows), pa.string()),
                pa.array([r[1] for r in rows], pa.float64()),
                pa.array([r[2] for r in rows], pa.float64()),
                pa.array([list(r[3]) for r in rows], pa.list_(pa.float64())),
                pa.array([unit] * len(rows), pa.string()),
            ],
            schema=tables.BASELINE_SAMPLE,
        )

    def table(self, subject, indicator, unit) -> pa.Table:
        c = self.columns
        window_start = c.joined("window_start", np.int64)
        n = window_start.size
        arrays = {
            "window_start": pa.array(window_start, type=pa.int64()).cast(tables.TIMESTAMP),
            "subject": pa.array([subject] * n, pa.string()),
            "indicator": pa.array([indicator] * n, pa.string()),
        }
        for name in (
            "value",
            "stderr",
            "expected",
            "resid_scale",
            "z",
            "cusum_pos",
            "cusum_neg",
            "ewma",
            "ewma_limit",
            "shift_size",
        ):
            arrays[name] = pa.array(c.joined(name, np.float64), pa.float64())
        arrays["state"] = pa.array(c.joined("state", object), pa.string())
        arrays["onset"] = _timestamps(c.joined("onset", object))
        arrays["direction"] = pa.array(c.joined("direction", np.int8), pa.int8())
        arrays["detector"] = pa.array(c.joined("detector", object), pa.string())
        arrays["first_alarm"] = _timestamps(c.joined("first_alarm", object))
        arrays["quality"] = pa.array(c.joined("quality", object), pa.string())
        arrays["unit"] = pa.array([unit] * n, pa.string())
        return pa.Table.from_arrays([arrays[f.name] for f in tables.SHIFTS], schema=tables.SHIFTS)


def _covariate_matrix(covariates, names: Tuple[str, ...], n: int) -> Optional[np.ndarray]:
    if not names:
        return None
    if covariates is None:
        return np.full((n, len(names)), np.nan)
    if isinstance(covariates, Mapping):
        columns = []
        for name in names:
            column = covariates.get(name)
            columns.append(np.full(n, np.nan) if column is None else np.asarray(column, dtype=float))
        return np.column_stack(columns).reshape(n, len(names))
    return np.asarray(covariates, dtype=float).reshape(n, len(names))


def _checked_series(times_us, values, stderr, quality):
    """The series as arrays (times int64, values and stderr float) and quality code tuples;
    ValueError unless the lengths agree and the times strictly increase."""
    t = np.asarray(times_us, dtype=np.int64).reshape(-1)
    v = np.asarray(values, dtype=float).reshape(-1)
    se = np.asarray(stderr, dtype=float).reshape(-1)
    n = t.size
    if v.size != n or se.size != n:
        raise ValueError("times_us, values and stderr must have the same length")
    codes = [quality_codes(q) for q in (quality if quality is not None else ["ok"] * n)]
    if len(codes) != n:
        raise ValueError("quality must have one entry per window")
    if n > 1 and np.any(np.diff(t) <= 0):
        raise ValueError("times_us must be strictly increasing (sort and drop duplicates first)")
    return t, v, se, codes


def detect_shifts(
    times_us,
    values,
    stderr,
    quality,
    covariates,
    config,
    state: Optional[ShiftState] = None,
    *,
    subject: str = "",
    indicator: str = "",
    unit: str = "",
    order: Optional[int] = None,
) -> Tuple[pa.Table, List[ShiftState]]:
    """Baseline, covariate compensation, error-aware z and CUSUM/EWMA detection of one series.

    Parameters
    ----------
    times_us : array_like of int
        Window starts (us since the epoch, UTC), strictly increasing, all after
        ``state.window_start_us`` when resuming.
    values, stderr : array_like of float
        Indicator values and their standard errors (NaN allowed: the window is held).
    quality : sequence of str or None
        Quality text of each indicator row ("ok" or ";"-separated codes).
    covariates : mapping name -> array, ndarray (n, p) or None
        Window means of the compensated covariates (``config.compensated_covariates()``,
        NaN where missing).
    config : corrtransforms.config.AssetConfig
        Uses ``[baseline]``, ``[shifts]`` and ``[archive] timezone``.
    state : ShiftState, optional
        State after the previous run (None: a fresh series, starting with its baseline).
    subject, indicator, unit : str
        Written into the rows (taken from ``state`` when empty).
    order : {1, 2}, optional
        Covariate model order (None: ``[shifts] model``).

    Returns
    -------
    shifts : pyarrow.Table
        :data:`corrtransforms.tables.SHIFTS` rows, one per window.
    day_states : list of ShiftState
        State after the last window of each local day, in time order.

    Raises
    ------
    StateMismatchError
        ``state`` was computed with other settings, for another series, or ``times_us`` are not
        all after it.
    ValueError
        ``times_us`` not strictly increasing or arrays of different lengths.

    Notes
    -----
    Per window after the baseline: ``expected`` from the baseline model,
    ``z = (value - expected) / sqrt(s_resid^2 + stderr^2)``; CUSUM
    ``C+_t = max(0, C+_{t-1} + z_t - k)``, ``C-_t = max(0, C-_{t-1} - z_t - k)``, signal when
    ``C > h``; EWMA ``w_t = lambda z_t + (1 - lambda) w_{t-1}``, signal when
    ``|w_t| > L sqrt(lambda / (2 - lambda) (1 - (1 - lambda)^(2 n)))`` after n updates. The
    onset of a shift is the first window after the CUSUM of its direction last left zero (the
    earliest such estimate of the episode); the size is the mean of ``value - expected`` over
    the current CUSUM run. An episode (one ``first_alarm``) has one direction: a reversal while
    shifted starts a new episode.

    References
    ----------
    Page (1954); Roberts (1959); Montgomery (2009) Sections 9.1-9.2.
    """
    result = detect_shifts_with_sample(
        times_us,
        values,
        stderr,
        quality,
        covariates,
        config,
        state,
        subject=subject,
        indicator=indicator,
        unit=unit,
        order=order,
    )
    return result.shifts, result.day_states


class SeriesResult(NamedTuple):
    """What :func:`detect_shifts_with_sample` returns."""

    #: SHIFTS rows, one per window
    shifts: pa.Table
    #: state after the last window of each local day (rows carry the sample's count only)
    day_states: List[ShiftState]
    #: BASELINE_SAMPLE rows of the windows that entered the baseline sample in this run
    baseline_sample: pa.Table


def detect_shifts_with_sample(
    times_us,
    values,
    stderr,
    quality,
    covariates,
    config,
    state: Optional[ShiftState] = None,
    *,
    baseline_sample: Any = (),
    subject: str = "",
    indicator: str = "",
    unit: str = "",
    order: Optional[int] = None,
) -> SeriesResult:
    """:func:`detect_shifts`, also returning the baseline sample rows this run added, and
    accepting those of earlier runs (``baseline_sample``: BASELINE_SAMPLE rows or table) for a
    ``state`` read back from the state table while its baseline accumulates."""
    state = _with_sample(state, baseline_sample, config, order)
    run = _run_series(times_us, values, stderr, quality, covariates, config, state, subject, indicator, order)
    subject, indicator = run.state.subject, run.state.indicator
    return SeriesResult(run.table(subject, indicator, unit), run.day_states, run.sample_table(subject, indicator, unit))


def _with_sample(
    state: Optional[ShiftState], baseline_sample: Any, config, order: Optional[int]
) -> Optional[ShiftState]:
    """``state`` with its baseline sample attached from ``baseline_sample`` when it needs it (a
    state of other settings is left as it is: :func:`resume_or_start` reports that first)."""
    if state is None or not state.needs_sample or state.settings != settings_digest(config, order):
        return state
    rows = baseline_sample.to_pylist() if isinstance(baseline_sample, pa.Table) else baseline_sample
    return attach_sample(state, rows)


def _run_series(times_us, values, stderr, quality, covariates, config, state, subject, indicator, order) -> _SeriesRun:
    """The engine of :func:`detect_shifts`: the finished :class:`_SeriesRun` (rows, day states
    and the windows that entered the baseline sample)."""
    t, v, se, codes = _checked_series(times_us, values, stderr, quality)
    n = t.size
    names = tuple(config.compensated_covariates())
    digest = settings_digest(config, order)
    polynomial, hinge = covariate_model_of(config, order)
    state = resume_or_start(state, digest, names, polynomial, subject, indicator, int(t[0]) if n else None, hinge)
    x = _covariate_matrix(covariates, names, n)
    run = _SeriesRun(config, state)
    if n:
        days = local_days(t, config.timezone)
        edges = np.concatenate(([0], np.flatnonzero(np.diff(days)) + 1, [n]))
        for a, b in zip(edges[:-1], edges[1:]):
            run.process_day(t[a:b], v[a:b], se[a:b], codes[a:b], None if x is None else x[a:b], int(days[a]))
    return run


# --------------------------------------------------------------------------------------------
# Rows in, rows out (what the Beam transform calls)


@dataclasses.dataclass
class SeriesOutcome:
    """Result of :func:`detect_shifts_for_rows`: what the Beam outputs carry."""

    #: SHIFTS rows of the series
    shifts: pa.Table
    #: STATE rows, one per local day processed
    states: pa.Table
    rejects: List[Reject]
    #: BASELINE_SAMPLE rows of the windows that entered the baseline sample in this run
    baseline_sample: pa.Table = dataclasses.field(default_factory=tables.BASELINE_SAMPLE.empty_table)

    @property
    def shifted_windows(self) -> int:
        """Rows in state "shifted"."""
        return sum(1 for s in self.shifts.column("state").to_pylist() if s == SHIFTED)


def _empty_outcome(rejects) -> SeriesOutcome:
    return SeriesOutcome(tables.SHIFTS.empty_table(), tables.STATE.empty_table(), rejects)


def budget_limits(config, series: int) -> Dict[str, float]:
    """CUSUM h and EWMA L from ``[shifts] false_alarms_per_year`` for an asset of ``series``
    monitored series (the charts in use only; explicit ``cusum_h`` / ``ewma_L`` win: left out).

    The budget is divided over the series and their charts
    (:func:`~corrtransforms.numerics.arl.run_length_for_budget`), with ``[windows] hop_s`` giving
    the windows per year, and each limit is the one whose in-control ARL is that many windows
    (:func:`~corrtransforms.numerics.arl.limit_for_run_length`). The detectors chart
    standardised one-step AR(1) prediction errors, independent N(0, 1) when in control, so the
    ARL of independent data applies to serially correlated indicators too. Empty without a
    budget. These are the known-parameter limits; the fit widens them for the baseline's
    estimation error as it widens configured ones (:func:`limit_for_estimated_parameters`).
    """
    s = config.shifts
    if s.false_alarms_per_year is None:
        return {}
    charts = [c for c in ("cusum", "ewma") if s.detector in (c, "both")]
    windows_per_year = SECONDS_PER_YEAR / config.windows.hop_s
    arl0 = run_length_for_budget(s.false_alarms_per_year, max(int(series), 1), windows_per_year, len(charts))
    found: Dict[str, float] = {}
    if "cusum" in charts and "cusum_h" not in s.explicit_limits:
        found["cusum_h"] = limit_for_run_length("cusum", arl0, k=s.cusum_k)
    if "ewma" in charts and "ewma_L" not in s.explicit_limits:
        found["ewma_L"] = limit_for_run_length("ewma", arl0, smoothing=s.ewma_lambda)
    return found


def with_budget_limits(config, series: int):
    """``config`` with ``[shifts] cusum_h`` / ``ewma_L`` replaced by :func:`budget_limits` (the
    same object without a budget). The state's settings digest names the budget, not these
    values (:func:`corrtransforms.stages.state.settings_digest`), so a later run with another
    series count still resumes; the limits a series uses are those stored at its baseline fit
    (``cusum_h_used`` / ``ewma_L_used``)."""
    limits = budget_limits(config, series)
    if not limits:
        return config
    return dataclasses.replace(config, shifts=dataclasses.replace(config.shifts, **limits))


def row_role(row: IndicatorRow, config) -> Optional[str]:
    """What the shifts stage does with an indicator row: ``"covariate"`` (a window mean used for
    compensation), ``"monitored"`` (a series the detectors run on) or None (left alone)."""
    if row.indicator == COVARIATE_INDICATOR:
        return "covariate"
    if row.indicator in config.shifts.indicators and row.subject not in config.channels.covariates:
        return "monitored"
    return None


def covariates_for_window(
    window_start_us: int, rows: Iterable[IndicatorRow], asset: str = ""
) -> Tuple[Dict[str, float], List[Reject]]:
    """Covariate means of one window from its ``covariate_mean`` indicator rows.

    Returns
    -------
    means : dict covariate -> float
        Conflicting duplicates become NaN (missing).
    rejects : list of Reject
        One ``duplicate_covariate_rows`` per covariate with several rows.
    """
    seen: Dict[str, List[float]] = {}
    for row in rows:
        seen.setdefault(row.subject, []).append(float(row.value))
    means, rejects = {}, []
    for name in sorted(seen):
        found = seen[name]
        if len(found) == 1:
            means[name] = found[0]
            continue
        means[name] = float("nan")
        rejects.append(
            Reject(
                STAGE,
                iso_utc(window_start_us),
                name,
                "duplicate_covariate_rows",
                f"{len(found)} covariate_mean rows: {sorted(map(repr, found))}",
                asset=asset,
                window_start_us=int(window_start_us),
            )
        )
    return means, rejects


def _unique_rows(rows: List[IndicatorRow], asset: str, indicator: str) -> Tuple[List[IndicatorRow], List[Reject]]:
    """One row per window, in time order (a deterministic choice among duplicates), and a
    ``duplicate_indicator_rows`` finding for each row left out."""
    rows = sorted(
        rows, key=lambda r: (int(r.window_start_us), repr(float(r.value)), repr(float(r.stderr)), str(r.quality))
    )
    unique: List[IndicatorRow] = []
    rejects: List[Reject] = []
    for row in rows:
        if unique and int(row.window_start_us) == int(unique[-1].window_start_us):
            kept = unique[-1]
            rejects.append(
                Reject.for_window(
                    asset,
                    int(row.window_start_us),
                    STAGE,
                    "duplicate_indicator_rows",
                    f"{indicator}: value {row.value!r} stderr {row.stderr!r} not used; "
                    f"kept value {kept.value!r} stderr {kept.stderr!r}",
                    subject=row.subject,
                )
            )
            continue
        unique.append(row)
    return unique, rejects


def _rows_after_state(
    unique: List[IndicatorRow], blocking: ShiftState, asset: str, indicator: str
) -> Tuple[List[IndicatorRow], List[Reject]]:
    """The rows after the earliest resumable state, and a ``window_before_state`` finding for
    each row at or before it (such a window cannot be replayed into that state)."""
    blocked_at = int(blocking.window_start_us)  # type: ignore[arg-type]  # a resumable state has a window
    late = [
        Reject.for_window(
            asset,
            int(r.window_start_us),
            STAGE,
            "window_before_state",
            f"{indicator}: the earliest resumable state is at {iso_utc(blocked_at)}",
            subject=r.subject,
        )
        for r in unique
        if int(r.window_start_us) <= blocked_at
    ]
    return [r for r in unique if int(r.window_start_us) > blocked_at], late


def detect_shifts_for_rows(
    rows: Iterable[IndicatorRow],
    covariates_by_window: Mapping[int, Mapping[str, float]],
    config,
    resume_states: Iterable[Any] = (),
    order: Optional[int] = None,
    baseline_sample: Any = (),
) -> SeriesOutcome:
    """:func:`detect_shifts` on the indicator rows of one (subject, indicator) series.

    Parameters
    ----------
    rows : iterable of IndicatorRow
        All rows of one subject and indicator, in any order.
    covariates_by_window : mapping window_start_us -> {covariate: mean}
        Window means of the covariates (missing windows or names are NaN).
    config : AssetConfig
    resume_states : pyarrow.Table or iterable of ShiftState or STATE rows
        Earlier states (any series, any days); the latest state of this series before the first
        window is resumed (:func:`select_resume_state`).
    order : {1, 2}, optional
        Covariate model order (None: ``[shifts] model``).
    baseline_sample : pyarrow.Table or iterable of BASELINE_SAMPLE rows
        The baseline sample written by earlier runs (needed when the resumed state is still
        accumulating its baseline; rows of other series are ignored).

    Returns
    -------
    SeriesOutcome
        SHIFTS, STATE and BASELINE_SAMPLE tables of the series and the rejects (duplicates,
        windows not after the state, state mismatch or an incomplete baseline sample,
        failures). Nothing is dropped without a Reject.
    """
    rows = list(rows)
    if not rows:
        return _empty_outcome([])
    asset = config.name
    subject, indicator = rows[0].subject, rows[0].indicator
    unique, rejects = _unique_rows(rows, asset, indicator)
    state, blocking = select_resume_state(resume_states, subject, indicator, int(unique[0].window_start_us))
    if blocking is not None:
        unique, late = _rows_after_state(unique, blocking, asset, indicator)
        rejects += late
        state = blocking
        if not unique:
            return _empty_outcome(rejects)
    names = tuple(config.compensated_covariates())
    times = np.array([int(r.window_start_us) for r in unique], dtype=np.int64)
    covariates = {
        name: np.array([float(covariates_by_window.get(int(ti), {}).get(name, float("nan"))) for ti in times])
        for name in names
    }
    unit = unique[0].unit
    try:
        state = _with_sample(state, baseline_sample, config, order)
        run = _run_series(
            times,
            [float(r.value) for r in unique],
            [float(r.stderr) for r in unique],
            [r.quality for r in unique],
            covariates,
            config,
            state,
            subject,
            indicator,
            order,
        )
    except StateMismatchError as err:
        rejects.append(
            Reject(
                STAGE,
                "state",
                subject,
                "baseline_sample_incomplete" if isinstance(err, IncompleteSampleError) else "state_mismatch",
                f"{indicator}: {err}",
                asset=asset,
                date=day_date(int(local_days(times[:1], config.timezone)[0])).isoformat(),
            )
        )
        return _empty_outcome(rejects)
    except Exception as err:  # noqa: BLE001 - routed to the rejects table with its text
        rejects.append(
            Reject(
                STAGE,
                iso_utc(int(times[0])),
                subject,
                "shift_detection_failed",
                f"{indicator}: {type(err).__name__}: {err}",
                asset=asset,
                window_start_us=int(times[0]),
            )
        )
        return _empty_outcome(rejects)
    return SeriesOutcome(
        run.table(subject, indicator, unit),
        states_table(run.day_states),
        rejects,
        run.sample_table(subject, indicator, unit),
    )
