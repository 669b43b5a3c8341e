"""The hinge (bilinear) covariate model: knee search, the fit at the knee against statsmodels,
and the fallback to a line when the baseline does not reach a knee."""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

from corrtransforms.numerics import covariate_model

#: invented deck: the frequency stiffens below 0 degC (slope -0.02 Hz/degC), above it it falls by
#: 0.002 Hz/degC (the bilinear shape reported by Peeters & De Roeck 2001; the numbers are invented)
KNEE, BELOW, ABOVE = 0.0, -0.02, -0.002
#: tolerance of the recovered knee: a twentieth of the baseline's 30 degC range (common practice)
KNEE_TOLERANCE = 1.5


def _deck(seed, low=-10.0, high=20.0, n=400, noise=0.003):
    rng = np.random.default_rng(seed)
    temperature = rng.uniform(low, high, n)
    frequency = 2.0 + np.where(temperature < KNEE, BELOW, ABOVE) * (temperature - KNEE)
    frequency = frequency + rng.normal(0, noise, n)
    return temperature, frequency


def _hinge_rlm(temperature, frequency, knee, center):
    """statsmodels' Huber M-regression with the hinge column at a given knee."""
    design = np.column_stack([np.ones(temperature.size), temperature - center, np.maximum(temperature - knee, 0.0)])
    return sm.RLM(frequency, design, M=sm.robust.norms.HuberT()).fit(tol=1e-13, maxiter=1000), design


def test_a_known_hinge_is_recovered_and_the_fit_at_the_knee_matches_statsmodels():
    temperature, frequency = _deck(31)
    frequency[:6] += 0.1  # a few disturbed baseline windows
    model = covariate_model.fit_baseline_model(
        frequency, np.full(frequency.size, 0.001), temperature[:, None], ("temperature",), hinge=True
    )
    assert model.quality == () and model.knee is not None
    assert abs(model.knee - KNEE) < KNEE_TOLERANCE
    below, above = model.hinge_slopes
    assert below == pytest.approx(BELOW, rel=0.05) and above == pytest.approx(ABOVE, abs=0.0005)
    reference, design = _hinge_rlm(temperature, frequency, model.knee, np.median(temperature))
    np.testing.assert_allclose([model.location, *model.coefficients], reference.params, rtol=1e-6, atol=1e-9)
    expected, _ = model.predict(np.array([[-8.0], [15.0]]))
    np.testing.assert_allclose(expected, 2.0 + np.array([BELOW * -8.0, ABOVE * 15.0]), atol=0.003)


def test_the_knee_minimises_the_huber_objective_of_statsmodels_fits_over_a_grid():
    # an outside check of the profile search: statsmodels' RLM at each knee of a fine grid, the
    # objective sum rho(r / s0) (Huber's rho, s0 of the line); the minimum lies within one step
    temperature, frequency = _deck(32)
    knee = covariate_model.hinge_knee(temperature, frequency)
    line = sm.RLM(frequency, sm.add_constant(temperature), M=sm.robust.norms.HuberT()).fit(tol=1e-13, maxiter=1000)
    s0 = covariate_model.huber_regression(sm.add_constant(temperature - np.median(temperature)), frequency)[1]
    assert s0 == pytest.approx(line.scale, rel=1e-6)
    grid = np.linspace(-5.0, 5.0, 101)
    huber = sm.robust.norms.HuberT()
    objective = [float(np.sum(huber.rho(_hinge_rlm(temperature, frequency, k, 0.0)[0].resid / s0))) for k in grid]
    assert knee == pytest.approx(grid[int(np.argmin(objective))], abs=grid[1] - grid[0])


def test_huber_objective_and_the_moment_ratio_follow_statsmodels_and_scipy():
    residual = np.random.default_rng(33).standard_t(3, 200)
    huber = sm.robust.norms.HuberT()
    assert covariate_model.huber_objective(residual, 0.7) == pytest.approx(np.sum(huber.rho(residual / 0.7)), rel=1e-12)
    # E[psi^2] / E[psi'] at the normal by quadrature (scipy) against the closed form
    t = covariate_model.HUBER_T
    square = stats.norm.expect(lambda u: np.minimum(u * u, t * t))
    slope = stats.norm.cdf(t) - stats.norm.cdf(-t)
    assert covariate_model._huber_moments_ratio() == pytest.approx(square / slope, rel=1e-9)


def test_a_line_is_recovered_as_a_line():
    rng = np.random.default_rng(34)
    temperature = rng.uniform(-10, 20, 400)
    frequency = 2.0 - 0.003 * temperature + rng.normal(0, 0.003, 400)
    stderr = np.full(400, 0.001)
    hinge = covariate_model.fit_baseline_model(frequency, stderr, temperature[:, None], ("t",), hinge=True)
    linear = covariate_model.fit_baseline_model(frequency, stderr, temperature[:, None], ("t",))
    # no significant knee: the hinge model is the linear one, with the fallback code
    assert hinge.knee is None and hinge.quality == (covariate_model.KNEE_NOT_IN_BASELINE,)
    assert hinge.coefficients == linear.coefficients and hinge.location == linear.location
    assert linear.coefficients[0] == pytest.approx(-0.003, rel=0.05)


@pytest.mark.parametrize("low, high", [(5.0, 20.0), (-0.5, 20.0)])
def test_a_baseline_that_does_not_reach_the_knee_falls_back_to_a_line(low, high):
    # the whole baseline above the knee, or too few windows below it (about 7 of 400 under 0 degC,
    # fewer than side = 40 of the rule): linear with knee_not_in_baseline
    temperature, frequency = _deck(35, low=low, high=high)
    model = covariate_model.fit_baseline_model(
        frequency, np.full(frequency.size, 0.001), temperature[:, None], ("t",), hinge=True
    )
    assert model.knee is None and covariate_model.KNEE_NOT_IN_BASELINE in model.quality
    assert len(model.coefficients) == 1 and model.hinge_slopes[0] == model.hinge_slopes[1]


def test_a_second_covariate_stays_linear_beside_the_hinge():
    temperature, frequency = _deck(36)
    speed = np.random.default_rng(37).uniform(900, 1100, temperature.size)
    frequency = frequency + 1e-4 * (speed - 1000)
    model = covariate_model.fit_baseline_model(
        frequency, np.full(frequency.size, 0.001), np.column_stack([temperature, speed]), ("t", "speed"), hinge=True
    )
    assert abs(model.knee - KNEE) < KNEE_TOLERANCE and len(model.coefficients) == 3
    assert model.coefficients[1] == pytest.approx(1e-4, rel=0.1)
