"""Durability as a choice: per-file fsync (the default) or one sync at the end.

The expectations are POSIX semantics and common practice: fsync(2) flushes a
file's bytes, a rename is durable once its folder is fsynced (fsync(2) man
page, "calling fsync() does not necessarily ensure that the entry in the
directory containing the file has also reached disk"), and atomicity of
rename(2) does not depend on fsync (readers see old or new bytes either way);
syncfs(2) (Linux man page) flushes the whole file system holding a descriptor's
file and, since Linux 5.8, reports writeback errors.
"""
from __future__ import annotations

import errno
import os
import stat

import pytest

from cellbuild import fileio
from cellbuild.errors import InputError
from cellbuild.fileio import StagedFiles, atomic_writer, sync_files, write_bytes_atomic


@pytest.fixture
def fsyncs(monkeypatch):
    """Record every fsync: (is a folder, path of the descriptor)."""
    calls = []
    real = os.fsync

    def spy(fd):
        calls.append((stat.S_ISDIR(os.fstat(fd).st_mode), os.readlink(f"/proc/self/fd/{fd}")))
        return real(fd)

    monkeypatch.setattr(fileio.os, "fsync", spy)
    return calls


def _write_set(folder, sync):
    with StagedFiles(sync=sync) as staged:
        for name in ("a.lmp", "a.cif", "a.report.json"):
            staged.write_bytes(folder / name, name.encode() * 100)
        return staged.commit()


def test_default_flushes_every_file_before_it_is_renamed(tmp_path, fsyncs):
    """Today's behaviour stays the default: one fsync per staged file, none of a folder."""
    targets = _write_set(tmp_path, sync=True)
    assert [t.name for t in targets] == ["a.lmp", "a.cif", "a.report.json"]
    assert len(fsyncs) == 3 and not any(is_dir for is_dir, _ in fsyncs)
    write_bytes_atomic(tmp_path / "m.json", b"{}")
    assert len(fsyncs) == 4


def test_without_sync_the_same_bytes_and_names_appear_with_no_flush(tmp_path, fsyncs):
    (tmp_path / "synced").mkdir()
    (tmp_path / "unsynced").mkdir()
    _write_set(tmp_path / "synced", sync=True)
    fsyncs.clear()
    _write_set(tmp_path / "unsynced", sync=False)
    with atomic_writer(tmp_path / "unsynced" / "m.json", sync=False) as handle:
        handle.write(b"{}")
    assert fsyncs == []
    synced = {p.name: p.read_bytes() for p in (tmp_path / "synced").iterdir()}
    unsynced = {p.name: p.read_bytes() for p in (tmp_path / "unsynced").iterdir()}
    assert unsynced.pop("m.json") == b"{}"
    assert synced == unsynced  # no temporaries left either: the same names exactly
    assert all(oct(os.stat(p).st_mode & 0o777) == "0o644"
               for p in (tmp_path / "unsynced").iterdir())


def test_sync_files_flushes_each_file_then_each_folder_once(tmp_path, fsyncs):
    (tmp_path / "x").mkdir()
    (tmp_path / "y").mkdir()
    written = _write_set(tmp_path / "x", sync=False) + _write_set(tmp_path / "y", sync=False)
    fsyncs.clear()
    assert sync_files(written) == 6
    files = [path for is_dir, path in fsyncs if not is_dir]
    folders = [path for is_dir, path in fsyncs if is_dir]
    assert sorted(files) == sorted(os.path.realpath(p) for p in written)
    assert folders == [os.path.realpath(tmp_path / "x"), os.path.realpath(tmp_path / "y")]


def test_sync_files_skips_files_removed_meanwhile_and_can_leave_folders(tmp_path, fsyncs):
    written = _write_set(tmp_path, sync=False)
    written[0].unlink()
    fsyncs.clear()
    assert sync_files(written, folders=False) == 2
    assert len(fsyncs) == 2 and not any(is_dir for is_dir, _ in fsyncs)


def test_a_folder_that_cannot_be_synced_is_skipped_but_a_disk_error_is_not(tmp_path,
                                                                        monkeypatch):
    """EINVAL from fsync of a folder (some network file systems) is skipped, as git
    and rsync do; EIO means the bytes are not known to be stored and must surface."""
    written = _write_set(tmp_path, sync=False)
    real = os.fsync

    def failing(code):
        def fsync(fd):
            if stat.S_ISDIR(os.fstat(fd).st_mode):
                raise OSError(code, os.strerror(code))
            return real(fd)
        return fsync

    monkeypatch.setattr(fileio.os, "fsync", failing(errno.EINVAL))
    assert sync_files(written) == 3
    monkeypatch.setattr(fileio.os, "fsync", failing(errno.EIO))
    with pytest.raises(OSError) as caught:
        sync_files(written)
    assert caught.value.errno == errno.EIO


