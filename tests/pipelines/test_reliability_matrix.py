"""The bad-input matrix: each kind of bad input in one small archive next to good files, run through
the real backfill pipeline, and compared row by row with the run on the clean archive.

One row of MATRIX per kind: (kind, what is done to the clean archive, reason code expected in the
rejects table, its action, the windows it touches, what happens to them). Outcomes:

- ``same``: the windows come out bit-identical to the clean run (lossless repair);
- ``rejected``: each window is one whole-window reject (subject ``*``) and has no rows;
- ``subset``: a channel is dropped; the rows left are bit-identical to the clean run's;
- ``changed``: the windows are computed from fewer or flagged samples and carry window findings;
  the subjects listed stay bit-identical;
- ``absent``: the file cannot be used, so its windows are not planned; the file's reject says so;
- ``none``: an extra bad file that touches no window.

Every kind also checks: every other window is bit-identical to the clean run (correlations and
indicators), windows planned = computed + rejected (counters and tables), and every window whose
rows differ from the clean run has a window-level finding in the rejects table.
"""

import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from corrtransforms.records import quality_codes, quality_text
from tests.support.archive_data import T0, US, wide_table, window_rows
from tests.support.reliability_data import (
    CORRELATION_KEY,
    INDICATOR_KEY,
    RATE,
    ROW_GROUP,
    clean_columns,
    per_window,
    read_table,
    reject_rows,
    rows_by_key,
    run_backfill,
    whole_window_rejects,
    windows_with_findings,
    write_clean_archive,
    write_config,
)

PERIOD_US = int(US / RATE)


# --------------------------------------------------------------------------------------------
# What each kind does to the clean archive (files[i] holds windows 2i and 2i+1)


def _file_columns(cols, i):
    mask = (cols["time"] >= T0 + i * 120 * US) & (cols["time"] < T0 + (i + 1) * 120 * US)
    return {k: v[mask].copy() for k, v in cols.items()}


def _rewrite(path, cols, **options):
    pq.write_table(wide_table(cols), path, row_group_size=ROW_GROUP, **options)


def _rows_of_window(cols, k):
    return np.flatnonzero(window_rows(cols, k))


def unreadable_bytes(folder, files, cols, rng):
    with open(os.path.join(folder, "notes.parquet"), "wb") as handle:
        handle.write(rng.bytes(4000))


def truncated_footer(folder, files, cols, rng):
    data = open(files[4], "rb").read()
    with open(files[4], "wb") as handle:
        handle.write(data[: int(len(data) * 0.6)])


def zero_byte_file(folder, files, cols, rng):
    open(files[4], "wb").close()


def no_rows(folder, files, cols, rng):
    pq.write_table(wide_table(_file_columns(cols, 4)).slice(0, 0), os.path.join(folder, "upload-empty.parquet"))


def missing_channel_column(folder, files, cols, rng):
    pq.write_table(wide_table(_file_columns(cols, 4)).drop_columns(["b"]), files[4], row_group_size=ROW_GROUP)


def renamed_time_column(folder, files, cols, rng):
    table = wide_table(_file_columns(cols, 4))
    pq.write_table(table.rename_columns(["timestamp"] + table.column_names[1:]), files[4], row_group_size=ROW_GROUP)


def non_numeric_values(folder, files, cols, rng):
    table = wide_table(_file_columns(cols, 4))
    text = pa.array([f"{v:.6f}" for v in table.column("b").to_pylist()])
    pq.write_table(table.set_column(table.column_names.index("b"), "b", text), files[4], row_group_size=ROW_GROUP)


def timestamps_as_strings(folder, files, cols, rng):
    table = wide_table(_file_columns(cols, 4))
    text = pa.array([t.isoformat() for t in table.column("time").to_pylist()])
    pq.write_table(table.set_column(0, "time", text), files[4], row_group_size=ROW_GROUP)


