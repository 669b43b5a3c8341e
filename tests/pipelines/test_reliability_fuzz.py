"""Fuzzing: corrupted Parquet files never crash the job and never yield a wrong window silently.

Hypothesis corrupts one file of a small clean archive (flipped bytes anywhere, truncation at any
offset, or a schema change: a dropped, renamed or retyped column). Then every window either comes
out exactly as in the clean run, or carries a finding in the rejects (a whole-window reject, or a
per-channel one), and windows planned = blocks + whole-window rejects. The archive's files store
page checksums (``write_page_checksum=True``): without them a flipped byte inside a data page is
simply another number, which no reader can tell from the truth (see docs/reliability.md).

Budget: ``CORRTRANSFORMS_FUZZ_EXAMPLES`` examples of the in-memory path (default 20; ``make fuzz``
sets 500) and a twenty-fifth of that (at least 3) through the Beam pipeline. Examples are
derandomized (the same every run) unless ``CORRTRANSFORMS_FUZZ_RANDOM=1``.
"""

import os
import shutil
import tempfile

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from corrtransforms.config import load_config
from corrtransforms.stages.analyse import analyse_window
from corrtransforms.stages.plan import list_local_archive, plan_archive
from corrtransforms.stages.read import read_task
from tests.support.reliability_data import (
    CORRELATION_KEY,
    INDICATOR_KEY,
    canonical,
    clean_columns,
    per_window,
    read_table,
    reject_rows,
    rows_by_key,
    run_backfill,
    windows_with_findings,
    write_clean_archive,
    write_config,
)

