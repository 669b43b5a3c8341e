"""Screening wired into the correlate stage: flags reach pairs, modes and indicators; exclusion
rejects the window before it is correlated.

The screening and correlation numerics are checked against their references in
test_screen.py and test_correlation.py; here the check is that the merge loses nothing:
the flagged subjects come out flagged everywhere they are used, the stationarity_p rows travel
with the window, and with ``action = "exclude"`` the window yields exactly one whole-window reject.
"""

import dataclasses

import numpy as np

from corrtransforms.config import parse_config
from corrtransforms.records import WindowBlock
from corrtransforms.stages.analyse import analyse_window
from corrtransforms.stages.indicators import window_indicators

FS = 20.0
N = 12_000  # 600 s


def config(action="flag"):
    return parse_config(
        {
            "asset": {"name": "screen-test"},
            "archive": {"path": "unused", "sample_rate_hz": FS},
            "channels": {"names": ["a", "b"]},
            "windows": {"length_s": 600.0},
            "correlation": {"max_lag_s": 10.0, "pairs": "all"},
            "modes": [{"name": "mode_a", "channel": "a", "band_hz": [1.0, 3.0]}],
            "screening": {"action": action},
        }
    )


def ar1(rng, phi=0.9, n=N):
    # AR(1): stationary, short memory (integral time scale (1+phi)/(1-phi) samples)
    e = rng.standard_normal(n)
    x = np.empty(n)
    x[0] = e[0] / np.sqrt(1 - phi**2)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


def block(a, b):
    values = np.column_stack([a, b])
    return WindowBlock(
        asset="screen-test",
        window_start_us=1_700_000_400_000_000,
        window_length_s=600.0,
        sample_rate_hz=FS,
        channels=("a", "b"),
        values=values,
        valid=np.ones_like(values, bool),
    )


def burst(x, start_s=300.0, length_s=30.0, factor=3.0):
    # a 30-s burst with three times the rms in the middle of the record (a heavy transient)
    y = x.copy()
    i0, i1 = int(start_s * FS), int((start_s + length_s) * FS)
    y[i0:i1] *= factor
    return y


def test_flag_reaches_pairs_modes_and_indicator_rows():
    rng = np.random.default_rng(7)
    b_channel = ar1(rng)
    a_channel = burst(ar1(rng))
    result, rejects = analyse_window(block(a_channel, b_channel), config("flag"))
    assert rejects == [] and result is not None
    quality = {p.subject: p.quality for p in result.pairs}
    assert "nonstationary" in quality["a"] and "nonstationary" in quality["a:b"]
    assert "nonstationary" not in quality["b"]
    assert "nonstationary" in result.subject_quality["mode_a"]
    rows = window_indicators(result, config("flag"))
    by = {(r.subject, r.indicator): r for r in rows}
    assert "nonstationary" in by[("a", "rms")].quality
    assert "nonstationary" in by[("mode_a", "mode_freq_hz")].quality
    assert "nonstationary" in by[("a:b", "lag_s")].quality
    assert "nonstationary" not in by[("b", "rms")].quality
    assert by[("a", "stationarity_p")].value <= 0.05 < by[("b", "stationarity_p")].value


def test_exclude_rejects_the_window_before_correlating():
    rng = np.random.default_rng(7)
    flagged = block(burst(ar1(rng)), ar1(rng))
    result, rejects = analyse_window(flagged, config("exclude"))
    assert result is None
    assert len(rejects) == 1
    (reject,) = rejects
    assert reject.reason == "nonstationary_window" and reject.subject == "*" and reject.rejects_whole_window
    assert reject.window_start_us == flagged.window_start_us


def test_stationary_window_is_unchanged_by_screening():
    rng = np.random.default_rng(11)
    clean = block(ar1(rng), ar1(rng))
    screened, _ = analyse_window(clean, config("exclude"))
    unscreened_config = dataclasses.replace(config(), screening=dataclasses.replace(config().screening, enabled=False))
    plain, _ = analyse_window(clean, unscreened_config)
    assert screened is not None
    for p, q in zip(screened.pairs, plain.pairs):
        np.testing.assert_array_equal(p.coefficient, q.coefficient)
        assert "nonstationary" not in p.quality
    assert {r.indicator for r in screened.extra_indicators} == {"stationarity_p"}
    assert plain.extra_indicators == ()
