"""The output-table summaries of :mod:`corrtransforms.stages.summaries` over Beam's FileSystems.

The launchers call these before and after a pipeline; each is the stage function with the
store :class:`corrtransforms.beam.filesystems.BeamFiles`, so the output folder may be any
registered filesystem URL. :func:`remove_stale_temporary` reads the filesystem's modification
times, which only Beam's FileSystems report.
"""

from __future__ import annotations

import datetime as _dt
import time
from typing import Callable, List, Mapping, Optional, Sequence, Tuple

import pyarrow as pa
from apache_beam.io.filesystems import FileSystems

from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.config import AssetConfig
from corrtransforms.stages import summaries
from corrtransforms.stages import write as table_writer
from corrtransforms.stages.summaries import (
    EPISODE_COLUMNS,
    EPISODE_EVIDENCE,
    LATEST_STATE,
    SUMMARIES,
    episode_evidence,
    last_row_of_each_series,
    latest_states,
)

#: the reductions and names are re-exported for the launchers (their home is stages.summaries)
__all__ = [
    "EPISODE_COLUMNS",
    "EPISODE_EVIDENCE",
    "LATEST_STATE",
    "SUMMARIES",
    "episode_evidence",
    "last_row_of_each_series",
    "latest_states",
    "partition_files",
    "read_partitions",
    "summary_path",
    "summarize_partitions",
    "write_episodes",
    "remove_stale_temporary",
]


def partition_files(output_dir: str, table: str, asset: str) -> List[tuple]:
    """:func:`corrtransforms.stages.summaries.partition_files` over Beam's FileSystems."""
    return summaries.partition_files(BeamFiles(), output_dir, table, asset)


def read_partitions(
    output_dir: str,
    table: str,
    asset: str,
    schema: pa.Schema,
    before: Optional[_dt.date] = None,
    columns: Optional[Sequence[str]] = None,
    keep: Optional[Callable[[pa.Table], pa.Table]] = None,
) -> pa.Table:
    """:func:`corrtransforms.stages.summaries.read_partitions` over Beam's FileSystems."""
    return summaries.read_partitions(BeamFiles(), output_dir, table, asset, schema, before, columns, keep)


def summary_path(output_dir: str, asset: str, name: str) -> str:
    """:func:`corrtransforms.stages.summaries.summary_path` over Beam's FileSystems."""
    return summaries.summary_path(BeamFiles(), output_dir, asset, name)


def summarize_partitions(
    output_dir: str,
    table: str,
    asset: str,
    schema: pa.Schema,
    keep: Callable[[pa.Table], pa.Table],
    name: str,
    before: Optional[_dt.date] = None,
    columns: Optional[Sequence[str]] = None,
    provenance: Optional[Mapping[str, str]] = None,
) -> pa.Table:
    """:func:`corrtransforms.stages.summaries.summarize_partitions` over Beam's FileSystems."""
    return summaries.summarize_partitions(
        BeamFiles(), output_dir, table, asset, schema, keep, name, before, columns, provenance
    )


def write_episodes(output_dir: str, config: AssetConfig, run_id: str) -> int:
    """:func:`corrtransforms.stages.summaries.write_episodes` over Beam's FileSystems."""
    return summaries.write_episodes(BeamFiles(), output_dir, config, run_id)


def remove_stale_temporary(
    output_dir: str, current_run_id: str, older_than_s: float, now_s: Optional[float] = None
) -> List[Tuple[str, float]]:
    """Delete the ``DIR/_temporary/<run id>/`` folders of runs that stopped writing long ago.

    Parameters
    ----------
    output_dir : str
        The output root (any registered filesystem).
    current_run_id : str
        This run's id; its folder is never touched.
    older_than_s : float
        A folder whose newest file was last written more than this many seconds ago belongs to a
        run that died (a running job keeps writing part files); <= 0 removes nothing.
    now_s : float, optional
        The current time, seconds since the epoch (default: the clock).

    Returns
    -------
    list of (run id, age in seconds)
        The folders removed.

    Notes
    -----
    A killed run leaves its temporary files behind (readers never see them, but they take
    space). The age comes from the filesystem's modification times of the files below each run
    folder, so it works on object stores too. A run that is still active writes part files as
    it goes; one that has written nothing for ``older_than_s`` is taken as dead. The default of
    the launchers (24 hours) is common practice, not derived: longer than any pause between two
    part files of a running job.
    """
    if not older_than_s > 0:
        return []
    root = FileSystems.join(output_dir, table_writer.TEMPORARY)
    try:
        matched = FileSystems.match([FileSystems.join(root, "**")])[0].metadata_list
    except Exception:  # noqa: BLE001 - no temporary folder: nothing to remove
        return []
    prefix = root.replace("\\", "/").rstrip("/") + "/"
    newest: dict = {}
    for item in matched:
        path = item.path.replace("\\", "/")
        if not path.startswith(prefix):
            continue
        run = path[len(prefix) :].split("/", 1)[0]
        updated = float(getattr(item, "last_updated_in_seconds", 0.0) or 0.0)
        newest[run] = max(newest.get(run, 0.0), updated)
    now_s = time.time() if now_s is None else float(now_s)
    removed = []
    store = BeamFiles()
    for run, updated in sorted(newest.items()):
        age = now_s - updated
        if run == current_run_id or not updated or age <= older_than_s:
            continue
        store.delete_tree(FileSystems.join(root, run))
        removed.append((run, age))
    return removed
