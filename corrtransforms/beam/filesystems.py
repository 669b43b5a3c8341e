"""File access through Beam's FileSystems: any registered scheme (local, gs://, s3://, hdfs://).

- :func:`open_file`: binary reading, the ``open_file`` callable the read stage takes;
- :class:`BeamFiles`: the store interface of :mod:`corrtransforms.stages.write`;
- :func:`list_archive`: the archive's files for a folder, a glob or a URL
  (:func:`list_archive_files`: with their sizes and modification times).
"""

from __future__ import annotations

from typing import List, Optional, Sequence

from apache_beam.io.filesystem import CompressionTypes
from apache_beam.io.filesystems import FileSystems

from corrtransforms.stages import plan as archive_plan
from corrtransforms.stages import write as table_writer
from corrtransforms.stages.footer_index import ListedFile


def open_file(path: str):
    """Open ``path`` for binary reading through Beam's FileSystems (any registered scheme)."""
    return FileSystems.open(path, compression_type=CompressionTypes.UNCOMPRESSED)


class BeamFiles:
    """The :mod:`corrtransforms.stages.write` store interface over Beam's FileSystems."""

    def join(self, *parts: str) -> str:
        return FileSystems.join(*parts)

    def create(self, path: str):
        return FileSystems.create(path, compression_type=CompressionTypes.UNCOMPRESSED)

    def open(self, path: str):
        return open_file(path)

    def rename(self, source: str, destination: str) -> None:
        FileSystems.rename([source], [destination])

    def exists(self, path: str) -> bool:
        return FileSystems.exists(path)

    def mkdirs(self, folder: str) -> None:
        if FileSystems.exists(folder):
            return
        try:
            FileSystems.mkdirs(folder)
        except OSError:
            if not FileSystems.exists(folder):
                raise

    def list_files(self, folder: str) -> List[str]:
        pattern = FileSystems.join(folder, "*")
        try:
            result = FileSystems.match([pattern])[0]
        except Exception:  # noqa: BLE001 - a missing folder matches nothing
            return []
        return sorted(m.path for m in result.metadata_list)

    def match(self, pattern: str) -> List[str]:
        """Paths matching a glob pattern, sorted (errors of the filesystem propagate)."""
        return sorted(m.path for m in FileSystems.match([pattern])[0].metadata_list)

    def delete(self, paths: Sequence[str]) -> None:
        if paths:
            FileSystems.delete(list(paths))

    def delete_tree(self, folder: str) -> None:
        """Delete everything below ``folder``. Object stores (gs://, s3://) have no folders:
        ``exists`` is false for a prefix and deleting the prefix name deletes nothing, so the
        files below it are listed and deleted one by one."""
        if FileSystems.exists(folder):  # a real folder: local disk, HDFS
            FileSystems.delete([folder])
            return
        try:
            below = FileSystems.match([FileSystems.join(folder, "**")])[0].metadata_list
        except Exception:  # noqa: BLE001 - nothing below the prefix matches nothing
            return
        if below:
            FileSystems.delete([m.path for m in below])

    def remove_empty_folder(self, folder: str) -> None:
        if "://" in folder:
            return  # object stores have no folders
        table_writer.LocalFiles().remove_empty_folder(folder)


def list_archive(pattern: str) -> List[str]:
    """Files of the archive: ``pattern`` as a glob, a folder as everything below it (hidden
    ``.``/``_`` names skipped), sorted. No match is an error (a wrong path must not pass quietly)."""
    return [listed.path for listed in list_archive_files(pattern)]


def list_archive_files(pattern: str) -> List[ListedFile]:
    """:func:`list_archive` with each file's size and modification time, as the filesystem's
    listing reports them (no file is opened; the time is None where a filesystem gives none)."""
    expanded = archive_plan.expand_archive_path(pattern)
    root = pattern.rstrip("/") + "/" if expanded != pattern else ""
    result = FileSystems.match([expanded])[0]
    found = sorted(
        (
            ListedFile(m.path, int(m.size_in_bytes), _modified_s(m))
            for m in result.metadata_list
            if not archive_plan.is_hidden(m.path, root)
        ),
        key=lambda listed: listed.path,
    )
    if not found:
        raise FileNotFoundError(f"[archive] path = {pattern!r}: no files match {expanded!r}")
    return found


def _modified_s(metadata) -> Optional[float]:
    updated = getattr(metadata, "last_updated_in_seconds", None)
    return float(updated) if updated else None
