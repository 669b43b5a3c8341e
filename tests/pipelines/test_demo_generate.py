"""Physics and files of the invented demo asset (demo_data/generate.py), not the pipeline.

Each numerical check compares with a closed form or with scipy; the source is in a comment.
"""

import datetime as dt
import json
import math
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy import integrate, linalg, signal

from corrtransforms.config import load_config
from demo_data import generate as gen

DEMO_DIR = os.path.dirname(gen.__file__)


def _sdof_white_noise(frequency_hz, damping):
    omega = 2 * math.pi * frequency_hz
    a = np.array([[0.0, 1.0], [-(omega**2), -2 * damping * omega]])
    return a, np.array([0.0, 1.0]), omega


def test_van_loan_discretisation_matches_closed_forms():
    frequency, damping, intensity, step = 2.0, 0.05, 3.0, 0.04
    a, g, omega = _sdof_white_noise(frequency, damping)
    transition, covariance = gen.discretise_linear_sde(a, g, intensity, step)
    # deterministic part: scipy's zero-order-hold discretisation has the same Ad = expm(A dt)
    ad_scipy = signal.cont2discrete((a, g.reshape(-1, 1), np.eye(2), np.zeros((2, 1))), step, method="zoh")[0]
    np.testing.assert_allclose(transition, ad_scipy, rtol=1e-12, atol=1e-14)
    # noise covariance: direct quadrature of Qd = int_0^dt e^{As} G q G^T e^{A^T s} ds
    direct = integrate.quad_vec(
        lambda s: linalg.expm(a * s) @ (intensity * np.outer(g, g)) @ linalg.expm(a * s).T, 0.0, step
    )[0]
    np.testing.assert_allclose(covariance, direct, rtol=1e-9, atol=1e-15)
    # stationary variances of the white-noise-driven oscillator x'' + 2 zeta w x' + w^2 x = f,
    # E[f(t) f(t+tau)] = q delta(tau): var(x) = q / (4 zeta w^3), var(x') = q / (4 zeta w)
    # (Crandall & Mark, Random Vibration in Mechanical Systems, 1963, sect. 2.6; Newland,
    # An Introduction to Random Vibrations, 3rd ed., eqs. (14.27)-(14.28); equation numbers from memory)
    stationary = linalg.solve_discrete_lyapunov(transition, covariance)
    assert stationary[0, 0] == pytest.approx(intensity / (4 * damping * omega**3), rel=1e-9)
    assert stationary[1, 1] == pytest.approx(intensity / (4 * damping * omega), rel=1e-9)
    assert abs(stationary[0, 1]) < 1e-9 * math.sqrt(stationary[0, 0] * stationary[1, 1])


def test_simulated_record_has_the_theoretical_autocorrelation():
    frequency, damping, intensity, step = 2.0, 0.05, 1.0, 0.04
    a, g, omega = _sdof_white_noise(frequency, damping)
    transition, covariance = gen.discretise_linear_sde(a, g, intensity, step)
    rng = np.random.default_rng(7)
    x = gen.simulate_stationary(transition, covariance, np.array([1.0, 0.0]), 200_000, rng)
    variance = intensity / (4 * damping * omega**3)
    # Monte-Carlo: 8000 s of a process with decay time 1/(zeta w) = 1.6 s, error about 2 %
    assert x.var() == pytest.approx(variance, rel=0.06)
    # normalised autocorrelation of the displacement (Clough & Penzien, Dynamics of Structures,
    # 2nd ed., 1993, eq. (21-13) form): exp(-zeta w tau) (cos wd tau + zeta/sqrt(1-zeta^2) sin wd tau)
    omega_d = omega * math.sqrt(1 - damping**2)
    for lag in (3, 6, 12, 25):
        tau = lag * step
        theory = math.exp(-damping * omega * tau) * (
            math.cos(omega_d * tau) + damping / math.sqrt(1 - damping**2) * math.sin(omega_d * tau)
        )
        sample = np.mean(x[:-lag] * x[lag:]) / x.var()
        assert sample == pytest.approx(theory, abs=0.04)


