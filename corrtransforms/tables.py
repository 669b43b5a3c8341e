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


CORRELATIONS = pa.schema(
    [
        _f("window_start", TIMESTAMP, "", "window start, aligned to the epoch", nullable=False),
        _f("channel_a", pa.string(), "", "first channel of the pair", nullable=False),
        _f("channel_b", pa.string(), "", "second channel (equal to channel_a for an auto-correlation)", nullable=False),
        _f("sample_rate_hz", pa.float64(), "Hz", "nominal sample rate"),
        _f("n_samples", pa.int64(), "", "samples on the window's grid"),
        _f("coverage", pa.float64(), "", "fraction of grid samples valid in both channels"),
        _f("first_lag_s", pa.float64(), "s", "lag of coefficient[0]: -max_lag for a cross pair, 0 for an auto"),
        _f("lag_step_s", pa.float64(), "s", "lag i is first_lag_s + i * lag_step_s"),
        _f(
            "coefficient",
            pa.list_(pa.float32()),
            "",
            "correlation coefficient rho_ab(tau); R_ab(tau) = E[a(t) b(t+tau)]",
        ),
        _f(
            "scale",
            pa.float64(),
            "unit_a*unit_b",
            "R = scale * coefficient (sqrt(R_aa(0) R_bb(0)) of the detrended records)",
        ),
        _f(
            "stderr",
            pa.list_(pa.float32()),
            "",
            "standard error of each coefficient (Bartlett's formula, pair counts for n)",
        ),
        _f("bandwidth_hz", pa.float64(), "Hz", "statistical bandwidth B (Bendat & Piersol)"),
        _f("record_s", pa.float64(), "s", "record length T of valid samples"),
        _f(
            "rel_error",
            pa.float64(),
            "",
            "normalised random error of R: at lag 0 for an auto, at the peak for a cross pair",
        ),
        _f("required_record_s", pa.float64(), "s", "record length that would meet target_rel_error"),
        _f("meets_target", pa.bool_(), "", "rel_error <= target_rel_error"),
        _f("quality", pa.string(), "", "'ok' or ';'-separated quality codes"),
        _f("bandwidth_time", pa.float64(), "", "B*T"),
        _f("n_effective", pa.float64(), "", "effective number of independent samples from the integral time scale"),
        _f("tone_freq_hz", pa.float64(), "Hz", "frequency of the strongest sharp PSD peak (NaN if none)"),
        _f(
            "tone_required_record_s",
            pa.float64(),
            "s",
            "averaging length for the tone's error to stay within the target",
        ),
    ]
)

INDICATORS = pa.schema(
    [
        _f("window_start", TIMESTAMP, "", "window start", nullable=False),
        _f("subject", pa.string(), "", "channel, 'a:b' pair or mode name", nullable=False),
        _f(
            "indicator",
            pa.string(),
            "",
            "rms, corr_time_s, decay_time_s, mode_freq_hz, mode_damping, mode_mac, lag_s, peak_coef, "
            "stationarity_p, ...",
            nullable=False,
        ),
        _f("value", pa.float64(), "see unit column", "indicator value"),
        _f("stderr", pa.float64(), "see unit column", "standard error of value"),
        _f("unit", pa.string(), "", "unit of value and stderr"),
        _f("quality", pa.string(), "", "'ok' or ';'-separated quality codes"),
    ]
)

REJECTS = pa.schema(
    [
        _f("stage", pa.string(), "", "plan, read, correlate, screen, indicators, shifts", nullable=False),
        _f("source", pa.string(), "", "file path, or the window start for window findings", nullable=False),
        _f("subject", pa.string(), "", "channel, pair, mode, or '*' for the whole file or window", nullable=False),
        _f("reason", pa.string(), "", "stable snake_case reason code", nullable=False),
        _f("detail", pa.string(), "", "specifics", nullable=False),
        _f("action", pa.string(), "", "rejected, repaired or flagged", nullable=False),
        _f("window_start", TIMESTAMP, "", "window start for window findings, else null"),
    ]
)

