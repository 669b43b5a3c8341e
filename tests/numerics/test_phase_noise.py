"""Single-look phase statistics (corrtransforms.numerics.phase_noise) against outside references."""

import numpy as np
import pytest
import scipy.integrate
import scipy.special

from corrtransforms.numerics.phase_noise import MAX_COHERENCE, phase_moments, single_look_phase_pdf


@pytest.mark.parametrize("coherence", [0.0, 0.3, 0.8, 0.99])
def test_density_integrates_to_one(coherence):
    # scipy.integrate.quad as the reference integrator (the table uses a periodic trapezoid rule)
    total, _ = scipy.integrate.quad(lambda t: float(single_look_phase_pdf(t, coherence)), -np.pi, np.pi, limit=200)
    assert total == pytest.approx(1.0, abs=1e-8)


@pytest.mark.parametrize("coherence", [0.05, 0.4, 0.8, 0.95, 0.999])
def test_mean_cosine_equals_the_closed_form(coherence):
    # E[cos theta] = (pi / 4) gamma 2F1(1/2, 1/2; 2; gamma^2) for one look (Lee, Hoppel, Mango &
    # Miller 1994, from memory; scipy.special.hyp2f1 evaluates it)
    expected = np.pi / 4 * coherence * scipy.special.hyp2f1(0.5, 0.5, 2.0, coherence**2)
    mean_cos, _ = phase_moments(coherence)
    assert float(mean_cos) == pytest.approx(expected, rel=2e-4)


@pytest.mark.parametrize("coherence", [0.2, 0.6, 0.9])
def test_moments_equal_a_simulation_of_complex_gaussian_pairs(coherence):
    # direct simulation: y = gamma x + sqrt(1 - gamma^2) e with x, e independent circular complex
    # Gaussians has coherence gamma with x; theta = arg(conj(x) y); 4 standard errors of the mean
    rng = np.random.default_rng(5)
    n = 400_000
    x = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    e = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    theta = np.angle(np.conj(x) * (coherence * x + np.sqrt(1 - coherence**2) * e))
    mean_cos, mean_sin2 = phase_moments(coherence)
    for sample, model in ((np.cos(theta), mean_cos), (np.sin(theta) ** 2, mean_sin2)):
        assert abs(sample.mean() - float(model)) < 4 * sample.std() / np.sqrt(n)


def test_limits_and_odd_extension():
    # gamma = 0: uniform phase, E[cos] = 0 and E[sin^2] = 1/2 (closed form); a negative estimate
    # gives the opposite mean cosine and the same sin^2 (a noise estimate adds nothing on average)
    mean_cos, mean_sin2 = phase_moments(np.array([0.0, 0.5, -0.5, 1.5]))
    assert mean_cos[0] == pytest.approx(0.0, abs=1e-12) and mean_sin2[0] == pytest.approx(0.5, abs=1e-9)
    assert mean_cos[2] == -mean_cos[1] and mean_sin2[2] == mean_sin2[1]
    assert mean_cos[3] == phase_moments(MAX_COHERENCE)[0]
    with pytest.raises(ValueError):
        single_look_phase_pdf(0.0, 1.0)
