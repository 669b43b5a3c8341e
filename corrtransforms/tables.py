"""Arrow schemas of the output tables (the contract users' scripts and dashboards rely on).

Every table is written as Parquet (zstd) under ``DIR/<table>/asset=NAME/date=YYYY-MM-DD/``; the
``asset`` and ``date`` columns come from those Hive folders and are not stored in the files.
Times are ``timestamp[us, tz=UTC]``. Each field's unit is in its field metadata under ``unit``.
"""
from __future__ import annotations

import pyarrow as pa

TIMESTAMP = pa.timestamp("us", tz="UTC")


def _f(name, type_, unit="", description="", nullable=True):
    meta = {"unit": unit, "description": description}
    return pa.field(name, type_, nullable=nullable, metadata={k: v for k, v in meta.items()})


CORRELATIONS = pa.schema([
    _f("window_start", TIMESTAMP, "", "window start, aligned to the epoch", nullable=False),
    _f("channel_a", pa.string(), "", "first channel of the pair", nullable=False),
    _f("channel_b", pa.string(), "", "second channel (equal to channel_a for an auto-correlation)", nullable=False),
    _f("sample_rate_hz", pa.float64(), "Hz", "nominal sample rate"),
    _f("n_samples", pa.int64(), "", "samples on the window's grid"),
    _f("coverage", pa.float64(), "", "fraction of grid samples valid in both channels"),
    _f("first_lag_s", pa.float64(), "s", "lag of coefficient[0]: -max_lag for a cross pair, 0 for an auto"),
    _f("lag_step_s", pa.float64(), "s", "lag i is first_lag_s + i * lag_step_s"),
    _f("coefficient", pa.list_(pa.float32()), "", "correlation coefficient rho_ab(tau); R_ab(tau) = E[a(t) b(t+tau)]"),
    _f("scale", pa.float64(), "unit_a*unit_b", "R = scale * coefficient (sqrt(R_aa(0) R_bb(0)) of the detrended records)"),
    _f("stderr", pa.list_(pa.float32()), "", "standard error of each coefficient (Bartlett's formula, pair counts for n)"),
    _f("bandwidth_hz", pa.float64(), "Hz", "statistical bandwidth B (Bendat & Piersol)"),
    _f("record_s", pa.float64(), "s", "record length T of valid samples"),
    _f("rel_error", pa.float64(), "", "normalised random error of R: at lag 0 for an auto, at the peak for a cross pair"),
    _f("required_record_s", pa.float64(), "s", "record length that would meet target_rel_error"),
    _f("meets_target", pa.bool_(), "", "rel_error <= target_rel_error"),
    _f("quality", pa.string(), "", "'ok' or ';'-separated quality codes"),
    _f("bandwidth_time", pa.float64(), "", "B*T"),
    _f("n_effective", pa.float64(), "", "effective number of independent samples from the integral time scale"),
    _f("tone_freq_hz", pa.float64(), "Hz", "frequency of the strongest sharp PSD peak (NaN if none)"),
    _f("tone_required_record_s", pa.float64(), "s", "averaging length for the tone's error to stay within the target"),
])

INDICATORS = pa.schema([
    _f("window_start", TIMESTAMP, "", "window start", nullable=False),
    _f("subject", pa.string(), "", "channel, 'a:b' pair or mode name", nullable=False),
    _f("indicator", pa.string(), "", "rms, corr_time_s, decay_time_s, mode_freq_hz, mode_damping, lag_s, peak_coef, stationarity_p, ...", nullable=False),
    _f("value", pa.float64(), "see unit column", "indicator value"),
    _f("stderr", pa.float64(), "see unit column", "standard error of value"),
    _f("unit", pa.string(), "", "unit of value and stderr"),
    _f("quality", pa.string(), "", "'ok' or ';'-separated quality codes"),
])

REJECTS = pa.schema([
    _f("stage", pa.string(), "", "plan, read, correlate, screen, indicators, shifts", nullable=False),
    _f("source", pa.string(), "", "file path, or the window start for window findings", nullable=False),
    _f("subject", pa.string(), "", "channel, pair, mode, or '*' for the whole file or window", nullable=False),
    _f("reason", pa.string(), "", "stable snake_case reason code", nullable=False),
    _f("detail", pa.string(), "", "specifics", nullable=False),
    _f("action", pa.string(), "", "rejected, repaired or flagged", nullable=False),
    _f("window_start", TIMESTAMP, "", "window start for window findings, else null"),
])

ALL_TABLES = ("correlations", "indicators", "shifts", "rejects", "state")
