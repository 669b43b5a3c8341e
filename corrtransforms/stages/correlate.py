"""The correlate stage for one window: :class:`~corrtransforms.records.WindowBlock` in,
:class:`~corrtransforms.records.WindowCorrelation` out, and the correlations table.

:func:`correlate_window` transforms each channel once, then forms every configured pair, every
configured single-channel mode's band-limited auto-correlation, the multi-channel modes
(:mod:`corrtransforms.stages.modes`, from their own sub-record lag sums) and (for cross pairs, when configured) the
weighted generalised cross-correlation, and attaches the record-length error metadata of
:mod:`corrtransforms.numerics.random_error`. :func:`correlation_table` turns a batch of results into an
Arrow table with exactly the :data:`corrtransforms.tables.CORRELATIONS` schema.

Lag convention: ``R_ab(tau) = E[a(t) b(t + tau)]``; a peak at positive tau means b lags a. Auto
pairs keep lags ``0..L``, cross pairs ``-L..L``.
"""

from __future__ import annotations

from typing import Dict, Iterable, List

import numpy as np
import pyarrow as pa

from corrtransforms.config import AssetConfig
from corrtransforms.numerics import random_error as err
from corrtransforms.numerics.bartlett import bartlett_stderr, bartlett_stderr_of_pairs
from corrtransforms.numerics.correlation import DEFAULT_MIN_PAIRS, channel_spectra, correlate_spectra, pairs_by_name
from corrtransforms.numerics.spectra import lag_window_psd, strongest_tone
from corrtransforms.numerics.timescales import integral_time_scale
from corrtransforms.records import ModeCorrelation, PairCorrelation, WindowBlock, WindowCorrelation, quality_text
from corrtransforms.stages.modes import window_multichannel_modes
from corrtransforms.tables import CORRELATIONS, TIMESTAMP

#: |rho| above this in the last 10 % of lags flags "max_lag_short" (common practice)
UNDECAYED_COEFFICIENT = 0.2
#: a pair with fewer effective samples (n_effective = T / (2 T_I)) gets "few_effective_samples",
#: a holding code (corrtransforms.records.HOLDING_CODES): chosen from the calibration matrix
#: (AR(1), phi 0.9): at 100 effective samples and above the lag-0 errors cover 0.95 and the
#: decay time 0.90; at 50 the decay time covers 0.83, at 25 the lag-0 errors 0.89 and the time
#: scales 0.75-0.83 (docs/calibration.md)
MIN_EFFECTIVE_SAMPLES = 100.0


def _usable_channels(spectra, min_pairs: int) -> np.ndarray:
    """Channels with enough valid samples and non-zero variance (others are skipped).

    Zero variance: standard deviation at most 1e-10 of the channel's mean magnitude (a flat
    record up to the round-off of its mean).
    """
    var = np.nan_to_num(spectra.variance)
    flat = var <= 1e-20 * spectra.channel_mean**2
    return (spectra.valid_counts >= max(min_pairs, 2)) & ~flat & (var > 0)


