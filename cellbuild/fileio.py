"""Atomic file writing: write to a temporary file beside the target, then rename.

A reader never sees a half-written file, and an interrupted write leaves the
previous file (if any) intact and no temporary file behind.
"""
from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import BinaryIO, Iterator


@contextlib.contextmanager
def atomic_writer(path: str | os.PathLike) -> Iterator[BinaryIO]:
    """Open a binary handle whose content replaces ``path`` only on success."""
    target = Path(path)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part",
                                    dir=target.parent)
    try:
        with os.fdopen(fd, "wb", buffering=1 << 20) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp_name, 0o644)
        os.replace(tmp_name, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_name)
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_writer(path) as handle:
        handle.write(data)


class HashingWriter:
    """A write-only wrapper that keeps a running sha256 and byte count."""

    def __init__(self, handle: BinaryIO) -> None:
        import hashlib

        self._handle = handle
        self._hash = hashlib.sha256()
        self.bytes = 0

    def write(self, data) -> int:
        view = memoryview(data).cast("B")
        self._hash.update(view)
        self.bytes += view.nbytes
        return self._handle.write(view)

    @property
    def sha256(self) -> str:
        return self._hash.hexdigest()


def sha256_file(path: str | os.PathLike, block: int = 1 << 22) -> str:
    """sha256 of a file's bytes, read in blocks."""
    import hashlib

    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while chunk := handle.read(block):
            digest.update(chunk)
    return digest.hexdigest()
