"""Detectors and their average run lengths against published tables, closed forms and references.

Sources of the reference values:

- Two-sided tabular CUSUM, k = 0.5 (in standard deviations), zero start: Montgomery,
  Introduction to Statistical Quality Control (6th ed., 2009), Table 9.3, adapted from Hawkins
  (1993): h = 4: ARL0 = 168, ARL(1 sigma) = 8.38; h = 5: ARL0 = 465, ARL(1 sigma) = 10.4.
  (from memory)
- EWMA with asymptotic limits: Lucas & Saccucci (1990), as reproduced in Montgomery (2009)
  Table 9.11: lambda = 0.20, L = 2.962 and lambda = 0.10, L = 2.814 both give ARL0 = 500;
  ARL(1 sigma) = 10.5 and 10.3. (from memory)
- Siegmund (1985) closed-form CUSUM approximation (Montgomery 2009, Section 9.1.4).

The numerical ARLs (integral equation, Markov chain) are the project's own code, so every table
check is made three ways: simulation vs table, integral equation vs table, and the numerical
methods against each other.
"""

import math

import numpy as np
import pandas as pd
import pytest

from corrtransforms.numerics import arl, detectors, serial_dependence
from tests.support.shift_fixtures import ar1_series, residual_chart_errors

# --------------------------------------------------------------------------------------------
# Detector statistics against their definitions


def _cusum_loop(z, k, upper=0.0, lower=0.0):
    # Page (1954); Montgomery (2009) eqs. 9.2-9.3, evaluated literally
    up, lo = [], []
    for value in z:
        upper = max(0.0, upper + value - k)
        lower = max(0.0, lower - value - k)
        up.append(upper)
        lo.append(lower)
    return np.array(up), np.array(lo)


def test_cusum_path_equals_the_recursion_and_is_exactly_zero_at_resets():
    rng = np.random.default_rng(1)
    z = rng.standard_normal(500) + 0.3
    upper, lower = detectors.cusum_path(z, 0.5, upper_start=2.0, lower_start=0.7)
    ref_upper, ref_lower = _cusum_loop(z, 0.5, 2.0, 0.7)
    np.testing.assert_allclose(upper, ref_upper, rtol=0, atol=1e-11)
    np.testing.assert_allclose(lower, ref_lower, rtol=0, atol=1e-11)
    np.testing.assert_array_equal(upper == 0, ref_upper == 0)
    np.testing.assert_array_equal(lower == 0, ref_lower == 0)


def test_cusum_path_vectorised_over_chains():
    rng = np.random.default_rng(2)
    z = rng.standard_normal((7, 64))
    start = rng.uniform(0, 3, 7)
    upper, lower = detectors.cusum_path(z, 0.25, start, start[::-1])
    for i in range(7):
        ref_upper, ref_lower = _cusum_loop(z[i], 0.25, start[i], start[::-1][i])
        np.testing.assert_allclose(upper[i], ref_upper, atol=1e-11)
        np.testing.assert_allclose(lower[i], ref_lower, atol=1e-11)


def test_run_lengths_and_sums_follow_montgomery_counters():
    rng = np.random.default_rng(3)
    z = rng.standard_normal(300) + 0.4
    resid = rng.standard_normal(300)
    upper, _ = detectors.cusum_path(z, 0.5, 1.0)
    lengths = detectors.cusum_run_lengths(upper, 4)
    sums = detectors.cusum_run_sums(resid, lengths, 1.5)
    # N+ of Montgomery (2009) Section 9.1.2: consecutive periods with C+ > 0 (carried 4, sum 1.5)
    count, total = 4, 1.5
    for i in range(z.size):
        if upper[i] > 0:
            count, total = count + 1, total + resid[i]
        else:
            count, total = 0, 0.0
        assert lengths[i] == count
        assert sums[i] == pytest.approx(total, abs=1e-10)


def test_ewma_path_equals_pandas_ewm():
    rng = np.random.default_rng(4)
    z = rng.standard_normal(200)
    w = detectors.ewma_path(z, 0.2, start=0.8)
    # pandas ewm(adjust=False): y_t = (1 - alpha) y_{t-1} + alpha x_t with y_0 = x_0 (Roberts 1959)
    reference = pd.Series(np.concatenate(([0.8], z))).ewm(alpha=0.2, adjust=False).mean().to_numpy()[1:]
    np.testing.assert_allclose(w, reference, rtol=1e-12, atol=1e-12)


