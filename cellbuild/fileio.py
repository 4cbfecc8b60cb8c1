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


class StagedFiles:
    """A group of files that appear together or not at all.

    Each file is written to a temporary beside its target; :meth:`commit`
    renames them all into place, and leaving the ``with`` block by an exception
    removes every temporary, so a failure midway (a full disk, an interrupt)
    changes none of the targets.
    """

    def __init__(self) -> None:
        self._staged: list[tuple[str, Path]] = []

    def __enter__(self) -> "StagedFiles":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.discard()

    @contextlib.contextmanager
    def writer(self, path: str | os.PathLike) -> Iterator[BinaryIO]:
        """A binary handle for ``path``'s content, staged until :meth:`commit`."""
        target = Path(path)
        fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part",
                                        dir=target.parent)
        self._staged.append((tmp_name, target))
        with os.fdopen(fd, "wb", buffering=1 << 20) as handle:
            yield handle
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp_name, 0o644)

    def write_bytes(self, path: str | os.PathLike, data: bytes) -> None:
        with self.writer(path) as handle:
            handle.write(data)

    def commit(self) -> None:
        """Rename every staged file into place (each rename is atomic)."""
        for tmp_name, target in self._staged:
            os.replace(tmp_name, target)
        self._staged.clear()

    def discard(self) -> None:
        """Remove the temporaries of files not committed."""
        for tmp_name, _ in self._staged:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp_name)
        self._staged.clear()
