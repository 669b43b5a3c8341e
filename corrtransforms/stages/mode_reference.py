"""The baseline reference of each multi-channel mode: its frequency and shape, fixed once.

Every multi-channel ``[[modes]]`` entry gets, once its baseline is complete, a reference
frequency (the median of ``freq_hz`` over the baseline windows' ``mode_shapes`` rows) and a
reference shape (the component-wise median of the baseline windows' shapes, each divided by its
component at one channel: the channel that carried ``1 + 0j`` most often). From then on every
window's poles are assigned to the entries by the cost ``|df| / f + (1 - MAC)`` to these
references (:func:`~corrtransforms.numerics.mode_tracking.track_modes`), and ``mode_mac`` is the
MAC to the reference shape (to ``reference_shape`` when the entry configures one).

The rule, deterministic whatever the chunking of the days (nightly == backfill):

- the baseline windows of an entry are, with ``[baseline] start/end``, the windows of those days
  in which the mode was found; with ``[baseline] windows = N``, the first ``N`` windows in which
  the mode was found (windows without the mode do not count: they have no shape);
- a run whose first day is ``D`` uses the references complete from the ``mode_shapes`` rows of
  the days before ``D``: dates baselines when ``end < D``, count baselines when ``N`` windows
  were found before ``D``. Windows before that get the band-centre rule (reference frequency the
  band centre, shape ``reference_shape`` or the in-band pole nearest the centre) and, without
  ``reference_shape``, ``mode_mac`` NaN with ``mode_reference_pending``;
- so a day's windows are computed with the reference of the days before it, never with one that
  the same day completes: the backfill runs a chunk of one day whenever the reference is not yet
  complete before the chunk (``corrtransforms.launch.backfill``).

The references are never stored as such: they are a function of the baseline rows, and those
rows are kept in the read-back summary ``DIR/_summaries/asset=NAME/mode_reference.parquet``
(:func:`~corrtransforms.stages.summaries.summarize_partitions`, which re-reads a day whose
partition was rewritten). Its size is the baseline's (windows x channels rows), whatever the
history's length. A rerun of a baseline day reads only the days before it, so it computes what
the first run computed.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
from typing import Dict, Mapping, Optional

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from corrtransforms import tables
from corrtransforms.config import AssetConfig
from corrtransforms.numerics.mode_shapes import normalise_shape
from corrtransforms.stages import summaries
from corrtransforms.timeutil import day_start_us

#: name of the read-back summary holding each entry's baseline rows of mode_shapes
SUMMARY = "mode_reference"
#: the mode_shapes columns the reference is computed from
COLUMNS = ("window_start", "mode", "channel", "shape_real", "shape_imag", "freq_hz")
#: a reference needs at least this many baseline windows with the mode (else it stays pending)
MIN_REFERENCE_WINDOWS = 2


@dataclasses.dataclass(frozen=True)
class ModeReference:
    """One entry's baseline reference.

    Attributes
    ----------
    mode : str
    freq_hz : float
        Median frequency of the baseline windows.
    shape : ndarray of complex, shape (n_channels,)
        Component-wise median (real and imaginary parts apart) of the baseline shapes, each
        divided by its component at ``reference_index``; that component is ``1 + 0j``.
    reference_index : int
    n_windows : int
        Baseline windows behind the reference.
    """

    mode: str
    freq_hz: float
    shape: np.ndarray
    reference_index: int
    n_windows: int


def _multichannel(config: AssetConfig):
    return [m for m in config.modes if m.is_multichannel]


def baseline_rows(config: AssetConfig):
    """The ``keep`` reduction of :func:`~corrtransforms.stages.summaries.summarize_partitions`:
    the mode_shapes rows of every entry's baseline windows (decomposable: keeping the first ``N``
    windows, or the windows of fixed days, of a union is keeping them of its parts)."""
    names = [m.name for m in _multichannel(config)]
    base = config.baseline
    if base.by_dates:
        assert base.start is not None and base.end is not None  # by_dates: both given (config)
        low = day_start_us(base.start, config.timezone)
        high = day_start_us(base.end + _dt.timedelta(days=1), config.timezone)

    def keep(rows: pa.Table) -> pa.Table:
        rows = rows.filter(pc.is_in(rows.column("mode"), pa.array(names, pa.string())))
        starts = rows.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
        if base.by_dates:
            return rows.filter(pa.array((starts >= low) & (starts < high)))
        wanted = int(base.windows or 0)
        mask = np.zeros(rows.num_rows, bool)
        modes = np.asarray(rows.column("mode").to_pylist(), dtype=object)
        for name in names:
            of_mode = modes == name
            first = np.unique(starts[of_mode])[:wanted]
            mask |= of_mode & np.isin(starts, first)
        return rows.filter(pa.array(mask))

    return keep


def references_from_rows(rows: pa.Table, config: AssetConfig, before: _dt.date) -> Dict[str, ModeReference]:
    """The complete references among the baseline rows of the days before ``before``.

    Parameters
    ----------
    rows : pyarrow.Table
        mode_shapes rows (at least :data:`COLUMNS`) of the days before ``before``, reduced by
        :func:`baseline_rows`.
    config : AssetConfig
    before : datetime.date
        The first day of the run that uses the references.

    Returns
    -------
    dict
        Entry name -> :class:`ModeReference`, only for entries whose baseline is complete.
    """
    base = config.baseline
    out: Dict[str, ModeReference] = {}
    if base.by_dates and not (base.end is not None and base.end < before):
        return out
    modes = np.asarray(rows.column("mode").to_pylist(), dtype=object)
    for entry in _multichannel(config):
        reference = median_reference(rows.filter(pa.array(modes == entry.name)), entry.name, entry.channels)
        if reference is None:
            continue
        if not base.by_dates and reference.n_windows < int(base.windows or 0):
            continue
        out[entry.name] = reference
    return out


def median_reference(rows: pa.Table, name: str, channels) -> Optional[ModeReference]:
    """The median frequency and shape of one entry's baseline rows (None: too few windows).

    ``rows`` are mode_shapes rows (at least :data:`COLUMNS`) of one entry; ``channels`` orders the
    shape's components."""
    starts = rows.column("window_start").cast(pa.int64()).to_numpy(zero_copy_only=False)
    windows = np.unique(starts)
    if len(windows) < MIN_REFERENCE_WINDOWS:
        return None
    shapes = np.full((len(windows), len(channels)), np.nan + 0j)
    freq = np.full(len(windows), np.nan)
    row_window = np.searchsorted(windows, starts)
    row_channel = np.array([channels.index(c) for c in rows.column("channel").to_pylist()], dtype=int)
    real = rows.column("shape_real").to_numpy(zero_copy_only=False)
    imag = rows.column("shape_imag").to_numpy(zero_copy_only=False)
    shapes[row_window, row_channel] = real + 1j * imag
    freq[row_window] = rows.column("freq_hz").to_numpy(zero_copy_only=False)
    ones = np.abs(shapes - 1.0) == 0  # the component each window was normalised at
    index = int(np.argmax(ones.sum(axis=0)))
    shapes = normalise_shape(shapes, index)
    good = np.all(np.isfinite(shapes), axis=1) & np.isfinite(freq)
    if good.sum() < MIN_REFERENCE_WINDOWS:
        return None
    median = np.median(shapes[good].real, axis=0) + 1j * np.median(shapes[good].imag, axis=0)
    return ModeReference(name, float(np.median(freq[good])), normalise_shape(median, index), index, int(good.sum()))