MODE_SHAPES = pa.schema(
    [
        _f("window_start", TIMESTAMP, "", "window start", nullable=False),
        _f("mode", pa.string(), "", "name of the multi-channel [[modes]] entry", nullable=False),
        _f("channel", pa.string(), "", "channel of the shape component", nullable=False),
        _f("shape_real", pa.float64(), "", "real part of the component; 1 at the reference component"),
        _f("shape_imag", pa.float64(), "", "imaginary part of the component; 0 at the reference component"),
        _f(
            "stderr",
            pa.float64(),
            "",
            "jackknife standard error of the complex component: sqrt(se_real^2 + se_imag^2)",
        ),
        _f("quality", pa.string(), "", "'ok' or ';'-separated quality codes of the mode in this window"),
        _f(
            "freq_hz",
            pa.float64(),
            "Hz",
            "the mode's frequency in this window (what its baseline reference is built from)",
        ),
    ]
)

ALL_TABLES = ("correlations", "indicators", "shifts", "rejects", "state", "baseline_sample", "mode_shapes")

# Shift detection (corrtransforms.stages.shifts): one SHIFTS row per monitored indicator row,
# one STATE row per (subject, indicator) and local day, EPISODES summarises alarm episodes.
SHIFTS = pa.schema(
    [
        _f("window_start", TIMESTAMP, "", "window start", nullable=False),
        _f("subject", pa.string(), "", "channel, 'a:b' pair or mode name", nullable=False),
        _f("indicator", pa.string(), "", "monitored indicator name", nullable=False),
        _f("value", pa.float64(), "see unit column", "indicator value"),
        _f("stderr", pa.float64(), "see unit column", "standard error of value (record-length error)"),
        _f("expected", pa.float64(), "see unit column", "baseline prediction (median, or covariate regression)"),
        _f(
            "resid_scale",
            pa.float64(),
            "see unit column",
            "s_resid: baseline residual scale net of the windows' own error",
        ),
        _f("z", pa.float64(), "", "(value - expected) / sqrt(resid_scale^2 + stderr^2)"),
        _f("cusum_pos", pa.float64(), "", "upper tabular CUSUM statistic of the charted prediction errors (Page 1954)"),
        _f("cusum_neg", pa.float64(), "", "lower tabular CUSUM statistic of the charted prediction errors"),
        _f("ewma", pa.float64(), "", "EWMA of the charted prediction errors (Roberts 1959)"),
        _f("ewma_limit", pa.float64(), "", "exact time-varying EWMA control limit (+/-)"),
        _f("state", pa.string(), "", "baseline, normal or shifted", nullable=False),
        _f(
            "onset",
            TIMESTAMP,
            "",
            "estimated shift onset: first window after the CUSUM last left zero (null unless shifted)",
        ),
        _f("direction", pa.int8(), "", "+1 upward, -1 downward, 0 no shift", nullable=False),
        _f("shift_size", pa.float64(), "see unit column", "mean of value - expected since onset (null unless shifted)"),
        _f("detector", pa.string(), "", "which configured detector signals: cusum, ewma or cusum+ewma (null if none)"),
        _f("first_alarm", TIMESTAMP, "", "first alarm of the current episode (null unless shifted)"),
        _f("quality", pa.string(), "", "'ok' or ';'-separated quality codes"),
        _f("unit", pa.string(), "", "unit of value, stderr, expected, resid_scale and shift_size"),
    ]
)

