"""The command line without pydantic behaves exactly as Typer's own coercion.

Reference: Typer itself. Each command line runs through :func:`cellbuild.cli.main`
twice, once with the primed command of :mod:`cellbuild.cli_coerce` and once with
``typer.main.get_command(app)`` (what ``app(...)`` runs, values coerced by
Typer's pydantic adapters); exit code, standard output, standard error and the
files written must be the same. Start-up cost itself is measured by
benchmarks/bench_startup.py, not here.
"""
from __future__ import annotations

import signal
import subprocess
import sys
from pathlib import Path

import pytest
import typer.main

from cellbuild import cli, cli_coerce

ROOT = Path(__file__).resolve().parent.parent
RECIPE = str(ROOT / "recipes" / "al-host-perfect.yaml")
#: A small structure file (an extended XYZ of 4 fcc atoms, written here by hand
#: with the conventional cell of a = 3.6 A).
STRUCTURE = str(ROOT / "tests" / "data" / "fcc-cell.xyz")
SMALL = ("name: small\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\nsize: {repeat: 2}\n"
         "seed: 1\noutputs: [lammps-data, xyz]\ndefects: {vacancies: {count: 1}}\n")


def _run(argv, capsys, monkeypatch, primed: bool):
    if not primed:
        monkeypatch.setattr(cli_coerce, "command", typer.main.get_command)
    previous = signal.getsignal(signal.SIGTERM)
    try:
        cli.main(argv)
        code = 0
    except SystemExit as exc:
        code = exc.code
    finally:
        signal.signal(signal.SIGTERM, previous)
        monkeypatch.undo()
    out, err = capsys.readouterr()
    return code, out, err


@pytest.mark.parametrize("argv", [
    ["--help"], ["make", "--help"], ["batch", "--help"], ["inspect", "--help"],
    [], ["plan"], ["plan", RECIPE], ["plan", RECIPE, "--json", "--strict"],
    ["plan", "no-such-recipe.yaml"], ["plan", ""], ["plan", "--bogus"], ["plan", RECIPE, RECIPE],
    ["template", "fcc"], ["template", "nothing"], ["make", RECIPE], ["make", "--out", "x"],
    ["inspect", RECIPE, "--cutoff", "abc"], ["inspect", "no-such-file.xyz"],
    *(["inspect", STRUCTURE, "--cutoff", text, "--json"] for text in
      ("3.0", "-2", "2.5e0", "1E1", "0", "inf", "nan", "1_0", " 3", "03", "3.", ".5", "")),
    ["inspect", STRUCTURE, "--potential-cutoff", "1.5"],
    ["--debug", "template", "bcc"],
])
def test_same_answers_as_typers_own_coercion(argv, capsys, monkeypatch):
    primed = _run(argv, capsys, monkeypatch, primed=True)
    reference = _run(argv, capsys, monkeypatch, primed=False)
    assert primed == reference


def test_make_writes_the_same_files(tmp_path, capsys, monkeypatch):
    recipe = tmp_path / "small.yaml"
    recipe.write_text(SMALL)
    answers = []
    for primed, out in ((True, tmp_path / "a"), (False, tmp_path / "b")):
        code, stdout, err = _run(["make", str(recipe), "--out", str(out)], capsys, monkeypatch,
                                 primed)
        answers.append((code, stdout.replace(str(out), "OUT"), err))
    assert answers[0] == answers[1] and answers[0][0] == 0
    written = sorted(p.name for p in (tmp_path / "a").iterdir())
    assert written == sorted(p.name for p in (tmp_path / "b").iterdir())
    for name in written:
        if not name.endswith(".json"):  # the report holds timings
            assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


def test_values_arrive_as_typer_would_give_them(monkeypatch):
    """Paths as pathlib.Path, lists of paths as a list, text as text."""
    cmd = cli_coerce.command(cli.app)
    make = cmd.commands["make"]
    ctx = make.make_context("make", ["a.yaml", "b.yaml", "--out", "o"])
    assert ctx.params["recipes"] == [Path("a.yaml"), Path("b.yaml")]
    assert isinstance(ctx.params["out"], Path) and ctx.params["force"] is False
    template = cmd.commands["template"].make_context("template", ["fcc"])
    assert template.params["lattice"] == "fcc"


@pytest.mark.parametrize("argv", [["plan", RECIPE], ["template", "fcc"], ["--help"],
                                  ["inspect", STRUCTURE, "--cutoff", "3.0"]])
def test_plain_commands_do_not_import_pydantic(argv):
    script = ("import sys\nfrom cellbuild.cli import main\ntry:\n    main(sys.argv[1:])\n"
              "except SystemExit:\n    pass\nprint('pydantic' in sys.modules)\n")
    done = subprocess.run([sys.executable, "-c", script, *argv], capture_output=True, text=True,
                          timeout=60)
    assert done.stdout.strip().splitlines()[-1] == "False", done.stdout + done.stderr
