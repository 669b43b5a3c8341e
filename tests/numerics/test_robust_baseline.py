"""Baseline location/scale and the covariate model against scipy, statsmodels and closed forms."""

import datetime as dt
import zoneinfo

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from corrtransforms import timeutil
from corrtransforms.config import BaselineConfig
from corrtransforms.numerics import covariate_model
from corrtransforms.numerics import robust as baseline
from corrtransforms.stages.shifts import period_position


def test_mad_factor_is_the_normal_consistency_constant():
    # 1 / Phi^-1(3/4) (Rousseeuw & Croux 1993, eq. 1), from scipy's normal quantile
    assert baseline.MAD_TO_SIGMA == pytest.approx(1.0 / stats.norm.ppf(0.75), rel=1e-14)
    assert baseline.MAD_TO_SIGMA == pytest.approx(1.4826, abs=1e-4)


def test_robust_location_scale_matches_scipy_and_ignores_nonfinite():
    rng = np.random.default_rng(11)
    x = rng.standard_t(4, 301)
    with_gaps = np.concatenate([x, [np.nan, np.inf]])
    location, scale, n = baseline.robust_location_scale(with_gaps)
    assert n == 301
    assert location == np.median(x)
    assert scale == pytest.approx(stats.median_abs_deviation(x, scale="normal"), rel=1e-12)
    assert baseline.robust_location_scale([])[2] == 0


def test_robust_scale_is_consistent_and_resists_outliers():
    rng = np.random.default_rng(12)
    x = rng.normal(5.0, 2.0, 20000)
    x[:500] = 1e6  # 2.5 % gross errors
    location, scale, _ = baseline.robust_location_scale(x)
    # for N(mu, sigma) the normalised MAD estimates sigma (Hampel 1974); 2.5 % contamination
    # moves it by about Phi^-1 shift ~ 3 % (common practice: a few percent)
    assert location == pytest.approx(5.0, abs=0.1)
    assert scale == pytest.approx(2.0, rel=0.06)


def test_net_scale_removes_the_median_estimation_variance():
    # variances add (closed form): total^2 = s_resid^2 + median(stderr^2)
    resid_scale, stderr_sq = baseline.net_scale(5.0, [3.0, 4.0, 3.0])
    assert stderr_sq == 9.0
    assert resid_scale == pytest.approx(4.0)
    assert baseline.net_scale(1.0, [3.0])[0] == 0.0


def test_summarize_baseline_counts_and_flags_short_baselines():
    values = np.array([1.0, 2.0, np.nan, 4.0, 5.0])
    stderr = np.array([0.1, 0.1, 0.1, np.nan, 0.1])
    summary = baseline.summarize_baseline(values, stderr, min_windows=4)
    assert summary.n == 3
    assert summary.location == 2.0
    assert summary.quality == (baseline.BASELINE_TOO_SHORT,)
    assert baseline.summarize_baseline(values, stderr, min_windows=3).quality == ()


def test_local_days_follow_the_asset_time_zone():
    rng = np.random.default_rng(13)
    times = np.sort(rng.integers(1_600_000_000, 1_700_000_000, 200)) * 1_000_000
    zone = zoneinfo.ZoneInfo("America/New_York")
    expected = [(dt.datetime.fromtimestamp(t / 1e6, zone).date() - dt.date(1970, 1, 1)).days for t in times]
    np.testing.assert_array_equal(timeutil.local_days(times, "America/New_York"), expected)


def test_period_position_by_dates_and_by_count():
    by_dates = BaselineConfig(start=dt.date(2024, 5, 1), end=dt.date(2024, 5, 3))
    day = timeutil.day_number
    assert period_position(day(dt.date(2024, 4, 30)), 0, by_dates) == "before"
    assert period_position(day(dt.date(2024, 5, 3)), 999, by_dates) == "inside"
    assert period_position(day(dt.date(2024, 5, 4)), 0, by_dates) == "after"
    by_count = BaselineConfig(windows=10)
    assert period_position(0, 9, by_count) == "inside"
    assert period_position(0, 10, by_count) == "after"
    assert timeutil.day_date(day(dt.date(2031, 2, 3))) == dt.date(2031, 2, 3)


# --------------------------------------------------------------------------------------------
# Covariate model


def test_huber_regression_matches_statsmodels_rlm():
    rng = np.random.default_rng(21)
    x = rng.uniform(-10, 25, 250)
    y = 3.1 - 0.004 * x + 0.01 * rng.standard_t(2, 250)
    design = sm.add_constant(x)
    reference = sm.RLM(y, design, M=sm.robust.norms.HuberT()).fit(tol=1e-13, maxiter=1000)
    beta, scale, _ = covariate_model.huber_regression(design, y)
    np.testing.assert_allclose(beta, reference.params, rtol=1e-7, atol=1e-10)
    assert scale == pytest.approx(reference.scale, rel=1e-6)


