"""`batch` and `verify` stay inside the library, whatever a manifest or a link says.

Hostile manifests run in a subprocess with a time limit (``timeout=``) and an
address-space limit (``RLIMIT_AS``), so a regression fails instead of hanging
or swapping. The expected behaviour is the POSIX meaning of paths and links
(realpath(3)); the atom count 32 = 4 atoms per fcc conventional cell x 2x2x2
(Kittel, ch. 1).
"""
from __future__ import annotations

import json
import os
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

from conftest import recipe_dict

SECRET = "hunter2-do-not-print"


def _write(path: Path, data) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(data if isinstance(data, str) else yaml.safe_dump(data, sort_keys=False))
    return path


def _manifest(out: Path) -> dict:
    return json.loads((out / "manifest.json").read_text())


def _save(out: Path, manifest: dict) -> None:
    (out / "manifest.json").write_text(json.dumps(manifest, indent=2, sort_keys=True))


def run_cli(*args, timeout: float = 60, memory: int = 3 << 30, env: dict | None = None,
            extra_limits=None) -> subprocess.CompletedProcess:
    """The command line in a subprocess, bounded in time and address space."""
    def limits():
        resource.setrlimit(resource.RLIMIT_AS, (memory, memory))
        if extra_limits:
            extra_limits()

    return subprocess.run([sys.executable, "-m", "cellbuild.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=timeout, preexec_fn=limits,
                          env={**os.environ, **(env or {})})


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """lib/cu.yaml (and lib/sub/w.yaml) built once into out/ (one worker, in-process)."""
    from cellbuild.batch import build_library

    root = tmp_path_factory.mktemp("safe")
    _write(root / "lib" / "cu.yaml", recipe_dict(outputs=["xyz"]))
    _write(root / "lib" / "sub" / "w.yaml", recipe_dict("W", "bcc", 3.165, outputs=["poscar"]))
    result = build_library(root / "lib", root / "out", workers=1)
    assert result.exit_code == 0
    return root


@pytest.fixture
def lib(built, tmp_path):
    """A private copy: tmp/lib (recipes), tmp/out (library)."""
    shutil.copytree(built / "lib", tmp_path / "lib")
    shutil.copytree(built / "out", tmp_path / "out")
    return tmp_path


# ----------------------------------------------------------------------------- 1: batch


def test_stale_removal_does_not_follow_a_link_out_of_the_library(lib, cli):
    victim = lib / "elsewhere"
    _write(victim / "precious.xyz", "1\n\nCu 0 0 0\n")
    (lib / "out" / "link").symlink_to(victim, target_is_directory=True)
    manifest = _manifest(lib / "out")
    entry = dict(manifest["structures"][0], name="ghost",
                 outputs={"xyz": {"path": "link/precious.xyz", "sha256": "0" * 64, "bytes": 1}})
    manifest["structures"].append(entry)
    _save(lib / "out", manifest)
    result = cli("batch", lib / "lib", "--out", lib / "out", "--workers", "1")
    assert result.exit_code == 0, result.output
    assert (victim / "precious.xyz").read_text() == "1\n\nCu 0 0 0\n"
    assert "removed" not in result.output


def test_a_subfolder_linked_out_of_the_library_is_refused_before_building(lib, cli):
    outside = lib / "outside"
    outside.mkdir()
    shutil.rmtree(lib / "out" / "sub")
    (lib / "out" / "sub").symlink_to(outside, target_is_directory=True)
    before = _manifest(lib / "out")
    result = cli("batch", lib / "lib", "--out", lib / "out", "--workers", "1")
    assert result.exit_code == 2
    assert "sub" in result.output and "symbolic link" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert list(outside.iterdir()) == []
    assert _manifest(lib / "out") == before


def test_batch_refuses_recipes_outside_the_folder_holding_out(tmp_path, cli):
    """The rule verify applies (recipes beside or inside the library), checked up front."""
    _write(tmp_path / "a" / "lib" / "cu.yaml", recipe_dict(outputs=["xyz"]))
    result = cli("batch", tmp_path / "a" / "lib", "--out", tmp_path / "b" / "c" / "out")
    assert result.exit_code == 2
    assert "`DIR`" in result.output and "verify" in result.output
    assert not (tmp_path / "b").exists()


# ----------------------------------------------------------------------------- 2: verify


def _poison(lib: Path, **changes) -> None:
    manifest = _manifest(lib / "out")
    for key, value in changes.items():
        if key == "source":
            manifest["source"] = value
        else:
            manifest["structures"][0][key] = value
    _save(lib / "out", manifest)


@pytest.mark.parametrize("changes, field", [
    ({"recipe": "/etc/passwd"}, "structures[0].recipe"),
    ({"recipe": "../../../../../../../../etc/passwd"}, "structures[0].recipe"),
    ({"recipe": "../secrets.yaml"}, "structures[0].recipe"),
    ({"source": "/"}, "source"),
    ({"source": "../../../../../../../.."}, "source"),
    ({"source": "..", "recipe": "../../secrets.yaml"}, "structures[0].recipe"),
    ({"outputs": {"xyz": {"path": "link/x.xyz", "sha256": "0" * 64, "bytes": 1}}},
     "structures[0].outputs.xyz.path"),
])
def test_verify_refuses_a_manifest_naming_files_outside_the_library(lib, changes, field):
    _write(lib / "secrets.yaml", recipe_dict(name="s") | {"api_token": SECRET})
    _write(lib.parent / "secrets.yaml", {"api_token": SECRET})
    outside = lib / "outside"
    _write(outside / "x.xyz", "1\n\nCu 0 0 0\n")
    (lib / "out" / "link").symlink_to(outside, target_is_directory=True)
    _poison(lib, **changes)
    start = time.monotonic()
    result = run_cli("verify", lib / "out" / "manifest.json", "--workers", "1", timeout=60)
    assert time.monotonic() - start < 30  # no walk of the whole file system
    assert result.returncode == 2, result.stdout + result.stderr
    assert f"`{field}`" in result.stderr and "refused" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
    assert SECRET not in result.stdout + result.stderr
    assert "root:" not in result.stdout + result.stderr  # nothing of /etc/passwd


def test_the_batch_layout_recipes_beside_the_library_still_verifies(lib, cli):
    assert _manifest(lib / "out")["source"] == "../lib"
    result = cli("verify", lib / "out", "--workers", "1")
    assert result.exit_code == 0, result.output


def test_recipes_in_the_folder_holding_the_library_build_and_verify(tmp_path, cli):
    """`batch . --out library`: the source is the library's parent, `..`."""
    _write(tmp_path / "cu.yaml", recipe_dict(outputs=["xyz"]))
    result = cli("batch", tmp_path, "--out", tmp_path / "library", "--workers", "1")
    assert result.exit_code == 0, result.output
    assert _manifest(tmp_path / "library")["source"] == ".."
    assert cli("verify", tmp_path / "library", "--workers", "1").exit_code == 0


# ----------------------------------------------------------------------------- 5: targets


def test_a_folder_where_the_manifest_goes_is_refused_before_building(tmp_path, cli):
    _write(tmp_path / "lib" / "cu.yaml", recipe_dict(outputs=["xyz"]))
    (tmp_path / "out" / "manifest.json").mkdir(parents=True)
    result = cli("batch", tmp_path / "lib", "--out", tmp_path / "out", "--workers", "1")
    assert result.exit_code == 2
    assert "manifest.json" in result.output and "folder" in result.output
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["manifest.json"]


def test_leftover_temporaries_are_reported_by_verify_and_removed_by_batch(lib, cli):
    leftover = lib / "out" / "sub" / ".w-bcc.vasp.k3j9x0q_.part"
    leftover.write_bytes(b"half a file")
    other = lib / "out" / ".notes.part"  # not one of ours: left alone
    other.write_bytes(b"kept")
    result = cli("verify", lib / "out", "--workers", "1")
    assert result.exit_code == 1
    assert "sub/.w-bcc.vasp.k3j9x0q_.part: leftover temporary" in result.output
    assert ".notes.part" not in result.output
    result = cli("batch", lib / "lib", "--out", lib / "out", "--workers", "1")
    assert result.exit_code == 0, result.output
    assert not leftover.exists() and other.read_bytes() == b"kept"
    assert cli("verify", lib / "out", "--workers", "1").exit_code == 0


# ----------------------------------------------------------------------------- 6: messages


def test_a_full_scratch_folder_is_an_environment_problem_not_a_recipe_one(lib, cli, monkeypatch):
    """TMPDIR with no free space (shutil.disk_usage reports 0 bytes free)."""
    import collections
    import shutil as shutil_module

    scratch = lib / "scratch"
    scratch.mkdir()
    monkeypatch.setenv("TMPDIR", str(scratch))
    monkeypatch.setattr("tempfile.tempdir", None)  # re-read TMPDIR
    usage = collections.namedtuple("usage", "total used free")
    monkeypatch.setattr(shutil_module, "disk_usage", lambda path: usage(10**9, 10**9, 0))
    result = cli("verify", lib / "out", "--workers", "1")
    assert result.exit_code == 2, result.output
    assert "`TMPDIR`" in result.output and str(scratch) in result.output
    assert "outcome changed" not in result.output and "cu.yaml" not in result.output
    assert len(result.output.strip().splitlines()) == 1


def test_a_write_error_in_the_scratch_folder_names_the_folder(lib):
    """A real OSError while the rebuild writes: RLIMIT_FSIZE of 1 kB (SIGXFSZ ignored),
    so every output of more than 1 kB fails with EFBIG, as a full disk fails with ENOSPC."""
    import signal

    scratch = lib / "scratch"
    scratch.mkdir()

    def small_files():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (1024, 1024))

    # the disk pre-check passes (there is room); the writes themselves fail
    result = run_cli("verify", lib / "out", "--workers", "1", env={"TMPDIR": str(scratch)},
                     extra_limits=small_files)
    assert result.returncode == 2, result.stdout + result.stderr
    assert "`TMPDIR`" in result.stderr and str(scratch) in result.stderr
    assert "cu.yaml" not in result.stdout + result.stderr
    assert list(scratch.iterdir()) == []  # the scratch folder is cleaned up


