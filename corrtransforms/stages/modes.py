"""Multi-channel modes of one window (part of the correlate step) and the mode_shapes table.

:func:`window_multichannel_modes` runs, for the ``[[modes]]`` entries given with
``channels = [...]``, the identification of :mod:`corrtransforms.numerics.multichannel_modes`
on the window's correlation matrix of those channels, assigns one pole to each entry
(:mod:`corrtransforms.numerics.mode_tracking`) and attaches jackknife standard errors
(:mod:`corrtransforms.numerics.mode_uncertainty`). :func:`mode_shape_table` turns the results
into rows of :data:`corrtransforms.tables.MODE_SHAPES`.

Correlations used. The identification needs every auto and cross pair of the entry's channels
(outputs) with its reference channels, per sub-record (the jackknife). They are computed here,
from the window's samples, whatever ``[correlation] pairs`` lists, and are not written to the
correlations table (a mode needs its pairs whether or not the user wants to store them; storing
them would change the correlations table behind the user's back). The sub-records are the
overlap-save blocks of :func:`~corrtransforms.numerics.correlation.channel_spectra` with
``segment_length = ceil(n / SUB_RECORDS)``; the window's own matrix is the count-corrected
``sum S / sum N`` (:func:`~corrtransforms.numerics.mode_uncertainty.window_sequence`), at the lags
the Hankel matrix uses only (``(1 + rows + columns) * stride``, at most ``[correlation]
max_lag_s``).

Tracking. Entries with the same channels and reference channels share one identification over
the union of their bands. With the entry's baseline reference
(:mod:`corrtransforms.stages.mode_reference`: median frequency and shape of its baseline
windows, handed in as ``references``) the reference frequency and shape are those; before it
exists the frequency is the band centre and the shape ``reference_shape`` or the shape of the
candidate pole in the entry's (widened) band nearest the centre. A configured ``reference_shape``
is always the shape tracked and compared with (the user fixed it). Poles are assigned by
:func:`~corrtransforms.numerics.mode_tracking.track_modes` (Hungarian, cost
``|df| / f + (1 - MAC)``, admissible within the widened band and MAC >= 0.8). ``mode_mac`` is the
MAC of the window's shape to ``reference_shape``, else to the baseline reference shape, and NaN
with ``mode_reference_pending`` while neither exists (a reference taken from the window itself
would make it 1 by construction).

Settings chosen here (measured by ``benchmarks/bench_multichannel_modes.py --stage``):
model orders ``2, 4, ..., mode_max_order(n_channels, n_entries)`` (:func:`mode_max_order`),
``block_columns = ceil(max_order / n_references) + 1`` (the fewest that hold every model order,
plus one), block rows spanning a period of the band's low edge, capped by
the lags (:func:`mode_block_rows`), and a lag stride that keeps the strided grid's Nyquist frequency
at least :data:`NYQUIST_FACTOR` times the band's top.

A mode whose decay time is long against the jackknife's sub-records gets
``jackknife_records_short`` on its damping only (:func:`jackknife_records_short`,
:data:`MIN_DECAY_TIMES`; ``MultichannelMode.damping_quality``), a holding code.
"""

from __future__ import annotations

import dataclasses
from typing import Dict, Iterable, List, Mapping, Optional, Sequence, Tuple

import numpy as np
import pyarrow as pa

from corrtransforms import tables
from corrtransforms.config import AssetConfig, ModeConfig
from corrtransforms.numerics.correlation import block_lag_sums, channel_spectra, resolve_pairs
from corrtransforms.numerics.mode_shapes import largest_component, modal_assurance_criterion, normalise_shape
from corrtransforms.numerics.mode_tracking import track_modes
from corrtransforms.numerics.mode_uncertainty import (
    mac_stderr,
    mode_uncertainty,
    window_sequence,
)
from corrtransforms.numerics.multichannel_modes import (
    MAX_ORDER,
    IdentifiedModes,
    correlation_sequence,
    default_block_rows,
    identify_modes,
    search_band,
)
from corrtransforms.records import MultichannelMode, WindowBlock, WindowCorrelation, quality_text
from corrtransforms.stages.mode_reference import ModeReference

