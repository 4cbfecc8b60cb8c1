"""Atomic file writing: write to a temporary beside the target, then rename.

A reader never sees a half-written file, and an interrupted write leaves the
previous file (if any) intact and no temporary behind. Temporaries are hidden
files named ``.NAME.XXXXXXXX.part`` (``XXXXXXXX``: 8 random characters of
``[a-z0-9_]``, as :func:`tempfile.mkstemp` makes them); the old files a commit keeps aside until
it has succeeded are ``.NAME.XXXXXXXX.bak``. :func:`is_temporary` recognises
both, so a folder left by a killed process (SIGKILL, a power cut) can be
cleaned.

Durability is the caller's choice (``sync``):

- ``sync=True`` (the default, what ``make`` does): each file's bytes are
  flushed to the disk (``fsync``) before it is renamed into place, so after a
  power cut a target holds either its old or its complete new bytes. This
  costs one disk flush per file, most of a small structure's wall time on a
  busy disk.
- ``sync=False``: the rename still makes each file appear whole to readers
  (atomicity does not depend on ``fsync``), but the bytes may still sit in the
  page cache; a power cut (not a killed process) can then leave a new name
  with empty or partial content. A caller writing many files (a batch) flushes
  them once at the end (:func:`flush_file_systems`: one ``syncfs`` per file
  system, or :func:`sync_files`: one ``fsync`` per file and folder) before it
  writes the record that vouches for them (the manifest, itself written with
  ``sync=True``): a manifest on disk then implies its files are on disk too.
"""
from __future__ import annotations

import base64
import contextlib
import errno
import os
import re
import sys
from pathlib import Path
from typing import BinaryIO, Iterable, Iterator

from .errors import InputError

TEMP_SUFFIX = ".part"
BACKUP_SUFFIX = ".bak"
#: ``.`` + target name + ``.`` + 8 random characters (see _stage) + suffix
_TEMPORARY = re.compile(r"^\.(?P<target>.+)\.[a-z0-9_]{8}\.(?:part|bak)$")


def is_temporary(name: str, targets: Iterable[str] | None = None) -> bool:
    """Whether the file name ``name`` is one of our temporaries or backups.

    With ``targets`` (name endings such as ``.lmp``), only temporaries of a
    target ending so count: a folder may hold other programs' ``.part`` files.
    """
    match = _TEMPORARY.match(name)
    if match is None:
        return False
    return targets is None or match.group("target").endswith(tuple(targets))


#: Flags of a new temporary: created here or failing (never an existing file or a
#: link's target), closed in child processes; as :func:`tempfile.mkstemp` opens them.
_NEW_FILE = (os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0)
             | getattr(os, "O_CLOEXEC", 0) | getattr(os, "O_BINARY", 0))


#: New names tried before giving up (as many as :data:`tempfile.TMP_MAX`).
_NAME_TRIES = 10_000


def _stage(target: Path, suffix: str = TEMP_SUFFIX) -> tuple[int, str]:
    """A new, empty hidden file beside ``target`` (mode 0600): (open descriptor, path).

    The name's 8 characters come from ``os.urandom`` (base 32, lower case), a
    new draw whenever the name is taken; what :func:`tempfile.mkstemp` does, at
    a fraction of its cost per file (a library writes thousands)."""
    stem = os.path.join(target.parent, f".{target.name}.")
    for _ in range(_NAME_TRIES):
        name = stem + base64.b32encode(os.urandom(5)).decode("ascii").lower() + suffix
        try:
            return os.open(name, _NEW_FILE, 0o600), name
        except FileExistsError:
            continue
    raise FileExistsError(errno.EEXIST, "no unused temporary name", stem)


@contextlib.contextmanager
def atomic_writer(path: str | os.PathLike, *, sync: bool = True) -> Iterator[BinaryIO]:
    """Open a binary handle whose content replaces ``path`` only on success.

    ``sync``: flush the bytes to the disk before the rename (see the module's
    note on durability); ``False`` leaves that to a later :func:`sync_files`.
    """
    target = Path(path)
    fd, tmp_name = _stage(target)
    try:
        with os.fdopen(fd, "wb", buffering=1 << 20) as handle:
            yield handle
            handle.flush()
            if sync:
                os.fsync(handle.fileno())
        os.chmod(tmp_name, 0o644)
        os.replace(tmp_name, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_name)
        raise


