"""`inspect` names compound prototypes and the element on each sublattice.

Sources:
* First-shell coordination per sublattice: textbook geometry (common practice;
  e.g. rock salt 6-6, CsCl 8-8, zinc blende 4-4, fluorite 8-4, perovskite
  B 6 O and O 2 B, L1_2 12, spinel tetrahedral A 4 O and octahedral B 6 O).
* Ideal structures from ASE's ``ase.build.bulk`` and ``ase.Atoms`` (reference
  library), beside the ones cellbuild builds from recipes.
* Lattice constants: room-temperature handbook values, from memory (the
  ``COMPOUNDS`` table of ``tests/test_compounds.py``).
"""
from __future__ import annotations

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk

from cellbuild.inspection import EXPECT_CHOICES, describe, inspect_structure
from cellbuild.pipeline import build
from cellbuild.recipe import parse_recipe
from cellbuild.structure import Structure
from test_compounds import COMPOUNDS

# textbook geometry (common practice): neighbours in the first shell of each sublattice
FIRST_SHELL = {
    "rocksalt": {"A": 6, "B": 6},
    "cesium-chloride": {"A": 8, "B": 8},
    "zincblende": {"A": 4, "B": 4},
    "fluorite": {"A": 8, "X": 4},
    "perovskite": {"A": 12, "B": 6, "X": 2},
    "l1_2": {"A": 12, "B": 12},
    "a15": {"A": 12, "B": 2},
    "c15": {"A": 16, "B": 6},
    "heusler": {"X": 8, "Y": 8, "Z": 8},
    "half-heusler": {"X": 8, "Y": 4, "Z": 4},
    "spinel": {"A": 4, "B": 6, "X": 4},
}


def inspect(structure, **kwargs):
    return inspect_structure(structure, file="test", **kwargs)


def from_recipe(name, species, a, repeat=2, **extra):
    data = {"name": name, "crystal": {"lattice": name, "species": species, "a": a},
            "size": {"repeat": repeat}, "seed": 3, **extra}
    return build(parse_recipe(data)).structure


@pytest.mark.parametrize("name", sorted(COMPOUNDS))
def test_every_prototype_built_from_a_recipe_is_named_with_its_species(name):
    species, a, _, _ = COMPOUNDS[name]
    structure = from_recipe(name, species, a)
    result = inspect(structure)
    found = result["prototype"]
    assert result["lattice"] == name and found["name"] == name
    assert found["species"] == species
    assert found["lattice_constant"] == pytest.approx(a, rel=1e-6)
    assert found["cells"] == pytest.approx(8.0)  # repeat 2
    for label, sub in found["sublattices"].items():
        assert sub["element"] == species[label]
        assert sub["atoms"] == sub["sites_expected"]
        # textbook geometry: first-shell coordination of each sublattice
        assert sub["coordination"]["expected"] == FIRST_SHELL[name][label]
        assert sub["coordination"]["mean"] == pytest.approx(FIRST_SHELL[name][label])
    assert sum(s["atoms"] for s in found["sublattices"].values()) == structure.n_atoms
    assert f"{name} " + " ".join(f"{k}={v}" for k, v in species.items()) in describe(result)


@pytest.mark.parametrize("formula, kind, a, name, species", [
    # ASE ase.build.bulk (reference library), handbook a from memory
    ("MgO", "rocksalt", 4.212, "rocksalt", {"A": "Mg", "B": "O"}),
    ("GaAs", "zincblende", 5.653, "zincblende", {"A": "Ga", "B": "As"}),
    ("CsCl", "cesiumchloride", 4.12, "cesium-chloride", {"A": "Cs", "B": "Cl"}),
    ("CaF2", "fluorite", 5.463, "fluorite", {"A": "Ca", "X": "F"}),
])
def test_structures_built_by_ase_are_named(formula, kind, a, name, species):
    atoms = bulk(formula, kind, a=a, cubic=True).repeat(2)
    result = inspect(Structure.from_ase(atoms))
    assert result["lattice"] == name
    assert result["prototype"]["species"] == species
    assert result["prototype"]["lattice_constant"] == pytest.approx(a, rel=1e-6)


def test_ase_rock_salt_keeps_its_species_blind_pattern_and_space_group():
    # ASE ase.build.bulk rocksalt (reference library); textbook: the sites of rock
    # salt form sc with a/2, the space group is Fm-3m 225 (International Tables)
    atoms = bulk("NaCl", "rocksalt", a=5.64, cubic=True).repeat(2)
    result = inspect(Structure.from_ase(atoms), expect="rocksalt")
    assert result["lattice"] == "rocksalt" and result["prototype"]["pattern"] == "sc"
    assert result["lattice_match"]["lattice_constant"] == pytest.approx(5.64 / 2, rel=1e-6)
    assert result["space_group"]["number"] == 225
    assert result["passed"]
    # textbook: rock salt 6-6 coordination, each Na's six neighbours all Cl
    na = result["prototype"]["sublattices"]["A"]["coordination"]["by_element"]
    assert na["Cl"]["median"] == 6 and na["Na"]["median"] == 0
    assert inspect(Structure.from_ase(atoms), expect="sc")["passed"]
    assert not inspect(Structure.from_ase(atoms), expect="zincblende")["passed"]


def test_expect_accepts_prototype_names():
    assert {"rocksalt", "spinel", "l1_2"} <= set(EXPECT_CHOICES)


def test_ase_cu3au_l1_2_is_named_and_not_fcc():
    # ASE Atoms with the textbook L1_2 sites: Au at the corner, Cu at the face centres
    a = 3.75
    cell = Atoms("AuCu3", scaled_positions=[(0, 0, 0), (0.5, 0.5, 0), (0.5, 0, 0.5),
                                            (0, 0.5, 0.5)], cell=[a] * 3, pbc=True)
    result = inspect(Structure.from_ase(cell.repeat(3)))
    assert result["lattice"] == "l1_2" and result["prototype"]["pattern"] == "fcc"
    assert result["prototype"]["species"] == {"A": "Au", "B": "Cu"}