@pytest.mark.parametrize("mode", gen.MODES, ids=lambda m: m.name)
def test_mode_model_poles_carry_the_intended_frequency_and_damping(mode):
    # continuous poles s = -zeta w +- i w sqrt(1 - zeta^2) map to z = exp(s dt) (exact
    # discretisation); recover f and zeta from the discrete eigenvalues. Checked for the state after
    # both injected structural changes as well.
    step = 1.0 / gen.SAMPLE_RATE_HZ
    late = dt.datetime(2025, 6, 1, 12, tzinfo=gen.UTC)
    for when in (gen.START, late):
        frequency, damping = gen.mode_parameters(mode, when, 10.0)
        a, g, _ = gen.modal_acceleration_model(frequency, damping)
        transition, _ = gen.discretise_linear_sde(a, g, 1.0, step)
        poles = np.log(np.linalg.eigvals(transition).astype(complex)) / step
        oscillating = poles[np.abs(poles.imag) > 0]
        natural = np.abs(oscillating[0])
        assert natural / (2 * math.pi) == pytest.approx(frequency, rel=1e-9)
        assert -oscillating[0].real / natural == pytest.approx(damping, rel=1e-9)
    # the injected changes themselves (documented values)
    if mode.name == gen.STIFFNESS_LOSS_MODE:
        assert gen.mode_parameters(mode, late, 10.0)[0] == pytest.approx(0.97 * mode.frequency_hz)
    if mode.name == gen.DAMPING_INCREASE_MODE:
        assert (mode.damping, gen.mode_parameters(mode, late, 10.0)[1]) == (0.010, 0.018)


def test_psd_peaks_at_the_modal_frequencies_and_follow_temperature_and_damage():
    # one hour of samples at a cold night time and after the stiffness loss on a warm afternoon
    nperseg = 4096
    resolution = gen.SAMPLE_RATE_HZ / nperseg
    cold = dt.datetime(2025, 5, 2, 4, tzinfo=gen.UTC)
    warm_damaged = dt.datetime(2025, 5, 30, 14, tzinfo=gen.UTC)
    peaks = {}
    for when in (cold, warm_damaged):
        record = gen.simulate_record(when, record_s=3600.0)
        temperature = float(gen.deck_temperature_c((when - gen.START).total_seconds() + 1800.0))
        for mode in gen.MODES:
            frequency, damping = gen.mode_parameters(mode, when, temperature)
            freqs, psd = signal.welch(record[mode.channel], fs=gen.SAMPLE_RATE_HZ, nperseg=nperseg)
            inside = (freqs > mode.band_hz[0]) & (freqs < mode.band_hz[1])
            peak = freqs[inside][np.argmax(psd[inside])]
            # within the half-power bandwidth 2 zeta f (common practice) or two frequency bins
            assert abs(peak - frequency) <= max(2 * damping * frequency, 2 * resolution), (mode.name, when)
            peaks[(mode.name, when)] = peak
    # the bending mode is ~3 % lower after the loss, beyond what temperature explains
    ratio = peaks[("bending_1", warm_damaged)] / peaks[("bending_1", cold)]
    assert 0.94 < ratio < 0.97


def _delay_by_correlation(reference, delayed, sample_rate_hz):
    # scipy.signal.correlate: peak of sum reference[n] delayed[n + k] at k = delay in samples,
    # refined by a parabola through the three largest samples (common practice)
    correlation = signal.correlate(delayed - delayed.mean(), reference - reference.mean(), mode="full")
    lags = signal.correlation_lags(len(delayed), len(reference), mode="full")
    k = int(np.argmax(correlation))
    y0, y1, y2 = correlation[k - 1 : k + 2]
    return (lags[k] + 0.5 * (y0 - y2) / (y0 - 2 * y1 + y2)) / sample_rate_hz


def test_footing_delay_recovered_by_scipy_correlate_before_and_after_the_change():
    before = gen.simulate_record(dt.datetime(2025, 5, 3, 8, tzinfo=gen.UTC))
    after = gen.simulate_record(dt.datetime(2025, 5, 27, 8, tzinfo=gen.UTC))
    assert _delay_by_correlation(before["footing_n"], before["footing_s"], gen.SAMPLE_RATE_HZ) == pytest.approx(
        0.060, abs=0.008
    )
    assert _delay_by_correlation(after["footing_n"], after["footing_s"], gen.SAMPLE_RATE_HZ) == pytest.approx(
        0.090, abs=0.008
    )


def test_fractional_delay_is_exact_for_a_band_limited_tone():
    # a sampled sine delayed by 1.37 samples is the sine evaluated 1.37 samples later
    # (Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed., example 4.6)
    n = np.arange(512)
    tone = np.sin(2 * np.pi * 20 * n / 512)  # a whole number of periods: no wrap-around error
    np.testing.assert_allclose(gen.fractional_delay(tone, 1.37), np.sin(2 * np.pi * 20 * (n - 1.37) / 512), atol=1e-12)


