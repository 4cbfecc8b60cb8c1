"""Staged file sets: all new or all old, exclusive names, no temporaries left.

The expectations are POSIX file-system semantics (rename(2) replaces a file
atomically, link(2) fails with EEXIST when the name exists) and the shapes of
the outputs themselves; no numeric physics here.
"""
from __future__ import annotations

import multiprocessing
import os
from pathlib import Path

import pytest
import yaml

from cellbuild.errors import InputError
from cellbuild.fileio import StagedFiles, find_temporaries, is_temporary
from conftest import recipe_dict


def _hidden(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in folder.iterdir() if p.is_file()}


def _stage_set(folder: Path, names, content: bytes, **options) -> None:
    with StagedFiles(**options) as staged:
        for name in names:
            staged.write_bytes(folder / name, content + name.encode())
        staged.commit()


NAMES = ("t.lmp", "t.cif", "t.xyz", "t.vasp", "t.report.json")


# ----------------------------------------------------------------------------- point 3


def test_a_folder_in_the_way_is_refused_before_any_file_changes(tmp_path):
    """`make --force` with `t.xyz` being a folder: every target checked before the first
    rename, so t.lmp and t.cif keep their old bytes and the message names t.xyz."""
    from cellbuild.pipeline import make
    from cellbuild.recipe import parse_recipe

    def recipe(seed):
        return parse_recipe(recipe_dict(name="t", seed=seed, defects={"vacancies": {"count": 1}},
                                        outputs=["lammps-data", "cif", "xyz", "poscar"]))

    make(recipe(1), tmp_path, force=True)
    (tmp_path / "t.xyz").unlink()
    (tmp_path / "t.xyz").mkdir()
    before = _snapshot(tmp_path)
    with pytest.raises(InputError) as caught:
        make(recipe(2), tmp_path, force=True)  # another seed: other vacancy, other bytes
    message = str(caught.value)
    assert "t.xyz" in message and "is a folder" in message
    assert ".part" not in message
    assert _snapshot(tmp_path) == before
    assert _hidden(tmp_path) == []


def test_a_failure_mid_commit_puts_the_old_files_back(tmp_path, monkeypatch):
    """A rename that fails after two succeeded (simulated: the third rename raises
    ENOSPC) rolls the first two back: the set stays all old, no backups remain."""
    import cellbuild.fileio as fileio

    _stage_set(tmp_path, NAMES, b"old ")
    real_replace = os.replace

    def failing_replace(src, dst):
        if Path(dst).name == "t.xyz" and Path(src).name.endswith(".part"):
            raise OSError(28, "No space left on device", str(src))
        return real_replace(src, dst)

    monkeypatch.setattr(fileio.os, "replace", failing_replace)
    with pytest.raises(InputError) as caught:
        _stage_set(tmp_path, NAMES, b"new ")
    assert "t.xyz" in str(caught.value) and "No space left" in str(caught.value)
    assert ".part" not in str(caught.value)
    assert _snapshot(tmp_path) == {n: b"old " + n.encode() for n in NAMES}
    assert _hidden(tmp_path) == []


def test_an_interrupt_mid_commit_puts_the_old_files_back(tmp_path, monkeypatch):
    """KeyboardInterrupt (what SIGTERM becomes) between two renames: all old again."""
    import cellbuild.fileio as fileio

    _stage_set(tmp_path, NAMES, b"old ")
    real_replace = os.replace

    def interrupted(src, dst):
        if Path(dst).name == "t.vasp" and Path(src).name.endswith(".part"):
            raise KeyboardInterrupt
        return real_replace(src, dst)

    monkeypatch.setattr(fileio.os, "replace", interrupted)
    with pytest.raises(KeyboardInterrupt):
        _stage_set(tmp_path, NAMES, b"new ")
    assert _snapshot(tmp_path) == {n: b"old " + n.encode() for n in NAMES}
    assert _hidden(tmp_path) == []


def test_new_files_replace_old_ones_and_leave_nothing_hidden(tmp_path):
    _stage_set(tmp_path, NAMES[:2], b"old ")
    _stage_set(tmp_path, NAMES, b"new ")
    assert _snapshot(tmp_path) == {n: b"new " + n.encode() for n in NAMES}
    assert _hidden(tmp_path) == []


def test_a_folder_that_cannot_be_written_is_refused_naming_the_target(tmp_path):
    if os.geteuid() == 0:
        pytest.skip("root writes into read-only folders")
    sub = tmp_path / "sub"
    sub.mkdir()
    (sub / "a.lmp").write_bytes(b"old")
    with pytest.raises(InputError, match="a.lmp.*not writable"):
        with StagedFiles() as staged:
            staged.write_bytes(tmp_path / "b.lmp", b"new")
            staged.write_bytes(sub / "a.lmp", b"new")  # staged before the folder turns read-only
            sub.chmod(0o500)
            try:
                staged.commit()
            finally:
                sub.chmod(0o700)
    assert not (tmp_path / "b.lmp").exists() and (sub / "a.lmp").read_bytes() == b"old"


