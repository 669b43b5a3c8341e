"""Determinism: the same input and configuration give the same files, byte for byte, apart from the
run id; in-process and multi-process runners give the same rows.

Where the run id lives: only in the Parquet footer's key-value metadata (``corrtransforms.run_id``,
and inside the ``ARROW:schema`` entry pyarrow derives from the same schema metadata). So two runs'
files have identical names and identical bytes up to the footer; their decoded footers are equal
once the run id is taken out. The archive is the invented one with many kinds of bad input
(tests/support/archive_data.py), so the rejects table is not empty.
"""

import os

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from corrtransforms.stages.write import META_PREFIX
from pipelines import backfill
from tests.support.archive_data import bad_wide_archive
from tests.support.output_tables import files_by_path
from tests.support.reliability_data import canonical, write_config

RUN_ID = (META_PREFIX + "run_id").encode()
TABLES = ("correlations", "indicators", "shifts", "state", "baseline_sample", "rejects")


def _files(output):
    found = []
    for folder, _, names in os.walk(output):
        found += [os.path.relpath(os.path.join(folder, n), output) for n in names]
    return sorted(f for f in found if not f.startswith("_runs"))  # run summaries: named by run id


def _without_run_id(metadata):
    return {k: v for k, v in (metadata or {}).items() if k not in (RUN_ID, b"ARROW:schema")}


def _data_bytes(path):
    """The file's bytes before the footer (magic, column chunks, pages)."""
    raw = open(path, "rb").read()
    footer_length = int.from_bytes(raw[-8:-4], "little")
    assert raw[-4:] == b"PAR1"
    return raw[: len(raw) - 8 - footer_length]


def _rows(output, table):
    import pyarrow.dataset as ds

    data = ds.dataset(os.path.join(output, table), partitioning="hive").to_table()
    return sorted((tuple((k, canonical(v)) for k, v in row.items()) for row in data.to_pylist()), key=repr)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("det")
    bad_wide_archive(str(root / "archive"))
    config = write_config(root / "asset.toml", "archive")
    outputs = {}
    for name, flags in (
        ("first", []),
        ("second", []),
        ("multi", ["--direct_running_mode=multi_processing", "--direct_num_workers=2"]),
        ("one_worker", ["--direct_num_workers=1", "--run_id=same-run"]),
        ("two_workers", ["--direct_running_mode=multi_processing", "--direct_num_workers=2", "--run_id=same-run"]),
    ):
        outputs[name] = str(root / name)
        # default run id: time + random
        outputs["counters_" + name] = backfill.main(["--config", config, "--output", outputs[name], *flags])
    return outputs


def test_one_worker_and_two_worker_processes_write_the_same_bytes(runs):
    # every file of every table, the summaries and the episodes included (same run id: it is in
    # the footers); the run summaries name the output folder and are left out
    one, two = files_by_path(runs["one_worker"]), files_by_path(runs["two_workers"])
    assert one == two
    tables = {name.split(os.sep)[0] for name in one}
    assert set(TABLES) - {"baseline_sample"} <= tables  # this archive's baseline windows are all held
    # the counters the launchers read (window accounting, rejects, rows written) add up the same
    # when they come from two worker processes
    counters_one, counters_two = runs["counters_one_worker"], runs["counters_two_workers"]
    assert counters_one == counters_two
    assert counters_one["windows_planned"] > 0 and counters_one.get("rows_written_rejects", 0) > 0


