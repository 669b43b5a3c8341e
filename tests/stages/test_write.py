"""Partitioned Parquet output: format, partitions, provenance, commit and the stock-sink traps."""

import glob
import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

import corrtransforms
from corrtransforms import tables
from corrtransforms.rejects import Reject
from corrtransforms.stages.write import (
    FILE_CELLS,
    LocalFiles,
    cells,
    commit_partition,
    part_file_name,
    provenance_metadata,
    rejects_table,
    split_by_slot,
    write_part,
    write_tables,
)
from tests.support.archive_data import T0, US, make_config

HOUR = 3600 * US


def _correlation_rows(starts, lags=5):
    n = len(starts)
    rng = np.random.default_rng(0)
    data = {f.name: None for f in tables.CORRELATIONS}
    data.update(
        window_start=pa.array(starts, pa.int64()).cast(tables.TIMESTAMP),
        channel_a=["a"] * n,
        channel_b=["b"] * n,
        sample_rate_hz=[10.0] * n,
        n_samples=[600] * n,
        coverage=[1.0] * n,
        first_lag_s=[-0.2] * n,
        lag_step_s=[0.1] * n,
        coefficient=[rng.standard_normal(lags).astype(np.float32).tolist() for _ in range(n)],
        scale=[1.0] * n,
        stderr=[[0.01] * lags] * n,
        bandwidth_hz=[1.0] * n,
        record_s=[60.0] * n,
        rel_error=[0.1] * n,
        required_record_s=[240.0] * n,
        meets_target=[False] * n,
        quality=["ok"] * n,
        bandwidth_time=[60.0] * n,
        n_effective=[30.0] * n,
        tone_freq_hz=[float("nan")] * n,
        tone_required_record_s=[float("nan")] * n,
    )
    return pa.Table.from_arrays(
        [
            pa.array(data[f.name], f.type) if not isinstance(data[f.name], pa.Array) else data[f.name]
            for f in tables.CORRELATIONS
        ],
        schema=tables.CORRELATIONS,
    )


def _files(root, table="correlations"):
    return sorted(glob.glob(os.path.join(root, table, "*", "*", "*")))


def test_zstd_compliant_lists_units_timestamps_and_provenance(tmp_path):
    config = make_config("/nowhere")
    write_tables(str(tmp_path), config, "run-1", {"correlations": [_correlation_rows([T0, T0 + HOUR])]})
    (path,) = _files(str(tmp_path))
    parquet = pq.ParquetFile(path)
    # trap: the stock sink writes uncompressed unless told
    assert {parquet.metadata.row_group(0).column(i).compression for i in range(parquet.metadata.num_columns)} == {
        "ZSTD"
    }
    # trap: non-compliant list item names; the Parquet spec's LIST layout is <list>.list.element
    assert parquet.metadata.row_group(0).column(8).path_in_schema == "coefficient.list.element"
    schema = parquet.schema_arrow
    assert schema.field("window_start").type == pa.timestamp("us", tz="UTC")
    assert schema.field("lag_step_s").metadata[b"unit"] == b"s"
    assert schema.field("bandwidth_hz").metadata[b"unit"] == b"Hz"
    meta = schema.metadata
    assert meta[b"corrtransforms.version"].decode() == corrtransforms.__version__
    assert meta[b"corrtransforms.config_digest"].decode() == config.digest()
    assert meta[b"corrtransforms.run_id"] == b"run-1"
    assert json.loads(meta[b"corrtransforms.config"]) == config.as_dict()
    assert "asset" not in schema.names and "date" not in schema.names


