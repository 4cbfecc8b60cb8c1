"""Warren-Cowley short-range order in the report, against outside sources:
ordered L1_2 Cu3Au counted by hand (each Au has 12 Cu nearest neighbours and 6 Au
second neighbours: alpha_1(Cu, Au) = 1 - 1/0.75 = -1/3, alpha_2 = 1 - 0/0.75 = +1;
J. M. Cowley, Phys. Rev. 77, 669 (1950) for the definition), a random alloy near
zero, and the same alphas from ASE's neighbour list on the file written.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest


def test_ordered_l1_2_gives_the_textbook_alphas():
    from cellbuild.pipeline import build
    from cellbuild.recipe import parse_recipe
    from cellbuild.short_range_order import warren_cowley
    from cellbuild.structure import Structure

    recipe = parse_recipe({"name": "cu3au", "crystal": {"element": "Cu", "lattice": "fcc",
                                                       "a": 3.75},
                           "size": {"repeat": 4}, "types": ["Cu", "Au"]})
    b = build(recipe)
    s = b.structure
    species = s.species.copy()
    species[s.site % b.plan.crystal.n_grid == 0] = 1  # Au on the cube corners
    ordered = Structure(s.cell, s.positions, species, s.symbols, s.site)
    sro = warren_cowley(ordered, b.plan.crystal, b.plan.repeat)["A"]
    assert sro["shells"] == pytest.approx([3.75 / math.sqrt(2), 3.75, 3.75 * math.sqrt(1.5)])
    assert sro["concentration"] == {"Cu": 0.75, "Au": 0.25}
    a1, a2, a3 = sro["alpha"]["Cu-Au"]
    assert a1 == pytest.approx(-1 / 3) and a2 == pytest.approx(1.0)
    # third shell (24 at a sqrt(3/2), counted by hand): from a corner, the (1, 1/2, 1/2)-type
    # vectors all land on face centres, so Au sees 24 Cu again
    assert a3 == pytest.approx(-1 / 3)


def test_random_alloy_report_is_near_zero_and_matches_ase(cli, recipe_file, tmp_path):
    import ase.io
    from ase.neighborlist import neighbor_list

    a = 3.6
    data = {"name": "cuni", "seed": 4, "outputs": ["xyz"],
            "crystal": {"element": "Cu", "lattice": "fcc", "a": a}, "size": {"repeat": 8},
            "defects": {"substitutions": [{"element": "Ni", "fraction": 0.5}],
                        "vacancies": {"count": 5}}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / "cuni.report.json").read_text())
    sro = report["short_range_order"]["A"]
    assert all(abs(x) < 0.05 for x in sro["alpha"]["Cu-Ni"])  # random: near zero
    atoms = ase.io.read(out / "cuni.xyz")
    symbols = np.array(atoms.get_chemical_symbols())
    c_ni = float(np.mean(symbols == "Ni"))
    assert sro["concentration"]["Ni"] == pytest.approx(c_ni)
    for shell, (lo, hi) in enumerate([(0.0, 0.85), (0.85, 1.1), (1.1, 1.3)]):
        i, j, d = neighbor_list("ijd", atoms, hi * a)
        keep = d > lo * a
        i, j = i[keep], j[keep]
        around_cu = symbols[i] == "Cu"
        p_ni = float(np.mean(symbols[j[around_cu]] == "Ni"))
        assert sro["alpha"]["Cu-Ni"][shell] == pytest.approx(1 - p_ni / c_ni, abs=1e-12)


def test_compound_reports_only_its_mixed_sublattice(cli, recipe_file, tmp_path):
    data = {"name": "mgo", "outputs": ["xyz"],
            "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212},
            "size": {"repeat": 4},
            "defects": {"substitutions": [{"element": "Ni", "fraction": 0.3, "on": "A"}]}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    sro = json.loads((out / "mgo.report.json").read_text())["short_range_order"]
    assert set(sro) == {"A"}  # the oxygen sublattice holds one species
    # the cations form an fcc sublattice: shells a/sqrt2, a, a sqrt(3/2) (textbook geometry)
    assert sro["A"]["shells"] == pytest.approx([4.212 / math.sqrt(2), 4.212, 4.212 * math.sqrt(1.5)])


def test_one_species_per_sublattice_gives_none(cli, recipe_file, tmp_path):
    data = {"name": "cu", "outputs": ["xyz"], "size": {"repeat": 2},
            "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.6}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    assert json.loads((out / "cu.report.json").read_text())["short_range_order"] is None


def test_inspect_gives_the_same_alphas_as_the_report(cli, recipe_file, tmp_path):
    """A file read back by inspect (no site grid: pairs by distance, ideal shells
    of the matched lattice) gives the report's alphas exactly, all atoms centres."""
    data = {"name": "cuni", "seed": 7, "outputs": ["lammps-data", "xyz"],
            "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.6}, "size": {"repeat": 6},
            "defects": {"substitutions": [{"element": "Ni", "fraction": 0.3}]}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / "cuni.report.json").read_text())["short_range_order"]["A"]
    for name in ("cuni.xyz", "cuni.lmp"):
        found = json.loads(cli("inspect", out / name, "--json", "--types", "Cu,Ni")
                           .output)["short_range_order"]["A"]
        assert found["centres"] == 864
        assert found["shells"] == pytest.approx(report["shells"])
        for pair, values in report["alpha"].items():
            assert found["alpha"][pair] == pytest.approx(values, abs=1e-12), pair


