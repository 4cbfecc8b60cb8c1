"""Bad input gets exit code 2, one clear message, and loses nothing.

A table of cases: each names what the message must contain (the file, the key,
the value) and checks that the output folder is untouched.
"""
from __future__ import annotations

import errno
from pathlib import Path

import pytest
import yaml

from conftest import recipe_dict

GOOD = """\
name: cu-small
crystal:
  element: Cu
  lattice: fcc
  a: 3.615
size:
  repeat: [2, 2, 2]
seed: 1
outputs: [lammps-data, xyz]
"""

# (case id, recipe text, words the one-line message must contain)
CASES = [
    ("yaml-syntax", GOOD.replace("repeat: [2, 2, 2]", "repeat: [2, 2, 2"), ["line", "YAML"]),
    ("empty-file", "", ["empty"]),
    ("not-a-mapping", "- just\n- a list\n", ["mapping"]),
    ("duplicate-key", GOOD + "seed: 3\n", ["duplicate", "seed", "line 10"]),
    ("python-tag", GOOD.replace("name: cu-small", "name: !!python/object/apply:os.getcwd []"),
     ["tag"]),
    ("unknown-key-near-miss", GOOD.replace("seed: 1", "sed: 1"), ["sed", "did you mean `seed`"]),
    ("unknown-key", GOOD.replace("seed: 1", "colour: red"), ["colour", "allowed"]),
    ("string-for-number", GOOD.replace("a: 3.615", "a: '3.615 A'"), ["crystal.a", "number"]),
    ("repeat-of-two", GOOD.replace("[2, 2, 2]", "[2, 2]"), ["size.repeat", "three"]),
    ("exclusive-keys", GOOD.replace("a: 3.615", "a: 3.615\n  density: 8.9"),
     ["crystal.density", "crystal.a"]),
    ("missing-size-choice", GOOD.replace("repeat: [2, 2, 2]", "{}").replace("size:\n  {}", "size: {}"),
     ["size", "repeat, atoms, min_length"]),
    ("unknown-element", GOOD.replace("element: Cu", "element: Cx"), ["crystal.element", "'Cx'"]),
    ("unknown-lattice", GOOD.replace("lattice: fcc", "lattice: hpc"),
     ["crystal.lattice", "sc, bcc, fcc, diamond"]),
    ("unknown-format", GOOD.replace("xyz]", "pdb]"), ["outputs[1]", "lammps-data, cif, xyz, poscar"]),
    ("negative-a", GOOD.replace("a: 3.615", "a: -3.615"), ["crystal.a", "-3.615"]),
    ("zero-density", GOOD.replace("a: 3.615", "density: 0"), ["crystal.density", "greater than zero"]),
    ("nan-radius", GOOD.replace("a: 3.615", "radius: .nan"), ["crystal.radius", "finite"]),
    ("infinite-a", GOOD.replace("a: 3.615", "a: .inf"), ["crystal.a", "finite"]),
    ("repeat-zero", GOOD.replace("[2, 2, 2]", "[2, 0, 2]"), ["size.repeat[1]", "at least 1"]),
    ("repeat-negative", GOOD.replace("[2, 2, 2]", "[-2, 2, 2]"), ["size.repeat[0]"]),
    ("atoms-too-many", GOOD.replace("repeat: [2, 2, 2]", "atoms: 100000000000000"),
     ["size.atoms", "memory"]),
    ("repeat-too-big", GOOD.replace("[2, 2, 2]", "[100000, 100000, 100000]"),
     ["size.repeat", "memory"]),
    ("fraction-above-one", GOOD + "defects:\n  vacancies: {fraction: 1.5}\n",
     ["defects.vacancies.fraction", "between 0 and 1"]),
    ("fraction-negative", GOOD + "defects:\n  substitutions:\n    - {element: Ni, fraction: -0.1}\n",
     ["defects.substitutions[0].fraction"]),
    ("fractions-sum-over-one",
     GOOD + "defects:\n  vacancies: {fraction: 0.6}\n  substitutions:\n    - {element: Ni, fraction: 0.5}\n",
     ["defects.substitutions[0].fraction", "left"]),
    ("too-many-defects", GOOD + "defects:\n  vacancies: {count: 33}\n",
     ["defects.vacancies.count", "at most 32"]),
    ("separation-impossible", GOOD + "defects:\n  vacancies: {count: 8}\n  min_separation: 7.0\n",
     ["defects.min_separation", "7.0"]),
    ("site-lattice-lacks",
     GOOD + "defects:\n  interstitials:\n    - {element: C, site: cube-centre, count: 1}\n",
     ["defects.interstitials[0].site", "octahedral, tetrahedral"]),
    ("name-escapes", GOOD.replace("name: cu-small", "name: ../x"), ["name", "../x"]),
    ("name-absolute", GOOD.replace("name: cu-small", "name: /tmp/x"), ["name", "/tmp/x"]),
    ("name-separator", GOOD.replace("name: cu-small", "name: a/b"), ["name"]),
    ("types-missing-host", GOOD + "types: [Ni]\n", ["types", "Cu"]),
]