def correlate_window(
    block: WindowBlock, config: AssetConfig, min_pairs: int = DEFAULT_MIN_PAIRS, mode_references=None
) -> WindowCorrelation:
    """Correlation functions, error metadata and quality codes of one window.

    Parameters
    ----------
    block : WindowBlock
        One window of samples with its validity mask.
    config : AssetConfig
        Uses ``[correlation]`` (max_lag_s, pairs, estimator, detrend, weighting,
        target_rel_error) and ``[[modes]]``.
    min_pairs : int
        Lags with fewer valid sample pairs are NaN (and the pair gets "few_pairs").
    mode_references : mapping, optional
        The multi-channel entries' baseline references
        (:func:`corrtransforms.stages.mode_reference.read_references`); None means none yet.

    Returns
    -------
    WindowCorrelation
        ``pairs`` holds one :class:`PairCorrelation` per requested pair whose channels are
        usable; it is empty when none is (the caller then emits a ``no_valid_pairs`` reject).
        A channel with fewer than ``min_pairs`` valid samples or zero variance is skipped (the
        reader has already emitted a reject for it).

    Notes
    -----
    Per pair (a, b), with ``T`` the record length of valid sample pairs at zero lag, ``B`` the
    statistical bandwidth (:func:`~corrtransforms.numerics.random_error.statistical_bandwidth` of the
    Parzen-window PSDs of the biased auto-correlations; for a cross pair of ``G_aa G_bb``) and
    ``eps`` the target:

    - ``stderr``: Bartlett's per-lag standard error (general form) with pair counts for n;
    - ``rel_error``: for an auto pair the relative error of its mean square ``R(0)`` from
      Bartlett's general formula, ``sqrt(2 sum_{v=-L..L} rho(v)^2 / n)`` (the error the rms
      stderr uses; it equals ``1/sqrt(BT)`` for band-limited white noise and, unlike the
      Parzen-smoothed ``B``, does not widen a sharp resonance); for a cross pair the closed
      form ``[1 + rho_pk^-2]^(1/2) / sqrt(2BT)`` at the coefficient's peak;
    - ``required_record_s``: the ``T`` at which ``rel_error = eps`` (auto pair:
      ``T (rel_error / eps)^2``, the error scaling as ``1/sqrt(T)``); ``meets_target``:
      ``rel_error <= eps``;
    - ``n_effective``: ``T / (2 T_I)`` with the larger integral time scale of a and b;
    - ``tone_required_record_s``: ``2T = 1/(eps w0)`` for the strongest sharp PSD peak of a or
      b (whichever needs the longer record), NaN without one.

    ``rms`` is the root mean square of each detrended record, ``rms_stderr`` its standard
    error ``rms eps_ms / 2`` with the general (Bartlett) relative error ``eps_ms`` of the mean
    square, which equals ``1/sqrt(BT)`` for bandwidth-limited white noise.

    References
    ----------
    .. [1] J. S. Bendat and A. G. Piersol, *Random Data*, 4th ed., Wiley, 2010, Ch. 8.
    .. [2] G. E. P. Box, G. M. Jenkins and G. C. Reinsel, *Time Series Analysis*, 4th ed.,
       Wiley, 2008, Secs. 2.1.6 and 12.1.
    """
    cc = config.correlation
    fs = float(block.sample_rate_hz)
    names = tuple(block.channels)
    spectra = channel_spectra(
        block.values, fs, cc.max_lag_s, valid=block.valid, detrend=cc.detrend, precision=cc.transform_precision
    )
    usable = _usable_channels(spectra, min_pairs)
    requested = list(pairs_by_name(cc.pairs, names, usable))
    used = [i for i in range(len(names)) if usable[i]]
    channel_codes = {names[i]: tuple(block.channel_quality.get(names[i], ())) for i in used}
    autos = [(i, i) for i in used]
    needed = autos + [p for p in requested if p[0] != p[1]]
    est = correlate_spectra(spectra, needed, estimator=cc.estimator, min_pairs=min_pairs) if needed else None
    channels = _ChannelFigures(spectra, est, used, cc) if est is not None else None
    pairs_out: List[PairCorrelation] = []
    modes_out: List[ModeCorrelation] = []
    if est is not None and channels is not None:
        if requested:
            pairs_out = _pair_correlations(
                spectra, est, channels, requested, needed, names, channel_codes, cc, min_pairs
            )
        modes_out = _mode_correlations(spectra, config, names, usable, channel_codes, min_pairs)
    multichannel = window_multichannel_modes(block, config, usable, mode_references)
    return WindowCorrelation(
        asset=block.asset,
        window_start_us=int(block.window_start_us),
        sample_rate_hz=fs,
        n_samples=spectra.n_samples,
        channels=tuple(names[i] for i in used),
        rms={} if channels is None else {names[i]: channels.rms[i] for i in used},
        rms_stderr={} if channels is None else {names[i]: channels.rms_stderr[i] for i in used},
        pairs=tuple(pairs_out),
        modes=tuple(modes_out),
        multichannel_modes=tuple(multichannel),
        covariates=dict(block.covariates),
        subject_quality={name: codes for name, codes in channel_codes.items() if codes},
    )


def _undecayed(rho_tail: np.ndarray, L: int) -> bool:
    """|rho| above :data:`UNDECAYED_COEFFICIENT` in the last 10 % of the positive lags."""
    tail = max(1, int(np.ceil(0.1 * L)))
    return L > 0 and np.nanmax(np.abs(rho_tail[-tail:]), initial=0.0) > UNDECAYED_COEFFICIENT