def test_ewma_exact_limits():
    # Montgomery (2009) eq. 9.25: L sigma sqrt(lambda/(2-lambda) [1-(1-lambda)^(2i)]); first limit L*lambda
    assert detectors.ewma_limits(1, 0.2, 3.0) == pytest.approx(3.0 * 0.2)
    assert detectors.ewma_limits(10**6, 0.2, 3.0) == pytest.approx(3.0 * np.sqrt(0.2 / 1.8))
    assert detectors.ewma_limits(5, 0.2, 3.0, exact=False) == pytest.approx(1.0)
    assert np.all(np.diff(detectors.ewma_limits(np.arange(1, 50), 0.1, 2.7)) > 0)


# --------------------------------------------------------------------------------------------
# Average run lengths


def _simulated(chart, n_chains, seed, **kw):
    run_lengths = arl.simulate_run_lengths(chart, n_chains=n_chains, rng=np.random.default_rng(seed), **kw)
    return run_lengths.mean(), run_lengths.std(ddof=1) / np.sqrt(n_chains)


@pytest.mark.parametrize(
    "h, table_arl0, table_arl1, chains",
    [
        (4.0, 168.0, 8.38, 12000),  # Montgomery Table 9.3 / Hawkins (1993) (from memory)
        (5.0, 465.0, 10.4, 16000),
    ],
)
def test_cusum_arl_three_ways(h, table_arl0, table_arl1, chains):
    k = 0.5
    integral0 = arl.cusum_arl_integral_equation(k, h)
    markov0 = arl.cusum_arl_markov_chain(k, h, states=400)
    siegmund0 = arl.cusum_arl_siegmund(k, h)
    mean0, se0 = _simulated("cusum", chains, seed=10 + int(h), k=k, h=h)
    # numerical methods agree with each other and with the table's rounding
    assert integral0 == pytest.approx(markov0, rel=2e-4)
    assert integral0 == pytest.approx(table_arl0, abs=0.6)
    assert siegmund0 == pytest.approx(table_arl0, rel=0.015)  # an approximation, within ~1 %
    # simulation within 4 standard errors of the integral equation and of the table
    assert abs(mean0 - integral0) < 4 * se0
    assert abs(mean0 - table_arl0) < 4 * se0 + 0.6
    # out of control, 1 sigma shift
    integral1 = arl.cusum_arl_integral_equation(k, h, shift=1.0)
    mean1, se1 = _simulated("cusum", 4000, seed=20 + int(h), k=k, h=h, shift=1.0)
    assert integral1 == pytest.approx(table_arl1, abs=0.06)
    assert arl.cusum_arl_markov_chain(k, h, shift=1.0, states=400) == pytest.approx(integral1, rel=2e-4)
    assert abs(mean1 - integral1) < 4 * se1


def test_cusum_integral_equation_is_converged_and_one_sided_is_twice():
    a = arl.cusum_arl_integral_equation(0.5, 5.0, nodes=32)
    b = arl.cusum_arl_integral_equation(0.5, 5.0, nodes=96)
    assert a == pytest.approx(b, rel=1e-9)
    one = arl.cusum_arl_integral_equation(0.5, 5.0, two_sided=False)
    assert one == pytest.approx(2 * b, rel=1e-9)  # symmetric in control: 1/L = 2/L+


@pytest.mark.parametrize(
    "smoothing, width, table_arl0, table_arl1",
    [
        (0.2, 2.962, 500.0, 10.5),  # Lucas & Saccucci (1990) via Montgomery Table 9.11 (from memory)
        (0.1, 2.814, 500.0, 10.3),
    ],
)
def test_ewma_arl_three_ways(smoothing, width, table_arl0, table_arl1):
    integral0 = arl.ewma_arl_integral_equation(smoothing, width)
    markov0 = arl.ewma_arl_markov_chain(smoothing, width, states=601)
    mean0, se0 = _simulated("ewma", 12000, seed=30, smoothing=smoothing, width=width, exact_limits=False)
    assert integral0 == pytest.approx(markov0, rel=1e-3)
    assert integral0 == pytest.approx(table_arl0, rel=0.005)  # the table's L has 3 decimals
    assert abs(mean0 - integral0) < 4 * se0
    assert abs(mean0 - table_arl0) < 4 * se0 + 2.5
    integral1 = arl.ewma_arl_integral_equation(smoothing, width, shift=1.0)
    mean1, se1 = _simulated("ewma", 4000, seed=31, smoothing=smoothing, width=width, shift=1.0, exact_limits=False)
    assert integral1 == pytest.approx(table_arl1, abs=0.06)
    assert abs(mean1 - integral1) < 4 * se1


