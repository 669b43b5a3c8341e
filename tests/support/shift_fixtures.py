"""Invented indicator series for the shift-detection tests (no real site or structure).

A structure's modal frequency of 2 Hz falls linearly with temperature so that the temperature
range of the record moves it by 3 % (peak to peak: a seasonal warming plus a daily cycle); at a
known local midnight the frequency drops by 1.5 % (a stiffness loss). Windows every 2 hours.
"""

import datetime as dt
import math
import zoneinfo

import numpy as np

from corrtransforms.config import parse_config
from corrtransforms.records import IndicatorRow

TIMEZONE = "Europe/Vienna"
FIRST_DAY = dt.date(2024, 3, 1)
HOUR_US = 3600 * 10**6
FREQUENCY_HZ = 2.0


def local_midnight_us(day: dt.date) -> int:
    moment = dt.datetime(day.year, day.month, day.day, tzinfo=zoneinfo.ZoneInfo(TIMEZONE))
    return int(moment.timestamp()) * 10**6


def make_config(compensate="all", baseline=None, **shifts):
    raw = {
        "asset": {"name": "invented-bridge"},
        "archive": {"path": "unused", "sample_rate_hz": 50.0, "timezone": TIMEZONE},
        "channels": {"covariates": ["temperature"]},
        "baseline": baseline or {"start": "2024-03-01", "end": "2024-03-14", "min_windows": 30},
        "shifts": dict({"compensate": compensate}, **shifts),
    }
    return parse_config(raw)


def seasonal_series(
    seed: int,
    days: int = 50,
    step_day: int = 40,
    hours_per_window: int = 2,
    swing: float = 0.03,
    step: float = -0.015,
    process_rel: float = 0.0025,
    stderr_rel: float = 0.002,
    warming_from_day: int = 14,
):
    """Times (us), values, stderr, temperature and the step time of the invented series.

    Temperature: a cool fortnight (daily cycle +/- 5 degC and slow weather of ~1.5 degC), then a
    seasonal warming of 12 degC to the end of the record. The frequency falls linearly with
    temperature so that the whole record's temperature range moves it by ``swing`` (3 %); at
    local midnight of ``FIRST_DAY + step_day`` it drops by ``step`` (-1.5 %). Process scatter
    ``process_rel`` and a lognormal stderr around ``stderr_rel`` (relative to 2 Hz).
    """
    rng = np.random.default_rng(seed)
    start = local_midnight_us(FIRST_DAY)
    n = days * 24 // hours_per_window
    times = start + np.arange(n, dtype=np.int64) * hours_per_window * HOUR_US
    day = (times - start) / (24 * HOUR_US)
    weather = np.zeros(n)
    for i in range(1, n):  # AR(1) with a correlation time of about two days
        weather[i] = 0.96 * weather[i - 1] + rng.normal(0, 1.5 * np.sqrt(1 - 0.96**2))
    warming = 12.0 * np.clip((day - warming_from_day) / (days - warming_from_day), 0, 1)
    temperature = 4.0 + warming + 5.0 * np.sin(2 * np.pi * (day - 0.375)) + weather + rng.normal(0, 0.3, n)
    slope = -swing * FREQUENCY_HZ / (temperature.max() - temperature.min())
    healthy = FREQUENCY_HZ + slope * (temperature - temperature.mean())
    step_us = local_midnight_us(FIRST_DAY + dt.timedelta(days=step_day))
    truth = np.where(times >= step_us, healthy * (1 + step), healthy)
    stderr = FREQUENCY_HZ * stderr_rel * np.exp(rng.normal(0, 0.25, n))
    values = truth + rng.normal(0, FREQUENCY_HZ * process_rel, n) + stderr * rng.standard_normal(n)
    return times, values, stderr, temperature, step_us


def indicator_rows(
    times, values, stderr, temperature, subject="deck", indicator="mode_freq_hz", unit="Hz", quality=None
):
    rows = []
    for i, t in enumerate(times):
        rows.append(
            IndicatorRow(
                int(t),
                subject,
                indicator,
                float(values[i]),
                float(stderr[i]),
                unit,
                "ok" if quality is None else quality[i],
            )
        )
    covariates = [
        IndicatorRow(int(t), "temperature", "covariate_mean", float(temperature[i]), 0.01, "degC", "ok")
        for i, t in enumerate(times)
    ]
    return rows, covariates