def test_inspect_gives_a_compounds_cation_alphas_as_the_report_does(cli, recipe_file, tmp_path):
    """A rock-salt high-entropy oxide (five cations on A, O on B): `inspect` finds the
    cations sharing one sublattice (each surrounded by six O, rock-salt geometry,
    common practice) and counts their alphas on it by a neighbour search, equal to the
    report's grid count; the O sublattice holds one species and has none."""
    cations = ("Co", "Ni", "Cu", "Zn")
    data = {"name": "heo", "seed": 3, "outputs": ["xyz", "lammps-data"],
            "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.22},
            "size": {"repeat": [2, 2, 5]},
            "defects": {"substitutions": [{"element": e, "count": 16, "on": "A"} for e in cations]}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / "heo.report.json").read_text())["short_range_order"]
    assert set(report) == {"A"}
    for name in ("heo.xyz", "heo.lmp"):
        found = json.loads(cli("inspect", out / name, "--json", "--types", "Mg,O,Co,Ni,Cu,Zn")
                           .output)
        assert found["lattice"] == "rocksalt"
        assert found["prototype"]["occupants"]["A"] == {"Mg": 16, "Co": 16, "Ni": 16, "Cu": 16,
                                                       "Zn": 16}
        order = found["short_range_order"]
        assert set(order) == {"A"}
        assert order["A"]["shells"] == pytest.approx(report["A"]["shells"])
        for pair, values in report["A"]["alpha"].items():
            assert order["A"]["alpha"][pair] == pytest.approx(values, abs=1e-12), pair


@pytest.mark.parametrize("crystal, defects", [
    ({"element": "Cu", "lattice": "fcc", "a": 3.6},
     {"substitutions": [{"element": "Ni", "fraction": 0.4}], "vacancies": {"count": 3}}),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.2},
     {"substitutions": [{"element": "Ni", "fraction": 0.3, "on": "A"}],
      "vacancies": {"count": 2, "on": "B"}}),
])
def test_one_pass_per_shell_counts_the_same_bonds_as_a_shift_per_offset(crystal, defects,
                                                                         monkeypatch):
    """Small grids gather a shell's bonds in one pass, large ones shift the grid per
    offset: both count the same bonds (the ASE comparison above checks the alphas)."""
    from cellbuild import short_range_order
    from cellbuild.pipeline import build
    from cellbuild.recipe import parse_recipe

    b = build(parse_recipe({"name": "x", "seed": 2, "crystal": crystal, "size": {"repeat": 4},
                            "defects": defects}))
    args = (b.structure, b.plan.crystal, b.plan.repeat)
    gathered = short_range_order.warren_cowley(*args)
    monkeypatch.setattr(short_range_order, "_GATHER_BONDS", 0)
    short_range_order._shell_ends.cache_clear()  # the ends kept for the gathered pass
    try:
        label = b.plan.crystal.sublattice[0]
        assert all(e is None for e in short_range_order._shell_ends(
            b.plan.crystal, label, short_range_order.SHELLS, tuple(b.plan.repeat)))
        assert short_range_order.warren_cowley(*args) == gathered
    finally:
        short_range_order._shell_ends.cache_clear()
    assert gathered is not None
