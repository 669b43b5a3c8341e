"""Smoothed covariates (``[channels] smoothing_h``): the smoothed window means equal the formula
computed directly across days, the smoother's state rows carry it from night to night, and
DetectShifts compensates with the smoothed covariate, nightly equal to the backfill."""

import math

import apache_beam as beam
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from apache_beam.options.pipeline_options import PipelineOptions
from apache_beam.testing.test_pipeline import TestPipeline as BeamTestPipeline
from apache_beam.testing.util import BeamAssertException, assert_that

from corrtransforms.beam import LOCAL_RUNNER
from corrtransforms.beam.shifts import DetectShifts
from corrtransforms.config import parse_config
from corrtransforms.stages import shifts as shift_series
from corrtransforms.stages import state as shift_state
from corrtransforms.stages.covariate_smoothing import SMOOTHER_INDICATOR, smooth_covariate_means
from corrtransforms.stages.summaries import latest_states
from corrtransforms.timeutil import local_days, us_to_datetime
from tests.support.shift_fixtures import TIMEZONE, indicator_rows, same, seasonal_series

TAU_H = 6.0
DAYS = 4


def _config(smoothing=True):
    raw = {
        "asset": {"name": "invented-bridge", "timezone": TIMEZONE},
        "archive": {"path": "unused", "sample_rate_hz": 50.0, "timezone": TIMEZONE},
        "channels": {"covariates": ["temperature"], "smoothing_h": {"temperature": TAU_H} if smoothing else {}},
        "baseline": {"windows": 18, "min_windows": 10},
        "shifts": {"cusum_h": 5.0},
    }
    return parse_config(raw)


def _inputs():
    times, values, stderr, temperature, _ = seasonal_series(13, days=DAYS, step_day=3)
    temperature[9] = np.nan  # a window without its covariate
    deck, covariates = indicator_rows(times, values, stderr, temperature)
    return times, temperature, deck + covariates


def _direct(times, x, tau_s):
    """The formula written out once over all days (module notes of numerics.covariate_smoothing)."""
    out, last_t, last_m = [], None, None
    for t, v in zip(times, x):
        if not np.isfinite(v):
            out.append(float("nan"))
            continue
        dt = None if last_t is None else (t - last_t) / 1e6
        last_m = v if dt is None or dt > 5 * tau_s else math.exp(-dt / tau_s) * last_m + (1 - math.exp(-dt / tau_s)) * v
        last_t = t
        out.append(last_m)
    return np.array(out)


def _means(rows):
    return {r.window_start_us: {"temperature": r.value} for r in rows if r.indicator == "covariate_mean"}


def test_smoothed_means_equal_the_direct_computation_across_days_and_resume_night_by_night(tmp_path):
    times, temperature, rows = _inputs()
    config = _config()
    expected = _direct(times, temperature, TAU_H * 3600)
    whole, states, rejects = smooth_covariate_means(_means(rows), config)
    got = np.array([whole[int(t)]["temperature"] for t in times])
    np.testing.assert_allclose(got, expected, rtol=1e-13)
    assert not rejects and len(states) == DAYS and {s.indicator for s in states} == {SMOOTHER_INDICATOR}
    # night by night, each resuming from the previous night's state rows read back from Parquet
    days = local_days(times, TIMEZONE)
    resumed, nightly = [], []
    for number, day in enumerate(np.unique(days)):
        tonight = {int(t): {"temperature": float(temperature[i])} for i, t in enumerate(times) if days[i] == day}
        means, day_states, found = smooth_covariate_means(tonight, config, resumed)
        assert not found
        path = tmp_path / f"state-{number}.parquet"
        pq.write_table(shift_state.states_table(day_states), path)
        resumed = pq.read_table(path).to_pylist()
        nightly += [means[t]["temperature"] for t in sorted(means)]
    assert same(list(nightly), list(got))


def _core(rows, config, states=()):
    means, smoother_states, _ = smooth_covariate_means(_means(rows), config, states)
    series = [r for r in rows if r.indicator == "mode_freq_hz"]
    outcome = shift_series.detect_shifts_for_rows(series, means, config, states)
    return outcome, shift_state.states_table(smoother_states)


def _rows_of(tables_):
    rows = [row for t in tables_ for row in t.to_pylist()]
    return sorted(rows, key=lambda r: (r["subject"], r["indicator"], r["window_start"]))


def _equal_rows(expected):
    def check(actual):
        got = _rows_of(actual)
        if len(got) != len(expected) or not all(same(a, b) for a, b in zip(got, expected)):
            raise BeamAssertException(f"{len(got)} rows differ from the {len(expected)} expected")

    return check


def _pipeline():
    return BeamTestPipeline(runner=LOCAL_RUNNER, options=PipelineOptions([]))


def test_detect_shifts_compensates_with_the_smoothed_covariate_and_resumes_it_nightly():
    times, _, rows = _inputs()
    config = _config()
    backfill, smoother_states = _core(rows, config)
    plain, _ = _core(rows, _config(smoothing=False))
    assert backfill.shifts.column("expected").to_pylist() != plain.shifts.column("expected").to_pylist()
    days = local_days(np.array([r.window_start_us for r in rows]), TIMEZONE)
    earlier = [r for r, d in zip(rows, days) if d < days.max()]
    tonight = [r for r, d in zip(rows, days) if d == days.max()]
    yesterday, yesterday_smoother = _core(earlier, config)
    states = latest_states(pa.concat_tables([yesterday.states, yesterday_smoother]))
    tonight_start = us_to_datetime(min(r.window_start_us for r in tonight))
    expected_tonight = [r for r in _rows_of([backfill.shifts]) if r["window_start"] >= tonight_start]
    with _pipeline() as p:
        result = p | "Rows" >> beam.Create(rows) | "Detect" >> DetectShifts(config)
        assert_that(result["shifts"], _equal_rows(_rows_of([backfill.shifts])), label="Check shifts")
        assert_that(result["state"], _equal_rows(_rows_of([backfill.states, smoother_states])), label="Check state")
    with _pipeline() as p:
        result = p | "Tonight" >> beam.Create(tonight) | "Detect" >> DetectShifts(config, initial_states=states)
        assert_that(result["shifts"], _equal_rows(expected_tonight), label="Check tonight's shifts")


def test_a_rebuilt_state_replays_the_smoother_as_the_backfill_wrote_it():
    from corrtransforms.stages.indicators import indicator_table

    _, _, rows = _inputs()
    config = _config()
    backfill, smoother_states = _core(rows, config)
    replayed = shift_state.replay_tables(indicator_table(rows), config)
    assert same(_rows_of([replayed.states]), _rows_of([backfill.states, smoother_states]))
    assert {r["indicator"] for r in replayed.latest.to_pylist()} == {"mode_freq_hz", SMOOTHER_INDICATOR}