def stored_baseline_rows(store, output_dir: str, asset: str) -> Optional[pa.Table]:
    """The baseline rows the last run kept (the summary file), or None when there is none (the
    report draws the reference from them)."""
    path = summaries.summary_path(store, output_dir, asset, SUMMARY)
    try:
        if not store.exists(path):
            return None
        with store.open(path) as handle:
            return pq.read_table(handle)
    except Exception:  # noqa: BLE001 - a damaged summary: no reference drawn
        return None


def read_references(
    store, output_dir: str, config: AssetConfig, before: _dt.date, provenance: Optional[Mapping[str, str]] = None
) -> Dict[str, ModeReference]:
    """The references a run whose first day is ``before`` uses (refreshing the summary)."""
    if not _multichannel(config):
        return {}
    rows = summaries.summarize_partitions(
        store,
        output_dir,
        "mode_shapes",
        config.name,
        tables.MODE_SHAPES,
        baseline_rows(config),
        SUMMARY,
        before=before,
        columns=COLUMNS,
        provenance=provenance,
    )
    return references_from_rows(rows, config, before)


def references_complete(references: Mapping[str, ModeReference], config: AssetConfig) -> bool:
    """Whether every multi-channel entry has its reference."""
    return all(m.name in references for m in _multichannel(config))
