"""DetectShifts in real Beam pipelines: same rows as the core, nightly resumption equals backfill."""

import apache_beam as beam
import numpy as np
import pyarrow as pa
from apache_beam.options.pipeline_options import PipelineOptions
from apache_beam.testing.test_pipeline import TestPipeline as BeamTestPipeline
from apache_beam.testing.util import BeamAssertException, assert_that

from corrtransforms.beam import LOCAL_RUNNER
from corrtransforms.beam.shifts import DetectShifts
from corrtransforms.stages import shifts as shift_series
from corrtransforms.timeutil import local_days, us_to_datetime
from tests.support.shift_fixtures import TIMEZONE, indicator_rows, make_config, same, seasonal_series

DAYS = 4


def _inputs():
    """Two monitored series and one unmonitored, 4 days of 2-hour windows, plus covariates."""
    times, values, stderr, temperature, _ = seasonal_series(11, days=DAYS, step_day=3)
    deck, covariates = indicator_rows(times, values, stderr, temperature)
    rng = np.random.default_rng(12)
    rms, _ = indicator_rows(
        times,
        0.02 + rng.normal(0, 0.001, times.size),
        np.full(times.size, 0.0005),
        temperature,
        subject="mast",
        indicator="rms",
        unit="m/s2",
    )
    other, _ = indicator_rows(
        times,
        rng.uniform(0, 1, times.size),
        np.full(times.size, np.nan),
        temperature,
        subject="mast",
        indicator="stationarity_p",
        unit="",
    )
    duplicate = deck[7]._replace(value=deck[7].value + 1.0)
    return times, deck + rms + other + covariates + [duplicate]


def _config():
    # count baseline of 18 windows: completes during day 2
    return make_config("all", baseline={"windows": 18, "min_windows": 10}, cusum_h=5.0)


def _core(rows, config, states=()):
    covariates = {r.window_start_us: {"temperature": r.value} for r in rows if r.indicator == "covariate_mean"}
    out = {}
    for key in (("deck", "mode_freq_hz"), ("mast", "rms")):
        series = [r for r in rows if (r.subject, r.indicator) == key]
        if series:
            out[key] = shift_series.detect_shifts_for_rows(series, covariates, config, states)
    return out


def _rows_of(tables_):
    rows = [row for t in tables_ for row in t.to_pylist()]
    return sorted(rows, key=lambda r: (r["subject"], r["indicator"], r["window_start"]))


def _equal_rows(expected):
    def check(actual):
        assert all(isinstance(t, pa.Table) for t in actual)
        got = _rows_of(actual)
        if len(got) != len(expected) or not all(same(a, b) for a, b in zip(got, expected)):
            raise BeamAssertException(f"{len(got)} rows differ from the {len(expected)} expected")

    return check


def _reasons(expected):
    def check(actual):
        if sorted(r.reason for r in actual) != sorted(expected):
            raise BeamAssertException(f"rejects {sorted(r.reason for r in actual)} != {sorted(expected)}")

    return check


def _pipeline():
    return BeamTestPipeline(runner=LOCAL_RUNNER, options=PipelineOptions([]))


def test_detect_shifts_backfill_matches_the_core():
    times, rows = _inputs()
    config = _config()
    core = _core(rows, config)
    expected_shifts = _rows_of(o.shifts for o in core.values())
    expected_states = _rows_of(o.states for o in core.values())
    assert len(expected_shifts) == 2 * times.size and len(expected_states) == 2 * DAYS
    assert any(r["state"] == "shifted" for r in expected_shifts)
    with _pipeline() as p:
        result = p | "Rows" >> beam.Create(rows) | "Detect" >> DetectShifts(config)
        assert_that(result["shifts"], _equal_rows(expected_shifts), label="Check shifts")
        assert_that(result["state"], _equal_rows(expected_states), label="Check state")
        assert_that(result["rejects"], _reasons(["duplicate_indicator_rows"]), label="Check rejects")


def test_nightly_pipeline_resumes_from_yesterdays_state_and_equals_the_backfill():
    _, rows = _inputs()
    config = _config()
    days = local_days(np.array([r.window_start_us for r in rows]), TIMEZONE)
    last_day = days.max()
    earlier = [r for r, d in zip(rows, days) if d < last_day]
    tonight = [r for r, d in zip(rows, days) if d == last_day]
    tonight_start = us_to_datetime(min(r.window_start_us for r in tonight))
    backfill = _rows_of(o.shifts for o in _core(rows, config).values())
    expected = [row for row in backfill if row["window_start"] >= tonight_start]
    assert 0 < len(expected) < len(backfill)
    states = _yesterday(earlier, config)
    # yesterday's state as the pipeline itself produces it
    with _pipeline() as p:
        result = p | "Earlier rows" >> beam.Create(earlier) | "Detect" >> DetectShifts(config)
        assert_that(
            result["state"] | "Last day" >> beam.Map(_last_state_rows),
            _equal_rows(_rows_of([states])),
            label="Check yesterday's state",
        )
    # tonight's run from that state gives the backfill's rows of tonight
    with _pipeline() as p:
        result = p | "Tonight's rows" >> beam.Create(tonight) | "Detect" >> DetectShifts(config, initial_states=states)
        assert_that(result["shifts"], _equal_rows(expected), label="Check tonight's shifts")
        assert_that(result["rejects"], _reasons([]), label="No rejects tonight")


def _last_state_rows(table):
    starts = table.column("window_start").to_pylist()
    return table.slice(starts.index(max(starts)), 1)


def _yesterday(rows, config):
    outcomes = _core(rows, config)
    return pa.concat_tables([_last_state_rows(o.states) for o in outcomes.values()])
