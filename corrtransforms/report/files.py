"""The file access the report needs, over Beam's FileSystems (local paths, gs://, s3://, hdfs://).

The report reads the output tables and writes its page and pictures through one small store
object, so the same code reports a local folder, an object store or (in the tests) the in-memory
filesystem. :class:`ReportFiles` is the store over Beam's FileSystems; any object with the same
methods (``join``, ``match``, ``open``, ``create``, ``exists``) will do.
"""

from __future__ import annotations

from typing import List

from corrtransforms.beam.filesystems import BeamFiles, open_file


class ReportFiles(BeamFiles):
    """:class:`corrtransforms.beam.filesystems.BeamFiles` plus reading and glob matching."""

    def open(self, path: str):
        """``path`` opened for binary reading."""
        return open_file(path)

    def match(self, pattern: str) -> List[str]:
        """Paths matching ``pattern`` (``*`` within a name, ``**`` across folders), sorted;
        empty when nothing matches or the location does not exist."""
        from apache_beam.io.filesystems import FileSystems

        try:
            found = FileSystems.match([pattern])[0].metadata_list
        except Exception:  # noqa: BLE001 - a missing folder or bucket prefix matches nothing
            return []
        return sorted(m.path for m in found)

    def holds_anything(self, folder: str) -> bool:
        """Whether ``folder`` exists (a local or HDFS folder) or any object lies below it (object
        stores have no folders: a prefix exists only through the objects below it)."""
        return self.exists(folder) or bool(self.match(self.join(folder, "**")))


def default_store() -> ReportFiles:
    return ReportFiles()