def same(a, b) -> bool:
    """Equality with NaN == NaN, through nested lists and dicts (bit-exact for floats)."""
    if isinstance(a, float) and isinstance(b, float):
        return (math.isnan(a) and math.isnan(b)) or a == b
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(same(a[k], b[k]) for k in a)
    return a == b


def assert_tables_identical(a, b):
    assert a.schema.equals(b.schema), (a.schema, b.schema)
    assert a.num_rows == b.num_rows
    for name in a.column_names:
        x, y = a.column(name).to_pylist(), b.column(name).to_pylist()
        bad = [i for i in range(len(x)) if not same(x[i], y[i])]
        assert not bad, (name, bad[:5], [(x[i], y[i]) for i in bad[:3]])


def ar1_series(rng, n_series: int, n: int, phi: float) -> np.ndarray:
    """Unit-variance AR(1) series, shape (n_series, n), started from the stationary law."""
    innovations = rng.standard_normal((n_series, n)) * math.sqrt(1.0 - phi * phi)
    x = np.empty((n_series, n))
    x[:, 0] = rng.standard_normal(n_series)
    for t in range(1, n):
        x[:, t] = phi * x[:, t - 1] + innovations[:, t]
    return x


def residual_chart_errors(values: np.ndarray, baseline: int) -> np.ndarray:
    """What the shifts stage does to a batch of series without covariates or stderr, written with
    the numerics functions: median/MAD baseline of the first ``baseline`` windows, robust AR(1),
    filter over the whole series, errors divided by the MAD of the baseline's own errors.
    Returns the monitored windows' standardised prediction errors, shape (n_series, n - baseline)."""
    from corrtransforms.numerics import serial_dependence as sd

    base = values[:, :baseline]
    location = np.median(base, axis=1, keepdims=True)
    scale = 1.482602218505602 * np.median(np.abs(base - location), axis=1)
    resid = values - location
    rho, pairs = sd.robust_lag_one_correlation(resid[:, :baseline] / scale[:, None])
    phi = sd.latent_ar1_coefficient(rho, scale, scale)
    errors, _, _ = sd.ar1_prediction_errors(resid, 0.0, 1, phi, scale)
    ratio = 1.482602218505602 * np.median(
        np.abs(errors[:, :baseline] - np.median(errors[:, :baseline], axis=1, keepdims=True)), axis=1
    )
    return errors[:, baseline:] / ratio[:, None]


def nightly_run(times, values, stderr, covariates, config, tmp_path, subject="deck", indicator="mode_freq_hz"):
    """Day by day, each night resuming from the previous night's state and baseline-sample rows
    read back from Parquet; returns the joined SHIFTS rows and the last state.

    ``covariates`` maps a name to an array over all windows (each night gets its own days).
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    from corrtransforms import tables
    from corrtransforms.stages import shifts as shift_series
    from corrtransforms.stages import state as shift_state
    from corrtransforms.timeutil import local_days

    days = local_days(times, config.timezone)
    state, parts, samples = None, [], []
    for number, day in enumerate(np.unique(days)):
        mask = days == day
        table, day_states, sample = shift_series.detect_shifts_with_sample(
            times[mask],
            values[mask],
            stderr[mask],
            None,
            {name: column[mask] for name, column in covariates.items()},
            config,
            state,
            baseline_sample=pa.concat_tables(samples or [tables.BASELINE_SAMPLE.empty_table()]),
            subject=subject,
            indicator=indicator,
            unit="Hz",
        )
        path = tmp_path / f"state-{number}.parquet"
        pq.write_table(shift_state.states_table(day_states), path)
        (state,) = shift_state.states_from_table(pq.read_table(path))
        sample_path = tmp_path / f"sample-{number}.parquet"
        pq.write_table(sample, sample_path)
        samples.append(pq.read_table(sample_path))
        parts.append(table)
    return pa.concat_tables(parts), state


def hinge_series(seed: int, knee: float = 2.0, below: float = -0.02, above: float = -0.002, **kwargs):
    """:func:`seasonal_series` whose frequency follows a bilinear relation in temperature: slope
    ``below`` Hz/degC under ``knee`` (an invented stiffening in frost), ``above`` over it."""
    times, values, stderr, temperature, step_us = seasonal_series(seed, swing=0.0, **kwargs)
    values = values + np.where(temperature < knee, below, above) * (temperature - knee)
    return times, values, stderr, temperature, step_us