STATE = pa.schema(
    [
        _f("window_start", TIMESTAMP, "", "last window processed for this series", nullable=False),
        _f("local_date", pa.date32(), "", "local day ([archive] timezone) of that window", nullable=False),
        _f("subject", pa.string(), "", "channel, 'a:b' pair or mode name", nullable=False),
        _f("indicator", pa.string(), "", "monitored indicator name", nullable=False),
        _f(
            "settings",
            pa.string(),
            "",
            "digest of the [baseline]/[shifts] settings the state was computed with",
            nullable=False,
        ),
        _f("phase", pa.string(), "", "accumulating (baseline sample still growing) or fitted", nullable=False),
        _f("windows_seen", pa.int64(), "", "windows of this series processed so far", nullable=False),
        _f(
            "sample_value",
            pa.list_(pa.float64()),
            "see unit column",
            "empty: the baseline sample is in the baseline_sample table (filled only by states written before it)",
        ),
        _f("sample_stderr", pa.list_(pa.float64()), "see unit column", "empty (see sample_value)"),
        _f("sample_covariates", pa.list_(pa.float64()), "", "empty (see sample_value)"),
        _f("covariates", pa.list_(pa.string()), "", "compensated covariates, in model order"),
        _f("model_order", pa.int8(), "", "polynomial order of the covariate model"),
        _f("model_n", pa.int64(), "", "baseline windows used by the fit"),
        _f(
            "model_location",
            pa.float64(),
            "see unit column",
            "median (no covariates) or regression intercept at the covariate centres",
        ),
        _f(
            "model_coefficients",
            pa.list_(pa.float64()),
            "",
            "regression coefficients, linear terms then squares (quadratic) or the slope change above model_knee",
        ),
        _f(
            "model_covariate_center",
            pa.list_(pa.float64()),
            "",
            "baseline medians of the covariates (used for a missing covariate)",
        ),
        _f("model_scale", pa.float64(), "see unit column", "robust residual scale of the fit (MAD * 1.4826)"),
        _f("model_stderr_sq", pa.float64(), "", "median squared stderr of the baseline windows"),
        _f("resid_scale", pa.float64(), "see unit column", "s_resid = sqrt(max(model_scale^2 - model_stderr_sq, 0))"),
        _f("r_squared", pa.float64(), "", "coefficient of determination of the fit"),
        _f("model_quality", pa.string(), "", "'ok' or quality codes of the fit (baseline_too_short, ...)"),
        _f("cusum_pos", pa.float64(), "", "upper CUSUM after the last window"),
        _f("cusum_neg", pa.float64(), "", "lower CUSUM after the last window"),
        _f("run_start_pos", TIMESTAMP, "", "first window of the current nonzero run of cusum_pos"),
        _f("run_start_neg", TIMESTAMP, "", "first window of the current nonzero run of cusum_neg"),
        _f("run_count_pos", pa.int64(), "", "windows in the current run of cusum_pos"),
        _f("run_count_neg", pa.int64(), "", "windows in the current run of cusum_neg"),
        _f("run_resid_pos", pa.float64(), "see unit column", "sum of value - expected over the run of cusum_pos"),
        _f("run_resid_neg", pa.float64(), "see unit column", "sum of value - expected over the run of cusum_neg"),
        _f("ewma", pa.float64(), "", "EWMA of the charted prediction errors after the last window"),
        _f("ewma_count", pa.int64(), "", "windows the EWMA has used (for the exact limit)"),
        _f("state", pa.string(), "", "baseline, normal or shifted", nullable=False),
        _f("onset", TIMESTAMP, "", "onset of the current shift"),
        _f("direction", pa.int8(), "", "+1, -1 or 0"),
        _f("shift_size", pa.float64(), "see unit column", "current shift size estimate"),
        _f("detector", pa.string(), "", "detector(s) currently signalling"),
        _f("first_alarm", TIMESTAMP, "", "first alarm of the current episode"),
        _f("ewma_limit", pa.float64(), "", "last EWMA limit"),
        _f("sample_window_start", pa.list_(TIMESTAMP), "", "empty (see sample_value)"),
        _f(
            "dependence_phi",
            pa.float64(),
            "",
            "AR(1) coefficient of the residuals fitted on the baseline (0: none or not estimated)",
        ),
        _f(
            "dependence_pairs",
            pa.int64(),
            "",
            "adjacent baseline pairs phi was fitted from (0 for states written before it)",
        ),
        _f(
            "innovation_scale",
            pa.float64(),
            "see unit column",
            "scale of the one-step prediction errors: resid_scale sqrt(1 - phi^2) innovation_ratio",
        ),
        _f(
            "innovation_ratio",
            pa.float64(),
            "",
            "robust scale of the baseline's standardised prediction errors (divides them)",
        ),
        _f(
            "cusum_h_used", pa.float64(), "", "CUSUM h widened for the baseline's estimation error (null: configured h)"
        ),
        _f("ewma_L_used", pa.float64(), "", "EWMA L widened for the baseline's estimation error (null: configured L)"),
        _f(
            "predictor_mean",
            pa.float64(),
            "see unit column",
            "filtered mean of the residual after predictor_window_start",
        ),
        _f("predictor_var", pa.float64(), "", "its variance (null: the stationary start)"),
        _f("predictor_window_start", TIMESTAMP, "", "last window the predictor was updated with"),
        _f(
            "window_spacing_s",
            pa.float64(),
            "s",
            "median spacing of the baseline windows: one prediction step (null: [windows] hop_s)",
        ),
        _f(
            "sample_count",
            pa.int64(),
            "",
            "windows in the baseline sample so far (their rows: baseline_sample table, days up to this one)",
        ),
        _f("model_form", pa.string(), "", "configured covariate model: linear, quadratic or hinge ([shifts] model)"),
        _f(
            "model_knee",
            pa.float64(),
            "",
            "hinge model: knee in units of the first covariate, model_coefficients ending with the slope change "
            "above it (null: no knee, also a hinge fallen back to linear, quality knee_not_in_baseline)",
        ),
    ]
)

