"""The numerator-subset variance of a coefficient on a record with gaps, against a simulation.

``numerics.bartlett.subset_mismatch_variance`` is the variance a lag-``m`` coefficient gets when
its product sum runs over the ``C`` pairs with both samples valid and its normalisation over all
``N`` valid samples. With ``b_t = a_{t-m}`` the true coefficient at lag ``m`` is 1, Bartlett's
variance there is 0 (``(1 - rho^2)^2`` factor, Bartlett 1946), and what scatter remains is this
term alone, so a direct Monte-Carlo of the estimator checks it.
"""

import numpy as np
import scipy.signal

from corrtransforms.numerics.bartlett import subset_mismatch_variance


def _burst_mask(rng, n, mean_gap=50, mean_good=200):
    valid = np.ones(n, dtype=bool)
    t = int(rng.geometric(1 / mean_good))
    while t < n:
        gap = int(rng.geometric(1 / mean_gap))
        valid[t : t + gap] = False
        t += gap + int(rng.geometric(1 / mean_good))
    return valid


def test_subset_variance_matches_a_simulation_of_the_count_corrected_coefficient():
    rng = np.random.default_rng(5)
    n, m, phi = 9500, 4, 0.9
    rho = phi ** np.arange(50)  # AR(1) coefficient (Box, Jenkins & Reinsel Sec. 3.2.4)
    estimates, predicted = [], []
    for _ in range(400):
        x = scipy.signal.lfilter([1.0], [1.0, -phi], rng.standard_normal(n + m + 300))[300:]
        a, b = x[m:], x[:n]  # b_{t+m} = a_t: the lag-m coefficient is exactly 1
        valid = _burst_mask(rng, n)
        pairs = valid[:-m] & valid[m:]
        product = np.sum(a[:-m][pairs] * b[m:][pairs]) / pairs.sum()
        # the normalisation over every valid sample (means known to be 0)
        estimates.append(product / np.sqrt(np.mean(a[valid] ** 2) * np.mean(b[valid] ** 2)))
        predicted.append(subset_mismatch_variance(1.0, m, pairs.sum(), valid.sum(), valid.sum(), rho, rho))
    # the sample variance of 400 draws has a relative sd of sqrt(2 / 399) = 7 %; the formula is
    # first order with the runs taken as independent; measured 1.13 at this seed; a +/-35 % band
    ratio = np.var(estimates, ddof=1) / np.mean(predicted)
    assert 0.65 <= ratio <= 1.35, ratio


def test_subset_variance_is_zero_at_lag_zero_and_negligible_without_gaps():
    rho = 0.9 ** np.arange(50)
    assert subset_mismatch_variance(0.9, 0.3, 9000.0, 9000.0, 9000.0, rho, rho) == 0.0
    # complete record of 10000 samples at lag 4: C = N - 4, one run, O(m^2 / N^2)
    v = subset_mismatch_variance(0.9, 4.0, 9996.0, 10000.0, 10000.0, rho, rho)
    assert 0 < v < 16 / 1e8