def _snapshot(folder: Path) -> dict[str, bytes] | None:
    if not folder.exists():
        return None
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


@pytest.mark.parametrize("case,text,words", CASES, ids=[c[0] for c in CASES])
def test_bad_recipe_exits_2_names_it_and_writes_nothing(cli, tmp_path, case, text, words):
    path = tmp_path / "recipe.yaml"
    path.write_text(text)
    out = tmp_path / "out"
    result = cli("make", path, "--out", out)
    assert result.exit_code == 2, result.output
    message = result.output.strip()
    assert message.startswith("error: ") and "\n" not in message
    assert str(path) in message
    for word in words:
        assert word in message, (word, message)
    assert "Traceback" not in result.output
    assert not out.exists()


@pytest.mark.parametrize("case,text,words", [c for c in CASES if c[0] in {
    "unknown-key", "exclusive-keys", "atoms-too-many", "fractions-sum-over-one"}])
def test_plan_refuses_the_same_way(cli, tmp_path, case, text, words):
    path = tmp_path / "recipe.yaml"
    path.write_text(text)
    result = cli("plan", path)
    assert result.exit_code == 2
    for word in words:
        assert word in result.output


def test_existing_output_folder_untouched_on_bad_input(cli, tmp_path):
    good = tmp_path / "good.yaml"
    good.write_text(GOOD)
    out = tmp_path / "out"
    assert cli("make", good, "--out", out).exit_code == 0
    before = _snapshot(out)
    bad = tmp_path / "bad.yaml"
    bad.write_text(GOOD.replace("a: 3.615", "a: -1"))
    assert cli("make", bad, "--out", out, "--force").exit_code == 2
    assert _snapshot(out) == before


def test_implausible_constant_warns_or_fails_under_strict(cli, tmp_path):
    # 19.5 A for Cu: nearest neighbours 13.8 A apart, beyond 3.2 x the covalent radius
    # sum (Cordero 2008 via ase.data) only with physical_spacing off; 1 to 20 A is the
    # plausible range of cubic lattice constants of the elements (common practice)
    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD.replace("a: 3.615", "a: 21.5") + "checks: {physical_spacing: false}\n")
    loose = cli("make", path, "--out", tmp_path / "a")
    assert loose.exit_code == 0 and "warning" in loose.output and "plausible" in loose.output
    strict = cli("make", path, "--out", tmp_path / "b", "--strict")
    assert strict.exit_code == 2 and "crystal.a" in strict.output and "21.5" in strict.output
    assert not (tmp_path / "b").exists()


@pytest.mark.parametrize("a,unit", [("0.3615", "nm"), ("361.5", "pm")])
def test_lattice_constant_in_the_wrong_unit_is_refused(cli, tmp_path, a, unit):
    # Cu's lattice constant is 3.615 A (Kittel, from memory); given in nm or pm by
    # mistake its nearest-neighbour distance (a / sqrt2, fcc geometry) falls outside
    # 0.5 to 3.2 x twice Cu's covalent radius (1.32 A, Cordero 2008 via ase.data)
    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD.replace("a: 3.615", f"a: {a}"))
    result = cli("make", path, "--out", tmp_path / "out")
    assert result.exit_code == 2
    assert "crystal.a" in result.output and a in result.output and unit in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()
    allowed = tmp_path / "allowed.yaml"
    allowed.write_text(path.read_text() + "checks: {physical_spacing: false}\n")
    built = cli("make", allowed, "--out", tmp_path / "out2")
    assert built.exit_code == 0 and "physical_spacing" in built.output


def test_unit_mistake_is_an_error_entry_in_batch(cli, tmp_path):
    lib = tmp_path / "recipes"
    lib.mkdir()
    (lib / "nm.yaml").write_text(GOOD.replace("a: 3.615", "a: 0.3615"))
    result = cli("batch", lib, "--out", tmp_path / "lib", "--workers", "1")
    assert result.exit_code == 2
    import json

    manifest = json.loads((tmp_path / "lib" / "manifest.json").read_text())
    assert "nm" in manifest["structures"][0]["error"]


