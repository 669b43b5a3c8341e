"""The detector state of one series: the record, its table form, which state a run resumes from,
and its rebuild from an indicators table.

- :class:`ShiftState`: everything needed to continue one (subject, indicator) series after its
  last processed window; :meth:`ShiftState.to_row` / :meth:`ShiftState.from_row` convert it to
  and from a row of :data:`corrtransforms.tables.STATE` exactly.
- :func:`settings_digest`: the settings a state was computed with, checked on resume.
- :func:`select_resume_state` and :func:`resume_or_start`: which state a run continues from, and
  the checks that it fits the run (:class:`StateMismatchError` otherwise).
- :func:`replay_states` / :func:`replay_tables`: when the state of a nightly run is missing (a lost partition, a changed
  output folder), the detectors are replayed over the indicators already written: shift
  detection depends only on the indicator rows and the configuration, so the replayed state
  equals the state a backfill would have written.
"""

from __future__ import annotations

import copy
import dataclasses
import datetime as _dt
import hashlib
import json
from typing import Any, Dict, Iterable, List, Mapping, NamedTuple, Optional, Tuple

import pyarrow as pa

from corrtransforms import tables
from corrtransforms.config import AssetConfig
from corrtransforms.numerics.covariate_model import MODELS, BaselineModel
from corrtransforms.records import IndicatorRow, quality_text
from corrtransforms.rejects import Reject, iso_utc
from corrtransforms.timeutil import datetime_to_us, day_date, day_number, us_to_datetime

#: values of the ``state`` column of the shifts and state tables
BASELINE, NORMAL, SHIFTED = "baseline", "normal", "shifted"
#: values of the ``phase`` column of the state table
ACCUMULATING, FITTED = "accumulating", "fitted"


class StateMismatchError(ValueError):
    """A resumed state does not fit this run (other settings, other series, or later windows)."""


class IncompleteSampleError(StateMismatchError):
    """An accumulating state's baseline sample rows are not all in the baseline_sample table."""


# --------------------------------------------------------------------------------------------
# Settings


def covariate_model_of(config, order: Optional[int] = None) -> Tuple[int, bool]:
    """``(order, hinge)`` of the covariate model: ``[shifts] model`` when ``order`` is None,
    else the polynomial of that order (the explicit argument of the stage functions)."""
    if order is None:
        return MODELS[config.shifts.model]
    return int(order), False


