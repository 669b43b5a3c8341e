"""A few days of the invented demo archive, with broken inputs, for runner and filesystem tests.

Days 2025-05-01 and 05-02 are the baseline, 05-13 has the stuck channel and 05-19 the truncated
file (see demo_data/generate.py); one 10-minute record every 12 hours, so 8 records in all.
"""

from __future__ import annotations

import datetime as dt
import io
import os
import re
from typing import Dict, List, Tuple

import pyarrow as pa

from demo_data import generate

DAYS = (dt.date(2025, 5, 1), dt.date(2025, 5, 2), dt.date(2025, 5, 13), dt.date(2025, 5, 19))
EVERY_HOURS = 12
#: the backfill covers the days up to this one; the nightly run then processes NIGHT
BACKFILL_END = dt.date(2025, 5, 13)
NIGHT = dt.date(2025, 5, 19)
TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects", "mode_shapes")
DEMO_CONFIG = os.path.join(os.path.dirname(generate.__file__), "footbridge.toml")


def write_small_archive(folder: str) -> Dict:
    """Write the 8 records of :data:`DAYS` under ``folder``; returns the generator's expectations."""
    return generate.write_archive(folder, days=35, every_hours=EVERY_HOURS, dates=list(DAYS))


def small_config_text(archive_path: str = "archive") -> str:
    """The demo configuration with a two-day baseline (3 windows suffice) and ``archive_path``."""
    with open(DEMO_CONFIG, encoding="utf-8") as handle:
        text = handle.read()
    replacements = [
        (r'(?m)^path = "archive"', f'path = "{archive_path}"'),
        (r"(?m)^end = 2025-05-10", "end = 2025-05-02"),
        (r"(?m)^min_windows = 30", "min_windows = 3"),
    ]
    for pattern, new in replacements:
        text, count = re.subn(pattern, new, text)
        assert count == 1, f"the demo configuration changed: {pattern!r} not found once"
    return text


def partition_files(output: str) -> List[str]:
    """Relative paths of every committed file of a local output folder, sorted (the run summaries
    under ``_runs/``, named by run id, left out)."""
    found = []
    for root, _, names in os.walk(output):
        for name in names:
            found.append(os.path.relpath(os.path.join(root, name), output).replace(os.sep, "/"))
    return sorted(f for f in found if not f.startswith("_runs/"))


def table_bytes(table: pa.Table) -> bytes:
    """The Arrow IPC stream of ``table``: equal bytes mean bit-equal values (NaN included, which
    ``Table.equals`` calls unequal), same schema, same row order."""
    sink = io.BytesIO()
    table = table.combine_chunks()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


def partitions(files: List[str]) -> Dict[Tuple[str, str], List[str]]:
    """(table, partition folder) -> file names, from relative paths."""
    out: Dict[Tuple[str, str], List[str]] = {}
    for rel in files:
        parts = rel.split("/")
        out.setdefault((parts[0], "/".join(parts[1:-1])), []).append(parts[-1])
    return out
