"""corrtransforms.stages.novelty: the rules of docs/compensation.md ("Multivariate novelty") on
invented residuals, the config keys, and a run split in two equal to one run."""

import dataclasses

import numpy as np
import pytest
from scipy import stats

from corrtransforms.config import ConfigError
from corrtransforms.numerics.novelty import fit_novelty_model
from corrtransforms.stages import novelty
from corrtransforms.stages.state import ShiftState
from tests.support.archive_data import make_config
from tests.support.shift_fixtures import same

HOUR = 3600 * 10**6
T0 = 1_717_200_000 * 10**6  # 2024-06-01 00:00 UTC


def _config(windows=40, **extra):
    config = make_config(
        "unused", names=("a", "b"), extra={"shifts": {"multivariate": True, "multivariate_windows": windows}}
    )
    return dataclasses.replace(config, shifts=dataclasses.replace(config.shifts, **extra)) if extra else config


def _residuals(n=120, p=3, baseline=10, seed=1, drop=()):
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, p))
    out = []
    for i in range(n):
        for j in range(p):
            if (i, j) in drop:
                continue
            state = "baseline" if i < baseline else "normal"
            out.append(novelty.SeriesResidual(T0 + i * HOUR, f"s{j}/rms", float(z[i, j]), state, "ok"))
    return out, z


def test_config_keys_default_off_and_are_validated():
    config = make_config("unused")
    assert config.shifts.multivariate is False and config.shifts.multivariate_windows == 100
    assert _config().shifts.multivariate is True
    with pytest.raises(ConfigError, match="multivariate"):
        make_config("unused", extra={"shifts": {"multivariate": "yes"}})
    with pytest.raises(ConfigError, match="multivariate_windows"):
        make_config("unused", extra={"shifts": {"multivariate_windows": 10}})


def test_pending_then_scores_equal_the_core_model_and_scipy():
    residuals, z = _residuals()
    out = novelty.novelty_for_run(residuals, _config(40))
    t2 = {r.window_start_us: r for r in out.rows if r.indicator == novelty.NOVELTY_T2}
    times = sorted(t2)
    pending = [t for t in times if t2[t].quality == novelty.PENDING]
    # 10 baseline windows, then 40 sample windows: 50 pending
    assert len(pending) == 50 and pending == times[:50]
    model = fit_novelty_model(z[10:50], n_components=3)
    d = z[60] - z[10:50].mean(axis=0)
    t2_value = d @ np.linalg.inv(np.cov(z[10:50], rowvar=False)) @ d
    m, p = 40, 3
    expected = stats.norm.isf(stats.f.sf(t2_value * m * (m - p) / (p * (m + 1) * (m - 1)), p, m - p))
    assert t2[times[60]].value == pytest.approx(expected, rel=1e-9)
    assert model.statistics(z[60:61])[0][0] == pytest.approx(t2_value, rel=1e-9)
    contrib = [
        r.value for r in out.rows if r.indicator == novelty.NOVELTY_T2_CONTRIBUTION and r.window_start_us == times[60]
    ]
    assert sum(contrib) == pytest.approx(t2_value, rel=1e-9)
    assert len(out.charted) == 2 * (120 - 50)


def test_a_window_missing_a_series_is_incomplete_not_evaluated_on_a_subset():
    residuals, _ = _residuals(drop={(70, 1)})
    out = novelty.novelty_for_run(residuals, _config(40))
    at = [r for r in out.charted if r.window_start_us == T0 + 70 * HOUR]
    assert len(at) == 2 and all(np.isnan(r.value) and r.quality == novelty.INCOMPLETE for r in at)


def test_a_run_split_at_a_day_equals_one_run():
    residuals, _ = _residuals(n=24 * 5)
    config = _config(40)
    whole = novelty.novelty_for_run(residuals, config)
    cut = T0 + 48 * HOUR  # inside the sample: the sample is resumed from the state row
    first = novelty.novelty_for_run([r for r in residuals if r.window_start_us < cut], config)
    table = novelty.novelty_states_table(first.states)
    second = novelty.novelty_for_run([r for r in residuals if r.window_start_us >= cut], config, table.to_pylist())
    assert same([list(r) for r in first.rows + second.rows], [list(r) for r in whole.rows])
    assert same([s.to_row() for s in first.states + second.states], [s.to_row() for s in whole.states])
    assert isinstance(ShiftState.from_row(table.to_pylist()[-1]), ShiftState)