def test_rock_salt_with_two_per_cent_vacancies_still_matches():
    # ASE ase.build.bulk rocksalt (reference library) with 2 % of the atoms removed
    atoms = bulk("MgO", "rocksalt", a=4.212, cubic=True).repeat(4)
    rng = np.random.default_rng(7)
    del atoms[rng.choice(len(atoms), size=10, replace=False).tolist()]
    result = inspect(Structure.from_ase(atoms))
    found = result["prototype"]
    assert result["lattice"] == "rocksalt" and found["species"] == {"A": "Mg", "B": "O"}
    assert found["lattice_constant"] == pytest.approx(4.212, rel=1e-6)
    counted = sum(s["atoms"] for s in found["sublattices"].values())
    expected = sum(s["sites_expected"] for s in found["sublattices"].values())
    assert counted == len(atoms) and expected == 512


def test_rattled_rock_salt_still_matches():
    # ASE ase.build.bulk rocksalt (reference library), atoms displaced 0.05 A rms
    atoms = bulk("MgO", "rocksalt", a=4.212, cubic=True).repeat(3)
    atoms.rattle(stdev=0.05, seed=2)
    found = inspect(Structure.from_ase(atoms))["prototype"]
    assert found["name"] == "rocksalt"
    assert found["lattice_constant"] == pytest.approx(4.212, rel=0.01)


def test_recipe_perovskite_with_oxygen_vacancies_still_matches():
    species, a, _, _ = COMPOUNDS["perovskite"]
    structure = from_recipe("perovskite", species, a, repeat=3,
                            defects={"vacancies": {"count": 2, "on": "O"}})
    found = inspect(structure)["prototype"]
    assert found["name"] == "perovskite" and found["species"] == species
    assert found["sublattices"]["X"]["atoms"] == 81 - 2
    assert found["sublattices"]["X"]["sites_expected"] == 81


@pytest.mark.parametrize("element, kind, a, lattice", [
    # ASE ase.build.bulk (reference library); Kittel lattice constants from memory
    ("Cu", "fcc", 3.61, "fcc"), ("Si", "diamond", 5.43, "diamond"), ("Fe", "bcc", 2.87, "bcc"),
])
def test_one_element_crystals_are_reported_as_before(element, kind, a, lattice):
    atoms = bulk(element, kind, a=a, cubic=True).repeat(3)
    result = inspect(Structure.from_ase(atoms), expect=lattice)
    assert result["lattice"] == lattice and result["prototype"] is None
    assert "prototype_note" not in result and result["passed"]


def test_random_fcc_alloy_is_not_l1_2():
    # ASE ase.build.bulk fcc (reference library) with 1/4 of the sites Au at random:
    # the composition of Cu3Au, but Au sees Au among its 12 neighbours (common
    # practice: a disordered solid solution is fcc, not L1_2)
    atoms = bulk("Cu", "fcc", a=3.75, cubic=True).repeat(5)
    symbols = np.array(atoms.get_chemical_symbols())
    symbols[np.random.default_rng(0).permutation(len(atoms))[:len(atoms) // 4]] = "Au"
    atoms.set_chemical_symbols(symbols.tolist())
    result = inspect(Structure.from_ase(atoms))
    assert result["prototype"] is None and result["lattice"] == "fcc"
    assert "l1_2" in result["prototype_note"]


def test_random_two_species_diamond_is_not_zincblende():
    # ASE ase.build.bulk diamond (reference library), half the atoms Ge at random:
    # zinc blende needs every neighbour of the other species (textbook geometry)
    atoms = bulk("Si", "diamond", a=5.43, cubic=True).repeat(3)
    symbols = np.array(atoms.get_chemical_symbols())
    symbols[np.random.default_rng(1).permutation(len(atoms))[:len(atoms) // 2]] = "Ge"
    atoms.set_chemical_symbols(symbols.tolist())
    result = inspect(Structure.from_ase(atoms))
    assert result["prototype"] is None and result["lattice"] == "diamond"


def test_a_doped_compound_is_matched_with_its_dopant_named(cli, recipe_file, tmp_path):
    """8 % Ni on the Mg sites of rock salt MgO (a third element, textbook rock salt
    otherwise): matched as rock salt with the dopant on the Mg sites, and the net charge of
    a charged LAMMPS file is read back (formal charges, common practice)."""
    import json as _json

    data = {"name": "mgo-ni", "seed": 2, "outputs": ["lammps-data", "xyz"],
            "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212},
            "size": {"repeat": 5}, "charges": {"Mg": 2, "O": -2, "Ni": 2},
            "checks": {"net_charge": 4},
            "defects": {"substitutions": [{"element": "Ni", "fraction": 0.08, "on": "A"}],
                        "vacancies": {"count": 2, "on": "B"}}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    for name in ("mgo-ni.xyz", "mgo-ni.lmp"):
        result = cli("inspect", out / name, "--json", "--types", "Mg,O,Ni")
        report = _json.loads(result.output)
        assert report["lattice"] == "rocksalt", name
        # Ni has the surroundings of Mg (six O): the dopant is named on its sublattice
        assert report["prototype"]["species"] == {"A": "Mg+Ni", "B": "O"}
        assert report["prototype"]["occupants"] == {"A": {"Mg": 460, "Ni": 40}}  # 8 % of 500
        assert set(report["short_range_order"]) == {"A"}
        assert report["net_charge"] == pytest.approx(4.0)
