"""ReadWindows: read tasks -> one window block per planned window, or its rejects (stage 2)."""

from __future__ import annotations

import logging

import apache_beam as beam

from corrtransforms.beam.filesystems import open_file
from corrtransforms.beam.metrics import count_reject, counter, whole_window_reject
from corrtransforms.config import AssetConfig
from corrtransforms.records import WindowBlock
from corrtransforms.stages import read as window_read
from corrtransforms.stages.plan import ReadTask

_LOG = logging.getLogger(__name__)


class _ReadWindowsFn(beam.DoFn):
    def __init__(self, config: AssetConfig):
        self._config = config

    def setup(self):
        self._blocks = counter("windows_read")
        self._samples = counter("samples_read")

    def process(self, task: ReadTask):
        done = set()
        try:
            for item in window_read.read_windows(task, self._config, open_file):
                if isinstance(item, WindowBlock):
                    done.add(item.window_start_us)
                    self._blocks.inc()
                    self._samples.inc(int(item.valid.sum()))
                    yield item
                else:
                    if item.rejects_whole_window and item.window_start_us is not None:
                        done.add(item.window_start_us)
                    count_reject(item)
                    yield beam.pvalue.TaggedOutput("rejects", item)
        except Exception as err:  # noqa: BLE001 - an unforeseen failure rejects the rest, loudly
            _LOG.exception("read task %s failed", task.task_id)
            for start_us in task.window_starts_us:
                if start_us not in done:
                    finding = whole_window_reject(
                        self._config,
                        start_us,
                        "read",
                        "decode_failed",
                        f"reading task {task.task_id} failed: {type(err).__name__}: {err}",
                    )
                    count_reject(finding)
                    yield beam.pvalue.TaggedOutput("rejects", finding)


class ReadWindows(beam.PTransform):
    """Read tasks -> one :class:`~corrtransforms.records.WindowBlock` per computed window.

    Returns ``{"blocks": ..., "rejects": ...}``; every planned window is either a block or a
    whole-window reject (counters ``windows_read`` and ``windows_rejected``).
    """

    def __init__(self, config: AssetConfig):
        super().__init__()
        self._config = config

    def expand(self, tasks):
        out = tasks | "Read task windows" >> beam.ParDo(_ReadWindowsFn(self._config)).with_outputs(
            "rejects", main="blocks"
        )
        return {"blocks": out.blocks, "rejects": out.rejects}