def test_missing_recipe_file(cli, tmp_path):
    result = cli("make", tmp_path / "nope.yaml", "--out", tmp_path / "out")
    assert result.exit_code == 2 and "nope.yaml" in result.output and "not found" in result.output


def test_binary_recipe_file(cli, tmp_path):
    path = tmp_path / "junk.yaml"
    path.write_bytes(bytes(range(256)) * 4)
    result = cli("make", path, "--out", tmp_path / "out")
    assert result.exit_code == 2 and "junk.yaml" in result.output


def test_output_folder_that_cannot_be_created(cli, tmp_path):
    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD)
    blocker = tmp_path / "afile"
    blocker.write_text("x")
    result = cli("make", path, "--out", blocker / "sub")
    assert result.exit_code == 2 and "--out" in result.output and "sub" in result.output
    result = cli("make", path, "--out", blocker)
    assert result.exit_code == 2 and "not a folder" in result.output


def _no_temporaries(folder: Path) -> bool:
    return not [p for p in folder.iterdir() if p.name.endswith(".part")]


def test_failed_write_keeps_previous_files_and_leaves_no_temporaries(cli, tmp_path, monkeypatch):
    from cellbuild.formats import xyz

    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD)
    out = tmp_path / "out"
    assert cli("make", path, "--out", out).exit_code == 0
    before = _snapshot(out)

    def disk_full(structure, handle, title, options=None):
        handle.write(b"12 partial bytes")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(xyz, "write", disk_full)
    path.write_text(GOOD.replace("seed: 1", "seed: 2"))
    result = cli("make", path, "--out", out, "--force")
    assert result.exit_code == 2
    assert "No space left on device" in result.output
    assert _snapshot(out) == before  # the lammps file written before xyz failed is not swapped in
    assert _no_temporaries(out)


def test_interrupt_during_write_leaves_previous_files(tmp_path, monkeypatch):
    from cellbuild.formats import lammps
    from cellbuild.pipeline import make
    from cellbuild.recipe import parse_recipe

    recipe = parse_recipe(yaml.safe_load(GOOD))
    out = tmp_path / "out"
    make(recipe, out)
    before = _snapshot(out)

    def interrupted(structure, handle, title, options=None):
        handle.write(b"LAMMPS data file, half")
        raise KeyboardInterrupt

    monkeypatch.setattr(lammps, "write", interrupted)
    with pytest.raises(KeyboardInterrupt):
        make(recipe, out, force=True)
    assert _snapshot(out) == before and _no_temporaries(out)


def test_debug_flag_shows_traceback(cli, tmp_path):
    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD.replace("a: 3.615", "a: -1"))
    from typer.testing import CliRunner

    from cellbuild.cli import app

    result = CliRunner().invoke(app, ["--debug", "make", str(path), "--out", str(tmp_path / "o")])
    assert result.exit_code == 2 and "Traceback" in result.output


def test_absurd_size_is_refused_quickly(cli, tmp_path):
    import time

    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD.replace("[2, 2, 2]", "[5000, 5000, 5000]"))
    start = time.perf_counter()
    result = cli("make", path, "--out", tmp_path / "out")
    # refused before allocating: no time-dependent assertion beyond "it returned"
    assert result.exit_code == 2 and "GB" in result.output
    assert time.perf_counter() - start < 60


def test_outputs_that_would_not_fit_on_the_disk_are_refused(cli, tmp_path, monkeypatch):
    from collections import namedtuple

    from cellbuild import build

    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(build.shutil, "disk_usage", lambda path: usage(10**6, 10**6 - 1000, 1000))
    path = tmp_path / "recipe.yaml"
    path.write_text(GOOD)
    out = tmp_path / "out"
    result = cli("make", path, "--out", out)
    assert result.exit_code == 2 and "disk" in result.output and "size.repeat" in result.output
    assert not out.exists()


def test_a_structure_too_large_for_the_audit_exits_2_before_writing(cli, recipe_file, tmp_path,
                                                                    monkeypatch):
    """When the audit's neighbour search refuses its pair budget (a structure too
    large for the checks, as above 268M grid sites), make names the size key and
    writes nothing; the refusal is simulated here, a real one takes tens of GB."""
    from cellbuild import pipeline
    from cellbuild.neighbours import PairLimitError

    def refuse(*args, **kwargs):
        raise PairLimitError(1.8e8, 3.07, 50_000_000, "a neighbour search handles")

    monkeypatch.setattr(pipeline, "audit", refuse)
    out = tmp_path / "out"
    result = cli("make", recipe_file(recipe_dict()), "--out", out)
    assert result.exit_code == 2
    assert "size.repeat" in result.output and "audit" in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not out.exists() or not any(out.iterdir())
