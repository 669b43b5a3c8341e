"""Smoothed covariates (``smoothing_h``): each smoothed covariate's window means replaced by
their exponentially weighted trailing mean, in time order across windows and days, with the
recursion carried from night to night.

Design: one smoother per asset and covariate, applied to the window means of the run's windows
(:func:`corrtransforms.stages.shifts.covariates_for_window`) before they reach the series, so
every series of the asset sees the same smoothed value. The recursion's two numbers (the last
finite window's start and the smoothed value) are kept in the state table, in a row of a
special series per covariate: ``subject`` = the covariate, ``indicator`` =
:data:`SMOOTHER_INDICATOR`, ``phase`` = :data:`SMOOTHER_PHASE`, ``predictor_window_start`` and
``predictor_mean`` the recursion, ``window_start`` the last window of the day processed. A
nightly run resumes from that row like a series does (the latest before its first window), so
nightly runs equal a backfill exactly. Recomputing from the previous days' ``covariate_mean``
rows instead would need the whole history to be exact (the weights never reach zero without a
restart).

A resumed row computed with other settings (time constant, time zone) or overlapping the run is
reported (``state_mismatch`` / ``window_before_state``) and the smoother restarts at the run's
first window.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any, Dict, Iterable, List, Mapping, Tuple

import numpy as np

from corrtransforms.numerics.covariate_smoothing import RESTART_TAUS, SmootherState, exponential_trailing_mean
from corrtransforms.rejects import Reject
from corrtransforms.stages.state import ShiftState, select_resume_state
from corrtransforms.timeutil import day_date, local_days

SMOOTHER_INDICATOR = "covariate_smoother"
SMOOTHER_PHASE = "smoother"
STAGE = "shifts"


def smoother_digest(config, name: str) -> str:
    """Digest of what a smoother's state depends on: its time constant, the restart rule and the
    calendar time zone (which fixes the days its rows are written for)."""
    plain = {"tau_h": config.covariate_smoothing_h()[name], "restart_taus": RESTART_TAUS, "tz": config.timezone}
    return hashlib.sha256(json.dumps(plain, sort_keys=True).encode("utf-8")).hexdigest()[:16]


def _resumed(name: str, config, states: Iterable[Any], first_us: int) -> Tuple[SmootherState, List[Reject]]:
    chosen, blocking = select_resume_state(states, name, SMOOTHER_INDICATOR, first_us)
    date = day_date(int(local_days(np.array([first_us]), config.timezone)[0])).isoformat()
    if blocking is not None:
        detail = f"{name}: the smoother's earliest state is not before the run; restarted"
        return SmootherState(), [
            Reject(STAGE, "state", name, "window_before_state", detail, asset=config.name, date=date)
        ]
    if chosen is None:
        return SmootherState(), []
    if chosen.settings != smoother_digest(config, name):
        detail = f"{name}: smoother state of other settings ({chosen.settings}); restarted"
        return SmootherState(), [Reject(STAGE, "state", name, "state_mismatch", detail, asset=config.name, date=date)]
    return SmootherState(chosen.predictor_window_start, float(chosen.predictor_mean)), []


def _day_states(name, config, times, values, smoothed, days, resumed: SmootherState) -> List[ShiftState]:
    """The smoother's state row after the last window of each local day."""
    out = []
    state = resumed
    edges = np.concatenate(([0], np.flatnonzero(np.diff(days)) + 1, [times.size]))
    for a, b in zip(edges[:-1], edges[1:]):
        finite = np.flatnonzero(np.isfinite(values[a:b]))
        if finite.size:
            state = SmootherState(int(times[a + finite[-1]]), float(smoothed[a + finite[-1]]))
        out.append(
            ShiftState(
                subject=name,
                indicator=SMOOTHER_INDICATOR,
                settings=smoother_digest(config, name),
                phase=SMOOTHER_PHASE,
                window_start_us=int(times[b - 1]),
                local_day=int(days[a]),
                windows_seen=int(b),
                predictor_window_start=state.time_us,
                predictor_mean=state.value,
                state="normal",
            )
        )
    return out


def smooth_covariate_means(
    means_by_window: Mapping[int, Mapping[str, float]], config, resume_states: Iterable[Any] = ()
) -> Tuple[Dict[int, Dict[str, float]], List[ShiftState], List[Reject]]:
    """The window means with each smoothed covariate replaced by its trailing exponential mean.

    Parameters
    ----------
    means_by_window : mapping window_start_us -> {covariate: mean}
        Window means of the run (every window of its days).
    config : AssetConfig
        ``covariate_smoothing_h()`` (name -> hours) and the calendar time zone.
    resume_states : iterable of ShiftState or STATE rows
        Earlier states (any series); the smoothers' rows are used.

    Returns
    -------
    means : dict window_start_us -> {covariate: mean}
        Smoothed covariates replaced (NaN where the window's own mean is missing).
    states : list of ShiftState
        Per smoothed covariate, its state after each local day of the run.
    rejects : list of Reject
    """
    taus = config.covariate_smoothing_h()
    times = np.array(sorted(means_by_window), dtype=np.int64)
    out = {int(t): dict(means_by_window[int(t)]) for t in times}
    if not taus or not times.size:
        return out, [], []
    resume_states = list(resume_states)
    days = local_days(times, config.timezone)
    states: List[ShiftState] = []
    rejects: List[Reject] = []
    for name, hours in taus.items():
        values = np.array([float(out[int(t)].get(name, float("nan"))) for t in times])
        resumed, found = _resumed(name, config, resume_states, int(times[0]))
        rejects += found
        smoothed, _ = exponential_trailing_mean(times, values, hours * 3600.0, resumed)
        for t, m in zip(times, smoothed):
            out[int(t)][name] = float(m)
        states += _day_states(name, config, times, values, smoothed, days, resumed)
    return out, states, rejects
