"""correlate_window and correlation_table: pairs resolved by name, skipped channels, modes,
weighted GCC, error metadata, quality codes, and the Arrow/Parquet table contract."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.signal

from corrtransforms.config import parse_config
from corrtransforms.numerics import random_error as err
from corrtransforms.records import PairCorrelation, WindowBlock, quality_text
from corrtransforms.stages.correlate import correlate_window, correlation_table
from corrtransforms.tables import CORRELATIONS
from tests.support.simulators import oscillator_rho, simulate_oscillator

START_US = 1_700_000_000_000_000  # an epoch-aligned invented window start


def _config(fs, length_s, **correlation):
    raw = {
        "asset": {"name": "test-asset"},
        "archive": {"path": "unused", "sample_rate_hz": fs},
        "windows": {"length_s": length_s},
        "correlation": correlation,
    }
    modes = correlation.pop("modes", None)
    if modes:
        raw["modes"] = modes
    return parse_config(raw)


def _block(values, fs, channels, valid=None, channel_quality=None, covariates=None):
    values = np.asarray(values, dtype=float)
    valid = np.isfinite(values) if valid is None else valid
    return WindowBlock(
        asset="test-asset",
        window_start_us=START_US,
        window_length_s=values.shape[0] / fs,
        sample_rate_hz=fs,
        channels=tuple(channels),
        values=np.where(valid, values, 0.0),
        valid=valid,
        covariates=covariates or {},
        channel_quality=channel_quality or {},
    )


def _band_limited_noise(rng, n, channels, fs, band_hz):
    spectrum = np.fft.rfft(rng.standard_normal((n, channels)), axis=0)
    f = np.fft.rfftfreq(n, 1 / fs)
    spectrum[(f < band_hz[0]) | (f > band_hz[1])] = 0.0
    return np.fft.irfft(spectrum, n=n, axis=0)


def test_all_pairs_layout_and_values_against_scipy():
    rng = np.random.default_rng(1)
    fs, n, L = 10.0, 600, 12
    x = rng.standard_normal((n, 3))
    wc = correlate_window(_block(x, fs, ["north", "south", "deck"]), _config(fs, 60.0, max_lag_s=L / fs))
    assert [(p.channel_a, p.channel_b) for p in wc.pairs] == [
        ("north", "north"),
        ("north", "south"),
        ("north", "deck"),
        ("south", "south"),
        ("south", "deck"),
        ("deck", "deck"),
    ]
    ref = x - x.mean(axis=0)
    lags = scipy.signal.correlation_lags(n, n)
    for p in wc.pairs:
        a, b = wc.channels.index(p.channel_a), wc.channels.index(p.channel_b)
        # R_ab(k) = scipy.signal.correlate(b, a)[lag == k] / n (biased), then / sqrt(R_aa(0) R_bb(0))
        full = scipy.signal.correlate(ref[:, b], ref[:, a], method="direct") / n
        expected = full[(lags >= (0 if p.is_auto else -L)) & (lags <= L)]
        expected /= np.sqrt(np.mean(ref[:, a] ** 2) * np.mean(ref[:, b] ** 2))
        # the default float32 lag sums: within 1e-6 (tests/numerics/test_transform_precision.py)
        np.testing.assert_allclose(p.coefficient, expected, rtol=0, atol=1e-6)
        assert p.first_lag_s == (0.0 if p.is_auto else -L / fs)
        assert len(p.coefficient) == len(p.stderr) == len(p.pair_count) == (L + 1 if p.is_auto else 2 * L + 1)
        np.testing.assert_allclose(p.lags_s()[-1], L / fs)
    for name in wc.channels:
        assert wc.rms[name] == pytest.approx(np.std(x[:, wc.channels.index(name)]), rel=1e-10)  # numpy


def test_named_pairs_keep_their_order_and_reverse_the_lag_axis():
    rng = np.random.default_rng(2)
    fs, n = 20.0, 2000
    s = rng.standard_normal(n + 5)
    x = np.column_stack([s[5:], s[:n]])  # "late" lags "early" by 5 samples
    cfg = _config(fs, 100.0, max_lag_s=1.0, pairs=[["early", "late"], ["late", "early"]])
    wc = correlate_window(_block(x, fs, ["early", "late"]), cfg)
    ab, ba = wc.pairs
    assert (ab.channel_a, ab.channel_b, ba.channel_a, ba.channel_b) == ("early", "late", "late", "early")
    assert ab.lags_s()[np.argmax(ab.coefficient)] == pytest.approx(5 / fs)
    # a reversed pair is the same sums from other float32 block products: equal within 1e-6
    np.testing.assert_allclose(ba.coefficient, ab.coefficient[::-1], rtol=0, atol=1e-6)
    assert set(wc.rms) == {"early", "late"}  # rms for every usable channel, even without autos requested


def test_dead_and_empty_channels_are_skipped_and_quality_is_propagated():
    rng = np.random.default_rng(3)
    fs, n = 10.0, 500
    x = rng.standard_normal((n, 4))
    x[:, 1] = 2.5  # flat (dead) sensor
    valid = np.ones((n, 4), dtype=bool)
    valid[:, 2] = False  # no sample at all
    block = _block(
        x,
        fs,
        ["a", "flat", "missing", "d"],
        valid=valid,
        channel_quality={"d": ("clipped",)},
        covariates={"temperature_c": 11.5},
    )
    wc = correlate_window(block, _config(fs, 50.0, max_lag_s=1.0))
    assert wc.channels == ("a", "d")
    assert [(p.channel_a, p.channel_b) for p in wc.pairs] == [("a", "a"), ("a", "d"), ("d", "d")]
    assert [quality_text(p.quality) for p in wc.pairs] == ["ok", "clipped", "clipped"]
    assert wc.covariates == {"temperature_c": 11.5}
    assert wc.subject_quality == {"d": ("clipped",)}
    # nothing usable: no pairs (the Beam stage turns that into a no_valid_pairs reject)
    none = correlate_window(_block(np.ones((n, 1)), fs, ["flat"]), _config(fs, 50.0, max_lag_s=1.0))
    assert none.pairs == () and none.rms == {}


def test_gappy_window_uses_pair_counts_for_record_length_and_coverage():
    rng = np.random.default_rng(4)
    fs, n = 10.0, 3000
    x = rng.standard_normal((n, 2))
    valid = np.ones((n, 2), dtype=bool)
    valid[100:400, 0] = False
    valid[1000:1100, 1] = False
    wc = correlate_window(
        _block(x, fs, ["a", "b"], valid=valid), _config(fs, 300.0, max_lag_s=2.0, estimator="unbiased")
    )
    cross = wc.pairs[1]
    both = valid[:, 0] & valid[:, 1]
    assert cross.pair_count[cross.pair_count.size // 2] == both.sum()
    assert cross.record_s == pytest.approx(both.sum() / fs)
    assert cross.coverage == pytest.approx(both.mean())
    assert wc.pairs[0].record_s == pytest.approx(valid[:, 0].sum() / fs)
    # rms over valid samples only (numpy reference)
    assert wc.rms["a"] == pytest.approx(np.std(x[valid[:, 0], 0]), rel=1e-10)


def test_error_metadata_of_band_limited_white_noise():
    # bandwidth-limited white noise, band 0..B: B_s = B, rel_error of the mean square 1/sqrt(BT),
    # required record 1/(B eps^2) (Bendat & Piersol, Random Data, Sec. 8.2); the tool's figure is
    # Bartlett's sqrt(2 sum rho^2 / n), equal to it for this spectrum
    rng = np.random.default_rng(5)
    fs, n, B = 20.0, 24000, 4.0
    x = _band_limited_noise(rng, n, 2, fs, (0.0, B))
    x[:, 1] = np.roll(x[:, 0], 7) + 0.2 * x[:, 1]  # a delayed copy plus a little noise
    wc = correlate_window(_block(x, fs, ["a", "b"]), _config(fs, n / fs, max_lag_s=5.0, target_rel_error=0.01))
    auto, cross = wc.pairs[0], wc.pairs[1]
    T = n / fs
    assert auto.bandwidth_hz == pytest.approx(B, rel=0.05)  # Parzen smoothing: ~1/L resolution
    rho = auto.coefficient[np.isfinite(auto.coefficient)]
    bartlett = np.sqrt(2 * np.sum(np.concatenate([rho, rho[1:]]) ** 2) / n)  # lags -L..L
    assert auto.rel_error == pytest.approx(bartlett, rel=1e-6)
    assert auto.rel_error == pytest.approx(1 / np.sqrt(B * T), rel=0.05)
    assert auto.bandwidth_time == pytest.approx(auto.bandwidth_hz * T)
    assert auto.required_record_s == pytest.approx(1 / (B * 0.01**2), rel=0.1)
    assert auto.meets_target == (auto.rel_error <= 0.01)
    peak = np.max(cross.coefficient)
    assert cross.lags_s()[np.argmax(cross.coefficient)] == pytest.approx(7 / fs)
    assert cross.rel_error == pytest.approx(float(err.correlation_rel_error(peak, cross.bandwidth_hz, T)))
    # per-lag stderr: at the peak of a (nearly) pure delay Bartlett's error of R equals the closed
    # form; the coefficient's own stderr there is much smaller (normalisation cancels most of it)
    assert np.nanmax(cross.stderr) < 0.05
    # rms stderr: rms / (2 sqrt(BT)) for band-limited white noise
    assert wc.rms_stderr["a"] == pytest.approx(wc.rms["a"] / (2 * np.sqrt(B * T)), rel=0.05)
    assert auto.n_effective == pytest.approx(2 * B * T, rel=0.25)  # T/(2 T_I), T_I ~ 1/(4B) for a sinc
    assert np.isnan(auto.tone_freq_hz) and auto.quality == ()


def _band_limited_sdof_rho(tau, fn, zeta, band_hz):
    """Wiener-Khinchin: rho_band(tau) = int_band G(f) cos(2 pi f tau) df / int_band G(f) df with
    the SDOF displacement PSD G(f) ~ 1 / ((wn^2 - w^2)^2 + (2 zeta wn w)^2) (Bendat & Piersol,
    Random Data, Sec. 6.1, from memory); numerical integration with the trapezoid rule."""
    f = np.linspace(band_hz[0], band_hz[1], 200001)
    w, wn = 2 * np.pi * f, 2 * np.pi * fn
    G = 1.0 / ((wn**2 - w**2) ** 2 + (2 * zeta * wn * w) ** 2)
    return np.array([np.trapezoid(G * np.cos(w * t), f) for t in tau]) / np.trapezoid(G, f)


def test_mode_band_limited_correlation_of_an_oscillator():
    rng = np.random.default_rng(6)
    fs, fn, zeta, band = 20.0, 1.5, 0.03, (1.0, 2.0)
    x, _, _ = simulate_oscillator(24000, 1, fs, fn, zeta, rng)
    cfg = _config(
        fs, 1200.0, max_lag_s=8.0, modes=[{"name": "first-bending", "channel": "deck", "band_hz": list(band)}]
    )
    wc = correlate_window(_block(x, fs, ["deck"]), cfg)
    (mode,) = wc.modes
    assert (mode.mode, mode.channel, mode.band_hz) == ("first-bending", "deck", band)
    assert mode.coefficient[0] == pytest.approx(1.0)
    lags = mode.lags_s()
    within = lags < 3.0
    expected = _band_limited_sdof_rho(lags[within], fn, zeta, band)
    se = mode.stderr[within]
    z = (mode.coefficient[within] - expected)[1:] / se[1:]
    assert np.max(np.abs(z)) < 5
    # the band holds nearly all of the mode: close to the closed-form SDOF correlation itself
    np.testing.assert_allclose(mode.coefficient[within], oscillator_rho(lags[within], fn, zeta), atol=0.1)
    assert mode.record_s == pytest.approx(1200.0)
    # decay envelope 0.03 * 2 pi * 1.5 = 0.28 1/s: exp(-0.28 * 7.2) = 0.13 < 0.2, so no flag
    assert "max_lag_short" not in mode.quality


def test_weighted_gcc_on_cross_pairs_only():
    rng = np.random.default_rng(7)
    fs, n, D = 50.0, 5000, 9
    s = scipy.signal.lfilter([1.0], [1.0, -0.9], rng.standard_normal(n + D))
    x = np.column_stack([s[D:], s[:n] + 0.1 * rng.standard_normal(n)])
    wc = correlate_window(_block(x, fs, ["a", "b"]), _config(fs, 100.0, max_lag_s=1.0, weighting="phat"))
    auto, cross = wc.pairs[0], wc.pairs[1]
    assert auto.weighted_coefficient is None
    assert cross.weighted_coefficient.shape == cross.coefficient.shape
    assert cross.lags_s()[np.argmax(cross.weighted_coefficient)] == pytest.approx(D / fs)
    plain = correlate_window(_block(x, fs, ["a", "b"]), _config(fs, 100.0, max_lag_s=1.0))
    assert plain.pairs[1].weighted_coefficient is None


def test_tone_bound_flags_a_short_record_for_a_strict_target():
    rng = np.random.default_rng(8)
    fs, n, f0 = 20.0, 1200, 1.0
    t = np.arange(n) / fs
    x = rng.standard_normal(n) + 3 * np.cos(2 * np.pi * f0 * t + 0.4)
    # 2T >= 1/(eps w0): eps = 0.001 needs 159 s, the record is 60 s
    wc = correlate_window(_block(x[:, None], fs, ["shaft"]), _config(fs, 60.0, max_lag_s=2.0, target_rel_error=0.001))
    p = wc.pairs[0]
    assert p.tone_freq_hz == pytest.approx(f0, abs=fs / 1240)
    assert p.tone_required_record_s == pytest.approx(1 / (0.001 * 2 * np.pi * p.tone_freq_hz))
    assert "tone_record_short" in p.quality and "max_lag_short" in p.quality


def test_correlation_table_schema_and_parquet_round_trip(tmp_path):
    rng = np.random.default_rng(9)
    fs, n = 10.0, 400
    blocks = [
        _block(rng.standard_normal((n, 2)), fs, ["a", "b"], channel_quality={"b": ("clipped",)}) for _ in range(3)
    ]
    blocks[1] = WindowBlock(**{**blocks[1].__dict__, "window_start_us": START_US + 40_000_000})
    wcs = [correlate_window(b, _config(fs, 40.0, max_lag_s=1.0)) for b in blocks]
    table = correlation_table(wcs)
    assert table.schema.equals(CORRELATIONS, check_metadata=True)
    assert table.num_rows == 9
    assert table.column("coefficient").type == pa.list_(pa.float32())
    pq.write_table(table, tmp_path / "part.parquet", compression="zstd")
    back = pq.read_table(tmp_path / "part.parquet")
    # Parquet names list items "element" on read-back; everything else (types, nullability,
    # field metadata with units) survives unchanged
    assert [f.name for f in back.schema] == CORRELATIONS.names
    assert back.cast(CORRELATIONS).schema.equals(CORRELATIONS, check_metadata=True)
    assert back.schema.field("scale").metadata[b"unit"] == b"unit_a*unit_b"
    rows = back.to_pylist()
    pairs = [p for wc in wcs for p in wc.pairs]
    for row, p, start in zip(rows, pairs, np.repeat([w.window_start_us for w in wcs], 3)):
        assert row["channel_a"] == p.channel_a and row["channel_b"] == p.channel_b
        assert int(row["window_start"].timestamp() * 1e6) == start
        np.testing.assert_array_equal(np.array(row["coefficient"], np.float32), p.coefficient.astype(np.float32))
        np.testing.assert_array_equal(np.array(row["stderr"], np.float32), p.stderr.astype(np.float32))
        assert row["quality"] == quality_text(p.quality)
        assert row["scale"] == p.scale and row["meets_target"] == p.meets_target
    assert rows[1]["quality"] == "clipped" and rows[0]["quality"] == "ok"
    assert str(back.column("window_start").type) == "timestamp[us, tz=UTC]"
    assert correlation_table([]).schema.equals(CORRELATIONS)


def test_correlation_table_readable_by_duckdb(tmp_path):
    duckdb = pytest.importorskip("duckdb")
    rng = np.random.default_rng(10)
    wc = correlate_window(_block(rng.standard_normal((300, 2)), 10.0, ["a", "b"]), _config(10.0, 30.0, max_lag_s=0.5))
    pq.write_table(correlation_table([wc]), tmp_path / "c.parquet")
    got = duckdb.sql(
        f"select channel_a, channel_b, len(coefficient) as n from '{tmp_path / 'c.parquet'}' "
        "order by channel_a, channel_b"
    ).fetchall()
    assert got == [("a", "a", 6), ("a", "b", 11), ("b", "b", 6)]


def test_pair_record_is_the_shared_contract():
    # the indicators stage reads these fields; keep them filled
    rng = np.random.default_rng(11)
    wc = correlate_window(_block(rng.standard_normal((500, 2)), 10.0, ["a", "b"]), _config(10.0, 50.0, max_lag_s=1.0))
    for p in wc.pairs:
        assert isinstance(p, PairCorrelation)
        for name in ("bandwidth_hz", "record_s", "rel_error", "required_record_s", "bandwidth_time", "n_effective"):
            assert np.isfinite(getattr(p, name)), name


def test_mean_square_rel_error_covers_a_lightly_damped_mode():
    # Monte Carlo, 160 windows of a 1 %-damped oscillator (300 s, 1/(zeta wn) = 8 s): rel_error of
    # an auto pair is Bartlett's (1946) general mean-square error sqrt(2 sum rho^2 / n); truth
    # R(0) = 1 / (4 zeta wn^3) for unit white forcing (Bendat & Piersol, Random Data, 4th ed.,
    # Sec. 6.1, from memory; equal to the Lyapunov solution of the simulator). The former
    # 1/sqrt(BT) with the Parzen-smoothed B covered 0.89 here. 95 % nominal; binomial sd 1.7 %
    # at n = 160, tolerance 3 sd.
    fs, n, reps, fn, zeta = 20.0, 6000, 160, 2.0, 0.01
    x, _, P = simulate_oscillator(n, reps, fs, fn, zeta, np.random.default_rng(41))
    truth = 1.0 / (4 * zeta * (2 * np.pi * fn) ** 3)
    assert P[0, 0] == pytest.approx(truth, rel=1e-9)
    names = [f"r{k}" for k in range(reps)]  # independent windows as channels of one block
    wc = correlate_window(_block(x, fs, names), _config(fs, n / fs, max_lag_s=30.0, pairs="auto"))
    z = [(wc.rms[p.channel_a] ** 2 / truth - 1.0) / p.rel_error for p in wc.pairs]
    assert len(z) == reps
    coverage = np.mean(np.abs(np.array(z)) < 1.96)
    assert 0.95 - 3 * 0.017 < coverage < 0.95 + 3 * 0.017, coverage


def test_few_effective_samples_is_a_holding_code_below_the_threshold():
    # AR(1) phi 0.9: n (1 - phi) / (1 + phi) effective samples (Box & Jenkins; the tool's
    # T / (2 T_I) estimates it): 25 in 475 samples (below 100: coded), 500 in 9500 (not coded)
    from corrtransforms.records import holds_window
    from corrtransforms.stages.correlate import MIN_EFFECTIVE_SAMPLES

    rng = np.random.default_rng(51)
    fs = 10.0
    for n, coded in ((475, True), (9500, False)):
        e = rng.standard_normal(n + 500)
        x = scipy.signal.lfilter([1.0], [1.0, -0.9], e)[500:, None]
        auto = correlate_window(_block(x, fs, ["a"]), _config(fs, n / fs, max_lag_s=10.0)).pairs[0]
        assert auto.n_effective == pytest.approx(n * 0.1 / 1.9, rel=0.5)
        assert ("few_effective_samples" in auto.quality) == coded == (auto.n_effective < MIN_EFFECTIVE_SAMPLES)
        assert holds_window(auto.quality) == coded