def nan_and_inf_runs(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    part["a"][r[100:120]] = np.nan
    part["a"][r[300:305]] = np.inf
    part["a"][r[400:403]] = -np.inf
    _rewrite(files[2], part)


def duplicate_equal(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    order = np.sort(np.concatenate([np.arange(part["time"].size), r[50:60]]), kind="stable")
    _rewrite(files[2], {k: v[order] for k, v in part.items()})


def duplicate_conflicting(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    order = np.sort(np.concatenate([np.arange(part["time"].size), r[70:71]]), kind="stable")
    rows = {k: v[order].copy() for k, v in part.items()}
    rows["a"][r[70] + 1] += 0.5  # the second copy of that timestamp holds another value
    _rewrite(files[2], rows)


def unordered_rows(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    stretch = _rows_of_window(part, 4)[200:260]
    for k in part:
        part[k][stretch] = part[k][stretch[::-1]]
    _rewrite(files[2], part)


def jitter_within_tolerance(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    part["time"][r] += np.round(rng.uniform(-0.1, 0.1, r.size) * PERIOD_US).astype(np.int64)
    _rewrite(files[2], part)


def jitter_beyond_tolerance(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    part["time"][r[200:230]] += int(0.4 * PERIOD_US)
    _rewrite(files[2], part)


def sample_rate_change(folder, files, cols, rng):
    n = 120 * 12  # minutes 4-6 written at 12 Hz instead of 10 Hz
    times = T0 + 4 * 60 * US + np.round(np.arange(n) * US / 12).astype(np.int64)
    _rewrite(
        files[2],
        {"time": times, "a": rng.standard_normal(n), "b": rng.standard_normal(n), "temperature": np.full(n, 20.4)},
    )


def flat_channel(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    part["b"][_rows_of_window(part, 4)] = 0.125
    _rewrite(files[2], part)


def clipped_channel(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    part["a"][r] = np.clip(part["a"][r], -1.5, 1.5)
    _rewrite(files[2], part)


def overlapping_files(folder, files, cols, rng):
    _rewrite(os.path.join(folder, "resent-0400.parquet"), _file_columns(cols, 2))


def overlapping_conflicting(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    part["b"] = part["b"] + 0.01  # a resent file whose values differ
    _rewrite(os.path.join(folder, "resent-0400.parquet"), part)


def statistics_absent(folder, files, cols, rng):
    _rewrite(files[2], _file_columns(cols, 2), write_statistics=False)


def coverage_gap(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    drop = _rows_of_window(part, 4)[100:300]
    keep = np.setdiff1d(np.arange(part["time"].size), drop)
    _rewrite(files[2], {k: v[keep] for k, v in part.items()})


def corrupt_data_page(folder, files, cols, rng):
    # the file stores page checksums (write_page_checksum); one byte of a data page of channel
    # "a" in row group 0 (minutes 4:00-4:40) is flipped after writing
    _rewrite(files[2], _file_columns(cols, 2), write_page_checksum=True)
    column = pq.ParquetFile(files[2]).metadata.row_group(0).column(1)
    assert column.path_in_schema == "a"
    with open(files[2], "r+b") as handle:
        handle.seek(column.data_page_offset + column.total_compressed_size - 20)
        byte = handle.read(1)
        handle.seek(-1, os.SEEK_CUR)
        handle.write(bytes([byte[0] ^ 0x08]))


def null_timestamps(folder, files, cols, rng):
    part = _file_columns(cols, 2)
    r = _rows_of_window(part, 4)
    valid = np.ones(part["time"].size, dtype=bool)
    valid[r[10:15]] = False
    table = wide_table(part)
    time = pa.array(part["time"], pa.int64(), mask=~valid).cast(pa.timestamp("us", "UTC"))
    pq.write_table(table.set_column(0, "time", time), files[2], row_group_size=ROW_GROUP)


# (kind, builder, reason, action, windows touched, outcome, subjects that stay identical)
MATRIX = [
    ("unreadable bytes", unreadable_bytes, "unreadable_file", "rejected", (), "none", ()),
    ("truncated file (footer cut)", truncated_footer, "unreadable_file", "rejected", (8, 9), "absent", ()),
    ("zero-byte file", zero_byte_file, "empty_file", "rejected", (8, 9), "absent", ()),
    ("valid Parquet with no rows", no_rows, "no_rows", "rejected", (), "none", ()),
    ("missing channel column", missing_channel_column, "missing_channel_column", "rejected", (8, 9), "subset", ()),
    ("renamed time column", renamed_time_column, "missing_time_column", "rejected", (8, 9), "absent", ()),
    ("non-numeric values", non_numeric_values, "non_numeric_channel", "rejected", (8, 9), "subset", ()),
    ("timestamps as strings", timestamps_as_strings, "time_column_not_timestamp", "rejected", (8, 9), "absent", ()),
    ("NaN and inf runs", nan_and_inf_runs, "nonfinite_values", "repaired", (4,), "changed", ("b",)),
    ("duplicated timestamps, equal", duplicate_equal, "duplicate_timestamps", "repaired", (4,), "same", ()),
    (
        "duplicated timestamps, conflicting",
        duplicate_conflicting,
        "conflicting_duplicates",
        "rejected",
        (4,),
        "rejected",
        (),
    ),
    ("unordered rows", unordered_rows, "unordered_timestamps", "repaired", (4,), "same", ()),
    (
        "jittered timestamps within tolerance",
        jitter_within_tolerance,
        "off_grid_timestamps",
        "repaired",
        (4,),
        "same",
        (),
    ),
    (
        "jittered timestamps beyond tolerance",
        jitter_beyond_tolerance,
        "jitter_beyond_tolerance",
        "repaired",
        (4,),
        "changed",
        (),
    ),
    (
        "sample-rate change inside the archive",
        sample_rate_change,
        "sample_rate_mismatch",
        "rejected",
        (4, 5),
        "rejected",
        (),
    ),
    ("flat channel", flat_channel, "flat_channel", "rejected", (4,), "subset", ()),
    ("clipped channel", clipped_channel, "clipped_channel", "flagged", (4,), "changed", ("b",)),
    ("overlapping files, identical samples", overlapping_files, "overlapping_files", "repaired", (4, 5), "same", ()),
    (
        "overlapping files, different samples",
        overlapping_conflicting,
        "conflicting_duplicates",
        "rejected",
        (4, 5),
        "rejected",
        (),
    ),
    ("row-group statistics absent", statistics_absent, "statistics_missing", "repaired", (4, 5), "same", ()),
    ("gap below min_coverage", coverage_gap, "insufficient_coverage", "rejected", (4,), "rejected", ()),
    ("corrupt data page (checksummed file)", corrupt_data_page, "decode_failed", "rejected", (4,), "rejected", ()),
    ("null timestamps", null_timestamps, "null_timestamps", "rejected", (4,), "changed", ()),
]
CLEAN_WINDOWS = set(range(10))


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    root = tmp_path_factory.mktemp("clean")
    write_clean_archive(str(root / "archive"))
    counters = run_backfill(write_config(root / "asset.toml", "archive"), str(root / "out"))
    assert counters["windows_planned"] == counters["windows_computed"] == 10
    out = str(root / "out")
    return {
        "correlations": per_window(rows_by_key(read_table(out, "correlations"), CORRELATION_KEY)),
        "indicators": per_window(rows_by_key(read_table(out, "indicators"), INDICATOR_KEY)),
    }


def _subjects_of(key):
    """Subjects a correlation key (a, b) or indicator key (subject, indicator) speaks about."""
    if len(key) == 2 and key[1] in (
        "rms",
        "corr_time_s",
        "decay_time_s",
        "mode_freq_hz",
        "mode_damping",
        "lag_s",
        "peak_coef",
        "stationarity_p",
        "covariate_mean",
    ):
        return {key[0]}
    return {key[0]} if key[0] == key[1] else {f"{key[0]}:{key[1]}"}


@pytest.mark.parametrize(
    "kind, build, reason, action, touched, outcome, same_subjects", MATRIX, ids=[row[0] for row in MATRIX]
)
def test_bad_input_matrix(kind, build, reason, action, touched, outcome, same_subjects, clean, tmp_path):
    archive = tmp_path / "archive"
    files = write_clean_archive(str(archive))
    build(str(archive), files, clean_columns(), np.random.default_rng(5))
    counters = run_backfill(write_config(tmp_path / "asset.toml", "archive"), str(tmp_path / "out"))
    output = str(tmp_path / "out")
    rejects = reject_rows(output)
    got = {
        name: per_window(rows_by_key(read_table(output, name), key))
        for name, key in (("correlations", CORRELATION_KEY), ("indicators", INDICATOR_KEY))
    }

    # 1. the reason code is in the rejects table, with its action
    found = [r for r in rejects if r["reason"] == reason]
    assert found, f"{kind}: no {reason!r} in rejects {sorted({r['reason'] for r in rejects})}"
    assert {r["action"] for r in found} == {action}

    # 2. windows planned = computed + rejected, in the counters and in the tables
    whole = whole_window_rejects(rejects)
    computed = set(got["correlations"])
    planned = CLEAN_WINDOWS - set(touched) if outcome == "absent" else CLEAN_WINDOWS
    assert counters["windows_planned"] == len(planned)
    assert counters.get("windows_computed", 0) + counters.get("windows_rejected", 0) == counters["windows_planned"]
    assert counters.get("windows_computed", 0) == len(computed) and counters.get("windows_rejected", 0) == len(whole)
    assert computed | set(whole) == planned and not computed & set(whole)
    assert set(got["indicators"]) == computed

    # 3. every untouched window is bit-identical to the clean run
    for table in ("correlations", "indicators"):
        for k in CLEAN_WINDOWS - set(touched):
            assert got[table][k] == clean[table][k], f"{kind}: {table} of good window {k} changed"

    # 4. what happens to the touched windows
    findings = windows_with_findings(rejects)
    for k in touched:
        for table in ("correlations", "indicators"):
            mine, theirs = got[table].get(k, {}), clean[table][k]
            if outcome == "same":
                assert mine == theirs, f"{kind}: {table} of window {k} not repaired to the clean values"
            elif outcome in ("rejected", "absent"):
                assert mine == {}
            elif outcome == "subset":
                assert mine and set(mine) < set(theirs)
                assert all(mine[key] == theirs[key] for key in mine), f"{kind}: kept rows of window {k} changed"
            elif outcome == "changed":
                assert mine and mine != theirs
                for key in mine:
                    if _subjects_of(key) <= set(same_subjects):
                        assert mine[key] == theirs[key], f"{kind}: {key} of window {k} should not change"
        if outcome == "rejected":
            assert k in whole
        if outcome == "absent":
            assert k not in whole and k not in findings
    # a window whose rows differ from the clean run always has a window-level finding
    for k in computed:
        if got["correlations"][k] != clean["correlations"][k]:
            assert findings.get(k), f"{kind}: window {k} differs from the clean run without a finding"
    if reason == "clipped_channel":
        quality = {key: dict(row)["quality"] for key, row in got["correlations"][4].items()}
        # the matrix's short records also carry few_effective_samples (fewer than 100 effective
        # samples, on every pair alike): only the clipping code is under test here
        clip = {
            key: quality_text(c for c in quality_codes(q) if c != "few_effective_samples") for key, q in quality.items()
        }
        assert clip == {("a", "a"): "clipped", ("a", "b"): "clipped", ("b", "b"): "ok"}