def test_ewma_exact_limits_arl_markov_chain_vs_simulation():
    # exact (time-varying) limits signal a little earlier than the asymptotic ones
    exact = arl.ewma_arl_markov_chain(0.2, 3.0, exact_limits=True, states=401)
    asymptotic = arl.ewma_arl_markov_chain(0.2, 3.0, exact_limits=False, states=401)
    mean, se = _simulated("ewma", 12000, seed=40, smoothing=0.2, width=3.0, exact_limits=True)
    assert exact < asymptotic
    assert abs(mean - exact) < 4 * se
    # with a 1 sigma shift the head start matters most (Lucas & Saccucci 1990 discuss it)
    exact1 = arl.ewma_arl_markov_chain(0.2, 3.0, shift=1.0, exact_limits=True, states=401)
    mean1, se1 = _simulated("ewma", 4000, seed=41, smoothing=0.2, width=3.0, shift=1.0, exact_limits=True)
    assert abs(mean1 - exact1) < 4 * se1
    assert exact1 < arl.ewma_arl_integral_equation(0.2, 3.0, shift=1.0)


def test_simulation_rejects_unknown_chart():
    with pytest.raises(ValueError, match="cusum"):
        arl.simulate_run_lengths("shewhart", n_chains=2)


# --------------------------------------------------------------------------------------------
# Serially correlated residuals: the residual chart with limits for an estimated baseline


def test_robust_lag_one_correlation_of_an_ar1_and_the_pairs_across_gaps():
    # closed form: the lag-1 autocorrelation of an AR(1) is phi (Box, Jenkins & Reinsel 2008, eq. 3.2.11)
    x = ar1_series(np.random.default_rng(4), 1, 20000, 0.7)[0]
    rho, pairs = serial_dependence.robust_lag_one_correlation(x)
    assert pairs == 19999 and abs(rho - 0.7) < 0.03  # sd of the MAD-based estimate ~0.008 here
    adjacent = np.ones(19999, dtype=bool)
    adjacent[::2] = False  # every other pair spans a gap: left out
    assert serial_dependence.robust_lag_one_correlation(x, adjacent)[1] == 9999


def test_prediction_errors_equal_z_without_dependence_and_statsmodels_kalman_filter_with_it():
    rng = np.random.default_rng(5)
    r, se = rng.normal(0, 1.2, 300), np.full(300, 0.6)
    errors, _, _ = serial_dependence.ar1_prediction_errors(r, se, 1, 0.0, 1.0)
    np.testing.assert_array_equal(errors, r / np.sqrt(1.0 + se * se))  # phi 0: the error-aware z
    # AR(1) state plus measurement error: statsmodels' SARIMAX Kalman filter, stationary start
    from statsmodels.tsa.statespace.sarimax import SARIMAX

    phi, s2 = 0.7, 1.0
    model = SARIMAX(r, order=(1, 0, 0), trend="n", measurement_error=True)
    fitted = model.filter(np.array([phi, 0.36, s2 * (1 - phi * phi)]))
    reference = fitted.filter_results.standardized_forecasts_error[0]
    errors, _, _ = serial_dependence.ar1_prediction_errors(r, se, 1, phi, math.sqrt(s2))
    np.testing.assert_allclose(errors, reference, rtol=1e-9, atol=1e-9)  # statsmodels: 5e-11
    # a gap of 3 windows is 3 predictions without an update: the same as NaN observations there
    gapped = r.copy()
    gapped[10:12] = np.nan
    ref_gap = model.clone(gapped).filter(np.array([phi, 0.36, s2 * (1 - phi * phi)]))
    steps = np.ones(298, dtype=int)
    steps[10] = 3
    kept = np.r_[r[:10], r[12:]]
    errors, _, _ = serial_dependence.ar1_prediction_errors(kept, 0.6, steps, phi, 1.0)
    expected = np.r_[
        ref_gap.filter_results.standardized_forecasts_error[0][:10],
        ref_gap.filter_results.standardized_forecasts_error[0][12:],
    ]
    np.testing.assert_allclose(errors, expected, rtol=1e-9, atol=1e-9)


