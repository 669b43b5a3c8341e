"""corrtransforms.numerics.novelty against scipy/numpy and closed forms."""

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import mahalanobis

from corrtransforms.numerics.novelty import fit_novelty_model, retained_components


def _sample(rng, m, p, rho=0.5):
    cov = rho * np.ones((p, p)) + (1 - rho) * np.eye(p)
    return rng.multivariate_normal(np.zeros(p), cov, size=m), cov


def test_t2_with_all_components_is_the_squared_mahalanobis_distance():
    # scipy.spatial.distance.mahalanobis with the inverse sample covariance (Mahalanobis 1936)
    rng = np.random.default_rng(1)
    z, _ = _sample(rng, 80, 5)
    model = fit_novelty_model(z, n_components=5)
    vi = np.linalg.inv(np.cov(z, rowvar=False))
    new = rng.normal(size=(7, 5))
    t2, spe, t2c, spec = model.statistics(new)
    for row, value in zip(new, t2):
        assert value == pytest.approx(mahalanobis(row, z.mean(axis=0), vi) ** 2, rel=1e-10)
    np.testing.assert_allclose(spe, 0.0, atol=1e-12)
    np.testing.assert_allclose(t2c.sum(axis=1), t2, rtol=1e-10)


def test_spe_is_the_squared_distance_to_the_retained_subspace_and_contributions_add_up():
    # projection residual computed independently with numpy's SVD of the centred sample
    rng = np.random.default_rng(2)
    z, _ = _sample(rng, 120, 6)
    model = fit_novelty_model(z, n_components=2)
    centred = z - z.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    basis = vt[:2].T
    new = rng.normal(size=(5, 6))
    d = new - z.mean(axis=0)
    expected = np.sum((d - d @ basis @ basis.T) ** 2, axis=1)
    t2, spe, t2c, spec = model.statistics(new)
    np.testing.assert_allclose(spe, expected, rtol=1e-9)
    np.testing.assert_allclose(spec.sum(axis=1), spe, rtol=1e-10)
    np.testing.assert_allclose(t2c.sum(axis=1), t2, rtol=1e-10)
    # eigenvalues are those of numpy's covariance (singular values^2 / (m - 1))
    s = np.linalg.svd(centred, compute_uv=False)
    np.testing.assert_allclose(model.eigenvalues, s**2 / (z.shape[0] - 1), rtol=1e-10)


def test_t2_limit_is_the_tracy_young_mason_closed_form():
    # Tracy, Young & Mason (1992); Montgomery (2009) eq. 11.19: p (m+1)(m-1)/(m(m-p)) F_{alpha,p,m-p}
    rng = np.random.default_rng(3)
    z, _ = _sample(rng, 50, 4)
    model = fit_novelty_model(z, n_components=3)
    k, m, alpha = 3, 50, 0.005
    assert model.t2_limit(alpha) == pytest.approx(
        k * (m + 1) * (m - 1) / (m * (m - k)) * stats.f.ppf(1 - alpha, k, m - k), rel=1e-12
    )
    # the normal score is Phi^-1 of that distribution: it equals Phi^-1(1 - alpha) at the limit
    assert float(model.t2_normal_score(model.t2_limit(alpha))) == pytest.approx(stats.norm.ppf(1 - alpha), rel=1e-9)
    # for large m the limit tends to chi-square with k degrees of freedom
    big = fit_novelty_model(_sample(rng, 200000, 4)[0], n_components=3)
    assert big.t2_limit(alpha) == pytest.approx(stats.chi2.ppf(1 - alpha, 3), rel=2e-3)


def test_spe_limit_against_chi_square_for_equal_residual_eigenvalues():
    # r equal residual eigenvalues l: Q / l ~ chi2(r) exactly; Jackson & Mudholkar's h0 is then 1/3
    # (the Wilson & Hilferty 1931 cube-root approximation), within about 1 % at these levels
    rng = np.random.default_rng(4)
    z, _ = _sample(rng, 100, 6)
    model = fit_novelty_model(z, n_components=1)
    lam = np.array([5.0, 2.0, 2.0, 2.0, 2.0, 2.0])
    import dataclasses

    model = dataclasses.replace(model, eigenvalues=lam)
    for alpha in (0.05, 0.01, 0.001):
        exact = 2.0 * stats.chi2.ppf(1 - alpha, 5)
        assert model.spe_limit(alpha) == pytest.approx(exact, rel=0.015)
        assert float(model.spe_normal_score(model.spe_limit(alpha))) == pytest.approx(stats.norm.ppf(1 - alpha))


def test_components_by_cumulative_variance_fraction():
    # Jolliffe (2002) Section 6.1.1: smallest k with cumulative fraction >= the cut-off
    assert retained_components([6.0, 2.0, 1.0, 1.0], 0.7) == 2
    assert retained_components([6.0, 2.0, 1.0, 1.0], 0.8) == 2
    assert retained_components([6.0, 2.0, 1.0, 1.0], 0.81) == 3
    assert retained_components([1.0, 1.0, 1.0], 0.99) == 2  # at most p - 1: SPE keeps a residual
    with pytest.raises(ValueError):
        retained_components([1.0])


def test_false_alarm_rate_on_in_control_data_is_the_design_rate():
    # Phase II in control: new windows independent of the baseline of m windows. Over many
    # baselines the T^2 exceedance rate with all components is exactly alpha (the F distribution
    # of Tracy, Young & Mason 1992); with the production rule's k (the subspace chosen from the
    # same data) and for SPE (Jackson & Mudholkar's approximation) it is approximate.
    # 400 baselines x 250 new windows = 100 000 windows; binomial sd of the rate at alpha 0.01:
    # sqrt(0.01 * 0.99 / 1e5) = 3.1e-4, but windows of one baseline share its estimation error,
    # so the tolerance is stated from the between-baseline spread: 4 standard errors of the
    # mean of the 400 per-baseline rates.
    rng = np.random.default_rng(20)
    alpha, m, p, n_new, n_base = 0.01, 150, 6, 250, 400
    rates = {"t2_full": [], "t2_rule": [], "spe_rule": []}
    for _ in range(n_base):
        z, cov = _sample(rng, m, p, rho=0.3)
        new = rng.multivariate_normal(np.zeros(p), cov, size=n_new)
        full = fit_novelty_model(z, n_components=p)
        rates["t2_full"].append(np.mean(full.statistics(new)[0] > full.t2_limit(alpha)))
        rule = fit_novelty_model(z)
        t2, spe, _, _ = rule.statistics(new)
        rates["t2_rule"].append(np.mean(t2 > rule.t2_limit(alpha)))
        rates["spe_rule"].append(np.mean(spe > rule.spe_limit(alpha)))
    for name, values in rates.items():
        values = np.asarray(values)
        mean, se = values.mean(), values.std(ddof=1) / np.sqrt(values.size)
        print(name, mean, se)
        if name == "t2_full":
            assert abs(mean - alpha) < 4 * se, (name, mean, se)
        elif name == "t2_rule":  # approximate: within a factor 1.5 of the design rate (stated tolerance)
            assert alpha / 1.5 < mean < alpha * 1.5, (name, mean, se)
        else:
            # known bias, measured 0.029 here: the residual subspace is that of the smallest
            # sample eigenvalues, which underestimate their population values for small m, so
            # the SPE limit is too low (docs/compensation.md); the chart of novelty_spe takes
            # its own scale from its baseline, so this does not reach the alarms
            assert alpha < mean < 4 * alpha, (name, mean, se)