def write_bytes_atomic(path: str | os.PathLike, data: bytes, *, sync: bool = True) -> None:
    """Write ``data`` to ``path`` atomically (``sync`` as for :func:`atomic_writer`)."""
    with atomic_writer(path, sync=sync) as handle:
        handle.write(data)


def sync_files(paths: Iterable[str | os.PathLike], *, folders: bool = True) -> int:
    """Flush files written with ``sync=False`` to the disk: one ``fsync`` per file,
    then (``folders``) one per distinct parent folder, so the new names survive a
    power cut as well as the bytes.

    Files that have gone meanwhile (a later rebuild removed them) are skipped.
    Returns the number of files flushed. Raises :class:`OSError` if the disk
    reports a write error, which is what a caller must not ignore: the files
    are then not known to be stored.
    """
    parents: dict[str, None] = {}  # insertion-ordered set: folders synced in a stable order
    flushed = 0
    for path in paths:
        try:
            fd = os.open(path, os.O_RDONLY)
        except FileNotFoundError:
            continue
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
        flushed += 1
        parents[os.path.dirname(os.path.abspath(path))] = None
    if folders:
        for folder in parents:
            _sync_folder(folder)
    return flushed


def flush_file_systems(paths: Iterable[str | os.PathLike]) -> int:
    """Flush written files to the disk with one ``syncfs(2)`` per file system
    that holds them (Linux), instead of one ``fsync`` per file and folder.

    ``syncfs`` writes out every dirty page, inode and folder entry of that file
    system, ours among them, in one journal commit: for a library of thousands of
    small files it costs a few milliseconds where a flush per file cost about
    0.5 ms of CPU per structure (measured on the development machine's ext4).
    It also writes out other programs' pending data on the same file system.
    Where ``syncfs`` is missing (not Linux, no C library) or refused, the files
    fall back to :func:`sync_files`. Returns the number of file systems flushed
    (0 after a fallback). Raises :class:`OSError` if the kernel reports a write
    error (Linux 5.8 and later report writeback errors through ``syncfs``).
    """
    paths = list(paths)
    syncfs = _syncfs()
    if syncfs is None:
        sync_files(paths)
        return 0
    devices: dict[int, str] = {}
    for folder in dict.fromkeys(os.path.dirname(os.path.abspath(p)) for p in paths):
        try:
            devices.setdefault(os.stat(folder).st_dev, folder)
        except FileNotFoundError:
            continue  # removed meanwhile, with its files
    for folder in devices.values():
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
        try:
            if syncfs(fd) != 0:
                import ctypes

                code = ctypes.get_errno()
                if code in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):  # refused: flush per file
                    sync_files(paths)
                    return 0
                raise OSError(code, os.strerror(code), folder)
        finally:
            os.close(fd)
    return len(devices)


def _syncfs():
    """The C library's ``syncfs`` as a ctypes function, or None where there is none."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        import ctypes

        function = ctypes.CDLL(None, use_errno=True).syncfs
    except (OSError, AttributeError):
        return None
    function.argtypes = [ctypes.c_int]
    function.restype = ctypes.c_int
    return function


def _sync_folder(folder: str) -> None:
    """fsync a folder's entry list (renames into it); file systems that cannot
    (some network and FUSE ones answer EINVAL or EBADF) are skipped, as rsync
    and git do."""

    try:
        fd = os.open(folder, os.O_RDONLY | getattr(os, "O_DIRECTORY", 0))
    except FileNotFoundError:
        return
    try:
        os.fsync(fd)
    except OSError as exc:
        if exc.errno not in (errno.EINVAL, errno.EBADF, errno.ENOTSUP, errno.EOPNOTSUPP):
            raise
    finally:
        os.close(fd)


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


def is_inside(path: str | os.PathLike, root: str | os.PathLike) -> bool:
    """Whether ``path``, every symbolic link resolved, lies strictly inside ``root``'s real path."""
    real, top = os.path.realpath(path), os.path.realpath(root)
    return real != top and os.path.commonpath([real, top]) == top