def test_linear_model_recovers_the_temperature_coefficient_and_reports_fit_quality():
    rng = np.random.default_rng(22)
    n = 400
    temperature = rng.uniform(-5, 25, n)
    speed = rng.uniform(900, 1100, n)
    stderr = np.full(n, 0.002)
    frequency = 2.0 * (1 - 0.0015 * (temperature - 10)) + 1e-5 * (speed - 1000) + rng.normal(0, 0.003, n)
    frequency[:8] += 0.2  # a few disturbed baseline windows
    model = covariate_model.fit_baseline_model(
        frequency, stderr, np.column_stack([temperature, speed]), ("temperature", "speed"), min_windows=30
    )
    assert model.n == n and model.quality == ()
    reference = sm.RLM(
        frequency,
        sm.add_constant(np.column_stack([temperature - np.median(temperature), speed - np.median(speed)])),
        M=sm.robust.norms.HuberT(),
    ).fit(tol=1e-13, maxiter=1000)
    np.testing.assert_allclose([model.location, *model.coefficients], reference.params, rtol=1e-6, atol=1e-9)
    assert model.coefficients[0] == pytest.approx(-0.003, rel=0.05)  # the invented true slope
    resid = frequency - (
        reference.params[0]
        + reference.params[1] * (temperature - np.median(temperature))
        + reference.params[2] * (speed - np.median(speed))
    )
    r_squared = 1 - np.sum(resid**2) / np.sum((frequency - frequency.mean()) ** 2)
    assert model.r_squared == pytest.approx(r_squared, rel=1e-6)
    assert model.scale == pytest.approx(stats.median_abs_deviation(resid, scale="normal"), rel=1e-5)
    assert model.resid_scale == pytest.approx(np.sqrt(model.scale**2 - 0.002**2), rel=1e-9)
    assert model.scale == pytest.approx(0.003, rel=0.15)  # the invented noise


def test_quadratic_model_matches_statsmodels():
    rng = np.random.default_rng(23)
    speed = rng.uniform(600, 1500, 300)
    rms = 0.2 + 1e-6 * (speed - 1000) ** 2 + rng.normal(0, 0.01, 300)
    model = covariate_model.fit_baseline_model(rms, np.full(300, 0.001), speed[:, None], ("speed",), order=2)
    c = speed - np.median(speed)
    reference = sm.RLM(rms, np.column_stack([np.ones(300), c, c * c]), M=sm.robust.norms.HuberT()).fit(
        tol=1e-13, maxiter=1000
    )
    np.testing.assert_allclose([model.location, *model.coefficients], reference.params, rtol=1e-6, atol=1e-12)
    expected, _ = model.predict(np.array([[1000.0]]))
    assert expected[0] == pytest.approx(0.2, abs=0.005)


def test_missing_covariates_are_left_out_of_the_fit_and_predicted_at_the_median():
    rng = np.random.default_rng(24)
    temperature = rng.uniform(0, 20, 120)
    values = 1.0 + 0.01 * temperature + rng.normal(0, 0.01, 120)
    stderr = np.full(120, 0.005)
    gappy = temperature.copy()
    gappy[::10] = np.nan
    model = covariate_model.fit_baseline_model(values, stderr, gappy[:, None], ("temperature",))
    keep = np.isfinite(gappy)
    complete = covariate_model.fit_baseline_model(values[keep], stderr[keep], gappy[keep][:, None], ("temperature",))
    assert model == complete
    assert model.n == 108
    expected, missing = model.predict(np.array([[np.nan], [model.center[0] + 1.0]]))
    np.testing.assert_array_equal(missing, [True, False])
    assert expected[0] == model.location
    assert expected[1] == pytest.approx(model.location + model.coefficients[0])


def test_constant_or_unusable_covariates_fall_back_with_quality_codes():
    rng = np.random.default_rng(25)
    values = rng.normal(1.0, 0.01, 50)
    stderr = np.full(50, 0.001)
    constant = covariate_model.fit_baseline_model(values, stderr, np.full((50, 1), 7.0), ("speed",))
    assert covariate_model.COVARIATE_CONSTANT in constant.quality
    assert constant.coefficients == (0.0,)
    unfitted = covariate_model.fit_baseline_model(values, stderr, np.full((50, 1), np.nan), ("speed",), min_windows=10)
    assert covariate_model.COVARIATE_MODEL_UNFITTED in unfitted.quality
    assert unfitted.location == np.median(values)
    short = covariate_model.fit_baseline_model(values[:5], stderr[:5], min_windows=30)
    assert short.too_short and short.n == 5