# --------------------------------------------------------- folder checks done once, same answers


def _old_is_within(path, root) -> bool:
    """The definition before the check was made cheaper (realpath four times)."""
    real, top = os.path.realpath(path), os.path.realpath(root)
    inside = real != top and os.path.commonpath([real, top]) == top
    return os.path.realpath(path) == os.path.realpath(root) or inside


def test_is_within_answers_as_before(tmp_path):
    """POSIX path resolution (realpath(3)): links resolved, `..` after them."""
    from cellbuild.fileio import is_within

    root = tmp_path / "root"
    (root / "a" / "b").mkdir(parents=True)
    (tmp_path / "out").mkdir()
    (root / "up").symlink_to(tmp_path / "out")
    (root / "self").symlink_to(root)
    (tmp_path / "rootx").mkdir()  # shares a prefix with root, lies outside it
    cases = [root, root / "a", root / "a" / "b", root / "up", root / "self", root / "self" / "a",
             root / "a" / ".." / "..", tmp_path / "rootx", tmp_path, root / "missing" / "x",
             root / "up" / ".." / "root"]
    answers = [is_within(path, root) for path in cases]
    assert answers == [_old_is_within(path, root) for path in cases]
    assert answers[:3] == [True, True, True] and answers[3] is False and answers[8] is False


def test_a_link_swapped_in_after_writing_is_still_refused_at_commit(tmp_path):
    """The folder check while staging is done once per folder; the commit checks
    again, so a folder replaced by a link out of root meanwhile is refused."""
    root = tmp_path / "root"
    (root / "sub").mkdir(parents=True)
    outside = tmp_path / "outside"
    outside.mkdir()
    with pytest.raises(InputError, match="outside"):
        with StagedFiles(root=root) as staged:
            staged.write_bytes(root / "sub" / "x.lmp", b"data")
            staged.write_bytes(root / "sub" / "y.lmp", b"data")
            os.rename(root / "sub", tmp_path / "moved")
            (root / "sub").symlink_to(outside)
            staged.commit()
    assert list(outside.iterdir()) == []


def test_flush_file_systems_syncs_each_file_system_once(tmp_path, fsyncs, monkeypatch):
    (tmp_path / "x").mkdir()
    (tmp_path / "y").mkdir()
    written = _write_set(tmp_path / "x", sync=False) + _write_set(tmp_path / "y", sync=False)
    real = fileio._syncfs()
    if real is None:
        pytest.skip("no syncfs here (not Linux)")
    flushed = []
    monkeypatch.setattr(fileio, "_syncfs", lambda: lambda fd: flushed.append(
        os.fstat(fd).st_dev) or real(fd))
    fsyncs.clear()
    assert fileio.flush_file_systems(written) == 1
    assert flushed == [os.stat(tmp_path).st_dev] and fsyncs == []  # one flush, no fsync


def test_flush_file_systems_without_syncfs_flushes_each_file(tmp_path, fsyncs, monkeypatch):
    written = _write_set(tmp_path, sync=False)
    monkeypatch.setattr(fileio, "_syncfs", lambda: None)
    fsyncs.clear()
    assert fileio.flush_file_systems(written) == 0
    assert sorted(p for is_dir, p in fsyncs if not is_dir) == sorted(
        os.path.realpath(p) for p in written)
    assert [p for is_dir, p in fsyncs if is_dir] == [os.path.realpath(tmp_path)]


@pytest.mark.parametrize("code,falls_back", [(errno.EIO, False), (errno.ENOSYS, True)])
def test_flush_file_systems_reports_a_write_error_and_falls_back_when_refused(
        tmp_path, fsyncs, monkeypatch, code, falls_back):
    import ctypes

    written = _write_set(tmp_path, sync=False)

    def failing(fd):
        ctypes.set_errno(code)
        return -1

    monkeypatch.setattr(fileio, "_syncfs", lambda: failing)
    fsyncs.clear()
    if falls_back:
        assert fileio.flush_file_systems(written) == 0
        assert len([p for is_dir, p in fsyncs if not is_dir]) == len(written)
    else:
        with pytest.raises(OSError) as err:
            fileio.flush_file_systems(written)
        assert err.value.errno == errno.EIO
