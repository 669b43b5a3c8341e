"""An in-memory object store registered as Beam filesystem scheme ``memfs://`` (tests only).

It behaves like the object stores a cluster job reads and writes (gs://, s3://), not like a
local disk: there are no folders (``exists`` is true only for objects, ``mkdirs`` does nothing,
``has_dirs`` is false, so listing is by prefix), reads and writes go through the same stream
classes as Beam's S3 and GCS filesystems (:mod:`apache_beam.io.filesystemio`), an object appears
only when its writer is closed, and rename is copy-then-delete. Every call is logged, so a test
can show which paths went through Beam's FileSystems.

Importing this module registers the scheme (Beam finds FileSystem subclasses by scheme). Objects
live in this process: use it with an in-process runner.
"""

from __future__ import annotations

import io
import threading
import time
from typing import Dict, List, Tuple

from apache_beam.io.filesystem import BeamIOError, CompressedFile, CompressionTypes, FileMetadata, FileSystem
from apache_beam.io.filesystemio import Downloader, DownloaderStream, Uploader, UploaderStream

SCHEME = "memfs"
PREFIX = SCHEME + "://"

_LOCK = threading.Lock()
#: path -> (content, last update time)
_OBJECTS: Dict[str, Tuple[bytes, float]] = {}
#: (operation, path) of every call, in order
_CALLS: List[Tuple[str, str]] = []


def reset() -> None:
    """Forget every object and logged call."""
    with _LOCK:
        _OBJECTS.clear()
        _CALLS.clear()


def put(path: str, content: bytes) -> None:
    """Store an object directly (test set-up)."""
    with _LOCK:
        _OBJECTS[path] = (bytes(content), time.time())


def get(path: str) -> bytes:
    with _LOCK:
        return _OBJECTS[path][0]


def paths(prefix: str = PREFIX) -> List[str]:
    with _LOCK:
        return sorted(p for p in _OBJECTS if p.startswith(prefix))


def calls(operation: str = None) -> List[Tuple[str, str]]:
    with _LOCK:
        return [c for c in _CALLS if operation is None or c[0] == operation]


def _log(operation: str, path: str) -> None:
    with _LOCK:
        _CALLS.append((operation, path))


class _ObjectDownloader(Downloader):
    def __init__(self, path: str):
        with _LOCK:
            if path not in _OBJECTS:
                raise FileNotFoundError(f"no object {path}")
            self._content = _OBJECTS[path][0]

    @property
    def size(self):
        return len(self._content)

    def get_range(self, start, end):
        return self._content[start:end]


class _ObjectUploader(Uploader):
    """Collects the bytes; the object appears when the writer is closed (as on S3 and GCS)."""

    def __init__(self, path: str):
        self._path = path
        self._parts: List[bytes] = []

    def put(self, data):
        self._parts.append(bytes(data))

    def finish(self):
        put(self._path, b"".join(self._parts))


def _compressed(raw, path, compression_type):
    """``raw`` as it is, or wrapped for the compression the path or caller asks for (as Beam's
    own filesystems do)."""
    compression_type = FileSystem._get_compression_type(path, compression_type)
    if compression_type == CompressionTypes.UNCOMPRESSED:
        return raw
    return CompressedFile(raw, compression_type=compression_type)


class MemoryFileSystem(FileSystem):
    """Beam FileSystem of scheme ``memfs``: an object store held in this process."""

    @classmethod
    def scheme(cls):
        return SCHEME

    def join(self, basepath, *paths):
        if not basepath.startswith(PREFIX):
            raise ValueError(f"not a {PREFIX} path: {basepath!r}")
        path = basepath
        for part in paths:
            path = path.rstrip("/") + "/" + part.lstrip("/")
        return path

    def split(self, path):
        if not path.startswith(PREFIX):
            raise ValueError(f"not a {PREFIX} path: {path!r}")
        head, _, tail = path[len(PREFIX) :].rpartition("/")
        return PREFIX + head, tail

    def mkdirs(self, path):
        _log("mkdirs", path)  # no folders in an object store

    def has_dirs(self):
        return False

    def _list(self, dir_or_prefix):
        _log("list", dir_or_prefix)
        with _LOCK:
            found = [(p, len(c), t) for p, (c, t) in _OBJECTS.items() if p.startswith(dir_or_prefix)]
        for path, size, updated in sorted(found):
            yield FileMetadata(path, size, updated)

    def create(self, path, mime_type="application/octet-stream", compression_type=CompressionTypes.AUTO):
        _log("create", path)
        raw = io.BufferedWriter(UploaderStream(_ObjectUploader(path)), buffer_size=128 * 1024)
        return _compressed(raw, path, compression_type)

    def open(self, path, mime_type="application/octet-stream", compression_type=CompressionTypes.AUTO):
        _log("open", path)
        raw = io.BufferedReader(DownloaderStream(_ObjectDownloader(path)), buffer_size=64 * 1024)
        return _compressed(raw, path, compression_type)

    def copy(self, source_file_names, destination_file_names):
        errors = {}
        for source, destination in zip(source_file_names, destination_file_names):
            _log("copy", source)
            with _LOCK:
                if source not in _OBJECTS:
                    errors[(source, destination)] = FileNotFoundError(source)
                    continue
                _OBJECTS[destination] = (_OBJECTS[source][0], time.time())
        if errors:
            raise BeamIOError("copy failed", errors)

    def rename(self, source_file_names, destination_file_names):
        self.copy(source_file_names, destination_file_names)
        for source in source_file_names:
            _log("rename", source)
            with _LOCK:
                _OBJECTS.pop(source, None)

    def exists(self, path):
        _log("exists", path)
        with _LOCK:
            return path in _OBJECTS

    def size(self, path):
        with _LOCK:
            return len(_OBJECTS[path][0])

    def last_updated(self, path):
        with _LOCK:
            return _OBJECTS[path][1]

    def checksum(self, path):
        import hashlib

        return hashlib.md5(get(path)).hexdigest()

    def metadata(self, path):
        with _LOCK:
            if path not in _OBJECTS:
                raise BeamIOError("metadata failed", {path: FileNotFoundError(path)})
            content, updated = _OBJECTS[path]
        return FileMetadata(path, len(content), updated)

    def delete(self, paths):
        """Delete objects; like a local disk (and unlike GCS), a missing object is an error, so a
        test notices a delete of something that is not there (e.g. a prefix taken for a folder)."""
        errors = {}
        for path in paths:
            _log("delete", path)
            with _LOCK:
                if _OBJECTS.pop(path, None) is None:
                    errors[path] = FileNotFoundError(path)
        if errors:
            raise BeamIOError("delete failed", errors)