def test_a_target_reached_through_a_link_out_of_root_is_refused(tmp_path):
    outside = tmp_path / "outside"
    outside.mkdir()
    root = tmp_path / "root"
    root.mkdir()
    (root / "sub").symlink_to(outside)
    with pytest.raises(InputError, match="outside"):
        with StagedFiles(root=root) as staged:
            staged.write_bytes(root / "sub" / "x.lmp", b"data")
    assert list(outside.iterdir()) == []


# ----------------------------------------------------------------------------- point 4


def test_exclusive_commit_refuses_an_existing_name_and_undoes_the_others(tmp_path):
    (tmp_path / "t.xyz").write_bytes(b"someone else's")
    with pytest.raises(InputError) as caught:
        _stage_set(tmp_path, NAMES, b"mine ", replace=False)
    message = str(caught.value)
    assert "t.xyz" in message and "already exists" in message and "--force" in message
    assert _snapshot(tmp_path) == {"t.xyz": b"someone else's"}
    assert _hidden(tmp_path) == []


def test_exclusive_commit_loses_a_race_cleanly(tmp_path, monkeypatch):
    """The name appears between the check and the claim (another process won): the
    link fails with EEXIST, the names claimed so far are released."""
    import cellbuild.fileio as fileio

    real_link = os.link

    def racing_link(src, dst):
        if Path(dst).name == "t.vasp":
            Path(dst).write_bytes(b"winner")
        return real_link(src, dst)

    monkeypatch.setattr(fileio.os, "link", racing_link)
    with pytest.raises(InputError, match="t.vasp.*already exists"):
        _stage_set(tmp_path, NAMES, b"loser ", replace=False)
    assert _snapshot(tmp_path) == {"t.vasp": b"winner"}
    assert _hidden(tmp_path) == []


def _racer(folder: str, tag: str, barrier, results) -> None:
    """One of two processes committing the same names at the same moment."""
    folder = Path(folder)
    try:
        with StagedFiles(replace=False) as staged:
            for name in NAMES:
                staged.write_bytes(folder / name, tag.encode())
            barrier.wait(timeout=20)
            staged.commit()
        results.put((tag, "ok"))
    except InputError as exc:
        results.put((tag, str(exc)))


@pytest.mark.parametrize("attempt", range(3))
def test_two_processes_racing_for_the_same_names_one_wins_whole(tmp_path, attempt):
    context = multiprocessing.get_context("fork")
    barrier, results = context.Barrier(2), context.Queue()
    racers = [context.Process(target=_racer, args=(str(tmp_path), tag, barrier, results))
              for tag in ("A", "B")]
    for p in racers:
        p.start()
    for p in racers:
        p.join(timeout=30)
        assert p.exitcode == 0
    outcome = dict(results.get(timeout=5) for _ in racers)
    winners = [tag for tag, text in outcome.items() if text == "ok"]
    assert len(winners) == 1, outcome
    loser = ({"A", "B"} - set(winners)).pop()
    assert "already exists" in outcome[loser] and "--force" in outcome[loser]
    # the set on disk is entirely the winner's
    assert _snapshot(tmp_path) == {n: winners[0].encode() for n in NAMES}
    assert _hidden(tmp_path) == []


def test_two_makes_without_force_racing_one_is_refused(tmp_path):
    """Two `make` runs of one name into one folder, released together: one exits with
    'already exists'."""
    context = multiprocessing.get_context("fork")
    barrier, results = context.Barrier(2), context.Queue()
    recipe = tmp_path / "r.yaml"
    recipe.write_text(yaml.safe_dump(recipe_dict(name="t", outputs=["xyz", "cif"])))

    def run(tag):
        from cellbuild.pipeline import make_file

        barrier.wait(timeout=20)
        try:
            make_file(recipe, tmp_path / "out", force=False)
            results.put((tag, "ok"))
        except InputError as exc:
            results.put((tag, str(exc)))

    racers = [context.Process(target=run, args=(tag,)) for tag in ("A", "B")]
    for p in racers:
        p.start()
    for p in racers:
        p.join(timeout=60)
    outcome = dict(results.get(timeout=5) for _ in racers)
    assert sorted(text == "ok" for text in outcome.values()) == [False, True], outcome
    assert any("already exist" in text for text in outcome.values())


# ----------------------------------------------------------------------------- names


def test_temporary_names_are_recognised(tmp_path):
    import tempfile

    fd, name = tempfile.mkstemp(prefix=".cu.lmp.", suffix=".part", dir=tmp_path)
    os.close(fd)
    assert is_temporary(Path(name).name, (".lmp",))
    assert not is_temporary(Path(name).name, (".cif",))
    assert not is_temporary("cu.lmp") and not is_temporary(".notes.part")
    assert find_temporaries(tmp_path) == [Path(name).name]