def test_a_duplicated_entry_is_refused(lib, cli):
    manifest = _manifest(lib / "out")
    manifest["structures"].append(manifest["structures"][0])
    _save(lib / "out", manifest)
    result = cli("verify", lib / "out", "--workers", "1")
    assert result.exit_code == 2
    assert "structures[2]" in result.output and "cu-fcc" in result.output
    assert "repeats" in result.output


def test_a_manifest_of_another_cellbuild_version_is_a_difference(lib, cli):
    manifest = _manifest(lib / "out")
    manifest["cellbuild"] = "0.0.1-edited"
    _save(lib / "out", manifest)
    result = cli("verify", lib / "out", "--workers", "1")
    assert result.exit_code == 1
    assert "manifest.json: other cellbuild version" in result.output
    assert "0.0.1-edited" in result.output


def _dev_zero(tmp_path: Path) -> Path:
    return Path("/dev/zero")


def _one_gigabyte(tmp_path: Path) -> Path:
    path = tmp_path / "manifest.json"
    with open(path, "wb") as handle:  # sparse: no disk space used
        handle.truncate(1 << 30)
    return path


def _deep(tmp_path: Path) -> Path:
    return _write(tmp_path / "manifest.json", "[" * 200_000 + "]" * 200_000)


def _huge_float(tmp_path: Path) -> Path:
    return _write(tmp_path / "manifest.json",
                  '{"cellbuild": "0.1.0", "source": ".", "structures": [], "n": 1e999}')