@pytest.fixture(scope="module")
def fault_days(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_archive")
    days = [gen.DEAD_DAY, gen.CORRUPT_FILE_AT.date(), gen.RENAMED_TIME_COLUMN_AT.date(), dt.date(2025, 5, 3)]
    expected = gen.write_archive(str(out), every_hours=12, dates=days)
    return out, expected


def test_ordinary_file_layout(fault_days):
    out, _ = fault_days
    path = out / "date=2025-05-03" / "footbridge_20250503T120000Z.parquet"
    parquet = pq.ParquetFile(path)
    schema = parquet.schema_arrow
    assert schema.field("time").type == pa.timestamp("us", tz="UTC")
    assert schema.names == ["time", *gen.VIBRATION_CHANNELS]  # the temperature is in the weather archive
    for name in gen.VIBRATION_CHANNELS:
        assert schema.field(name).type == pa.float32()
    assert parquet.metadata.num_rows == 15000 and parquet.metadata.num_row_groups == 2
    table = parquet.read()
    times = table.column("time").cast(pa.int64()).to_numpy()
    start_us = int(dt.datetime(2025, 5, 3, 12, tzinfo=gen.UTC).timestamp()) * 10**6
    np.testing.assert_array_equal(times, start_us + 40_000 * np.arange(15000))
    assert all(np.std(table.column(c).to_numpy()) > 0 for c in gen.VIBRATION_CHANNELS)


def test_weather_archive_holds_the_deck_temperature_once_a_minute(fault_days):
    out, _ = fault_days
    weather = out.parent / "weather"  # the default: beside the vibration archive
    day = dt.date(2025, 5, 3)
    files = sorted(p.relative_to(weather).as_posix() for p in weather.rglob("*.parquet"))
    # one file per day written (the four days asked for), none for other days
    assert files == sorted(
        gen.weather_relative_path(d)
        for d in [gen.DEAD_DAY, gen.CORRUPT_FILE_AT.date(), gen.RENAMED_TIME_COLUMN_AT.date(), day]
    )
    table = pq.read_table(weather / gen.weather_relative_path(day))
    assert table.schema.names == ["time", gen.TEMPERATURE_CHANNEL]
    assert table.schema.field(gen.TEMPERATURE_CHANNEL).metadata == {b"unit": b"degC"}
    times = table.column("time").cast(pa.int64()).to_numpy()
    first_us = int(dt.datetime(2025, 5, 3, tzinfo=gen.UTC).timestamp()) * 10**6
    np.testing.assert_array_equal(times, first_us + 60_000_000 * np.arange(1440))
    # the values are the closed-form deck temperature plus the logger's white noise (0.03 degC):
    # mean residual within 4 standard errors of 0, its spread within 10 % of 0.03 (chi-square,
    # 1,439 degrees of freedom: the 1e-4 quantiles are within 7 %)
    seconds = (times - int(gen.START.timestamp()) * 10**6) / 1e6
    residual = table.column(gen.TEMPERATURE_CHANNEL).to_numpy().astype(float) - gen.deck_temperature_c(seconds)
    assert abs(residual.mean()) < 4 * gen.TEMPERATURE_NOISE_RMS / np.sqrt(1440)
    assert residual.std(ddof=1) == pytest.approx(gen.TEMPERATURE_NOISE_RMS, rel=0.1)


def test_injected_broken_files_are_really_broken(fault_days):
    out, expected = fault_days
    sources = {r["reason"]: r for r in expected["rejects"]}
    with pytest.raises(pa.ArrowInvalid):
        pq.ParquetFile(out / sources["unreadable_file"]["source"])
    renamed = pq.read_schema(out / sources["missing_time_column"]["source"])
    assert "time" not in renamed.names and gen.RENAMED_TIME_COLUMN in renamed.names
    dead_files = sorted((out / f"date={gen.DEAD_DAY}").glob("*.parquet"))
    assert len(dead_files) == 2
    for path in dead_files:
        table = pq.read_table(path)
        values = table.column(gen.DEAD_CHANNEL).to_numpy()
        assert np.all(values == values[0])
        assert all(np.std(table.column(c).to_numpy()) > 0 for c in gen.VIBRATION_CHANNELS if c != gen.DEAD_CHANNEL)
    # the day before is alive: the fault is confined to its day
    assert not any(p.name.startswith("footbridge_20250512") for p in out.rglob("*.parquet"))


def test_rerun_writes_identical_files(tmp_path):
    first, second = tmp_path / "a", tmp_path / "b"
    gen.write_archive(str(first), days=1, every_hours=12)
    gen.write_archive(str(second), days=1, every_hours=12)
    # and a record does not depend on the record interval of the run
    third = tmp_path / "c"
    gen.write_archive(str(third), days=1, every_hours=6)
    names = sorted(p.relative_to(first) for p in first.rglob("*.parquet"))
    assert len(names) == 2
    for name in names:
        assert (first / name).read_bytes() == (second / name).read_bytes() == (third / name).read_bytes()
    # the weather archives (default folders beside each: a/.. is tmp_path for all three, so
    # name them apart)
    weathers = []
    for index, folder in enumerate((first, second)):
        weathers.append(tmp_path / f"weather{index}")
        gen.write_archive(str(folder), days=1, every_hours=12, weather_dir=str(weathers[-1]))
    days = sorted(p.relative_to(weathers[0]) for p in weathers[0].rglob("*.parquet"))
    assert [d.as_posix() for d in days] == [gen.weather_relative_path(dt.date(2025, 5, 1))]
    assert (weathers[0] / days[0]).read_bytes() == (weathers[1] / days[0]).read_bytes()


def test_configuration_is_valid_and_covers_the_scenario():
    config = load_config(os.path.join(DEMO_DIR, "footbridge.toml"))
    assert config.name == gen.ASSET
    assert config.archive.path == os.path.join(DEMO_DIR, "archive")
    assert config.archive.sample_rate_hz == gen.SAMPLE_RATE_HZ
    assert config.channels.names == gen.VIBRATION_CHANNELS
    assert config.channels.covariates == ()
    # the deck temperature comes from the weather archive beside the vibration archive
    (source,) = config.covariate_sources
    assert source.names == (gen.TEMPERATURE_CHANNEL,)
    assert source.path == os.path.join(DEMO_DIR, "weather")
    assert config.compensated_covariates() == (gen.TEMPERATURE_CHANNEL,)
    assert config.windows.length_s == gen.RECORD_S
    assert (config.baseline.start, config.baseline.end) == (gen.BASELINE_START, gen.BASELINE_END)
    configured = {m.name: m for m in config.modes}
    seconds = np.arange(0, gen.DEFAULT_DAYS * 86400, 600.0)
    temperatures = gen.deck_temperature_c(seconds)
    for mode in gen.MODES:
        assert configured[mode.name].channel == mode.channel
        assert configured[mode.name].band_hz == mode.band_hz
        low, high = mode.band_hz
        for when in (gen.START, dt.datetime(2025, 6, 4, tzinfo=gen.UTC)):
            for temperature in (temperatures.min(), temperatures.max()):
                frequency, damping = gen.mode_parameters(mode, when, float(temperature))
                # the band holds the mode's half-power band at every temperature and state
                assert low < frequency * (1 - 3 * damping) and frequency * (1 + 3 * damping) < high
    expected = gen.expected_changes()
    assert set(config.shifts.indicators) == set(expected["monitored"])
    pairs = {f"{a}:{b}" for a, b in config.correlation.pairs if a != b}
    for change in expected["shifts"]:
        assert change["indicator"] in config.shifts.indicators
        assert change["subject"] in configured or change["subject"] in pairs


def test_committed_expected_changes_match_the_generator():
    with open(os.path.join(DEMO_DIR, "expected_changes.json"), encoding="utf-8") as handle:
        committed = json.load(handle)
    assert committed == gen.expected_changes()
    # the stiffness loss is seen by bending_1 and by the multi-channel bending_1_deck
    assert [c["date"] for c in committed["shifts"]] == ["2025-05-16", "2025-05-16", "2025-05-21", "2025-05-26"]
    # a shorter archive lists only the changes it contains
    short = gen.expected_changes(days=18)
    assert [(c["subject"], c["indicator"]) for c in short["shifts"]] == [
        ("bending_1", "mode_freq_hz"),
        ("bending_1_deck", "mode_freq_hz"),
    ]
    assert {r["reason"] for r in short["rejects"]} == {"flat_channel"}