def test_two_runs_write_the_same_files_byte_for_byte_but_the_run_id(runs):
    first, second = runs["first"], runs["second"]
    names = _files(first)
    assert names == _files(second)  # names are a function of the rows
    # every table but baseline_sample: this archive's baseline windows are all held (too short)
    assert {n.split(os.sep)[0] for n in names} == set(TABLES) - {"baseline_sample"} | {"episodes", "_summaries"}
    assert not any("_temporary" in n or n.endswith(".tmp") for n in names)
    # the read-back summaries (derived data): the episode evidence, the footer index of the archive
    # (tests/pipelines/test_flat_archive.py) and the latest states each day chunk resumed from
    summaries = [n for n in names if n.startswith("_summaries")]
    assert [os.path.basename(n) for n in summaries] == [
        "episode_evidence.parquet",
        "footer_index.parquet",
        "latest_state.parquet",
    ]
    run_ids = set()
    for name in names:
        a, b = os.path.join(first, name), os.path.join(second, name)
        assert _data_bytes(a) == _data_bytes(b), name
        meta_a, meta_b = pq.ParquetFile(a).schema_arrow.metadata, pq.ParquetFile(b).schema_arrow.metadata
        assert _without_run_id(meta_a) == _without_run_id(meta_b), name
        assert pq.ParquetFile(a).schema_arrow.remove_metadata() == pq.ParquetFile(b).schema_arrow.remove_metadata()
        decoded = [[tuple(canonical(v) for v in row.values()) for row in pq.read_table(p).to_pylist()] for p in (a, b)]
        assert decoded[0] == decoded[1], name  # canonical: NaN equals NaN
        run_ids.add((meta_a[RUN_ID], meta_b[RUN_ID]))
        footer_a, footer_b = open(a, "rb").read()[len(_data_bytes(a)) :], open(b, "rb").read()[len(_data_bytes(b)) :]
        if footer_a != footer_b:  # the footers differ by the run id only
            assert meta_a[RUN_ID] in footer_a and meta_b[RUN_ID] in footer_b
            assert (
                footer_a.replace(meta_a[RUN_ID], meta_b[RUN_ID]).split(b"ARROW:schema")[0]
                == footer_b.split(b"ARROW:schema")[0]
            )
    assert len(run_ids) == 1 and len({x for pair in run_ids for x in pair}) == 2  # two runs, two ids


def test_rows_within_a_file_are_sorted_and_unique_per_key(runs):
    for name in _files(runs["first"]):
        if not name.startswith("correlations"):
            continue
        table = pq.read_table(os.path.join(runs["first"], name))
        keys = list(zip(*(table.column(c).to_pylist() for c in ("window_start", "channel_a", "channel_b"))))
        assert keys == sorted(keys) and len(set(keys)) == len(keys)


def test_multi_process_runner_gives_the_same_rows(runs):
    for table in TABLES:
        if table == "baseline_sample":  # not written: every baseline window of this archive is held
            assert not os.path.exists(os.path.join(runs["multi"], table)), table
            continue
        assert _rows(runs["multi"], table) == _rows(runs["first"], table), table
    assert pa.concat_tables(
        [pq.read_table(os.path.join(runs["multi"], n)) for n in _files(runs["multi"]) if n.startswith("episodes")]
    ).num_rows == sum(
        pq.read_table(os.path.join(runs["first"], n)).num_rows
        for n in _files(runs["first"])
        if n.startswith("episodes")
    )


def test_the_default_local_run_uses_every_core_and_the_environment_can_pin_it(monkeypatch):
    """The launchers' default (no worker flag): multi-process, one worker per usable core
    (os.sched_getaffinity); CORRTRANSFORMS_LOCAL_WORKERS pins it; a flag on the command line wins."""
    from apache_beam.options.pipeline_options import DirectOptions

    from corrtransforms.launch import common

    def chosen(argv):
        options = common.pipeline_options(["--config", "a.toml", "--output", "out", *argv], "backfill")
        direct = options.view_as(DirectOptions)
        return direct.direct_running_mode, direct.direct_num_workers

    monkeypatch.delenv(common.LOCAL_WORKERS_ENV, raising=False)
    cores = len(os.sched_getaffinity(0))
    if cores >= 2:
        assert chosen([]) == ("multi_processing", cores)
    monkeypatch.setenv(common.LOCAL_WORKERS_ENV, "3")
    assert chosen([]) == ("multi_processing", 3)
    monkeypatch.setenv(common.LOCAL_WORKERS_ENV, "1")
    assert chosen([])[0] != "multi_processing"  # one process: Beam's own default mode
    assert chosen(["--direct_num_workers=2", "--direct_running_mode=multi_threading"]) == ("multi_threading", 2)
    monkeypatch.setenv(common.LOCAL_WORKERS_ENV, "zero")
    with pytest.raises(SystemExit, match="positive integer"):
        chosen([])
