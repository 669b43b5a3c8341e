"""[shifts] false_alarms_per_year: limits from the budget, and the false-episode rate they give.

The limits come from Page's integral equation (CUSUM) and Crowder's (EWMA); they are checked
against the Markov-chain approximations of Brook & Evans (1972) and Lucas & Saccucci (1990),
a second, independent method. The rate is checked by simulating healthy series at the detector
level: AR(1) indicator residuals plus estimation noise, their standardised one-step prediction
errors (the production filter, numerics/serial_dependence.py) charted by a two-sided CUSUM and
EWMA that restart after each alarm (an episode).
"""

import numpy as np
import pytest

from corrtransforms.config import ArchiveConfig, AssetConfig, ShiftsConfig, WindowsConfig
from corrtransforms.numerics.arl import (
    SECONDS_PER_YEAR,
    cusum_arl_markov_chain,
    ewma_arl_markov_chain,
    limit_for_run_length,
    run_length_for_budget,
)
from corrtransforms.numerics.serial_dependence import ar1_prediction_errors
from corrtransforms.stages.shifts import budget_limits, with_budget_limits
from corrtransforms.stages.state import settings_digest

#: the demo's window rate: 600-s windows, hop = length (demo_data/footbridge.toml)
DEMO_HOP_S = 600.0
#: about the demo's monitored series: 5 auto pairs x 3 indicators, 3 modes x 2, one cross pair x 2
DEMO_SERIES = 23


def _config(**shifts):
    return AssetConfig(
        name="budget",
        archive=ArchiveConfig(path="x", sample_rate_hz=25.0),
        windows=WindowsConfig(length_s=DEMO_HOP_S, hop_s=DEMO_HOP_S),
        shifts=ShiftsConfig(**shifts),
    )


@pytest.mark.parametrize("arl0", [2e4, 1e6, 2e7])
def test_limits_reach_the_run_length_by_a_second_method(arl0):
    h = limit_for_run_length("cusum", arl0, k=0.5)
    width = limit_for_run_length("ewma", arl0, smoothing=0.1)
    # Brook & Evans (1972) Markov chain, 400 states: within 1 % of the integral equation's target
    assert cusum_arl_markov_chain(0.5, h, states=400) == pytest.approx(arl0, rel=0.01)
    # Lucas & Saccucci (1990) Markov chain (default states): within 1.5 %
    assert ewma_arl_markov_chain(0.1, width) == pytest.approx(arl0, rel=0.015)


def test_budget_divides_over_series_and_charts_and_explicit_limits_win():
    windows_per_year = SECONDS_PER_YEAR / DEMO_HOP_S  # 52 596
    assert run_length_for_budget(1.0, DEMO_SERIES, windows_per_year, 2) == pytest.approx(
        windows_per_year * DEMO_SERIES * 2
    )
    config = _config(false_alarms_per_year=1.0)
    limits = budget_limits(config, DEMO_SERIES)
    arl0 = windows_per_year * DEMO_SERIES * 2
    assert limits == {
        "cusum_h": limit_for_run_length("cusum", arl0, k=0.5),
        "ewma_L": limit_for_run_length("ewma", arl0, smoothing=0.1),
    }
    # more series, smaller share each: wider limits
    assert budget_limits(config, 10 * DEMO_SERIES)["cusum_h"] > limits["cusum_h"]
    # one chart only: the whole share is its own
    assert budget_limits(_config(false_alarms_per_year=1.0, detector="cusum"), DEMO_SERIES) == {
        "cusum_h": limit_for_run_length("cusum", windows_per_year * DEMO_SERIES, k=0.5)
    }
    explicit = _config(false_alarms_per_year=1.0, cusum_h=7.0, explicit_limits=("cusum_h",))
    assert with_budget_limits(explicit, DEMO_SERIES).shifts.cusum_h == 7.0
    assert with_budget_limits(explicit, DEMO_SERIES).shifts.ewma_L == limits["ewma_L"]
    assert with_budget_limits(_config(), DEMO_SERIES).shifts == _config().shifts
    # the state's settings name the budget, not the limits it gives for one series count
    assert settings_digest(with_budget_limits(config, 5)) == settings_digest(with_budget_limits(config, 50))
    assert settings_digest(config) != settings_digest(_config())


def _episodes(errors_blocks, h, k, width, smoothing):
    """Episodes of a two-sided CUSUM and EWMA (asymptotic limits) on each chain, both restarted
    after an alarm of either (Montgomery 2009, eqs. 9.2-9.3 and 9.22-9.26)."""
    c = width * np.sqrt(smoothing / (2 - smoothing))
    upper = lower = ewma = None
    count = 0
    for block in errors_blocks:
        if upper is None:
            upper = np.zeros(block.shape[0])
            lower = np.zeros(block.shape[0])
            ewma = np.zeros(block.shape[0])
        for t in range(block.shape[1]):
            z = block[:, t]
            upper = np.maximum(0.0, upper + z - k)
            lower = np.maximum(0.0, lower - z - k)
            ewma = smoothing * z + (1 - smoothing) * ewma
            alarm = (upper > h) | (lower > h) | (np.abs(ewma) > c)
            if alarm.any():
                count += int(alarm.sum())
                upper[alarm] = lower[alarm] = ewma[alarm] = 0.0
    return count


def test_false_episode_rate_per_asset_year_is_the_budget_within_a_factor_of_two():
    """40 asset-years of DEMO_SERIES healthy series at the demo's window rate, budget 1 a year.

    Tolerance: a factor of 2 (the brief's); with 40 expected episodes the Poisson standard
    deviation is 6.3, so the band [20, 80] is more than 3 of them wide on each side, and the
    design error (union of two charts below their sum, zero-start vs renewal ARL) is a few %.
    """
    rng = np.random.default_rng(20240518)
    config = _config(false_alarms_per_year=1.0)
    limits = budget_limits(config, DEMO_SERIES)
    years = 40
    chains = years * DEMO_SERIES
    n = int(round(SECONDS_PER_YEAR / DEMO_HOP_S))
    phi, scale, stderr = 0.7, 1.0, 0.5  # strongly correlated residuals; estimation noise on top
    latent = rng.standard_normal(chains) * scale
    mean, var = np.zeros(chains), None

    def blocks(size=4096):
        nonlocal latent, mean, var
        for first in range(0, n, size):
            m = min(size, n - first)
            shocks = rng.standard_normal((chains, m)) * scale * np.sqrt(1 - phi**2)
            x = np.empty((chains, m))
            for t in range(m):
                latent = phi * latent + shocks[:, t]
                x[:, t] = latent
            resid = x + stderr * rng.standard_normal((chains, m))
            errors, mean, var = ar1_prediction_errors(
                resid, np.full((chains, m), stderr), np.ones((chains, m)), phi, scale, mean, var
            )
            yield errors

    found = _episodes(blocks(), limits["cusum_h"], 0.5, limits["ewma_L"], 0.1)
    per_asset_year = found / years
    print(f"false episodes per asset-year: {per_asset_year:.2f} (budget 1; {found} in {years} years)")
    assert 0.5 <= per_asset_year <= 2.0, (found, limits)
