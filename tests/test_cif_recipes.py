"""Crystals from CIF files in recipes (`crystal: {cif: path}`), checked against
pymatgen, the reference library that writes the CIFs here and expands their
symmetry: supercells of rutile TiO2 (a tetragonal cell with an internal
parameter) and hcp Ti match pymatgen's `make_supercell` of the conventional
standard structure; partial occupancies give exact counts; LAMMPS reads the
charged result. Lattice constants and rutile's oxygen parameter are handbook
values from memory.
"""
from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

from lammps_run import charge_sum


def _write_cif(path, group, lattice, species, coords):
    from pymatgen.core import Structure
    from pymatgen.io.cif import CifWriter

    structure = Structure.from_spacegroup(group, lattice, species, coords)
    CifWriter(structure, symprec=0.01).write_file(str(path))
    return path


def _rutile(folder):
    from pymatgen.core import Lattice

    # rutile TiO2: a = 4.594, c = 2.959 A, oxygen at (u, u, 0) with u = 0.305 (from memory)
    return _write_cif(folder / "rutile.cif", "P4_2/mnm", Lattice.tetragonal(4.594, 2.959),
                      ["Ti", "O"], [[0, 0, 0], [0.305, 0.305, 0]])


def _ti(folder):
    from pymatgen.core import Lattice

    # hcp Ti: a = 2.951, c = 4.686 A (from memory)
    return _write_cif(folder / "ti.cif", "P6_3/mmc", Lattice.hexagonal(2.951, 4.686),
                      ["Ti"], [[1 / 3, 2 / 3, 0.25]])