class _ChannelFigures:
    """Per usable channel (row ``k`` is channel ``used[k]``): the biased PSD and its statistical
    bandwidth, integral time scale, strongest tone, validity checks, rms and its stderr."""

    def __init__(self, spectra, est, used: List[int], cc):
        fs, L = spectra.sample_rate_hz, spectra.max_lag
        self.auto_row = {i: k for k, i in enumerate(used)}
        self.rho = est.coefficient[: len(used)]
        count_auto = est.pair_count[: len(used)]
        valid_counts = spectra.valid_counts[used].astype(float)
        # biased auto-correlations for the PSD and the validity checks
        R_auto = est.R[: len(used)]
        R_biased = R_auto * count_auto / valid_counts[:, None] if cc.estimator == "unbiased" else R_auto
        self.frequencies_hz, self.psd = lag_window_psd(R_biased, fs)
        self.bandwidth_hz = err.statistical_bandwidth(self.frequencies_hz, self.psd)
        # general (Bartlett) relative error of each mean square: var R(0) / R(0)^2 =
        # sum_v [rho(v)^2 + rho(v) rho(-v)] / N = 2 sum_v rho(v)^2 / N (correlation_random_error at 0)
        finite_auto = np.where(np.isfinite(self.rho), self.rho, 0.0)
        ms_rel = np.sqrt(2.0 * np.einsum("ij,ij->i", finite_auto, finite_auto) / count_auto[:, L])
        self.mean_square_rel_error = ms_rel
        self.integral_scale_s = np.array([integral_time_scale(r[L:], 1.0 / fs) for r in self.rho])
        self.tone_freq_hz, _ = strongest_tone(
            spectra.frequencies_hz(), spectra.periodogram()[used], n_averaged=spectra.n_segments
        )
        self.tone_record_s = 2.0 * err.tone_required_half_length(2 * np.pi * self.tone_freq_hz, cc.target_rel_error)
        self.checks, self.rms, self.rms_stderr = {}, {}, {}
        for k, i in enumerate(used):
            codes = list(
                err.auto_correlation_checks(R_auto[k], spectra.mean_square[i], self.psd[k], rtol=spectra.round_off_rtol)
            )
            if _undecayed(self.rho[k, L + 1 :], L):
                codes.append("max_lag_short")
            self.checks[i] = codes
            r = float(np.sqrt(spectra.mean_square[i]))
            self.rms[i] = r
            self.rms_stderr[i] = float(r * ms_rel[k] / 2.0)


def _pair_correlations(
    spectra, est, channels: _ChannelFigures, requested, needed, names, channel_codes, cc, min_pairs: int
) -> List[PairCorrelation]:
    """One :class:`PairCorrelation` per requested pair, with its error metadata and quality."""
    fs, L, n = spectra.sample_rate_hz, spectra.max_lag, spectra.n_samples
    target = cc.target_rel_error
    row_of = {p: k for k, p in enumerate(needed)}
    rows = np.array([row_of[p] for p in requested])
    a_rows = np.array([channels.auto_row[a] for a, _ in requested])
    b_rows = np.array([channels.auto_row[b] for _, b in requested])
    rho = est.coefficient[rows]
    counts = est.pair_count[rows]
    figures = _pair_error_figures(
        rho, counts, channels, a_rows, b_rows, np.array([a == b for a, b in requested]), fs, L, target
    )
    weighted = {}
    cross = [p for p in requested if p[0] != p[1]]
    if cc.weighting != "none" and cross:
        west = correlate_spectra(spectra, cross, estimator=cc.estimator, weighting=cc.weighting, min_pairs=min_pairs)
        weighted = {p: west.coefficient[k] for k, p in enumerate(cross)}
    out = []
    for k, (a, b) in enumerate(requested):
        ka, kb = a_rows[k], b_rows[k]
        tones = [
            (channels.tone_record_s[ka], channels.tone_freq_hz[ka]),
            (channels.tone_record_s[kb], channels.tone_freq_hz[kb]),
        ]
        tones = [t for t in tones if np.isfinite(t[0])]
        t_record, t_freq = max(tones) if tones else (np.nan, np.nan)
        codes = list(channel_codes[names[a]]) + list(channel_codes[names[b]])
        codes += channels.checks[a] + (channels.checks[b] if b != a else [])
        if not np.all(np.isfinite(rho[k])):
            codes.append("few_pairs")
        if a != b and np.nanmax(np.abs(rho[k]), initial=0.0) > 1.0 + 1e-9:
            codes.append("coefficient_exceeds_one")
        if np.isfinite(t_record) and figures["record_s"][k] < t_record:
            codes.append("tone_record_short")
        if figures["n_effective"][k] < MIN_EFFECTIVE_SAMPLES:
            codes.append("few_effective_samples")
        sl = slice(L, None) if a == b else slice(None)
        out.append(
            PairCorrelation(
                channel_a=names[a],
                channel_b=names[b],
                first_lag_s=0.0 if a == b else -L / fs,
                lag_step_s=1.0 / fs,
                coefficient=rho[k, sl].copy(),
                stderr=figures["stderr"][k, sl].copy(),
                pair_count=counts[k, sl].copy(),
                scale=float(est.scale[rows[k]]),
                coverage=float(counts[k, L] / n) if n else 0.0,
                bandwidth_hz=float(figures["bandwidth_hz"][k]),
                record_s=float(figures["record_s"][k]),
                rel_error=float(figures["rel_error"][k]),
                required_record_s=float(figures["required_record_s"][k]),
                meets_target=bool(figures["rel_error"][k] <= target),
                bandwidth_time=float(figures["bandwidth_time"][k]),
                n_effective=float(figures["n_effective"][k]),
                tone_freq_hz=float(t_freq),
                tone_required_record_s=float(t_record),
                quality=tuple(sorted(set(codes))),
                weighted_coefficient=weighted.get((a, b)),
            )
        )
    return out


