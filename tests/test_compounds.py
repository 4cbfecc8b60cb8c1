"""Compounds built from recipes: every cubic prototype with a real compound,
read back by outside readers (ASE, spglib, LAMMPS), and the recipe's refusals.

Lattice constants are room-temperature handbook values, from memory; space-group
numbers from the International Tables (common practice); coordination from
textbook geometry (common practice).
"""
from __future__ import annotations

import json
from collections import Counter

import numpy as np
import pytest

from lammps_run import run_lammps

# prototype -> (species, a in Angstrom from memory, space-group number, formula unit)
COMPOUNDS = {
    "rocksalt": ({"A": "Mg", "B": "O"}, 4.212, 225, {"Mg": 1, "O": 1}),
    "cesium-chloride": ({"A": "Cs", "B": "Cl"}, 4.12, 221, {"Cs": 1, "Cl": 1}),
    "zincblende": ({"A": "Ga", "B": "As"}, 5.653, 216, {"Ga": 1, "As": 1}),
    "fluorite": ({"A": "U", "X": "O"}, 5.470, 225, {"U": 1, "O": 2}),
    "perovskite": ({"A": "Sr", "B": "Ti", "X": "O"}, 3.905, 221, {"Sr": 1, "Ti": 1, "O": 3}),
    "l1_2": ({"A": "Au", "B": "Cu"}, 3.75, 221, {"Au": 1, "Cu": 3}),
    "a15": ({"A": "Si", "B": "Cr"}, 4.56, 223, {"Si": 1, "Cr": 3}),
    "c15": ({"A": "Mg", "B": "Cu"}, 7.05, 227, {"Mg": 1, "Cu": 2}),
    "heusler": ({"X": "Cu", "Y": "Mn", "Z": "Al"}, 5.95, 225, {"Cu": 2, "Mn": 1, "Al": 1}),
    "half-heusler": ({"X": "Ni", "Y": "Ti", "Z": "Sn"}, 5.93, 216, {"Ni": 1, "Ti": 1, "Sn": 1}),
    "spinel": ({"A": "Mg", "B": "Al", "X": "O"}, 8.08, 227, {"Mg": 1, "Al": 2, "O": 4}),
}


def _recipe(name, species, a, repeat=2, **extra):
    data = {"name": name, "crystal": {"lattice": name, "species": species, "a": a},
            "size": {"repeat": repeat}, "seed": 3}
    data.update(extra)
    return data


@pytest.mark.parametrize("name", sorted(COMPOUNDS))
def test_every_prototype_builds_and_outside_readers_agree(cli, recipe_file, tmp_path, name):
    import ase.io
    import spglib

    species, a, number, unit = COMPOUNDS[name]
    out = tmp_path / "out"
    result = cli("make", recipe_file(_recipe(name, species, a), f"{name}.yaml"), "--out", out)
    assert result.exit_code == 0, result.output
    report = json.loads((out / f"{name}.report.json").read_text())
    assert report["passed"], [c for c in report["checks"] if not c["passed"]]
    assert report["space_group"]["number"] == number
    formats = {"cif": "cif", "xyz": "extxyz", "vasp": "vasp", "lmp": "lammps-data"}
    for ext, fmt in formats.items():
        kwargs = {"atom_style": "atomic"} if fmt == "lammps-data" else {}
        atoms = ase.io.read(out / f"{name}.{ext}", format=fmt, **kwargs)
        assert len(atoms) == report["n_atoms"]
        if fmt == "lammps-data":  # types, not elements: compare counts in type order
            got = Counter(atoms.get_array("type").tolist())
            assert [got[t + 1] for t in range(len(report["types"]))] == \
                [report["composition"][e] for e in report["types"]]
            continue
        counts = Counter(atoms.get_chemical_symbols())
        k = counts[next(iter(unit))] // next(iter(unit.values()))
        assert dict(counts) == {e: n * k for e, n in unit.items()}, (fmt, counts)
        codes = [sorted(counts).index(s) for s in atoms.get_chemical_symbols()]
        data = spglib.get_symmetry_dataset((atoms.cell[:], atoms.get_scaled_positions(), codes),
                                           symprec=1e-4)
        assert data.number == number, (fmt, data.number)


def test_lammps_counts_each_species_within_its_sublattice_cutoff(cli, recipe_file, tmp_path):
    """SrTiO3 with oxygen vacancies: LAMMPS's coord/atom, run once per sublattice
    cutoff, gives each species the histogram the report gives it."""
    species, a, _, _ = COMPOUNDS["perovskite"]
    data = _recipe("perovskite", species, a, repeat=3, outputs=["lammps-data"],
                   defects={"vacancies": {"count": 2, "on": "O"}})
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / "perovskite.report.json").read_text())
    assert report["passed"]
    cutoffs = report["coordination"]["cutoff_by_sublattice"]
    script = "".join(f"""clear
units metal
atom_style atomic
boundary p p p
read_data {out / 'perovskite.lmp'}
pair_style zero {max(cutoffs.values()) + 0.5}
pair_coeff * *
compute cn all coord/atom cutoff {cutoffs[label]}
dump d all custom 1 {tmp_path / f'{label}.dump'} id type c_cn
dump_modify d sort id
run 0
undump d
""" for label in cutoffs)
    run_lammps(script, tmp_path)
    for label, element in species.items():
        rows = np.loadtxt(tmp_path / f"{label}.dump", skiprows=9, ndmin=2)
        mine = rows[rows[:, 1] == report["types"].index(element) + 1, 2].astype(int)
        got = {str(k): int(v) for k, v in enumerate(np.bincount(mine, minlength=1)) if v}
        assert got == report["coordination"]["by_species"][element], (label, got)
    # two oxygen vacancies: 4 Ti lose one O each (6 -> 5), 8 Sr lose one (12 -> 11)
    assert report["coordination"]["by_species"]["Ti"].get("5") == 4
    assert report["coordination"]["by_species"]["Sr"].get("11") == 8


def test_density_gives_the_lattice_constant(cli, recipe_file, tmp_path):
    # MgO: 3.58 g/cm^3 (handbook, from memory) with 4 MgO per cubic cell gives
    # a = 4.21 A (rock-salt geometry; the measured a is 4.212 A, from memory)
    data = {"name": "mgo", "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"},
                                       "density": 3.58}, "size": {"repeat": 1}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / "mgo.report.json").read_text())
    assert report["lattice_constant"] == pytest.approx(4.212, rel=0.003)
    assert report["density"] == pytest.approx(3.58, rel=1e-9)


@pytest.mark.parametrize("crystal, key, words", [
    ({"lattice": "rocksalt", "a": 4.2}, "crystal.species", "is required"),
    ({"lattice": "rocksalt", "species": {"A": "Mg"}, "a": 4.2}, "crystal.species", "A, B"),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "Oo"}, "a": 4.2},
     "crystal.species.B", "Oo"),
    ({"lattice": "rocksalt", "element": "Mg", "a": 4.2}, "crystal.element", "species"),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}}, "crystal.a", "is required"),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "radius": 1.0},
     "crystal.radius", "crystal.a"),
    ({"lattice": "fcc", "species": {"A": "Cu"}, "a": 3.6}, "crystal.species", "element"),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 0.4212},
     "crystal.a", "nm"),
])
def test_bad_compound_recipes_exit_2_in_one_sentence(cli, recipe_file, tmp_path, crystal,
                                                    key, words):
    data = {"name": "bad", "crystal": crystal, "size": {"repeat": 1}}
    result = cli("make", recipe_file(data), "--out", tmp_path / "out")
    assert result.exit_code == 2, result.output
    assert key in result.output and words in result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()
