"""Multivariate novelty of an asset (``[shifts] multivariate = true``): the standardised
residuals ``z`` of all its monitored series, window by window, through a PCA novelty model
(:mod:`corrtransforms.numerics.novelty`), giving per window two indicator rows of subject = the
asset, charted by the shift detectors like any series:

- ``novelty_t2``: Hotelling's T^2 of the residual vector with the full baseline covariance, as
  its normal score ``Phi^-1(F(T^2))`` under the Tracy, Young & Mason (1992) F distribution;
- ``novelty_spe``: the squared prediction error off the retained components (cumulative
  variance fraction 0.9, Jolliffe 2002), as the Jackson & Mudholkar (1979) normal statistic;

and per monitored series its contributions, rows of subject ``"<subject>/<indicator>"`` and
indicator ``novelty_t2_contribution`` / ``novelty_spe_contribution`` (each window's
contributions sum to T^2 / SPE; indicators table only).

Rules, in time order over the run's SHIFTS rows of the asset's monitored series:

1. The model's series are fixed at the first window where every series with a row is past its
   own baseline (state ``normal`` or ``shifted``) and there are at least two: the sorted
   ``"subject/indicator"`` names of that window. A series appearing later is not in the model.
2. A window enters the model's sample when every model series has a row in state ``normal``
   with a finite ``z`` and no holding quality code (:func:`corrtransforms.records.holds_window`).
   When the sample holds ``[shifts] multivariate_windows`` windows the model is fitted; rows of
   the windows up to then are NaN with quality ``novelty_pending`` (indicators table only).
3. After the fit every window with a row of any model series gets the two statistics; a window
   where a model series is missing, non-finite or held gets NaN with ``novelty_incomplete``
   (a held window for the charts, as for any series).

State: a STATE row per local day of subject = the asset, indicator ``novelty_model``, with the
sample's vectors in ``sample_value`` (row-major, ``covariates`` naming the series in order),
their windows in ``sample_window_start``. The model is refitted from it on resume, so a nightly
run equals a backfill exactly.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from typing import Any, Dict, Iterable, List, Mapping, NamedTuple, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa

from corrtransforms import tables
from corrtransforms.config import BaselineConfig
from corrtransforms.numerics.novelty import VARIANCE_FRACTION, NoveltyModel, fit_novelty_model
from corrtransforms.records import IndicatorRow, holds_window, quality_codes
from corrtransforms.rejects import Reject
from corrtransforms.stages.state import ACCUMULATING, FITTED, ShiftState, select_resume_state
from corrtransforms.timeutil import datetime_to_us, day_date, local_days, us_to_datetime

NOVELTY_T2 = "novelty_t2"
NOVELTY_SPE = "novelty_spe"
#: the charted indicators (subject = the asset)
NOVELTY_INDICATORS = (NOVELTY_T2, NOVELTY_SPE)
NOVELTY_T2_CONTRIBUTION = "novelty_t2_contribution"
NOVELTY_SPE_CONTRIBUTION = "novelty_spe_contribution"
#: the state row's indicator (subject = the asset)
NOVELTY_MODEL = "novelty_model"
PENDING, INCOMPLETE = "novelty_pending", "novelty_incomplete"
#: normal scores are clipped here (Phi^-1 of probabilities near the float64 floor)
SCORE_CLIP = 37.0
STAGE = "shifts"


def novelty_digest(config) -> str:
    plain = {"windows": config.shifts.multivariate_windows, "fraction": VARIANCE_FRACTION, "format": 1}
    return hashlib.sha256(json.dumps(plain, sort_keys=True).encode("utf-8")).hexdigest()[:16]


def chart_config(config):
    """The configuration the two novelty series are charted with: no covariates (the residuals
    are already compensated) and a baseline of ``multivariate_windows`` windows counted from the
    first charted window."""
    n = config.shifts.multivariate_windows
    return dataclasses.replace(
        config,
        baseline=BaselineConfig(windows=n, min_windows=min(config.baseline.min_windows, n)),
        shifts=dataclasses.replace(config.shifts, compensate=()),
    )


def is_novelty_key(indicator: str) -> bool:
    """True for the state/sample rows the novelty step owns (its model and its two charts)."""
    return indicator == NOVELTY_MODEL or indicator in NOVELTY_INDICATORS


class SeriesResidual(NamedTuple):
    """What the novelty model takes from one SHIFTS row."""

    window_start_us: int
    series: str  # "subject/indicator"
    z: float
    state: str
    quality: str


class NoveltyOutcome(NamedTuple):
    charted: List[IndicatorRow]  # novelty_t2 / novelty_spe rows after the fit (for the detectors)
    rows: List[IndicatorRow]  # every novelty indicator row (for the indicators table)
    states: List[ShiftState]
    rejects: List[Reject]


def residuals_of_shift_rows(rows: Iterable[Mapping[str, Any]]) -> List[SeriesResidual]:
    """SHIFTS rows (dicts with integer-microsecond or datetime ``window_start``) -> residuals."""
    out = []
    for r in rows:
        t = r["window_start"]
        t = int(t) if isinstance(t, (int, np.integer)) else int(datetime_to_us(t) or 0)
        z = r.get("z")
        out.append(
            SeriesResidual(
                t,
                f"{r['subject']}/{r['indicator']}",
                float("nan") if z is None else float(z),
                str(r["state"]),
                str(r.get("quality") or "ok"),
            )
        )
    return out


@dataclasses.dataclass
class _Accumulator:
    series: Tuple[str, ...] = ()
    sample: List[List[float]] = dataclasses.field(default_factory=list)
    sample_times: List[int] = dataclasses.field(default_factory=list)
    windows_seen: int = 0
    model_full: Optional[NoveltyModel] = None
    model_rule: Optional[NoveltyModel] = None

    def fit(self) -> None:
        z = np.array(self.sample, dtype=float)
        self.model_full = fit_novelty_model(z, n_components=z.shape[1])
        self.model_rule = fit_novelty_model(z)

    def state(self, config, window_start_us: int, day: int) -> ShiftState:
        return ShiftState(
            subject=config.name,
            indicator=NOVELTY_MODEL,
            settings=novelty_digest(config),
            covariates=self.series,
            phase=FITTED if self.model_full is not None else ACCUMULATING,
            window_start_us=window_start_us,
            local_day=day,
            windows_seen=self.windows_seen,
            sample_value=[v for row in self.sample for v in row],
            sample_window_start=list(self.sample_times),
            sample_count=len(self.sample),
            state="normal",
        )


def novelty_states_table(states: Iterable[ShiftState]) -> pa.Table:
    """STATE rows of the novelty model's day states, with its sample inline (``sample_value``,
    row-major, and ``sample_window_start``; :meth:`ShiftState.to_row` leaves them empty, as the
    series keep theirs in the baseline_sample table)."""
    rows = []
    for s in states:
        row = s.to_row()
        row["sample_value"] = list(s.sample_value)
        row["sample_window_start"] = [us_to_datetime(t) for t in s.sample_window_start]
        rows.append(row)
    return pa.Table.from_pylist(rows, schema=tables.STATE)


def _resumed(config, states, first_us: int) -> Tuple[_Accumulator, List[Reject]]:
    chosen, blocking = select_resume_state(states, config.name, NOVELTY_MODEL, first_us)
    date = day_date(int(local_days(np.array([first_us]), config.timezone)[0])).isoformat()
    if blocking is not None or (chosen is not None and chosen.settings != novelty_digest(config)):
        code = "window_before_state" if blocking is not None else "state_mismatch"
        detail = f"{NOVELTY_MODEL}: no usable earlier state ({code}); the novelty model restarts"
        return _Accumulator(), [Reject(STAGE, "state", config.name, code, detail, asset=config.name, date=date)]
    if chosen is None:
        return _Accumulator(), []
    p = len(chosen.covariates)
    acc = _Accumulator(series=tuple(chosen.covariates), windows_seen=int(chosen.windows_seen))
    if p:
        flat = chosen.sample_value
        acc.sample = [list(flat[i * p : (i + 1) * p]) for i in range(len(flat) // p)]
        acc.sample_times = list(chosen.sample_window_start)
    if chosen.phase == FITTED:
        acc.fit()
    return acc, []


def _usable(r: Optional[SeriesResidual]) -> bool:
    return (
        r is not None
        and np.isfinite(r.z)
        and r.state in ("normal", "shifted")
        and not holds_window(quality_codes(r.quality))
    )


def _score(x) -> float:
    return float(np.clip(x, -SCORE_CLIP, SCORE_CLIP))


def novelty_for_run(residuals: Sequence[SeriesResidual], config, resume_states: Iterable[Any] = ()) -> NoveltyOutcome:
    """The novelty rows and day states of one run of an asset (see the module docstring).

    Parameters
    ----------
    residuals : sequence of SeriesResidual
        The run's SHIFTS rows of the asset's monitored series (any order).
    config : AssetConfig
        ``[shifts] multivariate_windows``, the asset name and time zone.
    resume_states : iterable of ShiftState or STATE rows
        Earlier states; the latest ``novelty_model`` row before the run is resumed.
    """
    by_window: Dict[int, Dict[str, SeriesResidual]] = {}
    for r in residuals:
        by_window.setdefault(int(r.window_start_us), {})[r.series] = r
    times = np.array(sorted(by_window), dtype=np.int64)
    out = NoveltyOutcome([], [], [], [])
    if not times.size:
        return out
    acc, rejects = _resumed(config, list(resume_states), int(times[0]))
    out.rejects.extend(rejects)
    days = local_days(times, config.timezone)
    asset, target = config.name, config.shifts.multivariate_windows
    for i, t in enumerate(times):
        t = int(t)
        window = by_window[t]
        acc.windows_seen += 1
        if not acc.series and len(window) >= 2 and all(r.state in ("normal", "shifted") for r in window.values()):
            acc.series = tuple(sorted(window))
        if acc.model_full is None:
            if (
                acc.series
                and all(_usable(window.get(s)) for s in acc.series)
                and all(window[s].state == "normal" for s in acc.series)
            ):
                acc.sample.append([window[s].z for s in acc.series])
                acc.sample_times.append(t)
                if len(acc.sample) >= target:
                    try:
                        acc.fit()
                    except (ValueError, np.linalg.LinAlgError) as err:
                        out.rejects.append(
                            Reject(
                                STAGE, "novelty", asset, "novelty_fit_failed", str(err), asset=asset, window_start_us=t
                            )
                        )
                        acc.sample, acc.sample_times = [], []
            for name in NOVELTY_INDICATORS:
                out.rows.append(IndicatorRow(t, asset, name, float("nan"), float("nan"), "", PENDING))
        else:
            present = [window.get(s) for s in acc.series]
            if all(_usable(r) for r in present):
                z = np.array([[r.z for r in present]])  # type: ignore[union-attr]  # usable: not None
                t2, _, t2c, _ = acc.model_full.statistics(z)
                assert acc.model_rule is not None
                _, spe, _, spec = acc.model_rule.statistics(z)
                charted = [
                    IndicatorRow(t, asset, NOVELTY_T2, _score(acc.model_full.t2_normal_score(t2[0])), 0.0, "", "ok"),
                    IndicatorRow(t, asset, NOVELTY_SPE, _score(acc.model_rule.spe_normal_score(spe[0])), 0.0, "", "ok"),
                ]
                out.rows.extend(
                    IndicatorRow(t, s, ind, float(c), float("nan"), "", "ok")
                    for contrib, ind in ((t2c[0], NOVELTY_T2_CONTRIBUTION), (spec[0], NOVELTY_SPE_CONTRIBUTION))
                    for s, c in zip(acc.series, contrib)
                )
            else:
                charted = [
                    IndicatorRow(t, asset, n, float("nan"), float("nan"), "", INCOMPLETE) for n in NOVELTY_INDICATORS
                ]
            out.charted.extend(charted)
            out.rows.extend(charted)
        if i + 1 == times.size or days[i + 1] != days[i]:
            out.states.append(acc.state(config, t, int(days[i])))
    return out