#: sub-records of the window for the jackknife: 16, half of numerics.mode_uncertainty's
#: DEFAULT_SEGMENTS, halves its cost; measured through this stage (benchmarks/bench_multichannel_modes.py
#: --coverage --stage-settings, 400 windows) the coverage is as good as with 32 (docs/modes.md);
#: with 15 degrees of freedom a correct stderr covers P(|t_15| < 1.96) = 0.931 (Student's t)
SUB_RECORDS = 16
#: the strided lag grid keeps its Nyquist frequency at least this many times the band's top
#: (common practice: content above the strided Nyquist aliases into the band)
NYQUIST_FACTOR = 5.0
#: the jackknife's sub-records must last at least this many decay times ``1 / (2 pi f zeta)`` of
#: the mode for its damping stderr to be trusted, else ``jackknife_records_short`` (a holding code).
#: The delete-one-block jackknife assumes blocks much longer than the dependence of the data
#: (Kuensch 1989, Ann. Statist. 17(3), 1217-1241; Efron & Tibshirani 1993, *An Introduction to the
#: Bootstrap*, Sec. 8.6 on blocks; both from memory): a lightly damped mode's response, and so the
#: lag sums of neighbouring sub-records, stay correlated for about its decay time. Value chosen
#: from the Monte Carlo of benchmarks/bench_multichannel_modes.py (docs/modes.md, "Uncertainty"):
#: rms damping error / rms stderr 1.67 at 0.6 decay times per sub-record, 1.39 at 1.2, 1.10 at 2.4,
#: 0.93-1.05 at 4.7-5.4
MIN_DECAY_TIMES = 3.0
#: model orders of a group: 2, 4, ..., mode_max_order(channels, entries) instead of up to MAX_ORDER
#: (measured: docs/modes.md, "Cost"); False restores the full range (the benchmark compares both)
NARROW_ORDERS = True
#: orders above 2 n_channels per entry of the group, and for noise / out-of-band modes (common practice)
ORDERS_PER_ENTRY = 4
ORDER_MARGIN = 20

#: quality codes of this module (the numerics add mode_not_found, mode_pole_shared,
#: mode_low_mac, jackknife_unmatched, too_few_segments, nonfinite_correlation)
QUALITY_CODES = {
    "mode_channel_unusable": "a channel of the mode is missing, flat or too sparse in this window",
    "mode_identification_failed": "the identification raised on this window's correlations (too few lags, singular)",
    "mode_max_lag_short": "[correlation] max_lag_s holds too few lags for the Hankel matrix of this band",
    "mode_reference_pending": "no reference_shape and the baseline reference is not complete yet, so mode_mac is NaN",
    "jackknife_records_short": "mode_damping only: the jackknife's sub-records last fewer than MIN_DECAY_TIMES decay "
    "times of the mode, so its damping stderr is too small; held out of the shift detectors",
}


def jackknife_records_short(record_s: float, sub_records: int, freq_hz: float, damping: float) -> bool:
    """True when a sub-record (``record_s / sub_records``) lasts fewer than :data:`MIN_DECAY_TIMES`
    decay times ``1 / (2 pi f zeta)`` of the mode (non-finite or non-positive values: False, the
    stderr is NaN anyway)."""
    if not (np.isfinite(freq_hz) and np.isfinite(damping) and freq_hz > 0 and damping > 0):
        return False
    decay_time_s = 1.0 / (2.0 * np.pi * freq_hz * damping)
    return bool(record_s / sub_records < MIN_DECAY_TIMES * decay_time_s)


def mode_lag_stride(fs: float, high_hz: float) -> int:
    """Lag stride: the largest with ``fs / (2 stride) >= NYQUIST_FACTOR * high_hz`` (at least 1)."""
    return max(1, int(np.floor(fs / (2.0 * NYQUIST_FACTOR * high_hz))))


def mode_max_order(n_channels: int, n_entries: int) -> int:
    """Largest model order of a group: ``min(MAX_ORDER, 2 n_channels + ORDERS_PER_ENTRY n_entries
    + ORDER_MARGIN)`` (orders 2, 4, ... up to it), or MAX_ORDER when :data:`NARROW_ORDERS` is off.

    ``2 n_channels`` is the order from which a pole represents its mode (the state can hold as
    many modes as channels; :func:`~corrtransforms.numerics.multichannel_modes.select_modes`); the
    orders above it give each entry's mode room to stabilise. Fewer orders mean fewer and
    smaller eigenvalue problems and a narrower Hankel matrix (its columns hold the largest order).
    """
    if not NARROW_ORDERS:
        return MAX_ORDER
    wanted = 2 * n_channels + ORDERS_PER_ENTRY * n_entries + ORDER_MARGIN
    return int(min(MAX_ORDER, wanted + wanted % 2))