def test_rows_go_to_the_local_date_folder(tmp_path):
    # trap: the stock sink cannot split rows into per-date folders
    config = make_config("/nowhere", timezone="Europe/Berlin")
    starts = [T0 - 2 * HOUR, T0 - HOUR // 2, T0 + HOUR]  # 23:00 (Mar 3), 00:30 (Mar 4), 02:00 local
    write_tables(str(tmp_path), config, "r", {"correlations": [_correlation_rows(starts)]})
    folders = sorted(os.path.basename(os.path.dirname(p)) for p in _files(str(tmp_path)))
    assert folders == ["date=2024-03-03", "date=2024-03-04"]
    data = ds.dataset(str(tmp_path / "correlations"), partitioning="hive").to_table()
    by_date = {
        d: sorted(v)
        for d, v in _group(
            data.column("date").to_pylist(), data.column("window_start").cast(pa.int64()).to_pylist()
        ).items()
    }
    assert by_date == {"2024-03-03": [starts[0]], "2024-03-04": starts[1:]}


def _group(keys, values):
    out = {}
    for k, v in zip(keys, values):
        out.setdefault(str(k), []).append(v)
    return out


def test_rerun_with_fewer_shards_leaves_no_stale_files_and_other_days_alone(tmp_path):
    # trap: the stock sink leaves stale shards when a rerun writes a different shard count
    config = make_config("/nowhere")
    store, root = LocalFiles(), str(tmp_path)
    meta = provenance_metadata(config, "first")
    day_rows = [_correlation_rows([T0 + i * HOUR]) for i in range(3)]
    parts = [
        write_part(
            store, root, "correlations", config.name, "2024-03-04", t, "first", meta, str(i), split_by_slot(t)[0][0]
        )
        for i, t in enumerate(day_rows)
    ]
    # max_cells=0: a "large" partition, one file per hour slot (three files for three hours)
    commit_partition(store, root, "correlations", config.name, "2024-03-04", parts, max_cells=0)
    other = write_part(
        store, root, "correlations", config.name, "2024-03-05", _correlation_rows([T0 + 25 * HOUR]), "first", meta, "x"
    )
    commit_partition(store, root, "correlations", config.name, "2024-03-05", [other])
    assert len(_files(root)) == 4
    write_tables(root, config, "second", {"correlations": [pa.concat_tables(day_rows[:2])]}, days=["2024-03-04"])
    files = _files(root)
    assert len(files) == 2 and sum("date=2024-03-04" in f for f in files) == 1
    data = ds.dataset(os.path.join(root, "correlations"), partitioning="hive").to_table()
    assert sorted(data.column("window_start").cast(pa.int64()).to_pylist()) == [T0, T0 + HOUR, T0 + 25 * HOUR]


def test_owned_day_without_rows_is_emptied(tmp_path):
    config = make_config("/nowhere")
    write_tables(str(tmp_path), config, "1", {"correlations": [_correlation_rows([T0])]})
    write_tables(str(tmp_path), config, "2", {"correlations": []}, days=["2024-03-04"])
    assert _files(str(tmp_path)) == []


def test_partition_folders_are_created_and_a_silent_rename_failure_is_loud(tmp_path):
    # trap: the file-based dynamic-destination sink needs existing partition folders, else its
    # final rename fails quietly. Here the folders need not exist, and a rename that leaves no
    # file raises.
    config = make_config("/nowhere")
    root = str(tmp_path / "fresh" / "nested")
    write_tables(root, config, "r", {"correlations": [_correlation_rows([T0])]})
    assert len(_files(root)) == 1

    class RenameDoesNothing(LocalFiles):
        def rename(self, source, destination):
            return None

    store = RenameDoesNothing()
    part = write_part(
        store,
        root,
        "correlations",
        config.name,
        "2024-03-06",
        _correlation_rows([T0 + 48 * HOUR]),
        "r2",
        provenance_metadata(config, "r2"),
        "0",
    )
    with pytest.raises(IOError, match="not there after the rename"):
        commit_partition(store, root, "correlations", config.name, "2024-03-06", [part])


def test_uncommitted_parts_are_invisible_to_readers(tmp_path):
    config = make_config("/nowhere")
    root = str(tmp_path)
    write_tables(root, config, "good", {"correlations": [_correlation_rows([T0])]})
    store = LocalFiles()
    write_part(
        store,
        root,
        "correlations",
        config.name,
        "2024-03-04",
        _correlation_rows([T0, T0 + HOUR]),
        "crashed",
        provenance_metadata(config, "crashed"),
        "0",
    )  # the run dies before its commit
    assert os.path.isdir(os.path.join(root, "_temporary", "crashed"))
    data = ds.dataset(os.path.join(root, "correlations"), partitioning="hive").to_table()
    assert data.column("window_start").cast(pa.int64()).to_pylist() == [T0]


def test_file_names_depend_only_on_the_rows(tmp_path):
    rows = _correlation_rows([T0, T0 + HOUR, T0 + 2 * HOUR])
    shuffled = rows.take([2, 0, 1])
    store, config = LocalFiles(), make_config("/nowhere")
    meta = provenance_metadata(config, "x")
    one = write_part(store, str(tmp_path), "correlations", "a", "2024-03-04", rows, "x", meta, "1")
    two = write_part(store, str(tmp_path), "correlations", "a", "2024-03-04", shuffled, "y", meta, "2")
    assert one.name == two.name == part_file_name(rows) and one.name.startswith("part-20240304T000000Z-")
    nan_columns = ["tone_freq_hz", "tone_required_record_s"]  # NaN != NaN in Table.equals
    assert (
        pq.read_table(one.temp_path)
        .drop_columns(nan_columns)
        .equals(pq.read_table(two.temp_path).drop_columns(nan_columns))
    )
    assert part_file_name(rows.slice(1)) != one.name


def test_rejects_table_dates_and_actions(tmp_path):
    config = make_config("/nowhere", timezone="Europe/Berlin")
    findings = [
        Reject("plan", "/x/f.parquet", "*", "empty_file", "0 bytes", config.name, date="2024-03-02"),
        Reject("read", "w", "*", "insufficient_coverage", "c", config.name, window_start_us=T0 - HOUR // 2),
        Reject("read", "w", "a", "clipped_channel", "c", config.name, window_start_us=T0),
    ]
    table = rejects_table(findings)
    assert table.schema.equals(tables.REJECTS)
    assert table.column("action").to_pylist() == ["rejected", "rejected", "flagged"]
    write_tables(str(tmp_path), config, "r", {"rejects": findings})
    data = ds.dataset(str(tmp_path / "rejects"), partitioning="hive").to_table()
    got = _group(data.column("date").to_pylist(), data.column("reason").to_pylist())
    assert {k: sorted(v) for k, v in got.items()} == {
        "2024-03-02": ["empty_file"],
        "2024-03-04": ["clipped_channel", "insufficient_coverage"],
    }


def _committed_bytes(root):
    found = {}
    for path in _files(root):
        with open(path, "rb") as handle:
            found[os.path.relpath(path, root)] = handle.read()
    return found


@pytest.mark.parametrize("max_cells", [FILE_CELLS, 0])  # one file per partition; one per hour slot
def test_committed_files_do_not_depend_on_how_the_rows_were_split_into_parts(tmp_path, max_cells):
    # what two workers do: the same rows reach the commit in other part files (other splits,
    # other order, a slot's rows in several parts); the committed files must be the same bytes
    config = make_config("/nowhere")
    starts = [T0 + i * HOUR // 2 for i in range(8)]  # four hour slots, two windows each
    rows = _correlation_rows(starts)
    meta = provenance_metadata(config, "same-run")
    splits = {
        "one": [list(range(8))],
        "per_slot": [[0, 1], [2, 3], [4, 5], [6, 7]],
        "interleaved": [[7, 0, 3], [5], [1, 6, 2, 4]],
    }
    outputs = {}
    for label, groups in splits.items():
        store, root = LocalFiles(), str(tmp_path / label)
        parts = []
        for number, group in enumerate(groups):
            for slot, piece in split_by_slot(rows.take(group)):
                parts.append(
                    write_part(
                        store,
                        root,
                        "correlations",
                        config.name,
                        "2024-03-04",
                        piece,
                        "same-run",
                        meta,
                        str(number),
                        slot,
                    )
                )
        commit_partition(store, root, "correlations", config.name, "2024-03-04", parts[::-1], max_cells=max_cells)
        outputs[label] = _committed_bytes(root)
    assert outputs["one"] == outputs["per_slot"] == outputs["interleaved"]
    assert len(outputs["one"]) == (1 if max_cells else 4)
    whole = pa.concat_tables([pq.read_table(os.path.join(tmp_path, "one", n)) for n in sorted(outputs["one"])])
    assert whole.num_rows == 8
    assert sorted(whole.column("window_start").cast(pa.int64()).to_pylist()) == starts
    # the merged file is the file write_part makes of all the rows at once
    if max_cells:
        alone = write_part(
            LocalFiles(),
            str(tmp_path / "alone"),
            "correlations",
            config.name,
            "2024-03-04",
            rows,
            "same-run",
            meta,
            "0",
        )
        with open(alone.temp_path, "rb") as handle:
            assert list(outputs["one"].values()) == [handle.read()]


def test_slots_and_cells():
    rows = _correlation_rows([T0, T0 + HOUR // 2, T0 + HOUR], lags=5)
    slots = split_by_slot(rows)
    assert [(s, t.num_rows) for s, t in slots] == [(f"{T0 // HOUR:08d}", 2), (f"{T0 // HOUR + 1:08d}", 1)]
    assert cells(rows) == 3 + 3 * 5 * 2  # rows + the elements of coefficient and stderr
    finding = Reject("plan", "/x", "*", "empty_file", "0 bytes", "a", date="2024-03-04")
    assert [s for s, _ in split_by_slot(rejects_table([finding]))] == [""]  # no window: no slot
