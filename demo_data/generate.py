"""Generate the invented demo archive: a steel footbridge with five accelerometers and a deck
temperature sensor, with documented changes injected at known dates.

Run ``python -m demo_data.generate --out demo_data/archive [--days N] [--every-hours H]``.
The deck temperature is logged separately, one value a minute around the clock, in a weather
archive beside the vibration archive (``--weather-out``, default the folder ``weather`` next to
``--out``), which the demo configuration reads as a ``[[covariate_sources]]`` entry.

The scenario (see docs/demo.md) is invented: no real site, product or person. It is built from
physical models, not from curve drawing:

- three structural modes (first vertical bending, first lateral, first torsion) superposed at the
  deck sensors through their mode-shape ordinates; each mode is a single-degree-of-freedom
  oscillator driven by its own broadband modal force (a first-order, Ornstein-Uhlenbeck, process
  standing for wind turbulence and footfall), discretised exactly with the matrix exponential
  (Van Loan's method for the noise covariance) and started in its stationary state;
- a temperature-dependent stiffness: each modal frequency is linear in the deck temperature
  (a daily and a slower weather swing), constant within one 10-minute record;
- ground-borne traffic vibration reaching the north footing first and the south footing through a
  longer transmission path, an exact band-limited (Fourier) fractional delay of 60 ms;
- sensor noise on every channel.

Records are duty-cycled (one 600 s record every ``--every-hours`` hours, aligned to the hour) at
25 Hz, one wide Parquet file per record in ``date=YYYY-MM-DD/`` folders, float32 channels and a
``time`` column of type ``timestamp[us, tz=UTC]``. The weather archive has one file per day
(``date=YYYY-MM-DD/weather_YYYYMMDD.parquet``: ``time`` and ``deck_temp``, 1,440 rows).
Every record's random numbers come from a generator seeded with the fixed seed and the record's
start time (a weather day's with the day's start), so a rerun writes identical files and a
shorter run (``--days``) writes the same records as the start of a longer one.

:func:`expected_changes` returns the injected changes (what the demo should find) as plain data; the
default scenario's list is committed as ``demo_data/expected_changes.json``.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as _dt
import functools
import json
import math
import os
import re
import sys
from typing import Dict, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy import linalg, signal

UTC = _dt.timezone.utc

ASSET = "footbridge"
SEED = 20250501
START = _dt.datetime(2025, 5, 1, tzinfo=UTC)
DEFAULT_DAYS = 35
DEFAULT_EVERY_HOURS = 2
SAMPLE_RATE_HZ = 25.0
RECORD_S = 600.0
BASELINE_START = _dt.date(2025, 5, 1)
BASELINE_END = _dt.date(2025, 5, 10)
ACCELERATION_UNIT = "m/s^2"
TEMPERATURE_UNIT = "degC"
TIME_COLUMN = "time"
TEMPERATURE_CHANNEL = "deck_temp"
#: vibration channels in column order (all accelerometers, vertical "_v" or horizontal "_h")
VIBRATION_CHANNELS = ("deck_mid_v", "deck_qtr_v", "deck_mid_h", "footing_n", "footing_s")
#: reference temperature of the modal frequencies below
REFERENCE_TEMPERATURE_C = 10.0


@dataclasses.dataclass(frozen=True)
class Mode:
    """One structural mode of the invented footbridge.

    ``temperature_coefficient`` is the relative change of the natural frequency per degree
    Celsius; ``shape`` maps a channel to the mode-shape ordinate seen by that sensor (1 at the
    mode's reference sensor); ``response_rms`` is the modal acceleration's standard deviation at
    the reference sensor at the reference temperature and unit excitation level, in m/s^2.
    """

    name: str
    channel: str
    band_hz: Tuple[float, float]
    frequency_hz: float
    damping: float
    temperature_coefficient: float
    response_rms: float
    shape: Mapping[str, float]


MODES = (
    Mode("bending_1", "deck_mid_v", (2.0, 2.9), 2.45, 0.008, -0.0015, 0.020, {"deck_mid_v": 1.0, "deck_qtr_v": 0.71}),
    Mode("lateral_1", "deck_mid_h", (1.0, 1.7), 1.32, 0.015, -0.0010, 0.006, {"deck_mid_h": 1.0, "deck_mid_v": 0.04}),
    Mode(
        "torsion_1",
        "deck_qtr_v",
        (4.0, 5.3),
        4.62,
        0.010,
        -0.0012,
        0.010,
        {"deck_qtr_v": 1.0, "deck_mid_v": 0.55, "deck_mid_h": 0.15},
    ),
)
#: the configuration's multi-channel [[modes]] entry: the first bending mode identified from the
#: two vertical deck sensors that see it (shape ordinates 1.0 and 0.71), tracked by its shape
MULTICHANNEL_BENDING = "bending_1_deck"
#: corner frequency of the broadband modal forces (first-order low-pass), Hz
FORCE_CORNER_HZ = 8.0
#: accelerometer noise floor (white, standard deviation per sample), m/s^2
SENSOR_NOISE_RMS = 1.5e-4
#: temperature sensor noise (white, per logged value), degC
TEMPERATURE_NOISE_RMS = 0.03
#: the weather logger's interval (one deck temperature value a minute), s
WEATHER_STEP_S = 60
#: ground-borne traffic vibration: band (Butterworth band-pass, order 4) and rms at the north footing
GROUND_BAND_HZ = (1.5, 9.0)
GROUND_RMS = 0.004
#: amplitude of the ground motion at the south footing relative to the north (longer path)
GROUND_TRANSMISSION = 0.7
#: local, incoherent ground noise at each footing relative to GROUND_RMS
GROUND_LOCAL_NOISE = 0.25
#: transmission delay from the north to the south footing before the change, s
FOOTING_DELAY_S = 0.060
#: the stuck output of the dead sensor, m/s^2
STUCK_VALUE = -0.0312

# ----------------------------------------------------------------------------------------------
# Injected changes (UTC). Structural changes are permanent from their instant on.

STIFFNESS_LOSS_AT = _dt.datetime(2025, 5, 16, 12, tzinfo=UTC)
STIFFNESS_LOSS_MODE = "bending_1"
STIFFNESS_LOSS_FREQUENCY_FACTOR = 0.97  # modal stiffness x 0.9409
DAMPING_INCREASE_AT = _dt.datetime(2025, 5, 21, 12, tzinfo=UTC)
DAMPING_INCREASE_MODE = "torsion_1"
DAMPING_AFTER = 0.018
LAG_CHANGE_AT = _dt.datetime(2025, 5, 26, 12, tzinfo=UTC)
FOOTING_DELAY_AFTER_S = 0.090
DEAD_CHANNEL = "deck_mid_h"
DEAD_DAY = _dt.date(2025, 5, 13)
#: the first record starting at or after these instants is broken
CORRUPT_FILE_AT = _dt.datetime(2025, 5, 19, 12, tzinfo=UTC)
RENAMED_TIME_COLUMN_AT = _dt.datetime(2025, 5, 29, 0, tzinfo=UTC)
RENAMED_TIME_COLUMN = "timestamp"
#: fraction of the corrupt file's bytes kept (the footer is lost, as after an interrupted copy)
CORRUPT_KEEP_FRACTION = 0.55


# ----------------------------------------------------------------------------------------------
# Exact discretisation of linear stochastic differential equations


def discretise_linear_sde(
    state_matrix: np.ndarray, noise_input: np.ndarray, intensity: float, step_s: float
) -> Tuple[np.ndarray, np.ndarray]:
    """Exact discrete-time form of ``dx = A x dt + G dW`` sampled every ``step_s`` seconds.

    Parameters
    ----------
    state_matrix : ndarray, shape (n, n)
        Continuous-time state matrix A.
    noise_input : ndarray, shape (n,) or (n, 1)
        Input vector G of the scalar white noise.
    intensity : float
        Intensity q of the white noise w(t): ``E[w(t) w(t + tau)] = q delta(tau)``.
    step_s : float
        Sample interval dt in seconds.

    Returns
    -------
    transition : ndarray, shape (n, n)
        ``Ad = expm(A dt)``.
    noise_covariance : ndarray, shape (n, n)
        ``Qd = integral_0^dt expm(A s) G q G^T expm(A^T s) ds``, the covariance of the state
        increment ``x[k+1] - Ad x[k]``.

    Notes
    -----
    Van Loan's method: with ``M = [[-A, G q G^T], [0, A^T]] dt`` and ``E = expm(M)``,
    ``Ad = E22^T`` and ``Qd = Ad E12``. The sampled process ``x[k+1] = Ad x[k] + w[k]``,
    ``w[k] ~ N(0, Qd)`` has exactly the joint distribution of the continuous process at the
    sample times (no Euler step, no zero-order-hold approximation of the noise).

    References
    ----------
    C. F. Van Loan, "Computing integrals involving the matrix exponential", IEEE Trans.
    Automatic Control 23(3), 395-404 (1978), Theorem 1.
    """
    a = np.asarray(state_matrix, dtype=float)
    g = np.asarray(noise_input, dtype=float).reshape(-1, 1)
    n = a.shape[0]
    m = np.zeros((2 * n, 2 * n))
    m[:n, :n] = -a
    m[:n, n:] = intensity * (g @ g.T)
    m[n:, n:] = a.T
    e = linalg.expm(m * step_s)
    transition = e[n:, n:].T
    covariance = transition @ e[:n, n:]
    return transition, 0.5 * (covariance + covariance.T)


def _covariance_factor(covariance: np.ndarray) -> np.ndarray:
    """A factor F with F F^T = covariance for a symmetric positive semi-definite matrix."""
    values, vectors = np.linalg.eigh(covariance)
    return vectors * np.sqrt(np.clip(values, 0.0, None))


def simulate_stationary(
    transition: np.ndarray, noise_covariance: np.ndarray, output: np.ndarray, n_samples: int, rng: np.random.Generator
) -> np.ndarray:
    """Simulate ``y[k] = C x[k]``, ``x[k+1] = Ad x[k] + w[k]`` started in the stationary state.

    Parameters
    ----------
    transition : ndarray, shape (n, n)
        Ad, with distinct eigenvalues inside the unit circle.
    noise_covariance : ndarray, shape (n, n)
        Qd, covariance of ``w[k]``.
    output : ndarray, shape (n,)
        Output row C.
    n_samples : int
        Number of samples.
    rng : numpy.random.Generator
        Source of the Gaussian innovations.

    Returns
    -------
    ndarray, shape (n_samples,)
        The output sequence.

    Notes
    -----
    The initial state is drawn from ``N(0, P)`` with P the solution of the discrete Lyapunov
    equation ``P = Ad P Ad^T + Qd``, so the record is stationary from its first sample (no
    burn-in). The recursion runs in the eigenbasis of Ad, ``Ad = V diag(lambda) V^-1``, as one
    first-order complex filter per eigenvalue (``scipy.signal.lfilter``), which is exact.

    References
    ----------
    B. D. O. Anderson and J. B. Moore, *Optimal Filtering*, Prentice-Hall (1979), ch. 4
    (state covariance recursion and its stationary solution).
    """
    n_state = transition.shape[0]
    stationary = linalg.solve_discrete_lyapunov(transition, noise_covariance)
    x0 = _covariance_factor(stationary) @ rng.standard_normal(n_state)
    innovations = rng.standard_normal((n_samples, n_state)) @ _covariance_factor(noise_covariance).T
    eigenvalues, vectors = np.linalg.eig(transition)
    inverse = np.linalg.inv(vectors)
    modal_inputs = innovations @ inverse.T
    modal_start = inverse @ x0
    modal = np.empty((n_samples, n_state), dtype=complex)
    modal[0] = modal_start
    for i, lam in enumerate(eigenvalues):
        # s[k] = z[k+1] = lam z[k] + u[k]; lfilter's zi sets s[-1] = z[0]
        following, _ = signal.lfilter([1.0], [1.0, -lam], modal_inputs[:-1, i], zi=[lam * modal_start[i]])
        modal[1:, i] = following
    return np.real(modal @ (np.asarray(output, dtype=float) @ vectors))


def modal_acceleration_model(frequency_hz: float, damping: float, force_corner_hz: float = FORCE_CORNER_HZ):
    """State-space model of one mode's acceleration under a first-order broadband modal force.

    Parameters
    ----------
    frequency_hz : float
        Undamped natural frequency f_n.
    damping : float
        Damping ratio zeta (fraction of critical).
    force_corner_hz : float
        Corner frequency f_c of the force's first-order low-pass spectrum.

    Returns
    -------
    state_matrix, noise_input, output : ndarray
        A (3 x 3), G (3,) and C (3,) for the state ``x = [q, dq/dt, f]``.

    Notes
    -----
    Per unit modal mass: ``q'' + 2 zeta omega q' + omega^2 q = f`` and
    ``f' = -omega_c f + w`` with ``omega = 2 pi f_n``, ``omega_c = 2 pi f_c`` and w white noise.
    The acceleration ``q'' = -omega^2 q - 2 zeta omega q' + f`` is a linear function of the state,
    so it is sampled exactly.

    References
    ----------
    R. W. Clough and J. Penzien, *Dynamics of Structures*, 2nd ed., McGraw-Hill (1993),
    eq. (2-15) (damped single-degree-of-freedom equation) and ch. 12 (normal coordinates).
    """
    omega = 2 * math.pi * frequency_hz
    omega_c = 2 * math.pi * force_corner_hz
    a = np.array([[0.0, 1.0, 0.0], [-(omega**2), -2 * damping * omega, 1.0], [0.0, 0.0, -omega_c]])
    g = np.array([0.0, 0.0, 1.0])
    c = np.array([-(omega**2), -2 * damping * omega, 1.0])
    return a, g, c


@functools.cache
def _stationary_output_std(frequency_hz: float, damping: float, step_s: float) -> float:
    a, g, c = modal_acceleration_model(frequency_hz, damping)
    ad, qd = discretise_linear_sde(a, g, 1.0, step_s)
    p = linalg.solve_discrete_lyapunov(ad, qd)
    return float(math.sqrt(c @ p @ c))


def fractional_delay(values: np.ndarray, delay_samples: float) -> np.ndarray:
    """Delay a sampled band-limited signal by a (fractional) number of samples.

    Notes
    -----
    Multiplies the discrete Fourier transform by ``exp(-i 2 pi f delay)``, the ideal
    band-limited (Whittaker-Shannon) interpolation of the delayed signal. The transform is
    circular, so callers pad the record and discard the ends.

    References
    ----------
    A. V. Oppenheim and R. W. Schafer, *Discrete-Time Signal Processing*, 3rd ed. (2010),
    sect. 4.2 and example 4.6 (band-limited delay, ``H(e^jw) = e^{-jw Delta}``).
    """
    n = len(values)
    spectrum = np.fft.rfft(values)
    frequencies = np.fft.rfftfreq(n)
    shifted = spectrum * np.exp(-2j * np.pi * frequencies * delay_samples)
    if n % 2 == 0:  # the Nyquist bin of a real signal stays real
        shifted[-1] = spectrum[-1].real * np.cos(np.pi * delay_samples)
    return np.fft.irfft(shifted, n)


# ----------------------------------------------------------------------------------------------
# The scenario


def record_starts(days: int = DEFAULT_DAYS, every_hours: int = DEFAULT_EVERY_HOURS) -> List[_dt.datetime]:
    """Start instants of the duty-cycled records: one every ``every_hours`` hours from START."""
    if days < 1:
        raise ValueError(f"days = {days}: must be at least 1")
    if every_hours < 1 or 24 % every_hours:
        raise ValueError(f"every_hours = {every_hours}: must divide 24 (1, 2, 3, 4, 6, 8, 12 or 24)")
    count = days * 24 // every_hours
    return [START + _dt.timedelta(hours=every_hours * i) for i in range(count)]


def deck_temperature_c(seconds_since_start) -> np.ndarray:
    """Deck temperature in degC: daily swing (warmest 15:00 UTC), a 9-day weather swing, a slow
    warming of 0.05 degC per day. Invented, smooth and deterministic."""
    t = np.asarray(seconds_since_start, dtype=float)
    hours = t / 3600.0
    days = hours / 24.0
    return (
        12.0 + 4.5 * np.sin(2 * np.pi * (hours - 9.0) / 24.0) + 3.0 * np.sin(2 * np.pi * days / 9.0 + 0.3) + 0.05 * days
    )


def mode_parameters(mode: Mode, when: _dt.datetime, temperature_c: float) -> Tuple[float, float]:
    """Natural frequency (Hz) and damping ratio of ``mode`` at instant ``when`` and temperature.

    Notes
    -----
    ``f = f_ref (1 + alpha (T - T_ref))`` (linear in temperature, so a linear model in the window
    mean temperature compensates it exactly), times the stiffness-loss factor after its onset.
    """
    frequency = mode.frequency_hz * (1.0 + mode.temperature_coefficient * (temperature_c - REFERENCE_TEMPERATURE_C))
    damping = mode.damping
    if mode.name == STIFFNESS_LOSS_MODE and when >= STIFFNESS_LOSS_AT:
        frequency *= STIFFNESS_LOSS_FREQUENCY_FACTOR
    if mode.name == DAMPING_INCREASE_MODE and when >= DAMPING_INCREASE_AT:
        damping = DAMPING_AFTER
    return frequency, damping


def footing_delay_s(when: _dt.datetime) -> float:
    """Transmission delay from the north to the south footing at instant ``when``."""
    return FOOTING_DELAY_AFTER_S if when >= LAG_CHANGE_AT else FOOTING_DELAY_S


def _excitation_levels(start: _dt.datetime, rng: np.random.Generator) -> Tuple[float, float]:
    """(deck excitation, traffic) levels of one record: busier by day, log-normal scatter."""
    hour = start.hour + start.minute / 60.0
    daytime = math.exp(-0.5 * ((hour - 13.5) / 4.0) ** 2)
    deck = (0.6 + 0.8 * daytime) * float(np.exp(0.25 * rng.standard_normal()))
    traffic = (0.4 + 1.0 * daytime) * float(np.exp(0.2 * rng.standard_normal()))
    return deck, traffic


def simulate_record(
    start: _dt.datetime, sample_rate_hz: float = SAMPLE_RATE_HZ, record_s: float = RECORD_S, seed: int = SEED
) -> Dict[str, np.ndarray]:
    """Samples of every channel of the record starting at ``start`` (before any injected fault).

    Parameters
    ----------
    start : datetime (UTC)
        Record start.
    sample_rate_hz, record_s : float
        Sample rate and record length.
    seed : int
        Scenario seed; the record's generator is seeded with (seed, start in epoch seconds).

    Returns
    -------
    dict
        Vibration channel name -> float64 samples in m/s^2 (the deck temperature is in the
        weather archive: :func:`weather_table`).
    """
    rng = np.random.default_rng([seed, int(start.timestamp())])
    n = int(round(record_s * sample_rate_hz))
    step = 1.0 / sample_rate_hz
    offset = (start - START).total_seconds()
    record_temperature = float(deck_temperature_c(offset + record_s / 2))
    deck_level, traffic_level = _excitation_levels(start, rng)

    channels = {name: np.zeros(n) for name in VIBRATION_CHANNELS}
    for mode in MODES:
        frequency, damping = mode_parameters(mode, start, record_temperature)
        a, g, c = modal_acceleration_model(frequency, damping)
        # fixed force intensity: the one giving response_rms at the reference state
        reference_std = _stationary_output_std(mode.frequency_hz, mode.damping, step)
        intensity = (mode.response_rms * deck_level / reference_std) ** 2
        ad, qd = discretise_linear_sde(a, g, intensity, step)
        response = simulate_stationary(ad, qd, c, n, rng)
        for channel, ordinate in mode.shape.items():
            channels[channel] += ordinate * response

    pad = 256
    sos = signal.butter(4, GROUND_BAND_HZ, btype="bandpass", fs=sample_rate_hz, output="sos")
    warmup = 4 * pad
    ground = signal.sosfilt(sos, rng.standard_normal(n + 2 * pad + warmup))[warmup:]
    ground *= GROUND_RMS * traffic_level / ground.std()
    delayed = fractional_delay(ground, footing_delay_s(start) * sample_rate_hz)
    local_n = signal.sosfilt(sos, rng.standard_normal(n + warmup))[warmup:]
    local_s = signal.sosfilt(sos, rng.standard_normal(n + warmup))[warmup:]
    local_scale = GROUND_LOCAL_NOISE * GROUND_RMS * traffic_level
    channels["footing_n"] += ground[pad : pad + n] + local_scale * local_n / local_n.std()
    channels["footing_s"] += GROUND_TRANSMISSION * delayed[pad : pad + n] + local_scale * local_s / local_s.std()

    for name in VIBRATION_CHANNELS:
        channels[name] += SENSOR_NOISE_RMS * rng.standard_normal(n)
    return channels


def _first_record_at_or_after(starts: Sequence[_dt.datetime], instant: _dt.datetime) -> Optional[_dt.datetime]:
    for s in starts:
        if s >= instant:
            return s
    return None


def record_relative_path(start: _dt.datetime) -> str:
    """Path of a record's file inside the archive folder."""
    return f"date={start.date().isoformat()}/{ASSET}_{start.strftime('%Y%m%dT%H%M%SZ')}.parquet"


def _iso(instant: _dt.datetime) -> str:
    return instant.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def expected_changes(days: int = DEFAULT_DAYS, every_hours: int = DEFAULT_EVERY_HOURS) -> Dict:
    """What the demo should find: the injected shifts and the rejected input, as plain data.

    Parameters
    ----------
    days, every_hours : int
        The archive's extent and record interval (as given to the generator).

    Returns
    -------
    dict
        ``shifts``: one entry per injected change with ``subject``, ``indicator``, ``direction``
        ("up" | "down") and ``sign`` (+1 | -1, as in the shifts table), ``date`` and ``at`` (UTC onset),
        ``before``/``after`` (true values at the
        reference temperature) and ``cause``; ``rejects``: the broken input with ``reason``,
        ``subject``, ``date``, ``source`` (file path inside the archive folder, or null; the
        rejects table holds the full path, so compare with ``endswith``) and
        ``windows`` (windows affected); ``monitored``: the indicators the demo's [shifts]
        configuration monitors, for which the shifts list is complete.
    """
    starts = record_starts(days, every_hours)
    end = starts[-1] + _dt.timedelta(seconds=RECORD_S)
    modes = {m.name: m for m in MODES}
    shifts = []
    if STIFFNESS_LOSS_AT < end:
        m = modes[STIFFNESS_LOSS_MODE]
        for subject in (m.name, MULTICHANNEL_BENDING):  # the one-channel fit and the deck's pair
            shifts.append(
                dict(
                    subject=subject,
                    indicator="mode_freq_hz",
                    direction="down",
                    sign=-1,
                    date=STIFFNESS_LOSS_AT.date().isoformat(),
                    at=_iso(STIFFNESS_LOSS_AT),
                    before=m.frequency_hz,
                    after=round(m.frequency_hz * STIFFNESS_LOSS_FREQUENCY_FACTOR, 6),
                    cause="loss of bending stiffness near midspan (modal stiffness -5.9 %, frequency -3 %)",
                )
            )
    if DAMPING_INCREASE_AT < end:
        m = modes[DAMPING_INCREASE_MODE]
        shifts.append(
            dict(
                subject=m.name,
                indicator="mode_damping",
                direction="up",
                sign=1,
                date=DAMPING_INCREASE_AT.date().isoformat(),
                at=_iso(DAMPING_INCREASE_AT),
                before=m.damping,
                after=DAMPING_AFTER,
                cause="added friction damping in the torsion mode (damping ratio 1.0 % -> 1.8 %)",
            )
        )
    if LAG_CHANGE_AT < end:
        shifts.append(
            dict(
                subject="footing_n:footing_s",
                indicator="lag_s",
                direction="up",
                sign=1,
                date=LAG_CHANGE_AT.date().isoformat(),
                at=_iso(LAG_CHANGE_AT),
                before=FOOTING_DELAY_S,
                after=FOOTING_DELAY_AFTER_S,
                cause="longer ground transmission path to the south footing (delay 60 ms -> 90 ms)",
            )
        )
    rejects = []
    dead = [s for s in starts if s.date() == DEAD_DAY]
    if dead:
        rejects.append(
            dict(
                reason="flat_channel",
                subject=DEAD_CHANNEL,
                date=DEAD_DAY.isoformat(),
                source=None,
                windows=len(dead),
                cause="sensor output stuck at a constant value for one day",
            )
        )
    corrupt = _first_record_at_or_after(starts, CORRUPT_FILE_AT)
    if corrupt is not None:
        rejects.append(
            dict(
                reason="unreadable_file",
                subject="*",
                date=corrupt.date().isoformat(),
                source=record_relative_path(corrupt),
                windows=1,
                cause="file truncated: the Parquet footer is missing",
            )
        )
    renamed = _first_record_at_or_after(starts, RENAMED_TIME_COLUMN_AT)
    if renamed is not None:
        rejects.append(
            dict(
                reason="missing_time_column",
                subject=TIME_COLUMN,
                date=renamed.date().isoformat(),
                source=record_relative_path(renamed),
                windows=1,
                cause=f"time column renamed to {RENAMED_TIME_COLUMN!r}",
            )
        )
    return dict(
        asset=ASSET,
        days=days,
        every_hours=every_hours,
        records=len(starts),
        first_record=_iso(starts[0]),
        last_record=_iso(starts[-1]),
        baseline=dict(start=BASELINE_START.isoformat(), end=BASELINE_END.isoformat()),
        monitored=["mode_freq_hz", "mode_damping", "lag_s"],
        shifts=shifts,
        rejects=rejects,
    )


def _schema(time_column: str = TIME_COLUMN) -> pa.Schema:
    fields = [pa.field(time_column, pa.timestamp("us", tz="UTC"), nullable=False)]
    for name in VIBRATION_CHANNELS:
        fields.append(pa.field(name, pa.float32(), metadata={"unit": ACCELERATION_UNIT}))
    return pa.schema(
        fields, metadata={"source": "corrtransforms demo generator (invented data)", "asset": ASSET, "seed": str(SEED)}
    )


def record_table(start: _dt.datetime, time_column: str = TIME_COLUMN, dead_channel: Optional[str] = None) -> pa.Table:
    """One record as a wide Arrow table (time + float32 channels), faults applied as asked."""
    channels = simulate_record(start)
    if dead_channel is not None:
        channels[dead_channel] = np.full_like(channels[dead_channel], STUCK_VALUE)
    n = len(channels[VIBRATION_CHANNELS[0]])
    step_us = int(round(1e6 / SAMPLE_RATE_HZ))
    start_us = int(start.timestamp()) * 1_000_000
    times = pa.array(start_us + step_us * np.arange(n, dtype=np.int64), type=pa.timestamp("us", tz="UTC"))
    columns = [times] + [pa.array(channels[c].astype(np.float32)) for c in VIBRATION_CHANNELS]
    return pa.Table.from_arrays(columns, schema=_schema(time_column))


_OWN_FILE = re.compile(r"^" + ASSET + r"_\d{8}T\d{6}Z\.parquet$")
_OWN_WEATHER_FILE = re.compile(r"^weather_\d{8}\.parquet$")


def weather_relative_path(day: _dt.date) -> str:
    """Path of a day's file inside the weather archive folder."""
    return f"date={day.isoformat()}/weather_{day.strftime('%Y%m%d')}.parquet"


def weather_table(day: _dt.date, seed: int = SEED) -> pa.Table:
    """The weather logger's day: the deck temperature once a minute from 00:00 UTC (1,440 rows;
    ``time`` as in the vibration files, ``deck_temp`` float32 with a ``unit`` field metadata).
    Its own generator (seed, day start in epoch seconds, 1): a rerun writes the same values."""
    first = _dt.datetime(day.year, day.month, day.day, tzinfo=UTC)
    rng = np.random.default_rng([seed, int(first.timestamp()), 1])
    n = 24 * 3600 // WEATHER_STEP_S
    seconds = (first - START).total_seconds() + WEATHER_STEP_S * np.arange(n)
    values = deck_temperature_c(seconds) + TEMPERATURE_NOISE_RMS * rng.standard_normal(n)
    start_us = int(first.timestamp()) * 1_000_000
    times = pa.array(start_us + WEATHER_STEP_S * 1_000_000 * np.arange(n, dtype=np.int64), pa.timestamp("us", tz="UTC"))
    schema = pa.schema(
        [
            pa.field(TIME_COLUMN, pa.timestamp("us", tz="UTC"), nullable=False),
            pa.field(TEMPERATURE_CHANNEL, pa.float32(), metadata={"unit": TEMPERATURE_UNIT}),
        ],
        metadata={"source": "corrtransforms demo generator (invented data)", "asset": ASSET, "seed": str(SEED)},
    )
    return pa.Table.from_arrays([times, pa.array(values.astype(np.float32))], schema=schema)


def default_weather_dir(out_dir: str) -> str:
    """The weather archive's folder when none is given: ``weather`` beside the vibration archive
    (where the demo configuration's ``[[covariate_sources]] path`` looks)."""
    return os.path.join(os.path.dirname(os.path.abspath(out_dir)), "weather")


def _clear_previous(out_dir: str, own=_OWN_FILE) -> int:
    """Remove files this generator wrote before (and then empty date folders); nothing else."""
    removed = 0
    if not os.path.isdir(out_dir):
        return 0
    for entry in sorted(os.listdir(out_dir)):
        folder = os.path.join(out_dir, entry)
        if not (entry.startswith("date=") and os.path.isdir(folder)):
            continue
        for name in os.listdir(folder):
            if own.match(name):
                os.remove(os.path.join(folder, name))
                removed += 1
        if not os.listdir(folder):
            os.rmdir(folder)
    return removed


def write_archive(
    out_dir: str,
    days: int = DEFAULT_DAYS,
    every_hours: int = DEFAULT_EVERY_HOURS,
    progress=None,
    dates: Optional[Sequence[_dt.date]] = None,
    weather_dir: Optional[str] = None,
) -> Dict:
    """Write the demo archive under ``out_dir`` and the weather archive under ``weather_dir``
    (default :func:`default_weather_dir`), and return :func:`expected_changes`.

    Files this generator wrote earlier under either folder are removed first, so a shorter rerun
    leaves no stale records behind. ``dates`` restricts writing to those days (the records are
    the same as in a full run); the returned expectations describe the full run. The weather
    archive covers every day that has a record (and only ``dates`` when given).
    """
    starts = record_starts(days, every_hours)
    _clear_previous(out_dir)
    weather = default_weather_dir(out_dir) if weather_dir is None else weather_dir
    _clear_previous(weather, _OWN_WEATHER_FILE)
    wanted = None if dates is None else set(dates)
    corrupt = _first_record_at_or_after(starts, CORRUPT_FILE_AT)
    renamed = _first_record_at_or_after(starts, RENAMED_TIME_COLUMN_AT)
    for i, start in enumerate(starts):
        if wanted is not None and start.date() not in wanted:
            continue
        path = os.path.join(out_dir, record_relative_path(start))
        os.makedirs(os.path.dirname(path), exist_ok=True)
        table = record_table(
            start,
            time_column=RENAMED_TIME_COLUMN if start == renamed else TIME_COLUMN,
            dead_channel=DEAD_CHANNEL if start.date() == DEAD_DAY else None,
        )
        pq.write_table(
            table, path, compression="zstd", row_group_size=len(table) // 2, use_dictionary=False, write_statistics=True
        )
        if start == corrupt:
            with open(path, "rb") as handle:
                data = handle.read()
            with open(path, "wb") as handle:
                handle.write(data[: int(len(data) * CORRUPT_KEEP_FRACTION)])
        if progress is not None and (i + 1) % 50 == 0:
            progress(f"{i + 1}/{len(starts)} records written")
    for day in sorted({s.date() for s in starts}):
        if wanted is not None and day not in wanted:
            continue
        path = os.path.join(weather, weather_relative_path(day))
        os.makedirs(os.path.dirname(path), exist_ok=True)
        pq.write_table(weather_table(day), path, compression="zstd", use_dictionary=False, write_statistics=True)
    return expected_changes(days, every_hours)


#: the demo configuration shipped beside this module (package data, also in an installed wheel)
CONFIG_TEMPLATE = "footbridge.toml"


def write_config(config_path: str, archive_dir: str, weather_dir: Optional[str] = None) -> str:
    """Write the demo configuration to ``config_path`` with ``[archive] path`` naming
    ``archive_dir`` and the weather source's ``path`` naming ``weather_dir`` (default
    :func:`default_weather_dir` of ``archive_dir``).

    The packaged ``footbridge.toml`` names ``archive`` and ``weather`` beside itself; a copy
    elsewhere (e.g. from an installed wheel) must name the folders actually written. The paths are
    written relative to the configuration's folder when on the same drive. Returns ``config_path``.
    """
    import importlib.resources

    template = importlib.resources.files("demo_data").joinpath(CONFIG_TEMPLATE).read_text(encoding="utf-8")
    folder = os.path.dirname(os.path.abspath(config_path))
    weather = default_weather_dir(archive_dir) if weather_dir is None else weather_dir
    text = template
    for name, target in (("archive", archive_dir), ("weather", weather)):
        try:
            relative = os.path.relpath(os.path.abspath(target), folder)
        except ValueError:  # another drive (Windows)
            relative = os.path.abspath(target)
        line = f"path = {json.dumps(relative.replace(os.sep, '/'))}  # written by python -m demo_data.generate"
        text, count = re.subn(rf'(?m)^path = "{name}".*$', lambda _, line=line: line, text)
        if count != 1:
            raise ValueError(f"demo_data/{CONFIG_TEMPLATE}: no single path = {name!r} line to replace")
    os.makedirs(folder, exist_ok=True)
    with open(config_path, "w", encoding="utf-8") as handle:
        handle.write(text)
    return config_path


def main(argv: Optional[Sequence[str]] = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m demo_data.generate", description="Write the invented footbridge demo archive (deterministic)."
    )
    parser.add_argument(
        "--out",
        default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "archive"),
        help="archive folder to write (default: demo_data/archive)",
    )
    parser.add_argument(
        "--weather-out",
        default=None,
        help="weather archive folder to write (default: the folder 'weather' beside --out)",
    )
    parser.add_argument(
        "--days", type=int, default=DEFAULT_DAYS, help=f"days of records from {START.date()} (default {DEFAULT_DAYS})"
    )
    parser.add_argument(
        "--every-hours",
        type=int,
        default=DEFAULT_EVERY_HOURS,
        help=f"one 10-minute record every H hours (default {DEFAULT_EVERY_HOURS})",
    )
    parser.add_argument(
        "--expected-out", default=None, help="also write the expected changes of this run as JSON to this file"
    )
    parser.add_argument(
        "--config-out",
        default=None,
        help="also write the demo configuration to this file, naming the archive "
        "written by this run (for an installed package, whose footbridge.toml "
        "names demo_data/archive beside itself)",
    )
    args = parser.parse_args(argv)
    try:
        record_starts(args.days, args.every_hours)
    except ValueError as err:
        parser.error(str(err))
    weather = default_weather_dir(args.out) if args.weather_out is None else args.weather_out
    expected = write_archive(
        args.out, args.days, args.every_hours, progress=lambda text: print(text, file=sys.stderr), weather_dir=weather
    )
    if args.expected_out:
        with open(args.expected_out, "w", encoding="utf-8") as handle:
            json.dump(expected, handle, indent=2)
            handle.write("\n")
    if args.config_out:
        write_config(args.config_out, args.out, weather)
        print(f"wrote the configuration {args.config_out}")
    print(
        f"wrote {expected['records']} records ({expected['first_record']} .. {expected['last_record']}) "
        f"to {args.out}, the deck temperature to {weather}; injected: {len(expected['shifts'])} shifts, "
        f"{len(expected['rejects'])} broken inputs"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