def is_within(path: str | os.PathLike, root: str | os.PathLike) -> bool:
    """Whether ``path`` is ``root`` or inside it, symbolic links resolved."""
    real, top = os.path.realpath(path), os.path.realpath(root)  # once each: realpath is slow
    return real == top or os.path.commonpath([real, top]) == top


class StagedFiles:
    """A group of files that appear together or not at all.

    Each file is written to a temporary beside its target; :meth:`commit`
    first checks every target (none may be a folder or sit in a folder that
    cannot be written; with ``replace=False`` none may exist), then moves them
    all into place. Should a move fail midway (or a signal interrupt it), the
    targets already moved are put back from hidden backups, so the group is
    all new or all old. Leaving the ``with`` block by an exception removes
    every temporary.

    Args:
        replace: replace existing targets (``make --force``). With ``False``
            each target is claimed exclusively (a hard link, which fails if the
            name exists), so of two processes writing the same name one wins
            and the other gets an :class:`InputError`.
        root: if given, refuse any target whose folder, symbolic links
            resolved, is not inside ``root`` (a link must not lead writes out).
        sync: flush each file to the disk before the commit (the default).
            ``False`` leaves that to one :func:`sync_files` call over every
            :meth:`commit`'s returned targets (see the module's note).
    """

    def __init__(self, *, replace: bool = True, root: str | os.PathLike | None = None,
                 sync: bool = True) -> None:
        self.replace = replace
        self.root = root
        self.sync = sync
        self._staged: list[tuple[str, Path]] = []
        #: folders found inside ``root`` while staging; :meth:`commit` checks again
        self._inside: set[Path] = set()

    def __enter__(self) -> "StagedFiles":
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.discard()

    @contextlib.contextmanager
    def writer(self, path: str | os.PathLike) -> Iterator[BinaryIO]:
        """A binary handle for ``path``'s content, staged until :meth:`commit`."""
        target = Path(path)
        if target.parent not in self._inside:  # a structure's files share one folder
            self._check_root(target)
            self._inside.add(target.parent)
        fd, tmp_name = _stage(target)
        self._staged.append((tmp_name, target))  # at once: discard() must know it
        with os.fdopen(fd, "wb", buffering=1 << 20) as handle:
            yield handle
            handle.flush()
            if self.sync:
                os.fsync(handle.fileno())
        os.chmod(tmp_name, 0o644)

    def write_bytes(self, path: str | os.PathLike, data: bytes) -> None:
        with self.writer(path) as handle:
            handle.write(data)

    def commit(self) -> list[Path]:
        """Move every staged file into place, all or none; returns the targets
        (for :func:`sync_files` when ``sync`` is off).

        Raises :class:`InputError` naming the target (not a temporary) when a
        target is a folder, its folder is not writable, it exists and
        ``replace`` is off, or a move fails; the targets are then as before.
        """
        staged = list(self._staged)
        folders: set[Path] = set()
        for _, target in staged:
            self._check_target(target, folders)
        if self.replace:
            _commit_replacing(staged)
        else:
            _commit_exclusive(staged)
        self._staged.clear()
        return [target for _, target in staged]

    def discard(self) -> None:
        """Remove the temporaries of files not committed."""
        for tmp_name, _ in self._staged:
            with contextlib.suppress(OSError):
                os.unlink(tmp_name)
        self._staged.clear()

    def _check_root(self, target: Path) -> None:
        if self.root is not None and not is_within(target.parent, self.root):
            raise InputError(f"lies outside {self.root} (through a symbolic link)",
                             file=str(target), hint="remove the link or write elsewhere")

    def _check_target(self, target: Path, folders: set[Path]) -> None:
        """Check one target at commit; its folder only if not in ``folders`` (the
        folders this commit has checked already, which it extends)."""
        parent = target.parent
        if parent not in folders:
            self._check_root(target)
        if os.path.isdir(target) and not os.path.islink(target):
            raise InputError("is a folder, so the new file cannot take its place",
                             file=str(target), hint="move the folder away or choose another name")
        if parent not in folders:
            if not os.access(parent, os.W_OK | os.X_OK):
                raise InputError("cannot be written: its folder is not writable",
                                 file=str(target))
            folders.add(parent)
        if not self.replace and os.path.lexists(target):
            raise _exists(target)


