"""Shift detection with the hinge covariate model ([shifts] model): the knee and slopes in the
state, its Parquet round trip, the settings digest and nightly runs equal to the backfill."""

import numpy as np
import pyarrow.parquet as pq
import pytest

from corrtransforms import tables
from corrtransforms.config import ConfigError
from corrtransforms.stages import shifts as shift_series
from corrtransforms.stages import state as shift_state
from corrtransforms.stages.write import conform
from tests.support.shift_fixtures import (
    assert_tables_identical,
    hinge_series,
    make_config,
    nightly_run,
    same,
)

SCENARIO = dict(cusum_h=8.0, ewma_lambda=0.1, ewma_L=3.75)
#: knee tolerance (degC): a tenth of the baseline's temperature range of about 16 degC (common practice)
KNEE_TOLERANCE = 1.6


def _backfill(times, values, stderr, temperature, config):
    return shift_series.detect_shifts(
        times,
        values,
        stderr,
        None,
        {"temperature": temperature},
        config,
        subject="deck",
        indicator="mode_freq_hz",
        unit="Hz",
    )


def test_the_hinge_model_is_fitted_on_the_baseline_and_its_knee_and_slopes_are_in_the_state(tmp_path):
    times, values, stderr, temperature, step_us = hinge_series(3)
    config = make_config("all", model="hinge", **SCENARIO)
    table, states = _backfill(times, values, stderr, temperature, config)
    model = states[-1].model
    assert model.knee == pytest.approx(2.0, abs=KNEE_TOLERANCE)
    below, above = model.hinge_slopes
    assert below == pytest.approx(-0.02, rel=0.15) and above == pytest.approx(-0.002, abs=0.002)
    # no alarm before the step; the line would leave the frost windows as residuals
    state = np.array(table.column("state").to_pylist())
    start = table.column("window_start").cast("int64").to_numpy()
    assert not np.any((state == "shifted") & (start < step_us)) and np.any(state == "shifted")
    path = tmp_path / "state.parquet"
    pq.write_table(shift_state.states_table(states[-1:]), path)
    row = pq.read_table(path).to_pylist()[0]
    assert row["model_form"] == "hinge" and row["model_knee"] == model.knee
    assert shift_state.ShiftState.from_row(row).model == model


def test_a_line_would_alarm_on_the_frost_windows():
    times, values, stderr, temperature, step_us = hinge_series(3)
    table, _ = _backfill(times, values, stderr, temperature, make_config("all", model="linear", **SCENARIO))
    state = np.array(table.column("state").to_pylist())
    start = table.column("window_start").cast("int64").to_numpy()
    assert np.any((state == "shifted") & (start < step_us))


def test_nightly_runs_with_the_hinge_model_give_exactly_the_backfill_rows(tmp_path):
    times, values, stderr, temperature, _ = hinge_series(4, days=20, step_day=17)
    config = make_config("all", model="hinge", **SCENARIO)
    backfill, states = _backfill(times, values, stderr, temperature, config)
    nightly, last = nightly_run(times, values, stderr, {"temperature": temperature}, config, tmp_path)
    assert_tables_identical(nightly, backfill)
    assert same(last.to_row(), states[-1].to_row()) and last.model.knee is not None


def test_the_digest_changes_with_the_hinge_and_keeps_the_linear_and_quadratic_ones():
    linear, quadratic, hinge = (make_config("all", model=m) for m in ("linear", "quadratic", "hinge"))
    assert shift_state.settings_digest(linear) == shift_state.settings_digest(linear, 1)
    assert shift_state.settings_digest(quadratic) == shift_state.settings_digest(linear, 2)
    assert len({shift_state.settings_digest(c) for c in (linear, quadratic, hinge)}) == 3
    with pytest.raises(ConfigError, match=r'\[shifts\] model = .cubic.: must be one of "linear", "quadratic", "hinge"'):
        make_config("all", model="cubic")


def test_the_baseline_not_reaching_the_knee_falls_back_to_linear_with_its_code():
    # every baseline temperature above the knee of -20 degC: a line, and the code on every row after
    times, values, stderr, temperature, _ = hinge_series(5, knee=-20.0, days=20, step_day=17)
    table, states = _backfill(times, values, stderr, temperature, make_config("all", model="hinge", **SCENARIO))
    assert states[-1].model.knee is None and "knee_not_in_baseline" in states[-1].model.quality
    after = [
        q for q, s in zip(table.column("quality").to_pylist(), table.column("state").to_pylist()) if s != "baseline"
    ]
    assert after and all("knee_not_in_baseline" in q for q in after)


def test_a_state_file_without_the_model_columns_reads_as_a_polynomial_state():
    times, values, stderr, temperature, _ = hinge_series(6, days=16)
    _, states = _backfill(times, values, stderr, temperature, make_config("all", **SCENARIO))
    old = shift_state.states_table(states[-1:]).drop_columns(["model_form", "model_knee"])
    restored = shift_state.states_from_table(conform(old, tables.STATE))[0]
    assert restored.hinge is False and restored.model == states[-1].model


def test_the_run_summary_lists_the_knee_and_both_slopes():
    from corrtransforms.launch import run_summary

    times, values, stderr, temperature, _ = hinge_series(3)
    _, states = _backfill(times, values, stderr, temperature, make_config("all", model="hinge", **SCENARIO))
    (entry,) = run_summary.hinge_models(shift_state.states_table(states[-1:]))
    model = states[-1].model
    assert entry["knee"] == model.knee and (entry["slope_below"], entry["slope_above"]) == model.hinge_slopes
    assert entry["covariate"] == "temperature" and entry["quality"] == "ok"
    line = run_summary._hinge_line(entry)
    assert line.startswith("hinge model of deck mode_freq_hz in temperature: knee ")


def test_smoothing_h_names_a_covariate_and_a_positive_time_constant():
    from corrtransforms.config import parse_config

    def config(smoothing):
        raw = {
            "asset": {"name": "invented-bridge"},
            "archive": {"path": "unused", "sample_rate_hz": 50.0},
            "channels": {"covariates": ["temperature"], "smoothing_h": smoothing},
        }
        return parse_config(raw)

    assert config({"temperature": 6}).covariate_smoothing_h() == {"temperature": 6.0}
    with pytest.raises(ConfigError, match=r"smoothing_h.wind = 2: names no covariate"):
        config({"wind": 2})
    with pytest.raises(ConfigError, match=r"smoothing_h.temperature = 0: must be a number in \(0, inf\]"):
        config({"temperature": 0})
    assert shift_state.settings_digest(config({"temperature": 6})) != shift_state.settings_digest(config({}))
    assert shift_state.settings_digest(config({})) == shift_state.settings_digest(config({}))