def test_a_window_with_a_poor_estimate_cannot_alarm_on_its_own():
    r = np.array([0.0, 0.0, 0.0, 50.0, 0.0])
    se = np.array([0.1, 0.1, 0.1, 1000.0, 0.1])
    errors, _, _ = serial_dependence.ar1_prediction_errors(r, se, 1, 0.8, 1.0)
    assert abs(errors[3]) < 0.06 and abs(errors[4]) < 1e-3  # and it hardly moves the predictor


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.8])
def test_false_alarm_rate_with_ar1_residuals_and_an_estimated_baseline_is_near_design(phi):
    # 300 series, baseline 120 windows, 3000 monitored; CUSUM k 0.5 with h 7 widened for the
    # baseline's error. The rate of first false alarms, alarms / windows monitored until the
    # first one, estimates 1 / E[RL] over baselines; design 1 / ARL0(h = 7) from Page's
    # equation (cusum_arl_integral_equation, ARL0 ~ 2.7e3 two-sided). About 250 alarms: Poisson
    # sd ~6 %, so a factor 2 either way (the acceptance target) is a wide, safe tolerance.
    h = arl.limit_for_estimated_parameters("cusum", 7.0, 120)
    design = 1.0 / arl.cusum_arl_integral_equation(0.5, 7.0)
    errors = residual_chart_errors(ar1_series(np.random.default_rng(11), 300, 3120, phi), 120)
    upper, lower = detectors.cusum_path(errors, 0.5)
    alarm = (upper > h) | (lower > h)
    hit = alarm.any(axis=1)
    exposure = np.where(hit, alarm.argmax(axis=1) + 1, alarm.shape[1]).sum()
    assert hit.sum() > 100
    assert 0.5 < hit.sum() / exposure / design < 2.0
    # without the prediction errors (CUSUM on z itself) phi 0.8 is far outside
    if phi == 0.8:
        x = ar1_series(np.random.default_rng(11), 300, 3120, phi)
        z = (x[:, 120:] - np.median(x[:, :120], axis=1, keepdims=True)) / np.std(x[:, :120], axis=1, keepdims=True)
        up, lo = detectors.cusum_path(z, 0.5)
        raw = (up > h) | (lo > h)
        raw_exposure = np.where(raw.any(axis=1), raw.argmax(axis=1) + 1, raw.shape[1]).sum()
        assert raw.any(axis=1).sum() / raw_exposure / design > 10.0


def test_a_two_percent_drop_of_a_correlated_mode_frequency_is_flagged_within_a_day():
    # a mode frequency with a residual scale of 0.5 % (4 residual scales for a 2 % drop),
    # AR(1) phi 0.8 between 2-hourly windows, baseline 120 windows, default CUSUM k 0.5, h 10
    # widened for the baseline (about 14.9): the first prediction error sees 4 / 0.6 = 6.7
    # scales, each later one 4 (1 - 0.8) / 0.6 = 1.3, so about (14.9 - 6.2) / 0.83 + 1 ~ 11
    # windows on average. Measured: median 11, 60 % within a day (12 windows), 90 % within two
    # (a baseline that overestimates the scale is slow); required: median <= 12, 85 % within 24
    h = arl.limit_for_estimated_parameters("cusum", 10.0, 120)
    x = ar1_series(np.random.default_rng(12), 200, 120 + 48, 0.8)
    x[:, 120:] -= 4.0
    errors = residual_chart_errors(x, 120)
    upper, lower = detectors.cusum_path(errors, 0.5)
    alarm = (upper > h) | (lower > h)
    delay = np.where(alarm.any(axis=1), alarm.argmax(axis=1) + 1, 999)
    assert np.median(delay) <= 12 and np.mean(delay <= 24) >= 0.85


def test_limits_for_an_estimated_baseline_shrink_towards_the_configured_ones_with_n():
    # design: the known-parameter ARL0 (Page's equation); the widening falls with n and is capped
    # at 3 h for a baseline too short to say anything (a 4-window baseline must not fail)
    widened = [arl.limit_for_estimated_parameters("cusum", 10.0, n) for n in (4, 60, 120, 1000)]
    assert widened[0] == 30.0 and widened[1] > widened[2] > widened[3] > 10.0
    assert widened[3] < 11.0
    assert arl.limit_for_estimated_parameters("ewma", 4.3, 10**6, smoothing=0.1) < 4.32
