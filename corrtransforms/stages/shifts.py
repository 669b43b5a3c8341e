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

:func:`shift_episodes` summarises a shifts table into one row per alarm episode.
"""
from __future__ import annotations

import copy
import dataclasses
import datetime as _dt
import hashlib
import json
import math
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa

from corrtransforms import tables
from corrtransforms.numerics.robust import day_date, day_number, local_days, period_position
from corrtransforms.numerics.covariate_model import BaselineModel, fit_baseline_model
from corrtransforms.numerics.detectors import cusum_path, cusum_run_lengths, cusum_run_sums, ewma_limits, ewma_path
from corrtransforms.records import IndicatorRow, quality_codes, quality_text
from corrtransforms.rejects import Reject, iso_utc

BASELINE, NORMAL, SHIFTED = "baseline", "normal", "shifted"
ACCUMULATING, FITTED = "accumulating", "fitted"
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
}
_EPOCH_UTC = _dt.datetime(1970, 1, 1, tzinfo=_dt.timezone.utc)


#: growth of the baseline sample, as a fraction, after which the provisional model is refitted
PROVISIONAL_REFIT_GROWTH = 0.10


def provisional_refit_point(first: int, count: int, growth: float = None) -> int:
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


class StateMismatchError(ValueError):
    """A resumed state does not fit this run (other settings, other series, or later windows)."""


# --------------------------------------------------------------------------------------------
# Settings and time helpers


def settings_digest(config, order: int = 1) -> str:
    """Digest of every setting that changes shift rows; stored in the state and checked on resume.

    Parameters
    ----------
    config : corrtransforms.config.AssetConfig
    order : int
        Covariate model order.

    Returns
    -------
    str
        First 16 hex digits of the SHA-256 of the canonical JSON of ``[baseline]``, the detector
        settings of ``[shifts]``, the compensated covariates, the time zone and the order.
    """
    b, s = config.baseline, config.shifts
    plain = {
        "baseline": [b.start.isoformat() if b.start else None, b.end.isoformat() if b.end else None,
                     b.windows, b.min_windows],
        "shifts": [s.detector, s.cusum_k, s.cusum_h, s.ewma_lambda, s.ewma_L],
        "covariates": list(config.compensated_covariates()),
        "timezone": config.archive.timezone,
        "order": order,
        "format": 1,
    }
    text = json.dumps(plain, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def _to_us(value) -> Optional[int]:
    if value is None:
        return None
    if isinstance(value, _dt.datetime):
        if value.tzinfo is None:
            value = value.replace(tzinfo=_dt.timezone.utc)
        delta = value - _EPOCH_UTC
        return (delta.days * 86400 + delta.seconds) * 1_000_000 + delta.microseconds
    return int(value)


def _to_datetime(us: Optional[int]) -> Optional[_dt.datetime]:
    if us is None:
        return None
    return _EPOCH_UTC + _dt.timedelta(microseconds=int(us))


# --------------------------------------------------------------------------------------------
# State


@dataclasses.dataclass
class ShiftState:
    """Everything needed to continue one series after its last processed window.

    While ``phase == "accumulating"`` the baseline sample is carried (values, stderr and
    covariates of the usable baseline windows); once ``"fitted"``, the baseline model and the
    detector statistics. :meth:`to_row` / :meth:`from_row` convert to and from a row of
    :data:`corrtransforms.tables.STATE` exactly (float64 throughout).
    """

    subject: str
    indicator: str
    settings: str
    covariates: Tuple[str, ...] = ()
    order: int = 1
    window_start_us: Optional[int] = None
    local_day: Optional[int] = None
    phase: str = ACCUMULATING
    windows_seen: int = 0
    sample_value: List[float] = dataclasses.field(default_factory=list)
    sample_stderr: List[float] = dataclasses.field(default_factory=list)
    sample_covariates: List[float] = dataclasses.field(default_factory=list)
    model: Optional[BaselineModel] = None
    cusum_pos: float = 0.0
    cusum_neg: float = 0.0
    run_start_pos: Optional[int] = None
    run_start_neg: Optional[int] = None
    run_count_pos: int = 0
    run_count_neg: int = 0
    run_resid_pos: float = 0.0
    run_resid_neg: float = 0.0
    ewma: float = 0.0
    ewma_count: int = 0
    ewma_limit: float = float("nan")
    state: str = BASELINE
    onset: Optional[int] = None
    direction: int = 0
    shift_size: float = float("nan")
    detector: Optional[str] = None
    first_alarm: Optional[int] = None

    # -- serialisation ------------------------------------------------------------------------
    def to_row(self) -> Dict[str, Any]:
        """One row of the STATE table (timestamps as UTC datetimes, as pyarrow returns them)."""
        m = self.model
        return {
            "window_start": _to_datetime(self.window_start_us),
            "local_date": day_date(self.local_day) if self.local_day is not None else None,
            "subject": self.subject,
            "indicator": self.indicator,
            "settings": self.settings,
            "phase": self.phase,
            "windows_seen": int(self.windows_seen),
            "sample_value": [float(v) for v in self.sample_value],
            "sample_stderr": [float(v) for v in self.sample_stderr],
            "sample_covariates": [float(v) for v in self.sample_covariates],
            "covariates": list(self.covariates),
            "model_order": int(self.order),
            "model_n": None if m is None else int(m.n),
            "model_location": None if m is None else m.location,
            "model_coefficients": None if m is None else list(m.coefficients),
            "model_covariate_center": None if m is None else list(m.center),
            "model_scale": None if m is None else m.scale,
            "model_stderr_sq": None if m is None else m.stderr_sq,
            "resid_scale": None if m is None else m.resid_scale,
            "r_squared": None if m is None else m.r_squared,
            "model_quality": None if m is None else quality_text(m.quality),
            "cusum_pos": self.cusum_pos,
            "cusum_neg": self.cusum_neg,
            "run_start_pos": _to_datetime(self.run_start_pos),
            "run_start_neg": _to_datetime(self.run_start_neg),
            "run_count_pos": int(self.run_count_pos),
            "run_count_neg": int(self.run_count_neg),
            "run_resid_pos": self.run_resid_pos,
            "run_resid_neg": self.run_resid_neg,
            "ewma": self.ewma,
            "ewma_count": int(self.ewma_count),
            "state": self.state,
            "onset": _to_datetime(self.onset),
            "direction": int(self.direction),
            "shift_size": self.shift_size,
            "detector": self.detector,
            "first_alarm": _to_datetime(self.first_alarm),
            "ewma_limit": self.ewma_limit,
        }

    @classmethod
    def from_row(cls, row: Mapping[str, Any]) -> "ShiftState":
        """Inverse of :meth:`to_row` (also accepts integer microseconds for timestamps)."""

        def num(name, default=float("nan")):
            value = row.get(name)
            return default if value is None else float(value)

        covariates = tuple(row.get("covariates") or ())
        model = None
        if row.get("model_n") is not None:
            quality = row.get("model_quality") or "ok"
            model = BaselineModel(
                covariates=covariates, order=int(row["model_order"]), location=num("model_location"),
                coefficients=tuple(float(c) for c in row["model_coefficients"] or ()),
                center=tuple(float(c) for c in row["model_covariate_center"] or ()),
                scale=num("model_scale"), stderr_sq=num("model_stderr_sq"),
                resid_scale=num("resid_scale"), r_squared=num("r_squared"), n=int(row["model_n"]),
                quality=() if quality == "ok" else tuple(quality.split(";")))
        local_date = row.get("local_date")
        if isinstance(local_date, _dt.date):
            local_date = day_number(local_date)
        return cls(
            subject=row["subject"], indicator=row["indicator"], settings=row["settings"],
            covariates=covariates, order=int(row.get("model_order") or 1),
            window_start_us=_to_us(row.get("window_start")),
            local_day=None if local_date is None else int(local_date),
            phase=row["phase"], windows_seen=int(row["windows_seen"]),
            sample_value=[float(v) for v in row.get("sample_value") or ()],
            sample_stderr=[float(v) for v in row.get("sample_stderr") or ()],
            sample_covariates=[float(v) for v in row.get("sample_covariates") or ()],
            model=model,
            cusum_pos=num("cusum_pos", 0.0), cusum_neg=num("cusum_neg", 0.0),
            run_start_pos=_to_us(row.get("run_start_pos")), run_start_neg=_to_us(row.get("run_start_neg")),
            run_count_pos=int(row.get("run_count_pos") or 0), run_count_neg=int(row.get("run_count_neg") or 0),
            run_resid_pos=num("run_resid_pos", 0.0), run_resid_neg=num("run_resid_neg", 0.0),
            ewma=num("ewma", 0.0), ewma_count=int(row.get("ewma_count") or 0),
            ewma_limit=num("ewma_limit"), state=row["state"], onset=_to_us(row.get("onset")),
            direction=int(row.get("direction") or 0), shift_size=num("shift_size"),
            detector=row.get("detector"), first_alarm=_to_us(row.get("first_alarm")),
        )


def states_table(states: Iterable[ShiftState]) -> pa.Table:
    """STATE table of the given states."""
    return pa.Table.from_pylist([s.to_row() for s in states], schema=tables.STATE)


def states_from_table(table: pa.Table) -> List[ShiftState]:
    """States from a STATE table (e.g. read back with pyarrow.dataset)."""
    return [ShiftState.from_row(row) for row in table.to_pylist()]


def select_resume_state(states: Iterable[Any], subject: str, indicator: str,
                        first_window_us: int) -> Tuple[Optional[ShiftState], Optional[ShiftState]]:
    """The state to resume a series from: the latest one before the run's first window.

    Parameters
    ----------
    states : pyarrow.Table or iterable of ShiftState or STATE rows
        Candidate states (any series, any day; e.g. the whole state table).
    subject, indicator : str
        The series.
    first_window_us : int
        First window of this run.

    Returns
    -------
    chosen : ShiftState or None
        Latest state of the series with ``window_start < first_window_us``.
    blocking : ShiftState or None
        When states of the series exist but none is before the run: the earliest of them (the
        run would overlap already processed windows); None otherwise.
    """
    if isinstance(states, pa.Table):
        states = states.to_pylist()
    candidates = []
    for s in states:
        s = s if isinstance(s, ShiftState) else ShiftState.from_row(s)
        if s.subject == subject and s.indicator == indicator:
            candidates.append(s)
    before = [s for s in candidates if s.window_start_us < first_window_us]
    if before:
        return max(before, key=lambda s: s.window_start_us), None
    if candidates:
        return None, min(candidates, key=lambda s: s.window_start_us)
    return None, None


# --------------------------------------------------------------------------------------------
# Core per-series processing


class _Columns:
    """Per-row output columns, appended day by day."""

    NAMES = ("window_start", "value", "stderr", "expected", "resid_scale", "z", "cusum_pos",
             "cusum_neg", "ewma", "ewma_limit", "state", "onset", "direction", "shift_size",
             "detector", "first_alarm", "quality")

    def __init__(self):
        self.parts = {name: [] for name in self.NAMES}

    def add(self, **columns):
        for name in self.NAMES:
            self.parts[name].append(columns[name])

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
    return any(c.startswith("nonstationary") for c in codes)


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
        self.columns = _Columns()
        self.day_states: List[ShiftState] = []
        # provisional model of the baseline phase: (sample size at its fit, model); refitted
        # on the schedule of provisional_refit_point, from the prefix of the carried sample
        self.provisional: Optional[Tuple[int, BaselineModel]] = None
        self.provisional_fits = 0

    # -- baseline -----------------------------------------------------------------------------
    def _sample_arrays(self):
        st = self.state
        x = np.asarray(st.sample_covariates, dtype=float).reshape(len(st.sample_value), self.p) if self.p else None
        return np.asarray(st.sample_value, dtype=float), np.asarray(st.sample_stderr, dtype=float), x

    def _fit(self) -> BaselineModel:
        values, stderr, x = self._sample_arrays()
        return fit_baseline_model(values, stderr, x, self.state.covariates,
                                  self.config.baseline.min_windows, self.state.order)

    def _finalize(self):
        st = self.state
        st.model = self._fit()
        st.phase = FITTED
        st.sample_value, st.sample_stderr, st.sample_covariates = [], [], []
        st.state = NORMAL

    def _baseline_window(self, t, v, se, codes, x, day):
        """One window while the baseline accumulates; returns its row values."""
        st = self.state
        position = period_position(day, st.windows_seen, self.config.baseline)
        extra = []
        expected = resid_scale = z = float("nan")
        count = len(st.sample_value)
        needed = 3 + self.p * st.order if self.p else 3
        if position == "inside" and count >= needed:
            point = provisional_refit_point(needed, count)
            if self.provisional is None or self.provisional[0] != point:
                values, stderr, xs = self._sample_arrays()
                fitted = fit_baseline_model(values[:point], stderr[:point],
                                            None if xs is None else xs[:point], st.covariates,
                                            self.config.baseline.min_windows, st.order)
                self.provisional = (point, fitted)
                self.provisional_fits += 1
            model = self.provisional[1]
            exp_arr, missing = model.predict(None if x is None else x[None, :], n=1)
            expected, resid_scale = float(exp_arr[0]), model.resid_scale
            denominator = math.sqrt(resid_scale ** 2 + se ** 2) if np.isfinite(se) else float("nan")
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
                if self.p:
                    st.sample_covariates.extend(float(c) for c in x)
            else:
                extra.append("not_in_baseline_sample")
        st.windows_seen += 1
        return expected, resid_scale, z, quality_text(codes + tuple(extra))

    # -- one day --------------------------------------------------------------------------------
    def process_day(self, t, v, se, codes, x, day):
        st = self.state
        baseline = self.config.baseline
        n = len(t)
        base_rows = []
        i = 0
        while i < n and st.phase == ACCUMULATING:
            if period_position(day, st.windows_seen, baseline) == "after":
                self._finalize()
                break
            base_rows.append(self._baseline_window(t[i], v[i], se[i], codes[i],
                                                   None if x is None else x[i], day))
            i += 1
            if not baseline.by_dates and st.windows_seen >= baseline.windows:
                self._finalize()
        if base_rows:
            expected, resid_scale, z, quality = (list(c) for c in zip(*base_rows))
            m = len(base_rows)
            nan = np.full(m, np.nan)
            self.columns.add(window_start=t[:m], value=v[:m], stderr=se[:m],
                             expected=np.asarray(expected, float), resid_scale=np.asarray(resid_scale, float),
                             z=np.asarray(z, float), cusum_pos=nan, cusum_neg=nan, ewma=nan, ewma_limit=nan,
                             state=[BASELINE] * m, onset=[None] * m, direction=np.zeros(m, np.int8),
                             shift_size=nan, detector=[None] * m, first_alarm=[None] * m, quality=quality)
        if i < n:
            self._fitted_windows(t[i:], v[i:], se[i:], codes[i:], None if x is None else x[i:])
        if st.phase == ACCUMULATING and baseline.by_dates and day >= day_number(baseline.end):
            self._finalize()
        st.window_start_us = int(t[-1])
        st.local_day = int(day)
        self.day_states.append(copy.deepcopy(st))

    def _fitted_windows(self, t, v, se, codes, x):
        st = self.state
        model = st.model
        n = len(t)
        st.windows_seen += n
        expected, covariate_missing = model.predict(x, n=n)
        resid = v - expected
        with np.errstate(invalid="ignore", divide="ignore"):
            denominator = np.sqrt(model.resid_scale ** 2 + se * se)
            z = np.where(denominator > 0, resid / denominator, np.nan)
        nonstationary = np.array([_is_nonstationary(c) for c in codes], dtype=bool)
        usable = np.isfinite(z) & ~nonstationary
        model_codes = tuple(model.quality)
        quality = []
        for j in range(n):
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
        resid_scale = np.full(n, model.resid_scale)
        if model.too_short:
            nan = np.full(n, np.nan)
            st.state = NORMAL
            self.columns.add(window_start=t, value=v, stderr=se, expected=expected, resid_scale=resid_scale,
                             z=z, cusum_pos=nan, cusum_neg=nan, ewma=nan, ewma_limit=nan,
                             state=[NORMAL] * n, onset=[None] * n, direction=np.zeros(n, np.int8),
                             shift_size=nan, detector=[None] * n, first_alarm=[None] * n, quality=quality)
            return
        zu, ru, tu = z[usable], resid[usable], t[usable]
        m = zu.size
        upper, lower = cusum_path(zu, self.k, st.cusum_pos, st.cusum_neg)
        n_upper = cusum_run_lengths(upper, st.run_count_pos)
        n_lower = cusum_run_lengths(lower, st.run_count_neg)
        sum_upper = cusum_run_sums(ru, n_upper, st.run_resid_pos)
        sum_lower = cusum_run_sums(ru, n_lower, st.run_resid_neg)
        ewma = ewma_path(zu, self.smoothing, st.ewma)
        limit = ewma_limits(st.ewma_count + 1 + np.arange(m), self.smoothing, self.width, exact=True)

        def run_start(lengths, carried, j):
            if lengths[j] == 0:
                return None
            first = j - int(lengths[j]) + 1
            return int(tu[first]) if first >= 0 else carried

        # per used window: state bookkeeping (m is at most the windows of one day)
        state_u, onset_u, direction_u, size_u, detector_u, alarm_u = [], [], [], [], [], []
        start_upper_u, start_lower_u = [], []
        previous, first_alarm = st.state, st.first_alarm
        for j in range(m):
            start_upper_u.append(run_start(n_upper, st.run_start_pos, j))
            start_lower_u.append(run_start(n_lower, st.run_start_neg, j))
            cusum_up = self.use_cusum and upper[j] > self.h
            cusum_down = self.use_cusum and lower[j] > self.h
            ewma_up = self.use_ewma and ewma[j] > limit[j]
            ewma_down = self.use_ewma and ewma[j] < -limit[j]
            up, down = cusum_up or ewma_up, cusum_down or ewma_down
            if up or down:
                direction = 1 if (up and not down) or (up and down and upper[j] >= lower[j]) else -1
                lengths, sums, starts = ((n_upper, sum_upper, start_upper_u) if direction > 0
                                         else (n_lower, sum_lower, start_lower_u))
                if lengths[j] > 0:
                    onset, size = starts[j], float(sums[j] / lengths[j])
                else:
                    onset, size = int(tu[j]), float(ru[j])
                names = [name for name, on in (("cusum", cusum_up or cusum_down), ("ewma", ewma_up or ewma_down)) if on]
                first_alarm = first_alarm if previous == SHIFTED else int(tu[j])
                previous = SHIFTED
                state_u.append(SHIFTED)
                onset_u.append(onset)
                direction_u.append(direction)
                size_u.append(size)
                detector_u.append("+".join(names))
                alarm_u.append(first_alarm)
            else:
                previous, first_alarm = NORMAL, None
                state_u.append(NORMAL)
                onset_u.append(None)
                direction_u.append(0)
                size_u.append(float("nan"))
                detector_u.append(None)
                alarm_u.append(None)

        # rows: used windows take their values, held windows carry the previous ones
        carry = np.concatenate(([0], np.cumsum(usable)))[1:]  # 0 = from the incoming state

        def numeric(start_value, values):
            return np.concatenate(([start_value], np.asarray(values, dtype=float)))[carry]

        def listed(start_value, values):
            table = [start_value] + list(values)
            return [table[c] for c in carry]

        self.columns.add(
            window_start=t, value=v, stderr=se, expected=expected, resid_scale=resid_scale, z=z,
            cusum_pos=numeric(st.cusum_pos, upper), cusum_neg=numeric(st.cusum_neg, lower),
            ewma=numeric(st.ewma, ewma), ewma_limit=numeric(st.ewma_limit, limit),
            state=listed(st.state, state_u), onset=listed(st.onset, onset_u),
            direction=numeric(st.direction, direction_u).astype(np.int8),
            shift_size=numeric(st.shift_size, size_u), detector=listed(st.detector, detector_u),
            first_alarm=listed(st.first_alarm, alarm_u), quality=quality)
        if m:
            last = m - 1
            st.cusum_pos, st.cusum_neg = float(upper[last]), float(lower[last])
            st.run_count_pos, st.run_count_neg = int(n_upper[last]), int(n_lower[last])
            st.run_resid_pos, st.run_resid_neg = float(sum_upper[last]), float(sum_lower[last])
            st.run_start_pos, st.run_start_neg = start_upper_u[last], start_lower_u[last]
            st.ewma, st.ewma_count, st.ewma_limit = float(ewma[last]), st.ewma_count + m, float(limit[last])
            st.state, st.onset, st.direction = state_u[last], onset_u[last], direction_u[last]
            st.shift_size, st.detector, st.first_alarm = size_u[last], detector_u[last], alarm_u[last]

    # -- output ---------------------------------------------------------------------------------
    def table(self, subject, indicator, unit) -> pa.Table:
        c = self.columns
        window_start = c.joined("window_start", np.int64)
        n = window_start.size
        arrays = {
            "window_start": pa.array(window_start, type=pa.int64()).cast(tables.TIMESTAMP),
            "subject": pa.array([subject] * n, pa.string()),
            "indicator": pa.array([indicator] * n, pa.string()),
        }
        for name in ("value", "stderr", "expected", "resid_scale", "z", "cusum_pos", "cusum_neg",
                     "ewma", "ewma_limit", "shift_size"):
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


def detect_shifts(times_us, values, stderr, quality, covariates, config, state: Optional[ShiftState] = None,
                  *, subject: str = "", indicator: str = "", unit: str = "",
                  order: int = 1) -> Tuple[pa.Table, List[ShiftState]]:
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
    order : {1, 2}
        Covariate model order.

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
    onset of a shift is the first window after the CUSUM of its direction last left zero; the
    size is the mean of ``value - expected`` since then.

    References
    ----------
    Page (1954); Roberts (1959); Montgomery (2009) Sections 9.1-9.2.
    """
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
    names = tuple(config.compensated_covariates())
    digest = settings_digest(config, order)
    if state is None:
        state = ShiftState(subject=subject, indicator=indicator, settings=digest, covariates=names, order=order)
    else:
        if state.settings != digest:
            raise StateMismatchError(
                f"state settings {state.settings} differ from this configuration's {digest}")
        if (subject and subject != state.subject) or (indicator and indicator != state.indicator):
            raise StateMismatchError(f"state is for {state.subject}/{state.indicator}, not {subject}/{indicator}")
        if n and state.window_start_us is not None and t[0] <= state.window_start_us:
            raise StateMismatchError(
                f"first window {iso_utc(int(t[0]))} is not after the state's last window {iso_utc(state.window_start_us)}")
        state = copy.deepcopy(state)
    subject = subject or state.subject
    indicator = indicator or state.indicator
    x = _covariate_matrix(covariates, names, n)
    run = _SeriesRun(config, state)
    if n:
        days = local_days(t, config.archive.timezone)
        edges = np.concatenate(([0], np.flatnonzero(np.diff(days)) + 1, [n]))
        for a, b in zip(edges[:-1], edges[1:]):
            run.process_day(t[a:b], v[a:b], se[a:b], codes[a:b], None if x is None else x[a:b], int(days[a]))
    return run.table(subject, indicator, unit), run.day_states


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

    @property
    def shifted_windows(self) -> int:
        """Rows in state "shifted"."""
        return sum(1 for s in self.shifts.column("state").to_pylist() if s == SHIFTED)