def _pair_error_figures(
    rho, counts, channels: _ChannelFigures, a_rows, b_rows, is_auto, fs: float, L: int, target: float
) -> Dict[str, np.ndarray]:
    """Record-length error metadata of the requested pairs (rows): per-lag stderr, bandwidth,
    record length, BT, closed-form relative error, required record length, N_eff."""
    stderr = bartlett_stderr_of_pairs(rho, channels.rho, a_rows, b_rows, counts)
    bandwidth = np.where(
        is_auto,
        channels.bandwidth_hz[a_rows],
        err.statistical_bandwidth(channels.frequencies_hz, channels.psd[a_rows], channels.psd[b_rows]),
    )
    record_s = counts[:, L] / fs
    abs_rho = np.where(np.isfinite(rho), np.abs(rho), -1.0)
    peak = rho[np.arange(len(rho)), np.argmax(abs_rho, axis=1)]
    # auto pair: Bartlett's mean-square error (the rms stderr's), which scales as 1/T
    auto_rel_error = channels.mean_square_rel_error[a_rows]
    rel_error = np.where(is_auto, auto_rel_error, err.correlation_rel_error(peak, bandwidth, record_s))
    with np.errstate(invalid="ignore", divide="ignore"):
        auto_required = record_s * (auto_rel_error / target) ** 2
    required = np.where(is_auto, auto_required, err.required_record_length(bandwidth, target, rho=peak))
    scales = np.maximum(channels.integral_scale_s[a_rows], channels.integral_scale_s[b_rows])
    return {
        "stderr": stderr,
        "bandwidth_hz": bandwidth,
        "record_s": record_s,
        "bandwidth_time": bandwidth * record_s,
        "rel_error": rel_error,
        "required_record_s": required,
        "n_effective": err.effective_samples(record_s, scales, counts[:, L]),
    }


