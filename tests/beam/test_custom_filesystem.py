"""Nothing bypasses Beam's FileSystems: the jobs run with configuration, archive and output on a
registered object-store scheme (``memfs://``, see tests/support/memory_filesystem.py) that exists only in
this process's memory, so any ``open()``/``os`` call on those paths would fail or leave a local
``memfs:`` folder behind.
"""

from __future__ import annotations

import io
import os
import shutil

import pyarrow.parquet as pq
import pytest

from corrtransforms.beam.filesystems import BeamFiles
from corrtransforms.config import ConfigError
from pipelines import backfill, nightly
from tests.support import demo_fixtures, memory_filesystem
from tests.support.demo_fixtures import BACKFILL_END, NIGHT, TABLES

SITE = "memfs://site"
RUN_ID = "object-store"

pytestmark = pytest.mark.slow


def _jobs(config: str, output: str):
    common = ["--config", config, "--output", output, "--run_id", RUN_ID]
    first = backfill.main(common + ["--end", BACKFILL_END.isoformat()])
    second = nightly.main(common + ["--date", NIGHT.isoformat()])
    return first, second


def _no_local_trace(folder) -> None:
    for root, dirs, files in os.walk(folder):
        assert not [n for n in dirs + files if n.startswith("memfs")], root


def test_backfill_and_nightly_read_and_write_only_through_filesystems(tmp_path, monkeypatch):
    memory_filesystem.reset()
    # the archive and the configuration go to the object store; the local copy is removed
    staging = tmp_path / "staging"
    demo_fixtures.write_small_archive(str(staging / "archive"))
    archive_objects = []
    for folder in ("archive", "weather"):  # the vibration records and the weather logger's days
        for rel in demo_fixtures.partition_files(str(staging / folder)):
            path = f"{SITE}/{folder}/{rel}"
            memory_filesystem.put(path, (staging / folder / rel).read_bytes())
            archive_objects.append(path)
    memory_filesystem.put(f"{SITE}/footbridge.toml", demo_fixtures.small_config_text("archive").encode())
    reference_archive = tmp_path / "reference"
    shutil.move(str(staging), str(reference_archive))
    (reference_archive / "footbridge.toml").write_text(demo_fixtures.small_config_text("archive"))
    cwd = tmp_path / "cwd"
    cwd.mkdir()
    monkeypatch.chdir(cwd)

    # what a retried bundle leaves behind: a part file in the run's temporary area, never committed
    orphan = f"{SITE}/out/_temporary/{RUN_ID}/correlations/asset=footbridge/date=2025-05-01/part-x.parquet.retried"
    memory_filesystem.put(orphan, b"half a file")

    first, second = _jobs(f"{SITE}/footbridge.toml", f"{SITE}/out")

    assert first["windows_planned"] == first["windows_computed"] == 6
    assert second["windows_planned"] == 1 and second["files_rejected"] == 1
    # nothing local was touched: no relative "memfs:/..." folders, nothing in the working folder
    assert list(cwd.iterdir()) == []
    _no_local_trace(tmp_path)
    _no_local_trace(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
    # every archive object was read through FileSystems (footers in planning, row groups in reading)
    opened = {path for _, path in memory_filesystem.calls("open")}
    assert set(archive_objects) <= opened
    # the nightly run read the earlier state through FileSystems too
    assert any("/out/state/" in path for path in opened)
    # the temporary area is gone, orphans included (an object store has no folders: the files below
    # the prefix are listed and deleted one by one)
    written = memory_filesystem.paths(f"{SITE}/out/")
    assert written and not [p for p in written if "_temporary" in p or p.endswith(".tmp")]

    # the same jobs on local disk give the same files, rows and values
    local_out = tmp_path / "local-out"
    _jobs(str(reference_archive / "footbridge.toml"), str(local_out))
    local_files = demo_fixtures.partition_files(str(local_out))
    remote_files = [p[len(f"{SITE}/out/") :] for p in written if not p.startswith(f"{SITE}/out/_runs/")]
    assert {rel.split("/")[0] for rel in local_files} == set(TABLES) | {"episodes", "_summaries"}
    # part-file names are digests of the rows: equal but where a reject names its file by path
    assert [r for r in remote_files if not r.startswith("rejects/")] == [
        r for r in local_files if not r.startswith("rejects/")
    ]
    assert (
        demo_fixtures.partitions([r for r in remote_files if r.startswith("rejects/")]).keys()
        == demo_fixtures.partitions([r for r in local_files if r.startswith("rejects/")]).keys()
    )
    local_root = str(reference_archive / "archive")
    # the footer index names each archive file by its path and modification time in that store
    index_rel = "_summaries/asset=footbridge/footer_index.parquet"
    remote_index = pq.read_table(io.BytesIO(memory_filesystem.get(f"{SITE}/out/{index_rel}")))
    indexed = remote_index.column("path").to_pylist()
    assert indexed and set(indexed) <= set(archive_objects)
    assert index_rel in remote_files and index_rel in local_files
    for remote_rel, local_rel in zip(remote_files, local_files):
        if remote_rel == index_rel:
            continue
        remote = pq.read_table(io.BytesIO(memory_filesystem.get(f"{SITE}/out/{remote_rel}")))
        local = pq.read_table(str(local_out / local_rel))
        # provenance differs (the configuration names another archive path); the rows must not
        assert remote.schema.metadata[b"corrtransforms.run_id"] == RUN_ID.encode()
        assert b"memfs://site/archive" in remote.schema.metadata[b"corrtransforms.config"]
        remote, local = remote.replace_schema_metadata(None), local.replace_schema_metadata(None)
        if remote_rel.startswith("rejects/"):
            sources = remote.column("source").to_pylist()
            assert [s.replace(f"{SITE}/archive", local_root) for s in sources] == local.column("source").to_pylist()
            remote, local = remote.drop_columns(["source"]), local.drop_columns(["source"])
        assert demo_fixtures.table_bytes(remote) == demo_fixtures.table_bytes(local), remote_rel


def test_delete_tree_removes_only_the_files_below_an_object_store_prefix():
    memory_filesystem.reset()
    for path in (
        f"{SITE}/out/_temporary/run/a/b.parquet",
        f"{SITE}/out/_temporary/run/c.parquet",
        f"{SITE}/out/_temporary/run-2/d.parquet",
        f"{SITE}/out/_temporary/runx.parquet",
    ):
        memory_filesystem.put(path, b"x")
    BeamFiles().delete_tree(f"{SITE}/out/_temporary/run")
    assert memory_filesystem.paths() == [
        f"{SITE}/out/_temporary/run-2/d.parquet",
        f"{SITE}/out/_temporary/runx.parquet",
    ]
    BeamFiles().delete_tree(f"{SITE}/nothing/here")  # an empty prefix is no error


def test_configuration_from_a_filesystem_url():
    memory_filesystem.reset()
    memory_filesystem.put(f"{SITE}/sites/a.toml", demo_fixtures.small_config_text("../archive").encode())
    config = backfill.load_job_config(f"{SITE}/sites/a.toml")
    assert config.archive.path == f"{SITE}/archive"  # relative to the file's folder, as for a local file
    assert config.covariate_sources[0].path == f"{SITE}/sites/weather"  # the weather source too
    memory_filesystem.put(f"{SITE}/sites/b.toml", demo_fixtures.small_config_text("memfs://other/x").encode())
    assert backfill.load_job_config(f"{SITE}/sites/b.toml").archive.path == "memfs://other/x"
    with pytest.raises(ConfigError, match="cannot be read"):
        backfill.load_job_config(f"{SITE}/sites/missing.toml")
    memory_filesystem.put(f"{SITE}/sites/bad.toml", b"[asset\nname = ")
    with pytest.raises(ConfigError, match="not valid TOML"):
        backfill.load_job_config(f"{SITE}/sites/bad.toml")
