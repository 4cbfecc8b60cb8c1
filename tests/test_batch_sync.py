"""`batch --sync end`: the files flushed once, before the manifest, and the same bytes.

Reference: POSIX fsync semantics (common practice, as in databases and git):
data a later record vouches for is flushed before that record is written.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

import cellbuild.fileio as fileio
from cellbuild.batch import build_library
from cellbuild.errors import InputError

REPO = Path(__file__).resolve().parents[1]


def _library(tmp_path: Path) -> Path:
    lib = tmp_path / "lib"
    (lib / "sub").mkdir(parents=True)
    shutil.copy(REPO / "recipes" / "al-host-perfect.yaml", lib)
    shutil.copy(REPO / "recipes" / "al-mg-solutes.yaml", lib / "sub")
    return lib


def test_sync_end_flushes_every_listed_file_once_before_the_manifest(tmp_path, monkeypatch):
    lib = _library(tmp_path)
    calls, fsyncs = [], []
    real_flush, real_fsync = fileio.flush_file_systems, fileio.os.fsync

    def recording_flush(paths):
        paths = list(paths)
        out = lib / "out-end"
        calls.append(([Path(p).relative_to(out).as_posix() for p in paths],
                      (out / "manifest.json").exists()))
        return real_flush(paths)

    monkeypatch.setattr(fileio, "flush_file_systems", recording_flush)
    monkeypatch.setattr(fileio.os, "fsync", lambda fd: fsyncs.append(fd) or real_fsync(fd))
    result = build_library(lib, lib / "out-end", workers=1, sync="end")
    assert result.exit_code == 0
    listed = sorted(info["path"] for e in result.manifest["structures"]
                    for info in e["outputs"].values())
    assert len(calls) == 1
    flushed, manifest_existed = calls[0]
    assert sorted(flushed) == listed and not manifest_existed
    if fileio._syncfs() is not None:
        # one syncfs for the whole library: the manifest's own fsync is the only one
        assert len(fsyncs) == 1
    else:
        # files: one fsync each from sync_files; folders (2) and the manifest add a few
        # more; per-file flushing while writing would have doubled the count
        assert len(fsyncs) <= len(listed) + 2 + 2


def test_sync_end_gives_the_same_manifest_and_bytes(tmp_path):
    lib = _library(tmp_path)
    a = build_library(lib, lib / "out-file", workers=1)
    b = build_library(lib, lib / "out-end", workers=1, sync="end")
    strip = [{k: v for k, v in r.manifest.items() if k != "created"} for r in (a, b)]
    assert strip[0] == strip[1]
    for entry in a.manifest["structures"]:
        for info in entry["outputs"].values():
            assert (lib / "out-file" / info["path"]).read_bytes() == \
                (lib / "out-end" / info["path"]).read_bytes()
    assert json.loads((lib / "out-end" / "manifest.json").read_text())["structures"]


def test_an_unknown_sync_choice_is_bad_input_before_anything_is_written(tmp_path):
    lib = _library(tmp_path)
    with pytest.raises(InputError) as err:
        build_library(lib, lib / "out", workers=1, sync="never")
    assert err.value.key == "--sync"
    assert not (lib / "out").exists()


def test_sync_end_with_workers_elsewhere_flushes_each_file(tmp_path, monkeypatch):
    """Dask workers may write from other machines, whose data this machine's
    syncfs does not reach (syncfs(2) flushes this kernel's pages of one file
    system): each listed file is then flushed on its own, as before syncfs was
    used (fsync(2); on NFS a commit of that file on its server)."""
    from cellbuild.executors import LocalPool

    class Elsewhere(LocalPool):
        kind = "dask"  # stands for workers this process cannot see into

    lib = _library(tmp_path)
    flushed, per_file = [], []
    monkeypatch.setattr(fileio, "flush_file_systems", lambda paths: flushed.append(list(paths)))
    real_sync = fileio.sync_files
    monkeypatch.setattr(fileio, "sync_files",
                        lambda paths, **kw: per_file.append(list(paths)) or real_sync(paths, **kw))
    result = build_library(lib, lib / "out", executor=Elsewhere(1), sync="end")
    assert result.exit_code == 0 and flushed == []
    listed = sorted(info["path"] for e in result.manifest["structures"]
                    for info in e["outputs"].values())
    assert [sorted(Path(p).relative_to(lib / "out").as_posix() for p in per_file[0])] == [listed]