def mode_block_columns(n_references: int, max_order: int = MAX_ORDER) -> int:
    """Block columns of the Hankel matrix: ``ceil(max_order / n_references) + 1``."""
    return int(np.ceil(max_order / max(n_references, 1))) + 1


def mode_block_rows(
    fs: float, low_hz: float, n_references: int, stride: int, columns: int, n_lags: int, max_order: int = MAX_ORDER
) -> int:
    """Block rows: :func:`~corrtransforms.numerics.multichannel_modes.default_block_rows` (a period
    of the band's low edge, room for the orders), capped by the lags ``[correlation] max_lag_s``
    gives (``rows + columns`` strided lags after lag 0)."""
    wanted = default_block_rows(fs, low_hz, n_references, max_order, stride)
    return max(2, min(wanted, (n_lags - 1) // stride - columns))


def _groups(config: AssetConfig) -> Dict[Tuple[Tuple[str, ...], Tuple[str, ...]], List[ModeConfig]]:
    groups: Dict[Tuple[Tuple[str, ...], Tuple[str, ...]], List[ModeConfig]] = {}
    for mode in config.modes:
        if mode.is_multichannel:
            groups.setdefault((mode.channels, mode.reference_channels), []).append(mode)
    return groups


def _empty(mode: ModeConfig, codes: Sequence[str]) -> MultichannelMode:
    nan = np.full(len(mode.channels), np.nan)
    return MultichannelMode(
        mode.name, mode.channels, np.nan, np.nan, np.nan, np.nan, np.nan, np.nan,
        nan + 0j, nan, nan, -1, tuple(sorted(set(codes))),
    )  # fmt: skip


def window_multichannel_modes(
    block: WindowBlock,
    config: AssetConfig,
    usable=None,
    references: Optional[Mapping[str, ModeReference]] = None,
    sub_records: int = SUB_RECORDS,
) -> List[MultichannelMode]:
    """One :class:`~corrtransforms.records.MultichannelMode` per multi-channel ``[[modes]]`` entry.

    Parameters
    ----------
    block : WindowBlock
    config : AssetConfig
        ``[[modes]]`` (entries with ``channels``) and ``[correlation]`` max_lag_s, detrend.
    usable : array_like of bool, optional
        Per block channel, whether the correlate stage could use it; None means all.
    references : mapping, optional
        Entry name -> its baseline :class:`~corrtransforms.stages.mode_reference.ModeReference`
        (entries without one use the band-centre rule); None means none.
    sub_records : int
        Sub-records of the jackknife, default :data:`SUB_RECORDS` (the benchmark varies it).

    Returns
    -------
    list of MultichannelMode
        In configuration order. An entry whose mode is not found has NaN values and its codes;
        a failure of the identification gives ``mode_identification_failed``, never an exception.
    """
    names = tuple(block.channels)
    baseline = references
    ok = np.ones(len(names), bool) if usable is None else np.asarray(usable, bool)
    results: Dict[str, MultichannelMode] = {}
    for (channels, reference_channels), entries in _groups(config).items():
        if not all(c in names and ok[names.index(c)] for c in channels):
            results.update({e.name: _empty(e, ["mode_channel_unusable"]) for e in entries})
            continue
        try:
            found = _group_modes(block, config, channels, reference_channels, entries, baseline or {}, sub_records)
            results.update({m.mode: m for m in found})
        except (ValueError, np.linalg.LinAlgError):  # ill-conditioned or too short: a code, not a crash
            results.update({e.name: _empty(e, ["mode_identification_failed"]) for e in entries})
    return [results[m.name] for m in config.modes if m.is_multichannel]


def _lag_arrays(block: WindowBlock, config: AssetConfig, channels, references, max_lag: int, sub_records: int):
    """Per sub-record lag sums and pair counts as ``(K, n_lags, n_outputs, n_references)``."""
    names = tuple(block.channels)
    columns = [names.index(c) for c in channels]
    values = np.asarray(block.values)[:, columns]
    valid = None if block.valid is None else np.asarray(block.valid)[:, columns]
    n = values.shape[0]
    cc = config.correlation
    spectra = channel_spectra(
        values, block.sample_rate_hz, max_lag / block.sample_rate_hz, valid=valid, detrend=cc.detrend,
        segment_length=-(-n // sub_records),
    )  # fmt: skip
    pairs = resolve_pairs("all", len(channels))
    sums, counts = block_lag_sums(spectra, pairs)
    outputs, refs = range(len(channels)), [channels.index(r) for r in references]
    n_lags = spectra.max_lag + 1
    return (
        correlation_sequence(sums, pairs, outputs, refs, n_lags),
        correlation_sequence(counts, pairs, outputs, refs, n_lags),
    )


def _group_modes(
    block,
    config,
    channels,
    references,
    entries: List[ModeConfig],
    baseline: Mapping[str, ModeReference],
    sub_records: int = SUB_RECORDS,
) -> List[MultichannelMode]:
    """Identify once for entries sharing channels, assign poles, attach jackknife stderrs."""
    fs = float(block.sample_rate_hz)
    union = (min(e.band_hz[0] for e in entries), max(e.band_hz[1] for e in entries))
    max_order = mode_max_order(len(channels), len(entries))
    stride, columns = mode_lag_stride(fs, search_band(union)[1]), mode_block_columns(len(references), max_order)
    configured_lags = int(round(config.correlation.max_lag_s * fs))
    if configured_lags // stride < columns + 2:
        return [_empty(e, ["mode_max_lag_short"]) for e in entries]
    rows = mode_block_rows(fs, search_band(union)[0], len(references), stride, columns, configured_lags + 1, max_order)
    # only the lags the Hankel matrix uses: (1 + rows + columns) strided lags, within max_lag_s
    used_lags = min(configured_lags, (1 + rows + columns) * stride)
    S, N = _lag_arrays(block, config, channels, references, used_lags, sub_records)
    sequence = window_sequence(S, N)
    if not np.all(np.isfinite(sequence)):
        return [_empty(e, ["nonfinite_correlation"]) for e in entries]
    orders = range(2, max_order + 1, 2)
    found = identify_modes(sequence, fs, union, orders, block_rows=rows, lag_stride=stride, block_columns=columns)
    bands = np.array([search_band(e.band_hz) for e in entries])
    centres = np.array(
        [baseline[e.name].freq_hz if e.name in baseline else 0.5 * (e.band_hz[0] + e.band_hz[1]) for e in entries]
    )
    reference_shapes = _reference_shapes(entries, found, bands, centres, baseline)
    if found.n_modes == 0 or reference_shapes is None:
        return [_empty(e, ["mode_not_found"]) for e in entries]
    assignment = track_modes(centres, reference_shapes, found.freq_hz, found.shapes, bands_hz=bands)
    out = []
    for k, entry in enumerate(entries):
        chosen = int(assignment.candidate[k])
        if chosen < 0:
            out.append(_empty(entry, assignment.quality[k]))
            continue
        mode = _assigned(entry, found, chosen, S, N, fs, assignment.quality[k], baseline.get(entry.name))
        if jackknife_records_short(np.asarray(block.values).shape[0] / fs, S.shape[0], mode.freq_hz, mode.damping):
            mode = dataclasses.replace(mode, damping_quality=("jackknife_records_short",))
        out.append(mode)
    return out


def _reference_shapes(entries, found: IdentifiedModes, bands, centres, baseline) -> Optional[np.ndarray]:
    """Configured reference shapes; else the baseline reference's; else the in-band candidate
    nearest the centre (None if no candidate at all)."""
    if found.n_modes == 0:
        return None
    shapes = np.empty((len(entries), found.shapes.shape[1]), complex)
    for k, entry in enumerate(entries):
        if entry.reference_shape:
            shapes[k] = np.asarray(entry.reference_shape, float)
            continue
        if entry.name in baseline:
            shapes[k] = baseline[entry.name].shape
            continue
        in_band = (found.freq_hz >= bands[k, 0]) & (found.freq_hz <= bands[k, 1])
        distance = np.where(in_band, np.abs(found.freq_hz - centres[k]), np.inf)
        shapes[k] = found.shapes[int(np.argmin(distance))]
    return shapes


def _subset(found: IdentifiedModes, row: int) -> IdentifiedModes:
    rows = np.array([row])
    return IdentifiedModes(
        found.freq_hz[rows], found.damping[rows], found.shapes[rows], found.order[rows], found.n_stable[rows],
        found.block_rows, found.lag_stride, found.method, found.block_columns,
    )  # fmt: skip


def _compared_shape(entry: ModeConfig, baseline: Optional[ModeReference]) -> Tuple[Optional[np.ndarray], int]:
    """The shape mode_mac compares with (configured, else baseline, else None) and the
    component normalised to 1 (-1: the window shape's own largest)."""
    if entry.reference_shape:
        reference = np.asarray(entry.reference_shape, float)
        return reference, largest_component(reference)
    if baseline is not None:
        return baseline.shape, baseline.reference_index
    return None, -1


def _assigned(
    entry: ModeConfig, found: IdentifiedModes, row: int, S, N, fs: float, codes, baseline: Optional[ModeReference]
) -> MultichannelMode:
    """The assigned pole's values with jackknife stderrs and the MAC to the reference shape."""
    reference, index = _compared_shape(entry, baseline)
    if index < 0:
        index = largest_component(found.shapes[row])
    mode = _subset(found, row)
    u = mode_uncertainty(S, N, fs, mode, reference_index=[index])
    quality = list(codes) + list(u.quality[0])
    if reference is None:
        mac, mac_se = np.nan, np.nan
        quality.append("mode_reference_pending")
    else:
        mac = float(modal_assurance_criterion(found.shapes[row], reference))
        mac_se = mac_stderr(u.replicate_shapes[:, 0], reference)
    return MultichannelMode(
        mode=entry.name,
        channels=entry.channels,
        freq_hz=float(found.freq_hz[row]),
        freq_stderr_hz=float(u.freq_stderr_hz[0]),
        damping=float(found.damping[row]),
        damping_stderr=float(u.damping_stderr[0]),
        mac=mac,
        mac_stderr=mac_se,
        shape=normalise_shape(found.shapes[row], index),
        shape_stderr_real=u.shape_stderr_real[0],
        shape_stderr_imag=u.shape_stderr_imag[0],
        reference_index=int(index),
        quality=tuple(sorted(set(quality))),
    )


def mode_shape_table(window_correlations: Iterable[WindowCorrelation]) -> pa.Table:
    """Rows of :data:`corrtransforms.tables.MODE_SHAPES`: one per window, found mode and channel.

    ``stderr`` is ``sqrt(se_real^2 + se_imag^2)`` of the normalised component (0 at the
    reference component); modes not found in a window have no rows (their indicator rows carry
    the reason).
    """
    starts: List[int] = []
    modes: List[str] = []
    channel_names: List[str] = []
    real: List[float] = []
    imag: List[float] = []
    stderr: List[float] = []
    quality: List[str] = []
    freq: List[float] = []
    for wc in window_correlations:
        for m in wc.multichannel_modes:
            if not np.isfinite(m.freq_hz):
                continue
            se = np.hypot(m.shape_stderr_real, m.shape_stderr_imag)
            for c, name in enumerate(m.channels):
                starts.append(wc.window_start_us)
                modes.append(m.mode)
                channel_names.append(name)
                real.append(float(m.shape[c].real))
                imag.append(float(m.shape[c].imag))
                stderr.append(float(se[c]))
                quality.append(quality_text(m.quality))
                freq.append(float(m.freq_hz))
    schema = tables.MODE_SHAPES
    columns = [
        pa.array(starts, type=pa.int64()).cast(tables.TIMESTAMP),
        pa.array(modes, type=pa.string()),
        pa.array(channel_names, type=pa.string()),
        pa.array(real, type=pa.float64()),
        pa.array(imag, type=pa.float64()),
        pa.array(stderr, type=pa.float64()),
        pa.array(quality, type=pa.string()),
        pa.array(freq, type=pa.float64()),
    ]
    return pa.Table.from_arrays(columns, schema=schema)