def _mode_correlations(
    spectra, config: AssetConfig, names, usable, channel_codes, min_pairs: int
) -> List[ModeCorrelation]:
    """The band-limited auto-correlation of every configured single-channel mode."""
    cc = config.correlation
    fs, L = spectra.sample_rate_hz, spectra.max_lag
    out = []
    for mode in config.modes:
        if mode.is_multichannel:
            continue  # identified by corrtransforms.stages.modes
        if mode.channel not in names or not usable[names.index(mode.channel)]:
            continue  # the reader has emitted a reject for this channel
        c = names.index(mode.channel)
        mest = correlate_spectra(spectra, [(c, c)], estimator=cc.estimator, band_hz=mode.band_hz, min_pairs=min_pairs)
        rho_m = mest.coefficient[0]
        se_m = bartlett_stderr(rho_m, rho_m, rho_m, mest.pair_count[0])
        codes = list(channel_codes[mode.channel])
        if not np.all(np.isfinite(rho_m)):
            codes.append("few_pairs")
        if _undecayed(rho_m[L + 1 :], L):
            codes.append("max_lag_short")
        out.append(
            ModeCorrelation(
                mode=mode.name,
                channel=mode.channel,
                band_hz=(float(mode.band_hz[0]), float(mode.band_hz[1])),
                lag_step_s=1.0 / fs,
                coefficient=rho_m[L:].copy(),
                stderr=se_m[L:].copy(),
                record_s=float(spectra.valid_counts[c] / fs),
                quality=tuple(sorted(set(codes))),
            )
        )
    return out


def _list_column(arrays: List[np.ndarray]) -> pa.Array:
    lengths = np.fromiter((len(a) for a in arrays), dtype=np.int64, count=len(arrays))
    offsets = np.zeros(len(arrays) + 1, dtype=np.int32)
    np.cumsum(lengths, out=offsets[1:])
    flat = np.concatenate(arrays).astype(np.float32) if arrays else np.zeros(0, np.float32)
    return pa.ListArray.from_arrays(pa.array(offsets, type=pa.int32()), pa.array(flat, type=pa.float32()))


def correlation_table(window_correlations: Iterable[WindowCorrelation]) -> pa.Table:
    """Rows of the correlations table, one per window and pair, with exactly the
    :data:`corrtransforms.tables.CORRELATIONS` schema.

    Parameters
    ----------
    window_correlations : iterable of WindowCorrelation

    Returns
    -------
    pyarrow.Table
        ``coefficient`` and ``stderr`` as ``list<float32>``, ``window_start`` as
        ``timestamp[us, UTC]``, ``quality`` as :func:`~corrtransforms.records.quality_text`.
        Built column-wise from numpy arrays.
    """
    starts, fs, n_samples = [], [], []
    pairs: List[PairCorrelation] = []
    for wc in window_correlations:
        pairs.extend(wc.pairs)
        k = len(wc.pairs)
        starts.append(np.full(k, wc.window_start_us, dtype=np.int64))
        fs.append(np.full(k, wc.sample_rate_hz))
        n_samples.append(np.full(k, wc.n_samples, dtype=np.int64))
    if not pairs:
        return CORRELATIONS.empty_table()

    def floats(name):
        return np.fromiter((getattr(p, name) for p in pairs), dtype=np.float64, count=len(pairs))

    columns = {
        "window_start": pa.array(np.concatenate(starts), type=pa.int64()).cast(TIMESTAMP),
        "channel_a": pa.array([p.channel_a for p in pairs], type=pa.string()),
        "channel_b": pa.array([p.channel_b for p in pairs], type=pa.string()),
        "sample_rate_hz": pa.array(np.concatenate(fs)),
        "n_samples": pa.array(np.concatenate(n_samples)),
        "coverage": pa.array(floats("coverage")),
        "first_lag_s": pa.array(floats("first_lag_s")),
        "lag_step_s": pa.array(floats("lag_step_s")),
        "coefficient": _list_column([np.asarray(p.coefficient) for p in pairs]),
        "scale": pa.array(floats("scale")),
        "stderr": _list_column([np.asarray(p.stderr) for p in pairs]),
        "bandwidth_hz": pa.array(floats("bandwidth_hz")),
        "record_s": pa.array(floats("record_s")),
        "rel_error": pa.array(floats("rel_error")),
        "required_record_s": pa.array(floats("required_record_s")),
        "meets_target": pa.array(np.fromiter((bool(p.meets_target) for p in pairs), dtype=bool, count=len(pairs))),
        "quality": pa.array([quality_text(p.quality) for p in pairs], type=pa.string()),
        "bandwidth_time": pa.array(floats("bandwidth_time")),
        "n_effective": pa.array(floats("n_effective")),
        "tone_freq_hz": pa.array(floats("tone_freq_hz")),
        "tone_required_record_s": pa.array(floats("tone_required_record_s")),
    }
    return pa.Table.from_arrays([columns[f.name] for f in CORRELATIONS], schema=CORRELATIONS)