def _make(cli, recipe_file, tmp_path, crystal, *, repeat=(2, 2, 2), name="x", **extra):
    data = {"name": name, "crystal": crystal, "size": {"repeat": list(repeat)}, "seed": 5,
            **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    path = out / f"{name}.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None), out


def _same_periodic_sets(cell, ours, theirs, tol=1e-6):
    """Every position of ``ours`` within ``tol`` (A) of one of ``theirs``, periodic, and
    as many of each."""
    from scipy.spatial import cKDTree

    assert len(ours) == len(theirs)
    inv = np.linalg.inv(cell)
    f_ours, f_theirs = (np.mod(p @ inv, 1.0) for p in (ours, theirs))
    # distances in fractional space through a periodic KD-tree, scaled back to A
    tree = cKDTree(np.mod(f_theirs, 1.0) % 1.0, boxsize=1.0)
    d, index = tree.query(np.mod(f_ours, 1.0) % 1.0)
    assert len(set(index.tolist())) == len(ours)
    delta = f_ours - f_theirs[index]
    delta -= np.round(delta)
    assert float(np.max(np.linalg.norm(delta @ cell, axis=1))) < tol


@pytest.mark.parametrize("which,repeat,group", [("rutile", (2, 2, 3), 136), ("ti", (3, 3, 2), 194)])
def test_cif_supercell_matches_pymatgens_make_supercell(cli, recipe_file, tmp_path, which,
                                                        repeat, group):
    import ase.io
    import spglib
    from pymatgen.io.cif import CifParser
    from pymatgen.symmetry.analyzer import SpacegroupAnalyzer

    cif = {"rutile": _rutile, "ti": _ti}[which](tmp_path)
    result, report, out = _make(cli, recipe_file, tmp_path, {"cif": str(cif)}, repeat=repeat)
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["lattice"] == "cif" and report["space_group"]["number"] == group
    # pymatgen: the same CIF, its conventional standard structure, make_supercell
    parsed = CifParser(str(cif)).parse_structures(primitive=False)[0]
    reference = SpacegroupAnalyzer(parsed, symprec=1e-3).get_conventional_standard_structure()
    reference.make_supercell(list(repeat))
    for ext, fmt in {"cif": "cif", "xyz": "extxyz", "vasp": "vasp", "lmp": "lammps-data"}.items():
        kwargs = {"atom_style": "atomic"} if fmt == "lammps-data" else {}
        atoms = ase.io.read(out / f"x.{ext}", format=fmt, **kwargs)
        if fmt == "lammps-data":  # LAMMPS's frame: compare lengths and counts only
            assert np.allclose(atoms.cell.cellpar(), reference.lattice.parameters, atol=1e-6)
            assert len(atoms) == len(reference)
            continue
        # the same cell up to a rotation (lengths and angles), and the same atoms
        # at the same fractional coordinates
        assert np.allclose(atoms.cell.cellpar(), reference.lattice.parameters, atol=1e-6), fmt
        mine = np.array(atoms.get_chemical_symbols())
        theirs = np.array([site.specie.symbol for site in reference])
        assert sorted(set(mine)) == sorted(set(theirs))
        for element in set(theirs):  # element by element
            _same_periodic_sets(atoms.cell[:],
                                atoms.get_scaled_positions()[mine == element] @ atoms.cell[:],
                                reference.frac_coords[theirs == element] @ atoms.cell[:])
        codes = [sorted(set(atoms.get_chemical_symbols())).index(s)
                 for s in atoms.get_chemical_symbols()]
        data = spglib.get_symmetry_dataset((atoms.cell[:], atoms.get_scaled_positions(), codes),
                                           symprec=1e-4)
        assert data.number == group, fmt


def test_a_scales_the_cif_cell(cli, recipe_file, tmp_path):
    cif = _rutile(tmp_path)
    own = _make(cli, recipe_file, tmp_path / "own", {"cif": str(cif)})[1]
    scaled = _make(cli, recipe_file, tmp_path / "big", {"cif": str(cif), "a": 4.7})[1]
    assert own["lattice_constant"] == pytest.approx(4.594)
    factor = 4.7 / 4.594
    assert np.allclose(scaled["cell_lengths"], np.array(own["cell_lengths"]) * factor, rtol=1e-12)
    assert scaled["volume"] == pytest.approx(own["volume"] * factor**3, rel=1e-12)


def test_partial_occupancies_give_exact_counts(cli, recipe_file, tmp_path):
    from pymatgen.core import Lattice

    # Fe0.9O on rock-salt sites and a Cu0.75Au0.25 random fcc alloy; the counts are
    # occupancy x sites, rounded to whole atoms (108 sites: 97.2 Fe -> 97)
    feo = _write_cif(tmp_path / "feo.cif", "Fm-3m", Lattice.cubic(4.3),
                     [{"Fe": 0.9}, "O"], [[0, 0, 0], [0.5, 0.5, 0.5]])
    cuau = _write_cif(tmp_path / "cuau.cif", "Fm-3m", Lattice.cubic(3.75),
                      [{"Cu": 0.75, "Au": 0.25}], [[0, 0, 0]])
    r1 = _make(cli, recipe_file, tmp_path / "a", {"cif": str(feo)}, repeat=(3, 3, 3))[1]
    assert r1["passed"] and r1["composition"] == {"Fe": 97, "O": 108}
    assert [(d["kind"], d["key"], d["placed"]) for d in r1["defects"]] == [
        ("vacancy", "crystal.cif", 11)]
    r2 = _make(cli, recipe_file, tmp_path / "b", {"cif": str(cuau)}, repeat=(3, 3, 3))[1]
    assert r2["passed"] and r2["composition"] == {"Cu": 81, "Au": 27}
    # the same recipe and seed give the same bytes; another seed another arrangement
    again = _make(cli, recipe_file, tmp_path / "c", {"cif": str(cuau)}, repeat=(3, 3, 3))[1]
    other = _make(cli, recipe_file, tmp_path / "d", {"cif": str(cuau)}, repeat=(3, 3, 3),
                  name="x", seed=6)[1]
    assert again["outputs"]["xyz"]["sha256"] == r2["outputs"]["xyz"]["sha256"]
    assert other["outputs"]["xyz"]["sha256"] != r2["outputs"]["xyz"]["sha256"]
    assert other["composition"] == r2["composition"]


def test_cif_labels_take_defects_and_charges_read_by_lammps(cli, recipe_file, tmp_path):
    cif = _rutile(tmp_path)
    result, report, out = _make(cli, recipe_file, tmp_path, {"cif": str(cif)}, repeat=(2, 2, 3),
                                charges={"Ti": 4, "O": -2}, checks={"net_charge": 4},
                                defects={"vacancies": {"count": 2, "on": "O"}})
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["composition"] == {"Ti": 24, "O": 46}  # rutile: 2 TiO2 per cell, 12 cells
    atoms, total = charge_sum(out / "x.lmp", tmp_path)
    # formal charges (common practice): 24 Ti4+ and 46 O2- give 96 - 92 = +4
    assert atoms == 70 and total == pytest.approx(4.0, abs=1e-8)


def test_cif_path_is_read_from_the_recipe_folder(cli, tmp_path, monkeypatch):
    import yaml

    folder = tmp_path / "library"
    folder.mkdir()
    _ti(folder)
    recipe = folder / "ti.yaml"
    recipe.write_text(yaml.safe_dump({"name": "ti", "crystal": {"cif": "ti.cif"},
                                      "size": {"repeat": 2}}))
    monkeypatch.chdir(tmp_path)  # elsewhere: the path is relative to the recipe
    result = cli("make", str(recipe), "--out", str(tmp_path / "out"))
    assert result.exit_code == 0, result.output
    sha = hashlib.sha256((tmp_path / "out" / "ti.xyz").read_bytes()).hexdigest()
    assert json.loads((tmp_path / "out" / "ti.report.json").read_text())[
        "outputs"]["xyz"]["sha256"] == sha


@pytest.mark.parametrize("crystal,key", [
    ({"cif": "missing.cif"}, "crystal.cif"),
    ({"cif": "RUTILE", "element": "Ti"}, "crystal.element"),
    ({"cif": "RUTILE", "lattice": "fcc"}, "crystal.lattice"),
    ({"cif": "RUTILE", "radius": 1.4}, "crystal.radius"),
    ({"cif": "RUTILE", "a": 4.6, "density": 4.2}, "crystal.density"),
    ({"cif": "DAMAGED"}, "crystal.cif"),
    ({"cif": 3}, "crystal.cif"),
])
def test_bad_cif_recipes_exit_2_in_one_sentence(cli, recipe_file, tmp_path, crystal, key):
    rutile = _rutile(tmp_path)
    damaged = tmp_path / "damaged.cif"
    damaged.write_text(rutile.read_text()[:400])
    crystal = {k: {"RUTILE": str(rutile), "DAMAGED": str(damaged)}.get(v, v)
               if isinstance(v, str) else v for k, v in crystal.items()}
    result, _, out = _make(cli, recipe_file, tmp_path, crystal)
    assert result.exit_code == 2, result.output
    assert key in result.output and "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) == 1, result.output
    assert not out.exists()
