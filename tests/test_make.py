"""`cellbuild make`, `plan` and `template` end to end.

Outputs are read back by outside readers: ASE's readers for every format and
pymatgen's CIF parser (reference libraries from PyPI).
"""
from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest

from conftest import recipe_dict

LATTICES = ["sc", "bcc", "fcc", "diamond"]
COMPOUND_PROTOTYPES = ["hcp", "rocksalt", "cesium-chloride", "zincblende", "fluorite", "perovskite",
                       "l1_2", "a15", "c15", "heusler", "half-heusler", "spinel"]
# one element per lattice, with a density (CRC Handbook, from memory) and an
# atomic radius (half the nearest-neighbour distance of Kittel's a, from memory)
HOSTS = {"sc": ("Po", 9.20, 3.35 / 2), "bcc": ("Fe", 7.87, 2.87 * math.sqrt(3) / 4),
         "fcc": ("Cu", 8.96, 3.61 * math.sqrt(2) / 4), "diamond": ("Si", 2.33, 5.43 * math.sqrt(3) / 8)}
# Coordination and atoms per cell (Kittel ch. 1); space groups (ITA Vol. A)
EXPECTED = {"sc": (6, 1, 221), "bcc": (8, 2, 229), "fcc": (12, 4, 225), "diamond": (4, 8, 227)}


def _make(cli, recipe_file, tmp_path, data, *extra):
    path = recipe_file(data)
    out = tmp_path / "out"
    result = cli("make", path, "--out", out, *extra)
    return result, out


@pytest.mark.parametrize("lattice", LATTICES)
@pytest.mark.parametrize("constant", ["a", "density", "radius", "reference"])
@pytest.mark.parametrize("size", [{"repeat": [2, 1, 3]}, {"atoms": 60}, {"min_length": 7.0}])
def test_every_lattice_by_every_constant_and_size(cli, recipe_file, tmp_path, lattice,
                                                  constant, size):
    element, density, radius = HOSTS[lattice]
    crystal = {"element": element, "lattice": lattice}
    if constant != "reference":
        crystal[constant] = {"a": 3.3, "density": density, "radius": radius}[constant]
    data = {"name": "t", "crystal": crystal, "size": size, "outputs": ["xyz"]}
    result, out = _make(cli, recipe_file, tmp_path, data)
    assert result.exit_code == 0, result.output
    report = json.loads((out / "t.report.json").read_text())
    cn, z, sg = EXPECTED[lattice]
    assert report["passed"] and all(c["passed"] for c in report["checks"])
    assert report["ideal_crystal"]["coordination"] == cn
    assert report["ideal_crystal"]["atoms_per_cell"] == z
    assert report["ideal_crystal"]["space_group"]["number"] == sg
    if report["n_atoms"] <= 2000:  # spglib on the built (perfect) supercell
        assert report["space_group"]["number"] == sg
    assert report["coordination"]["histogram"] == {str(cn): report["n_atoms"]}
    a = report["lattice_constant"]
    assert report["cell_lengths"] == pytest.approx([n * a for n in report["repeat"]])
    if constant == "density":
        assert report["density"] == pytest.approx(density, rel=1e-9)
    if size.get("min_length"):
        assert all(n * a >= 7.0 and (n - 1) * a < 7.0 for n in report["repeat"])


def test_all_formats_read_back_by_ase_and_pymatgen(cli, recipe_file, tmp_path):
    from ase.io import read
    from pymatgen.io.cif import CifParser

    data = recipe_dict("Fe", "bcc", 2.87, (3, 2, 2))
    result, out = _make(cli, recipe_file, tmp_path, data)
    assert result.exit_code == 0, result.output
    report = json.loads((out / "fe-bcc.report.json").read_text())
    n = report["n_atoms"]
    assert n == 2 * 12  # bcc: 2 atoms per conventional cell (Kittel ch. 1) x 3*2*2 cells
    a = 2.87
    cell = np.diag([3 * a, 2 * a, 2 * a])
    readers = {
        "lammps-data": lambda p: read(p, format="lammps-data", atom_style="atomic", units="metal"),
        "cif": lambda p: read(p, format="cif"),
        "xyz": lambda p: read(p, format="extxyz"),
        "poscar": lambda p: read(p, format="vasp"),
    }
    reference = None
    for key, reader in readers.items():
        path = out / report["outputs"][key]["path"]
        atoms = reader(path)
        assert len(atoms) == n, key
        np.testing.assert_allclose(atoms.cell[:], cell, atol=1e-8)
        frac = np.sort(np.round(atoms.get_scaled_positions() % 1.0, 8) % 1.0, axis=0)
        if reference is None:
            reference = frac
        np.testing.assert_allclose(frac, reference, atol=1e-8)
        if key != "lammps-data":  # LAMMPS data carries types and masses, not symbols
            assert set(atoms.get_chemical_symbols()) == {"Fe"}
    structure = CifParser(out / "fe-bcc.cif").parse_structures(primitive=False)[0]
    assert len(structure) == n and structure.composition.reduced_formula == "Fe"
    assert structure.lattice.abc == pytest.approx((3 * a, 2 * a, 2 * a), abs=1e-8)


def test_same_recipe_same_bytes(cli, recipe_file, tmp_path):
    path = recipe_file(recipe_dict("Si", "diamond", 5.43, (2, 2, 2)))
    cli("make", path, "--out", tmp_path / "a")
    cli("make", path, "--out", tmp_path / "b")
    for f in sorted((tmp_path / "a").iterdir()):
        assert f.read_bytes() == (tmp_path / "b" / f.name).read_bytes(), f.name


