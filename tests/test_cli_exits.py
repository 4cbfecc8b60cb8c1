"""Exit codes of the real entry point (`cellbuild.cli.main`), as a shell sees them.

0 success, 1 a check failed, 2 bad input (one sentence), 3 a bug (one sentence
asking for a report), 130 / 143 interrupted / terminated, 141 standard output
closed by its reader. 128 + signal number is the shell's convention (common
practice: POSIX shells report a process ended by signal N as 128 + N).
"""
from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import time

import pytest

GOOD = """\
name: cu-small
crystal: {element: Cu, lattice: fcc, a: 3.615}
size: {repeat: [2, 2, 2]}
"""


def _main(argv, capsys):
    from cellbuild.cli import main

    with pytest.raises(SystemExit) as stop:
        main([str(a) for a in argv])
    captured = capsys.readouterr()
    return stop.value.code, captured.out, captured.err


def _cellbuild(*args, **kwargs):
    return [sys.executable, "-m", "cellbuild.cli", *map(str, args)]


def test_a_bug_exits_3_with_one_sentence_not_as_bad_input(tmp_path, capsys, monkeypatch):
    import cellbuild.pipeline as pipeline

    def broken(*args, **kwargs):
        raise TypeError("unsupported operand")  # stands for a programming error

    monkeypatch.setattr(pipeline, "audit", broken)
    recipe = tmp_path / "r.yaml"
    recipe.write_text(GOOD)
    code, out, err = _main(["make", recipe, "--out", tmp_path / "out"], capsys)
    assert code == 3
    assert "bug" in err and "--debug" in err and "TypeError" in err
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


@pytest.mark.parametrize("signal_exc,code,words", [
    (SystemExit(143), 143, "terminated; no partial files were left"),
    (KeyboardInterrupt(), 130, "interrupted; no partial files were left")])
def test_a_signal_met_inside_an_import_ends_the_run_as_the_signal(tmp_path, capsys, monkeypatch,
                                                                  signal_exc, code, words):
    """A signal whose handler raises while a compiled extension initialises (the
    audit's first `import spglib`) reaches the caller as ImportError('initialization
    failed') raised from the handler's exception (seen with SIGTERM mid-build): the
    run ends as the signal asks (128 + signal number, common practice), not as a bug,
    and the staged files are gone."""
    import cellbuild.pipeline as pipeline

    def interrupted_import(*args, **kwargs):
        raise ImportError("initialization failed") from signal_exc

    monkeypatch.setattr(pipeline, "audit", interrupted_import)
    recipe = tmp_path / "r.yaml"
    recipe.write_text(GOOD)
    got, _, err = _main(["make", recipe, "--out", tmp_path / "out"], capsys)
    assert got == code and err.strip() == words
    assert list((tmp_path / "out").iterdir()) == []


def test_a_worker_stops_on_a_signal_met_inside_an_import(tmp_path, monkeypatch):
    """In a batch worker the same ImportError is the signal: the job re-raises the
    handler's exception (so the worker ends), instead of recording a crash and
    building on."""
    import cellbuild.pipeline as pipeline
    from cellbuild.batch import discover, plan_jobs
    from cellbuild.pool import Terminated, build_job

    def interrupted_import(*args, **kwargs):
        raise ImportError("initialization failed") from Terminated(143)

    (tmp_path / "lib").mkdir()
    (tmp_path / "lib" / "r.yaml").write_text(GOOD)
    jobs, failed = plan_jobs(discover(tmp_path / "lib", tmp_path / "out"), tmp_path / "out")
    assert len(jobs) == 1 and not failed
    monkeypatch.setattr(pipeline, "make", interrupted_import)
    with pytest.raises(Terminated):
        build_job(jobs[0])


def test_bad_input_still_exits_2(tmp_path, capsys):
    recipe = tmp_path / "r.yaml"
    recipe.write_text(GOOD.replace("3.615", "-1"))
    code, _, err = _main(["make", recipe, "--out", tmp_path / "out"], capsys)
    assert code == 2 and "crystal.a" in err and len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("argv,words", [
    (["batch", "DIR", "--out", "OUT", "--workers", "0"], ["--workers", "0", "at least 1"]),
    (["verify", "OUT/manifest.json", "--workers", "-1"], ["--workers", "-1"]),
    (["make", "RECIPE"], ["--out"]),
    (["make", "RECIPE", "--out", "OUT", "--bogus"], ["--bogus"]),
    (["batch", "DIR", "--out", "OUT", "--workers", "two"], ["--workers", "two"]),
])
def test_usage_errors_are_one_sentence_exit_2(tmp_path, capsys, argv, words):
    (tmp_path / "DIR").mkdir()
    argv = [str(tmp_path / a) if a in ("DIR", "OUT", "RECIPE", "OUT/manifest.json") else a
            for a in argv]
    code, out, err = _main(argv, capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), err
    assert "╭" not in err and "Usage:" not in err  # no usage box
    for word in words:
        assert word in err


def test_disk_full_names_the_output_folder(tmp_path, capsys, monkeypatch):
    from cellbuild.formats import xyz

    def disk_full(structure, handle, title, options=None):
        raise OSError(errno.ENOSPC, "No space left on device")  # no file name attached

    monkeypatch.setattr(xyz, "write", disk_full)
    recipe = tmp_path / "r.yaml"
    recipe.write_text(GOOD)
    code, _, err = _main(["make", recipe, "--out", tmp_path / "out"], capsys)
    assert code == 2 and "No space left on device" in err, err
    assert "= ''" not in err and str(tmp_path / "out") in err


def test_closed_stdout_is_not_a_failed_check(tmp_path):
    # `cellbuild plan ... | head -0`: the reader closes the pipe before we write
    recipe = tmp_path / "r.yaml"
    recipe.write_text(GOOD)
    proc = subprocess.Popen(_cellbuild("plan", recipe), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=60) == 141, err
    assert "Traceback" not in err


def test_sigterm_mid_build_leaves_no_partial_files(tmp_path):
    # 2,048,000 fcc atoms: a few seconds of work, long enough to be stopped midway
    recipe = tmp_path / "big.yaml"
    recipe.write_text(GOOD.replace("repeat: [2, 2, 2]", "repeat: [80, 80, 80]")
                      + "outputs: [lammps-data, xyz]\n")
    out = tmp_path / "out"
    proc = subprocess.Popen(_cellbuild("make", recipe, "--out", out),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    while not (out.is_dir() and any(out.iterdir())) and time.monotonic() < deadline:
        if proc.poll() is not None:
            break
        time.sleep(0.02)  # wait until the first staged file exists
    proc.send_signal(signal.SIGTERM)
    code = proc.wait(timeout=60)
    err = proc.stderr.read().decode()
    if code == 0:
        pytest.skip("the build finished before the signal arrived (a very fast machine)")
    assert code == 143, err
    assert "terminated" in err
    left = sorted(os.listdir(out)) if out.is_dir() else []
    assert left == [], left  # neither temporaries nor a partial set


def test_two_makes_without_force_racing_for_one_name_one_refuses(tmp_path):
    # issue reproduction: same name, same folder, no --force, started together
    recipe = tmp_path / "r.yaml"
    recipe.write_text(GOOD.replace("repeat: [2, 2, 2]", "repeat: [30, 30, 30]"))
    procs = [subprocess.Popen(_cellbuild("make", recipe, "--out", tmp_path / "out"),
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE) for _ in range(2)]
    codes = sorted(p.wait(timeout=120) for p in procs)
    errors = b"".join(p.stderr.read() for p in procs).decode()
    assert codes == [0, 2], errors
    assert "already exist" in errors