#: columns added to a schema after files were first written with it: read back as nulls from
#: older files (corrtransforms.stages.write.conform)
ADDED_COLUMNS = {"sample_count", "model_form", "model_knee", "freq_hz"}

# The baseline sample of each series while its baseline accumulates: one row per window that
# entered the sample, written on that window's own day, so no state row ever carries the sample
# (a state row's size does not depend on the baseline's length).
BASELINE_SAMPLE = pa.schema(
    [
        _f("window_start", TIMESTAMP, "", "window start", nullable=False),
        _f("subject", pa.string(), "", "channel, 'a:b' pair or mode name", nullable=False),
        _f("indicator", pa.string(), "", "monitored indicator name", nullable=False),
        _f("value", pa.float64(), "see unit column", "indicator value"),
        _f("stderr", pa.float64(), "see unit column", "standard error of value"),
        _f("covariates", pa.list_(pa.float64()), "", "window means of the compensated covariates, in model order"),
        _f("unit", pa.string(), "", "unit of value and stderr"),
    ]
)

EPISODES = pa.schema(
    [
        _f("subject", pa.string(), "", "channel, 'a:b' pair or mode name", nullable=False),
        _f("indicator", pa.string(), "", "monitored indicator name", nullable=False),
        _f("onset", TIMESTAMP, "", "estimated shift onset (earliest estimate in the episode; <= first_alarm)"),
        _f("first_alarm", TIMESTAMP, "", "first window in state shifted", nullable=False),
        _f("last_window", TIMESTAMP, "", "last window in state shifted", nullable=False),
        _f("status", pa.string(), "", "open (still shifted at the series' last window) or closed", nullable=False),
        _f("direction", pa.int8(), "", "+1 upward, -1 downward", nullable=False),
        _f("shift_size", pa.float64(), "see unit column", "shift size at the episode's last window"),
        _f("peak_abs_z", pa.float64(), "", "largest |z| during the episode"),
        _f("detector", pa.string(), "", "detectors that signalled during the episode"),
        _f("n_windows", pa.int64(), "", "windows in state shifted", nullable=False),
        _f("unit", pa.string(), "", "unit of shift_size"),
        _f(
            "shift_size_pct",
            pa.float64(),
            "%",
            "shift_size in % of the expected (baseline) level at the episode's last window",
        ),
    ]
)