def _exists(target: Path) -> InputError:
    return InputError("already exists", file=str(target), hint="pass --force to replace it")


def _cannot_move(target: Path, exc: OSError) -> InputError:
    return InputError(f"cannot be written ({exc.strerror or exc}); the files written "
                      "with it are left as they were", file=str(target))


def _identity(path: str | os.PathLike) -> tuple[int, int] | None:
    """(device, inode) of ``path`` itself (not a link's target), or None if absent."""
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return None
    return st.st_dev, st.st_ino


def _commit_replacing(staged: list[tuple[str, Path]]) -> None:
    """Move each temporary over its target, keeping the old file aside until all moved."""
    done: list[tuple[Path, str | None, tuple[int, int] | None]] = []
    current = None
    try:
        for tmp_name, target in staged:
            current = target
            new = _identity(tmp_name)
            backup = None
            if os.path.lexists(target):
                fd, backup = _stage(target, BACKUP_SUFFIX)  # reserves a unique name
                os.close(fd)
                try:
                    os.replace(target, backup)
                except BaseException:
                    with contextlib.suppress(OSError):
                        os.unlink(backup)
                    raise
            done.append((target, backup, new))
            os.replace(tmp_name, target)
    except BaseException as exc:
        _roll_back(done)
        if isinstance(exc, OSError):
            raise _cannot_move(current, exc) from None
        raise
    for _, backup, _ in done:
        if backup is not None:
            with contextlib.suppress(OSError):
                os.unlink(backup)


def _roll_back(done: list[tuple[Path, str | None, tuple[int, int] | None]]) -> None:
    """Undo the moves of :func:`_commit_replacing`, last first."""
    for target, backup, new in reversed(done):
        with contextlib.suppress(OSError):
            if backup is not None:
                os.replace(backup, target)
            elif new is not None and _identity(target) == new:
                os.unlink(target)  # the target did not exist before this commit


def _claim(tmp_name: str, target: Path) -> None:
    """Make ``target`` name the temporary's file, failing if ``target`` exists."""

    try:
        os.link(tmp_name, target)
    except FileExistsError:
        raise
    except OSError as exc:
        if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.ENOSYS,
                             errno.EMLINK):
            raise
        # no hard links on this file system: claim the name, then move the file onto it
        os.close(os.open(target, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644))
        os.replace(tmp_name, target)


def _commit_exclusive(staged: list[tuple[str, Path]]) -> None:
    """Claim every target exclusively; on any failure release the ones claimed."""
    claimed: list[tuple[Path, tuple[int, int] | None]] = []
    try:
        for tmp_name, target in staged:
            new = _identity(tmp_name)
            try:
                _claim(tmp_name, target)
            except FileExistsError:
                raise _exists(target) from None
            except OSError as exc:
                raise _cannot_move(target, exc) from None
            claimed.append((target, new))
    except BaseException:
        for target, new in reversed(claimed):
            with contextlib.suppress(OSError):
                if _identity(target) == new:  # still ours: nobody replaced it meanwhile
                    os.unlink(target)
        raise
    for tmp_name, _ in staged:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp_name)


def find_temporaries(root: str | os.PathLike, targets: Iterable[str] | None = None) -> list[str]:
    """Our temporaries and backups under ``root`` (paths relative to it, POSIX, sorted).

    Symbolic links to folders are not followed and hidden folders are skipped.
    """
    root = Path(root)
    found = []
    for folder, dirs, files in os.walk(root):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        found += [(Path(folder) / name).relative_to(root).as_posix()
                  for name in files if is_temporary(name, targets)]
    return sorted(found)


def remove_temporaries(root: str | os.PathLike, targets: Iterable[str] | None = None) -> list[str]:
    """Delete what :func:`find_temporaries` finds; returns the paths removed."""
    removed = []
    for rel in find_temporaries(root, targets):
        path = Path(root) / rel
        if is_inside(path, root) and not path.is_symlink():
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
                removed.append(rel)
    return removed