def _empty_outcome(rejects) -> SeriesOutcome:
    return SeriesOutcome(tables.SHIFTS.empty_table(), tables.STATE.empty_table(), rejects)


def row_role(row: IndicatorRow, config) -> Optional[str]:
    """What the shifts stage does with an indicator row: ``"covariate"`` (a window mean used for
    compensation), ``"monitored"`` (a series the detectors run on) or None (left alone)."""
    if row.indicator == COVARIATE_INDICATOR:
        return "covariate"
    if row.indicator in config.shifts.indicators and row.subject not in config.channels.covariates:
        return "monitored"
    return None


def covariates_for_window(window_start_us: int, rows: Iterable[IndicatorRow],
                          asset: str = "") -> Tuple[Dict[str, float], List[Reject]]:
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
        rejects.append(Reject(STAGE, iso_utc(window_start_us), name, "duplicate_covariate_rows",
                              f"{len(found)} covariate_mean rows: {sorted(map(repr, found))}",
                              asset=asset, window_start_us=int(window_start_us)))
    return means, rejects


def detect_shifts_for_rows(rows: Iterable[IndicatorRow], covariates_by_window: Mapping[int, Mapping[str, float]],
                           config, resume_states: Iterable[Any] = (), order: int = 1) -> SeriesOutcome:
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
    order : {1, 2}
        Covariate model order.

    Returns
    -------
    SeriesOutcome
        SHIFTS and STATE tables of the series and the rejects (duplicates, windows not after
        the state, state mismatch, failures). Nothing is dropped without a Reject.
    """
    rows = list(rows)
    if not rows:
        return _empty_outcome([])
    asset = config.name
    subject, indicator = rows[0].subject, rows[0].indicator
    rejects: List[Reject] = []
    rows.sort(key=lambda r: (int(r.window_start_us), repr(float(r.value)), repr(float(r.stderr)), str(r.quality)))
    unique: List[IndicatorRow] = []
    for row in rows:
        if unique and int(row.window_start_us) == int(unique[-1].window_start_us):
            kept = unique[-1]
            rejects.append(Reject(STAGE, iso_utc(int(row.window_start_us)), subject, "duplicate_indicator_rows",
                                  f"{indicator}: value {row.value!r} stderr {row.stderr!r} not used; "
                                  f"kept value {kept.value!r} stderr {kept.stderr!r}",
                                  asset=asset, window_start_us=int(row.window_start_us)))
            continue
        unique.append(row)
    state, blocking = select_resume_state(resume_states, subject, indicator, int(unique[0].window_start_us))
    if blocking is not None:
        stale = [r for r in unique if int(r.window_start_us) <= blocking.window_start_us]
        for r in stale:
            rejects.append(Reject(STAGE, iso_utc(int(r.window_start_us)), subject, "window_before_state",
                                  f"{indicator}: the earliest resumable state is at {iso_utc(blocking.window_start_us)}",
                                  asset=asset, window_start_us=int(r.window_start_us)))
        unique = [r for r in unique if int(r.window_start_us) > blocking.window_start_us]
        state = blocking
        if not unique:
            return _empty_outcome(rejects)
    names = tuple(config.compensated_covariates())
    times = np.array([int(r.window_start_us) for r in unique], dtype=np.int64)
    covariates = {name: np.array([float(covariates_by_window.get(int(ti), {}).get(name, float("nan")))
                                  for ti in times]) for name in names}
    try:
        table, day_states = detect_shifts(
            times, [float(r.value) for r in unique], [float(r.stderr) for r in unique],
            [r.quality for r in unique], covariates, config, state,
            subject=subject, indicator=indicator, unit=unique[0].unit, order=order)
    except StateMismatchError as err:
        rejects.append(Reject(STAGE, "state", subject, "state_mismatch", f"{indicator}: {err}", asset=asset,
                              date=day_date(int(local_days(times[:1], config.archive.timezone)[0])).isoformat()))
        return _empty_outcome(rejects)
    except Exception as err:  # noqa: BLE001 - routed to the rejects table with its text
        rejects.append(Reject(STAGE, iso_utc(int(times[0])), subject, "shift_detection_failed",
                              f"{indicator}: {type(err).__name__}: {err}", asset=asset,
                              window_start_us=int(times[0])))
        return _empty_outcome(rejects)
    return SeriesOutcome(table, states_table(day_states), rejects)


# --------------------------------------------------------------------------------------------
# Episodes


def shift_episodes(shifts: pa.Table) -> pa.Table:
    """Alarm summary: one row per subject, indicator and episode of consecutive shifted windows.

    Parameters
    ----------
    shifts : pyarrow.Table
        Rows of the SHIFTS schema (any number of series and days; an ``asset`` column, as read
        from the Hive folders, is kept as the first key when present).

    Returns
    -------
    pyarrow.Table
        :data:`corrtransforms.tables.EPISODES` (plus ``asset`` when given), sorted by keys and
        first alarm. An episode is identified by its ``first_alarm`` (carried in every shifted
        row), so a table holding only the latest days still groups correctly. ``onset``,
        ``direction`` and ``shift_size`` are the latest estimates (at the episode's last shifted
        window); ``status`` is ``"open"`` when the series' last row in the table is still in the
        episode.
    """
    has_asset = "asset" in shifts.column_names
    keys = (["asset"] if has_asset else []) + ["subject", "indicator"]
    schema = tables.EPISODES
    if has_asset:
        schema = schema.insert(0, pa.field("asset", pa.string(), nullable=False))
    if shifts.num_rows == 0:
        return schema.empty_table()
    columns = {name: shifts.column(name).to_pylist() for name in keys}
    start = shifts.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    first_alarm = shifts.column("first_alarm").cast(pa.int64()).to_pylist()
    onset = shifts.column("onset").cast(pa.int64()).to_pylist()
    state = shifts.column("state").to_pylist()
    direction = shifts.column("direction").to_pylist()
    size = shifts.column("shift_size").to_pylist()
    z = shifts.column("z").to_pylist()
    detector = shifts.column("detector").to_pylist()
    unit = shifts.column("unit").to_pylist()
    series_last: Dict[tuple, int] = {}
    episodes: Dict[tuple, Dict[str, Any]] = {}
    for i in range(shifts.num_rows):
        series = tuple(columns[name][i] for name in keys)
        series_last[series] = max(series_last.get(series, start[i]), start[i])
        if state[i] != SHIFTED or first_alarm[i] is None:
            continue
        key = series + (first_alarm[i],)
        e = episodes.get(key)
        if e is None:
            e = episodes[key] = {"last": start[i], "first": start[i], "n": 0, "peak": float("nan"),
                                 "detectors": set(), "unit": unit[i], "i": i}
        e["n"] += 1
        if start[i] >= e["last"]:
            e["last"], e["i"] = start[i], i
        if z[i] is not None and math.isfinite(z[i]) and not (abs(z[i]) <= e["peak"]):
            e["peak"] = abs(z[i])
        if detector[i]:
            e["detectors"].update(detector[i].split("+"))
    out = {name: [] for name in schema.names}
    for key in sorted(episodes, key=lambda k: tuple("" if v is None else v for v in k)):
        e = episodes[key]
        i = e["i"]
        series = key[:-1]
        for name, value in zip(keys, series):
            out[name].append(value)
        out["onset"].append(onset[i])
        out["first_alarm"].append(key[-1])
        out["last_window"].append(int(e["last"]))
        out["status"].append("open" if series_last[series] == e["last"] else "closed")
        out["direction"].append(direction[i])
        out["shift_size"].append(size[i])
        out["peak_abs_z"].append(e["peak"])
        out["detector"].append("+".join(d for d in ("cusum", "ewma") if d in e["detectors"]) or None)
        out["n_windows"].append(e["n"])
        out["unit"].append(e["unit"])
    arrays = []
    for field in schema:
        values = out[field.name]
        if pa.types.is_timestamp(field.type):
            arrays.append(pa.array(values, type=pa.int64()).cast(field.type))
        else:
            arrays.append(pa.array(values, type=field.type))
    return pa.Table.from_arrays(arrays, schema=schema)