def settings_digest(config, order: Optional[int] = None) -> str:
    """Digest of every setting that changes shift rows; stored in the state and checked on resume.

    Parameters
    ----------
    config : corrtransforms.config.AssetConfig
    order : int, optional
        Covariate model order (None: from ``[shifts] model``, :func:`covariate_model_of`).

    Returns
    -------
    str
        First 16 hex digits of the SHA-256 of the canonical JSON of ``[baseline]``, the detector
        settings of ``[shifts]``, the compensated covariates, the time zone, the order and,
        for the hinge model only, ``"model": "hinge"`` (so the digests of linear and quadratic
        models, which the order already tells apart, stay those of states written before
        ``[shifts] model`` existed), and the covariates' ``smoothing_h`` when any is set.
    """
    order, hinge = covariate_model_of(config, order)
    b, s = config.baseline, config.shifts
    plain = {
        "baseline": [
            b.start.isoformat() if b.start else None,
            b.end.isoformat() if b.end else None,
            b.windows,
            b.min_windows,
        ],
        "shifts": [s.detector, s.cusum_k, s.cusum_h, s.ewma_lambda, s.ewma_L],
        "covariates": list(config.compensated_covariates()),
        "timezone": config.timezone,
        "order": order,
        "format": 1,
    }
    if s.false_alarms_per_year is not None:
        # h and L follow from the budget (and the series count), unless given: the budget is the setting
        plain["shifts"] = [
            s.detector,
            s.cusum_k,
            s.cusum_h if "cusum_h" in s.explicit_limits else "budget",
            s.ewma_lambda,
            s.ewma_L if "ewma_L" in s.explicit_limits else "budget",
        ]
        plain["false_alarms_per_year"] = s.false_alarms_per_year
    if hinge:
        plain["model"] = "hinge"
    smoothing = config.covariate_smoothing_h()
    if smoothing:  # only when set, so that earlier digests stay valid
        plain["smoothing_h"] = smoothing
    text = json.dumps(plain, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


# --------------------------------------------------------------------------------------------
# State


@dataclasses.dataclass
class ShiftState:
    """Everything needed to continue one series after its last processed window.

    While ``phase == "accumulating"`` the baseline sample grows (values, stderr, covariates and
    window starts of the usable baseline windows); once ``"fitted"``, the baseline model and
    the detector statistics. :meth:`to_row` / :meth:`from_row` convert to and from a row of
    :data:`corrtransforms.tables.STATE` exactly (float64 throughout), except the sample: a row
    carries only ``sample_count``, and the sample's rows live in the ``baseline_sample`` table
    (one row per window, written on its own day; :func:`attach_sample` reads it back),
    so a state row's size does not depend on the baseline's length.

    In memory, the sample lists may be longer than ``sample_count`` (the day snapshots of one
    run share one list, see :meth:`snapshot`): the first ``sample_count`` entries are this
    state's sample.
    """

    subject: str
    indicator: str
    settings: str
    covariates: Tuple[str, ...] = ()
    order: int = 1
    #: the configured model is the hinge (its fit may have fallen back to a line)
    hinge: bool = False
    window_start_us: Optional[int] = None
    local_day: Optional[int] = None
    phase: str = ACCUMULATING
    windows_seen: int = 0
    sample_value: List[float] = dataclasses.field(default_factory=list)
    sample_stderr: List[float] = dataclasses.field(default_factory=list)
    sample_covariates: List[float] = dataclasses.field(default_factory=list)
    sample_window_start: List[int] = dataclasses.field(default_factory=list)
    model: Optional[BaselineModel] = None
    # serial dependence fitted on the baseline (numerics.serial_dependence); the defaults are
    # what a state written before it was added resumes with: phi 0, no scale correction, the
    # configured limits (the old detector) and the quality code dependence_not_estimated
    dependence_phi: float = 0.0
    dependence_pairs: int = 0
    innovation_scale: float = float("nan")
    innovation_ratio: float = 1.0
    cusum_h_used: Optional[float] = None
    ewma_L_used: Optional[float] = None
    predictor_mean: float = 0.0
    predictor_var: Optional[float] = None
    predictor_window_start: Optional[int] = None
    window_spacing_s: Optional[float] = None
    sample_count: int = 0
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

    def snapshot(self) -> ShiftState:
        """This state as it stands, sharing the sample lists (no copy: O(1) per day).

        The runner appends to the lists afterwards, so the snapshot's own sample is the first
        ``sample_count`` entries (see :meth:`own_sample`). Everything else is a scalar or an
        immutable value (the baseline model is a frozen dataclass).
        """
        return dataclasses.replace(self, sample_count=len(self.sample_value))

    def own_sample(self) -> ShiftState:
        """A copy whose sample lists hold exactly its first ``sample_count`` entries."""
        n = self.sample_count
        p = len(self.covariates)
        return dataclasses.replace(
            self,
            sample_value=list(self.sample_value[:n]),
            sample_stderr=list(self.sample_stderr[:n]),
            sample_covariates=list(self.sample_covariates[: n * p]),
            sample_window_start=list(self.sample_window_start[:n]),
        )

    @property
    def needs_sample(self) -> bool:
        """True when the state is accumulating and its sample rows must be attached
        (:func:`attach_sample`) before a run can continue it."""
        return self.phase == ACCUMULATING and len(self.sample_value) < self.sample_count

    # -- serialisation ------------------------------------------------------------------------
    def to_row(self) -> Dict[str, Any]:
        """One row of the STATE table (timestamps as UTC datetimes, as pyarrow returns them)."""
        m = self.model
        return {
            "window_start": us_to_datetime(self.window_start_us),
            "local_date": day_date(self.local_day) if self.local_day is not None else None,
            "subject": self.subject,
            "indicator": self.indicator,
            "settings": self.settings,
            "phase": self.phase,
            "windows_seen": int(self.windows_seen),
            "sample_value": [],
            "sample_stderr": [],
            "sample_covariates": [],
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
            "run_start_pos": us_to_datetime(self.run_start_pos),
            "run_start_neg": us_to_datetime(self.run_start_neg),
            "run_count_pos": int(self.run_count_pos),
            "run_count_neg": int(self.run_count_neg),
            "run_resid_pos": self.run_resid_pos,
            "run_resid_neg": self.run_resid_neg,
            "ewma": self.ewma,
            "ewma_count": int(self.ewma_count),
            "state": self.state,
            "onset": us_to_datetime(self.onset),
            "direction": int(self.direction),
            "shift_size": self.shift_size,
            "detector": self.detector,
            "first_alarm": us_to_datetime(self.first_alarm),
            "ewma_limit": self.ewma_limit,
            "sample_window_start": [],
            "dependence_phi": self.dependence_phi,
            "dependence_pairs": int(self.dependence_pairs),
            "innovation_scale": self.innovation_scale,
            "innovation_ratio": self.innovation_ratio,
            "cusum_h_used": self.cusum_h_used,
            "ewma_L_used": self.ewma_L_used,
            "predictor_mean": self.predictor_mean,
            "predictor_var": self.predictor_var,
            "predictor_window_start": us_to_datetime(self.predictor_window_start),
            "window_spacing_s": self.window_spacing_s,
            "sample_count": int(self.sample_count),
            "model_form": "hinge" if self.hinge else ("quadratic" if self.order == 2 else "linear"),
            "model_knee": None if m is None else m.knee,
        }

    @classmethod
    def from_row(cls, row: Mapping[str, Any]) -> ShiftState:
        """Inverse of :meth:`to_row` (also accepts integer microseconds for timestamps)."""

        def num(name, default=float("nan")):
            value = row.get(name)
            return default if value is None else float(value)

        covariates = tuple(row.get("covariates") or ())
        model = None
        if row.get("model_n") is not None:
            quality = row.get("model_quality") or "ok"
            model = BaselineModel(
                covariates=covariates,
                order=int(row["model_order"]),
                location=num("model_location"),
                coefficients=tuple(float(c) for c in row["model_coefficients"] or ()),
                center=tuple(float(c) for c in row["model_covariate_center"] or ()),
                scale=num("model_scale"),
                stderr_sq=num("model_stderr_sq"),
                resid_scale=num("resid_scale"),
                r_squared=num("r_squared"),
                n=int(row["model_n"]),
                quality=() if quality == "ok" else tuple(quality.split(";")),
                knee=None if row.get("model_knee") is None else float(row["model_knee"]),
            )
        local_date = row.get("local_date")
        if isinstance(local_date, _dt.date):
            local_date = day_number(local_date)
        inline = row.get("sample_value") or ()  # states written before the baseline_sample table
        count = row.get("sample_count")
        return cls(
            subject=row["subject"],
            indicator=row["indicator"],
            settings=row["settings"],
            covariates=covariates,
            order=int(row.get("model_order") or 1),
            hinge=row.get("model_form") == "hinge",
            window_start_us=datetime_to_us(row.get("window_start")),
            local_day=None if local_date is None else int(local_date),
            phase=row["phase"],
            windows_seen=int(row["windows_seen"]),
            sample_value=[float(v) for v in row.get("sample_value") or ()],
            sample_stderr=[float(v) for v in row.get("sample_stderr") or ()],
            sample_covariates=[float(v) for v in row.get("sample_covariates") or ()],
            model=model,
            cusum_pos=num("cusum_pos", 0.0),
            cusum_neg=num("cusum_neg", 0.0),
            run_start_pos=datetime_to_us(row.get("run_start_pos")),
            run_start_neg=datetime_to_us(row.get("run_start_neg")),
            run_count_pos=int(row.get("run_count_pos") or 0),
            run_count_neg=int(row.get("run_count_neg") or 0),
            run_resid_pos=num("run_resid_pos", 0.0),
            run_resid_neg=num("run_resid_neg", 0.0),
            ewma=num("ewma", 0.0),
            ewma_count=int(row.get("ewma_count") or 0),
            ewma_limit=num("ewma_limit"),
            state=row["state"],
            onset=datetime_to_us(row.get("onset")),
            direction=int(row.get("direction") or 0),
            shift_size=num("shift_size"),
            detector=row.get("detector"),
            first_alarm=datetime_to_us(row.get("first_alarm")),
            sample_window_start=[int(datetime_to_us(v) or 0) for v in row.get("sample_window_start") or ()],
            dependence_phi=num("dependence_phi", 0.0),
            dependence_pairs=int(row.get("dependence_pairs") or 0),
            innovation_scale=num("innovation_scale"),
            innovation_ratio=num("innovation_ratio", 1.0),
            cusum_h_used=row.get("cusum_h_used"),
            ewma_L_used=row.get("ewma_L_used"),
            predictor_mean=num("predictor_mean", 0.0),
            predictor_var=row.get("predictor_var"),
            predictor_window_start=datetime_to_us(row.get("predictor_window_start")),
            window_spacing_s=row.get("window_spacing_s"),
            sample_count=len(inline) if count is None else int(count),
        )


def attach_sample(state: ShiftState, rows: Iterable[Mapping[str, Any]]) -> ShiftState:
    """A copy of an accumulating ``state`` with its baseline sample read back from
    BASELINE_SAMPLE rows (any series, any days: those of this series up to the state's last
    window are used, in time order; duplicates of one window, from a partition written twice,
    count once).

    Raises
    ------
    IncompleteSampleError
        The rows do not hold the ``sample_count`` windows the state counts (a lost or partly
        deleted ``baseline_sample`` partition): the run cannot continue the baseline.
    """
    if not state.needs_sample:
        return state
    last = int(state.window_start_us) if state.window_start_us is not None else None
    found: Dict[int, Mapping[str, Any]] = {}
    for r in rows:
        if r["subject"] != state.subject or r["indicator"] != state.indicator:
            continue
        start = datetime_to_us(r["window_start"])
        if start is not None and (last is None or start <= last):
            found.setdefault(int(start), r)
    if len(found) != state.sample_count:
        raise IncompleteSampleError(
            f"the baseline_sample table holds {len(found)} windows of this series up to "
            f"{iso_utc(last) if last is not None else 'its state'}, the state counts {state.sample_count}: "
            "a baseline_sample partition is missing; run with --rebuild_state or rerun the backfill"
        )
    starts = sorted(found)
    p = len(state.covariates)
    covariates: List[float] = []
    for t in starts:
        values = list(found[t].get("covariates") or ())
        covariates.extend(float(c) for c in (values if len(values) == p else [float("nan")] * p))
    return dataclasses.replace(
        state,
        sample_value=[float(found[t]["value"]) for t in starts],
        sample_stderr=[float(found[t]["stderr"]) for t in starts],
        sample_covariates=covariates,
        sample_window_start=starts,
    )


def states_table(states: Iterable[ShiftState]) -> pa.Table:
    """STATE table of the given states."""
    return pa.Table.from_pylist([s.to_row() for s in states], schema=tables.STATE)


def states_from_table(table: pa.Table) -> List[ShiftState]:
    """States from a STATE table (e.g. read back with pyarrow.dataset)."""
    return [ShiftState.from_row(row) for row in table.to_pylist()]


def select_resume_state(
    states: Iterable[Any], subject: str, indicator: str, first_window_us: int
) -> Tuple[Optional[ShiftState], Optional[ShiftState]]:
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
        if s.subject == subject and s.indicator == indicator and s.window_start_us is not None:
            candidates.append(s)

    def start(s: ShiftState) -> int:
        return int(s.window_start_us)  # type: ignore[arg-type]  # not None: filtered above

    before = [s for s in candidates if start(s) < first_window_us]
    if before:
        return max(before, key=start), None
    if candidates:
        return None, min(candidates, key=start)
    return None, None


def resume_or_start(
    state: Optional[ShiftState],
    digest: str,
    covariates: Tuple[str, ...],
    order: int,
    subject: str,
    indicator: str,
    first_window_us: Optional[int],
    hinge: bool = False,
) -> ShiftState:
    """The state a run of one series starts from: a fresh one, or a checked copy of ``state``.

    Parameters
    ----------
    state : ShiftState or None
        State after the previous run (None: a fresh series, starting with its baseline).
    digest : str
        :func:`settings_digest` of this run's configuration.
    covariates : tuple of str
        Compensated covariates (for a fresh state).
    order : int
        Covariate model order (for a fresh state).
    hinge : bool
        The configured model is the hinge (for a fresh state).
    subject, indicator : str
        The series ("" accepts the state's).
    first_window_us : int or None
        First window of the run (None when the run has no windows).

    Returns
    -------
    ShiftState
        A new state, or a deep copy of ``state`` (the caller's object is never changed).

    Raises
    ------
    StateMismatchError
        ``state`` was computed with other settings, for another series, or the run's first
        window is not after it.
    """
    if state is None:
        return ShiftState(
            subject=subject, indicator=indicator, settings=digest, covariates=covariates, order=order, hinge=hinge
        )
    if state.settings != digest:
        raise StateMismatchError(f"state settings {state.settings} differ from this configuration's {digest}")
    if (subject and subject != state.subject) or (indicator and indicator != state.indicator):
        raise StateMismatchError(f"state is for {state.subject}/{state.indicator}, not {subject}/{indicator}")
    if first_window_us is not None and state.window_start_us is not None and first_window_us <= state.window_start_us:
        raise StateMismatchError(
            f"first window {iso_utc(int(first_window_us))} is not after the state's last window "
            f"{iso_utc(state.window_start_us)}"
        )
    if state.needs_sample:
        raise StateMismatchError(
            f"the state counts {state.sample_count} baseline windows but carries none: attach its "
            "baseline_sample rows first (attach_sample)"
        )
    return copy.deepcopy(state.own_sample())


# --------------------------------------------------------------------------------------------
# Rebuild from the indicators table


def indicator_rows_from_table(table: pa.Table) -> List[IndicatorRow]:
    """IndicatorRow records from an indicators table (as read back from Parquet)."""
    if table.num_rows == 0:
        return []
    starts = table.column("window_start").cast(pa.int64()).to_pylist()
    columns = [
        table.column(name).to_pylist() for name in ("subject", "indicator", "value", "stderr", "unit", "quality")
    ]
    return [
        IndicatorRow(
            int(s),
            subj,
            ind,
            float("nan") if v is None else float(v),
            float("nan") if e is None else float(e),
            u or "",
            q or "ok",
        )
        for s, subj, ind, v, e, u, q in zip(starts, *columns)
    ]


def replay_states(indicators: pa.Table, config: AssetConfig) -> Tuple[pa.Table, List[Reject]]:
    """Run the detectors over an indicators table; return the latest state of every series
    (:func:`replay_tables` for every day's state and the baseline sample)."""
    replayed = replay_tables(indicators, config)
    return replayed.latest, replayed.rejects


class Replay(NamedTuple):
    """What :func:`replay_tables` returns."""

    #: STATE rows, the last one of each monitored series
    latest: pa.Table
    #: STATE rows of every series and day (what a backfill writes into the state table)
    states: pa.Table
    #: BASELINE_SAMPLE rows of every series (what a backfill writes into that table)
    baseline_sample: pa.Table
    #: findings of the replay (duplicates, failures), as the shifts stage would report them
    rejects: List[Reject]


def replay_tables(indicators: pa.Table, config: AssetConfig) -> Replay:
    """Run the detectors over an indicators table: the state and baseline-sample rows a backfill
    would have written, and the latest state of every series.

    Parameters
    ----------
    indicators : pyarrow.Table
        Rows of the INDICATORS schema (monitored and ``covariate_mean`` rows), e.g. every
        partition of the asset before the day to be processed.
    config : AssetConfig

    Returns
    -------
    states : pyarrow.Table
        STATE rows, the last one of each monitored series.
    rejects : list of Reject
        Findings of the replay (duplicates, failures), as the shifts stage would report them.
    """
    from corrtransforms.stages import shifts as shift_series  # the engine imports this module
    from corrtransforms.stages.covariate_smoothing import smooth_covariate_means
    from corrtransforms.stages.summaries import latest_states as summaries_latest

    by_window: Dict[int, List[IndicatorRow]] = {}
    series: Dict[Tuple[str, str], List[IndicatorRow]] = {}
    for row in indicator_rows_from_table(indicators):
        role = shift_series.row_role(row, config)
        if role == "covariate":
            by_window.setdefault(row.window_start_us, []).append(row)
        elif role == "monitored":
            series.setdefault((row.subject, row.indicator), []).append(row)
    rejects: List[Reject] = []
    covariates = {}
    for start, found in by_window.items():
        covariates[start], found_rejects = shift_series.covariates_for_window(start, found, config.name)
        rejects.extend(found_rejects)
    covariates, smoother_states, smoother_rejects = smooth_covariate_means(covariates, config)
    rejects.extend(smoother_rejects)
    last, every, samples = [], [], []
    config = shift_series.with_budget_limits(config, len(series))
    if smoother_states:
        smoothers = states_table(smoother_states)
        every.append(smoothers)
        last.append(summaries_latest(smoothers))
    for key in sorted(series):
        outcome = shift_series.detect_shifts_for_rows(series[key], covariates, config)
        rejects.extend(outcome.rejects)
        samples.append(outcome.baseline_sample)
        if outcome.states.num_rows:
            ordered = outcome.states.sort_by([("window_start", "ascending")])
            every.append(ordered)
            last.append(ordered.slice(ordered.num_rows - 1))

    def joined(pieces, schema):
        return pa.concat_tables(pieces) if pieces else schema.empty_table()

    return Replay(
        joined(last, tables.STATE),
        joined(every, tables.STATE),
        joined(samples, tables.BASELINE_SAMPLE),
        rejects,
    )