EXAMPLES = int(os.environ.get("CORRTRANSFORMS_FUZZ_EXAMPLES", "20"))
BEAM_EXAMPLES = max(3, EXAMPLES // 25)
FUZZ = dict(
    deadline=None,
    database=None,
    derandomize=os.environ.get("CORRTRANSFORMS_FUZZ_RANDOM") != "1",
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
MINUTES = 6  # three files of two minutes: windows 0-5


@pytest.fixture(scope="module")
def clean_archive(tmp_path_factory):
    root = tmp_path_factory.mktemp("fuzz")
    cols = clean_columns(seed=31)
    cols = {k: v[cols["time"] < cols["time"][0] + MINUTES * 60 * 1_000_000] for k, v in cols.items()}
    files = write_clean_archive(str(root / "archive"), cols, write_page_checksum=True, compression="zstd")
    config_path = write_config(root / "asset.toml", "archive")
    blocks, rejects, planned = _core_run(load_config(config_path))
    assert planned == MINUTES and len(blocks) == MINUTES and rejects == []
    run_backfill(config_path, str(root / "out"))
    out = str(root / "out")
    tables = {
        "correlations": per_window(rows_by_key(read_table(out, "correlations"), CORRELATION_KEY)),
        "indicators": per_window(rows_by_key(read_table(out, "indicators"), INDICATOR_KEY)),
    }
    return _Clean(root=root, files=files, blocks=blocks, tables=tables)


class _Clean(dict):
    """The clean run (a dict with a short repr, so failing examples print readably)."""

    def __init__(self, **items):
        super().__init__(**items)

    def __repr__(self):
        return "<clean archive>"


def _core_run(config):
    """Plan, read and correlate in memory; checks accounting per task. Returns blocks by window."""
    plan = plan_archive(list_local_archive(config.archive.path), config)
    blocks, rejects = {}, list(plan.rejects)
    for task in plan.tasks:
        got, found = read_task(task, config)
        whole = [r.window_start_us for r in found if r.rejects_whole_window]
        assert sorted([b.window_start_us for b in got] + whole) == sorted(task.window_starts_us)
        rejects += found
        for block in got:
            result, screening = analyse_window(block, config)  # must not raise on what reading let through
            assert result is not None and not screening
            blocks[block.window_start_us] = block
    return blocks, rejects, plan.windows_planned


def _block_signature(block):
    return (
        block.channels,
        block.values.tobytes(),
        block.valid.tobytes(),
        tuple(sorted((k, canonical(v)) for k, v in block.covariates.items())),
        tuple(sorted(block.channel_quality.items())),
    )


# --------------------------------------------------------------------------------------------
# Corruptions


def _flip(path, data):
    raw = bytearray(open(path, "rb").read())
    for position, mask in data:
        raw[int(position * (len(raw) - 1))] ^= mask
    open(path, "wb").write(bytes(raw))


def _truncate(path, data):
    raw = open(path, "rb").read()
    open(path, "wb").write(raw[: int(data * len(raw))])


def _schema(path, data):
    """Returns True when the file's values legitimately change (a channel retyped to another
    numeric type holds other, valid numbers; no reader can call them wrong)."""
    action, column = data
    table = pq.read_table(path)
    name = table.column_names[column % table.num_columns]
    i = table.column_names.index(name)
    if action == "drop":
        table = table.drop_columns([name])
    elif action == "rename":
        table = table.rename_columns([n + "_x" if n == name else n for n in table.column_names])
    elif action == "to_string":
        table = table.set_column(i, name, pa.array([str(v) for v in table.column(name).to_pylist()]))
    elif action == "to_int":
        table = table.set_column(i, name, table.column(name).cast(pa.int64(), safe=False))
    elif action == "to_float32":
        column = table.column(name)
        table = table.set_column(
            i,
            name,
            column.cast(pa.float32())
            if pa.types.is_floating(column.type)
            else column.cast(pa.int64(), safe=False).cast(pa.float64()),
        )
    pq.write_table(table, path, row_group_size=400, write_page_checksum=True, compression="zstd")
    return action in ("to_int", "to_float32") and name != "time"


corruptions = st.one_of(
    st.tuples(st.just(_flip), st.lists(st.tuples(st.floats(0, 1), st.integers(1, 255)), min_size=1, max_size=6)),
    st.tuples(st.just(_truncate), st.floats(0, 0.999)),
    st.tuples(
        st.just(_schema),
        st.tuples(st.sampled_from(["drop", "rename", "to_string", "to_int", "to_float32"]), st.integers(0, 3)),
    ),
)


def _corrupted_copy(clean_archive, target, corruption, folder):
    shutil.copytree(clean_archive["root"] / "archive", os.path.join(folder, "archive"))
    path = os.path.join(folder, "archive", os.path.basename(clean_archive["files"][target]))
    how, data = corruption
    changed = how(path, data)
    exempt = {2 * target, 2 * target + 1} if changed else set()
    return write_config(os.path.join(folder, "asset.toml"), "archive"), exempt


@settings(max_examples=EXAMPLES, **FUZZ)
@given(target=st.integers(0, 2), corruption=corruptions)
def test_corrupted_files_never_crash_and_never_yield_a_wrong_window(clean_archive, target, corruption):
    with tempfile.TemporaryDirectory() as folder:
        config_path, exempt = _corrupted_copy(clean_archive, target, corruption, folder)
        config = load_config(config_path)
        blocks, rejects, planned = _core_run(config)
    findings = {}
    for r in rejects:
        if r.window_start_us is not None:
            findings.setdefault(r.window_start_us, set()).add(r.reason)
    whole = {r.window_start_us for r in rejects if r.rejects_whole_window}
    assert planned == len(blocks) + len(whole) and not set(blocks) & whole
    clean = clean_archive["blocks"]
    exempt_us = {s for s in clean if (s - min(clean)) // 60_000_000 in exempt}
    for start, block in blocks.items():
        if start in exempt_us:
            continue
        if start not in clean or _block_signature(block) != _block_signature(clean[start]):
            assert findings.get(start), (
                f"window {start} differs from the clean run without a finding; corruption {corruption} of file {target}"
            )
    # nothing silently lost: a clean window that is not computed is rejected, or its file is
    lost = set(clean) - set(blocks)
    if lost:
        assert lost <= whole | set(findings) or any(r.window_start_us is None for r in rejects)


@settings(max_examples=BEAM_EXAMPLES, **FUZZ)
@given(target=st.integers(0, 2), corruption=corruptions)
def test_corrupted_files_through_the_pipeline(clean_archive, target, corruption):
    with tempfile.TemporaryDirectory() as folder:
        config_path, exempt = _corrupted_copy(clean_archive, target, corruption, folder)
        counters = run_backfill(config_path, os.path.join(folder, "out"))
        out = os.path.join(folder, "out")
        rejects = reject_rows(out)
        got = {
            "correlations": per_window(rows_by_key(read_table(out, "correlations"), CORRELATION_KEY)),
            "indicators": per_window(rows_by_key(read_table(out, "indicators"), INDICATOR_KEY)),
        }
    assert counters.get("windows_computed", 0) + counters.get("windows_rejected", 0) == counters["windows_planned"]
    findings = windows_with_findings(rejects)
    for table in ("correlations", "indicators"):
        for k, rows in got[table].items():
            if k not in exempt and rows != clean_archive["tables"][table].get(k):
                assert findings.get(k), f"{table} of window {k} differ without a finding ({corruption})"