def _long_int(tmp_path: Path) -> Path:
    return _write(tmp_path / "manifest.json", '{"cellbuild": "0.1.0", "source": ".", '
                  '"structures": [{"name": "x", "recipe": "x.yaml", "outputs": {}, '
                  f'"seed": {"9" * 60}}}]}}')


@pytest.mark.parametrize("make, words", [
    (_dev_zero, "not a regular file"),
    (_one_gigabyte, "larger than 200 MB"),
    (_deep, "nests too deeply"),
    (_huge_float, "out of range"),
    (_long_int, "digits"),
])
def test_hostile_manifest_files_exit_2_quickly_in_one_sentence(tmp_path, make, words):
    start = time.monotonic()
    result = run_cli("verify", make(tmp_path), timeout=60, memory=2 << 30)
    assert time.monotonic() - start < 30
    assert result.returncode == 2, result.stderr
    assert words in result.stderr and "Traceback" not in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1


# ----------------------------------------------------------------------------- 7: wording


def test_a_stray_file_is_called_unlisted_without_guessing_who_wrote_it(lib, cli):
    (lib / "out" / "stray.lmp").write_bytes(b"")
    result = cli("verify", lib / "out", "--workers", "1")
    assert result.exit_code == 1
    line = next(line for line in result.output.splitlines() if line.startswith("stray.lmp: "))
    assert "extra" in line and "not listed in the manifest" in line
    assert "cellbuild output" not in line


def test_a_huge_recipe_file_fails_its_entry_quickly(tmp_path):
    """A 4 GB .yaml (sparse) is one failed entry, not a hang or an exhausted memory:
    the recipe is read, and hashed, at most 2 MiB + 1 byte."""
    recipes = tmp_path / "lib"
    _write(recipes / "good.yaml", recipe_dict())
    with open(recipes / "endless.yaml", "wb") as handle:  # sparse: no disk space used
        handle.truncate(4 << 30)
    start = time.monotonic()
    result = run_cli("batch", recipes, "--out", tmp_path / "out", "--workers", "1",
                     timeout=60, memory=2 << 30)
    assert time.monotonic() - start < 30
    assert "Traceback" not in result.stderr
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    errors = {e["name"]: e.get("error") for e in manifest["structures"]}
    assert errors.get("cu-fcc") is None, manifest
    assert "too large" in (errors.get("endless") or ""), manifest