def test_failed_check_exits_1_and_still_writes(cli, recipe_file, tmp_path):
    # a minimum distance above the nearest-neighbour distance must fail
    data = recipe_dict("Cu", "fcc", 3.615, (2, 2, 2), checks={"min_distance": 3.0})
    result, out = _make(cli, recipe_file, tmp_path, data)
    assert result.exit_code == 1
    assert "min_distance" in result.output
    report = json.loads((out / "cu-fcc.report.json").read_text())
    assert not report["passed"]
    failed = [c["name"] for c in report["checks"] if not c["passed"]]
    assert failed == ["min_distance"]
    assert (out / "cu-fcc.lmp").exists()


def test_refuses_to_overwrite_without_force(cli, recipe_file, tmp_path):
    path = recipe_file(recipe_dict())
    out = tmp_path / "out"
    assert cli("make", path, "--out", out).exit_code == 0
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    again = cli("make", path, "--out", out)
    assert again.exit_code == 2 and "--force" in again.output
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    assert cli("make", path, "--out", out, "--force").exit_code == 0


def test_plan_agrees_with_make(cli, recipe_file, tmp_path):
    data = recipe_dict("W", "bcc", None, (1, 1, 1))
    data["size"] = {"atoms": 250}
    path = recipe_file(data)
    planned = json.loads(cli("plan", path, "--json").output)
    out = tmp_path / "out"
    assert cli("make", path, "--out", out).exit_code == 0
    report = json.loads((out / "w-bcc.report.json").read_text())
    assert planned["n_atoms"] == report["n_atoms"] == 250  # bcc: 2 per cell (Kittel) x 5^3
    assert planned["repeat"] == report["repeat"]
    assert planned["lattice_constant"] == report["lattice_constant"]
    assert planned["box"] == pytest.approx(report["cell_lengths"])


@pytest.mark.parametrize("lattice", LATTICES + COMPOUND_PROTOTYPES)
def test_template_builds(cli, tmp_path, lattice):
    text = cli("template", lattice).output
    path = tmp_path / "t.yaml"
    path.write_text(text)
    result = cli("make", path, "--out", tmp_path / "out")
    assert result.exit_code == 0, result.output
    assert "all checks passed" in result.output
    # the commented defects and checks, uncommented, build and pass too
    tail = text[text.index("# defects:"):]
    path.write_text(text + re.sub(r"^# ", "", tail, flags=re.M))
    result = cli("make", path, "--out", tmp_path / "out2")
    assert result.exit_code == 0 and "all checks passed" in result.output, result.output


def test_report_has_the_documented_keys(cli, recipe_file, tmp_path):
    result, out = _make(cli, recipe_file, tmp_path, recipe_dict())
    report = json.loads((out / "cu-fcc.report.json").read_text())
    for key in ["name", "seed", "lattice", "element", "lattice_constant", "repeat", "n_atoms",
                "composition", "cell_lengths", "density", "ideal_crystal", "size_note",
                "coordination", "min_distance", "space_group", "checks", "passed", "outputs",
                "versions", "recipe_sha256"]:
        assert key in report, key
    ideal = report["ideal_crystal"]
    for key in ["atoms_per_cell", "nearest_neighbour_distance", "coordination",
                "packing_fraction", "space_group"]:
        assert key in ideal, key
    # packing fraction of fcc: pi*sqrt(2)/6 (Kittel ch. 1)
    assert ideal["packing_fraction"] == pytest.approx(math.pi * math.sqrt(2) / 6, rel=1e-9)
    # facts of the ideal crystal are not presented as checks of the structure
    assert {c["name"] for c in report["checks"]}.isdisjoint(
        {"nearest_neighbour_distance", "ideal_coordination"})
    import hashlib

    for key, info in report["outputs"].items():
        data = (out / info["path"]).read_bytes()
        assert hashlib.sha256(data).hexdigest() == info["sha256"] and len(data) == info["bytes"]


def test_console_script_runs(tmp_path):
    import subprocess
    import sys

    result = subprocess.run([sys.executable, "-m", "cellbuild.cli", "--help"],
                            capture_output=True, text=True, timeout=60)
    assert result.returncode == 0 and "make" in result.stdout


def test_example_report_is_what_the_demo_recipe_builds(cli, tmp_path):
    # examples/ ships a report; it must stay what the demo recipe gives (versions aside)
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    out = tmp_path / "out"
    assert cli("make", root / "recipes" / "al-host-perfect.yaml", "--out", out).exit_code == 0
    built = json.loads((out / "al-host-perfect.report.json").read_text())
    shipped = json.loads((root / "examples" / "al-host-perfect.report.json").read_text())
    for report in (built, shipped):
        report.pop("versions")
    assert built == shipped


def test_written_files_hashes_are_those_of_the_bytes_on_disk(tmp_path):
    """The sha256 and size make returns for every file (the manifest's entries) are
    those hashlib computes from the file as written (reference: hashlib)."""
    import hashlib

    from cellbuild.pipeline import make
    from cellbuild.recipe import parse_recipe

    data = recipe_dict("Cu", "fcc", 3.615, (2, 2, 2), seed=4,
                       defects={"vacancies": {"count": 1}})
    data["relax"] = {"within": 3.0}
    result = make(parse_recipe(data), tmp_path / "out")
    assert set(result.sidecars) == {"report", "defects", "lammps_groups"}
    written = [*result.outputs.values(), *result.sidecars.values()]
    for info in written:
        raw = info.path.read_bytes()
        assert (info.sha256, info.bytes) == (hashlib.sha256(raw).hexdigest(), len(raw))
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == sorted(
        info.path.name for info in written)
