"""Defects on sublattices (labels or elements, vacancy lists, Schottky defects,
antisites) and ionic charges, checked against outside sources.

Sources: stoichiometry of the formula units (common practice: MgO 1:1, SrTiO3
1:1:3, MgAl2O4 1:2:4, UO2 1:2); coordination from textbook geometry; LAMMPS
itself reads the `charge` style and sums the charges (``compute property/atom
q`` and ``compute reduce sum``); ASE's extended XYZ reader reads the charges.
Lattice constants are handbook values from memory.
"""
from __future__ import annotations

import json
from collections import Counter

import numpy as np
import pytest

from lammps_run import charge_sum

MGO = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}
SRTIO3 = {"lattice": "perovskite", "species": {"A": "Sr", "B": "Ti", "X": "O"}, "a": 3.905}
GAAS = {"lattice": "zincblende", "species": {"A": "Ga", "B": "As"}, "a": 5.653}
SPINEL = {"lattice": "spinel", "species": {"A": "Mg", "B": "Al", "X": "O"}, "a": 8.08}
UO2 = {"lattice": "fluorite", "species": {"A": "U", "X": "O"}, "a": 5.470}


def _make(cli, recipe_file, tmp_path, crystal, *, repeat=3, name="x", **extra):
    data = {"name": name, "crystal": crystal, "size": {"repeat": repeat}, "seed": 11, **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    report = json.loads((out / f"{name}.report.json").read_text()) if \
        (out / f"{name}.report.json").exists() else None
    return result, report, out


def _site_count(report, label):
    return sum(report["sublattices"][label].values())


@pytest.mark.parametrize("crystal,ratio", [
    (MGO, {"A": 1, "B": 1}),                      # MgO formula unit
    (SRTIO3, {"A": 1, "B": 1, "X": 3}),           # SrTiO3
    (SPINEL, {"A": 1, "B": 2, "X": 4}),           # MgAl2O4
    (UO2, {"A": 1, "X": 2}),                      # UO2
])
def test_schottky_defects_remove_formula_units(cli, recipe_file, tmp_path, crystal, ratio):
    perfect = _make(cli, recipe_file, tmp_path / "p", crystal, repeat=2, name="p")[1]
    result, report, _ = _make(cli, recipe_file, tmp_path, crystal, repeat=2,
                              defects={"schottky": {"count": 3}})
    assert result.exit_code == 0, result.output
    assert report["passed"], [c for c in report["checks"] if not c["passed"]]
    for label, n in ratio.items():
        assert _site_count(perfect, label) - _site_count(report, label) == 3 * n
    # charge-neutral vacancies keep the formula: the composition stays in ratio
    element = {lb: crystal["species"][lb] for lb in ratio}
    removed = Counter()
    for label, n in ratio.items():
        removed[element[label]] += 3 * n
    for e, n in report["composition"].items():
        assert perfect["composition"][e] - n == removed[e]


def test_on_takes_labels_and_elements_alike(cli, recipe_file, tmp_path):
    by_label = _make(cli, recipe_file, tmp_path / "a", MGO,
                     defects={"vacancies": {"count": 5, "on": "B"}})[1]
    by_element = _make(cli, recipe_file, tmp_path / "b", MGO,
                       defects={"vacancies": {"count": 5, "on": "O"}})[1]
    # the label B of rock salt is its anion sublattice, not boron
    assert by_label["composition"] == by_element["composition"] == {"Mg": 108, "O": 103}
    assert by_label["outputs"]["xyz"]["sha256"] == by_element["outputs"]["xyz"]["sha256"]


def test_vacancy_list_places_one_request_per_sublattice(cli, recipe_file, tmp_path):
    result, report, out = _make(cli, recipe_file, tmp_path, SRTIO3, defects={
        "vacancies": [{"count": 2, "on": "A"}, {"count": 4, "on": "X"}]})
    assert result.exit_code == 0 and report["passed"]
    assert [(d["key"], d["placed"]) for d in report["defects"]] == [
        ("defects.vacancies[0]", 2), ("defects.vacancies[1]", 4)]
    assert report["sublattices"] == {"A": {"Sr": 25}, "B": {"Ti": 27}, "X": {"O": 77}}


def test_antisites_swap_pairs_and_keep_the_composition(cli, recipe_file, tmp_path):
    import ase.io

    result, report, out = _make(cli, recipe_file, tmp_path, GAAS, repeat=3,
                                defects={"antisites": {"count": 4, "pair": ["Ga", "As"]}})
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["composition"] == {"Ga": 108, "As": 108}
    assert report["sublattices"] == {"A": {"Ga": 104, "As": 4}, "B": {"Ga": 4, "As": 104}}
    # ASE reads the file back: every atom on a zinc-blende site; As atoms on the
    # Ga (fcc origin) sublattice are the antisites (textbook geometry)
    atoms = ase.io.read(out / "x.xyz")
    frac = (atoms.get_scaled_positions() * 3) % 1.0
    on_a = np.all(np.isclose(frac % 0.5, 0.0, atol=1e-8) | np.isclose(frac % 0.5, 0.5,
                                                                       atol=1e-8), axis=1)
    symbols = np.array(atoms.get_chemical_symbols())
    assert int(np.sum(on_a & (symbols == "As"))) == 4
    assert int(np.sum(~on_a & (symbols == "Ga"))) == 4


def test_lone_oxygen_vacancy_fails_net_charge_unless_declared(cli, recipe_file, tmp_path):
    charges = {"Mg": 2, "O": -2}
    result, report, _ = _make(cli, recipe_file, tmp_path / "a", MGO, charges=charges,
                              defects={"vacancies": {"count": 1, "on": "O"}})
    assert result.exit_code == 1
    check = next(c for c in report["checks"] if c["name"] == "net_charge")
    # formal charges (common practice): one missing O2- leaves +2
    assert not check["passed"] and report["net_charge"] == pytest.approx(2.0)
    result, report, _ = _make(cli, recipe_file, tmp_path / "b", MGO, charges=charges,
                              checks={"net_charge": 2},
                              defects={"vacancies": {"count": 1, "on": "O"}})
    assert result.exit_code == 0 and report["passed"]


def test_lammps_reads_the_charge_style_and_sums_to_the_net_charge(cli, recipe_file, tmp_path):
    """SrTiO3 with two oxygen vacancies and formal charges: LAMMPS reads the file as
    atom_style charge and its sum of q is the report's net charge (+4 e)."""
    import ase.io

    result, report, out = _make(
        cli, recipe_file, tmp_path, SRTIO3, charges={"Sr": 2, "Ti": 4, "O": -2},
        checks={"net_charge": 4}, defects={"vacancies": {"count": 2, "on": "O"}})
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["net_charge"] == pytest.approx(4.0)  # two missing O2-: +4 (common practice)
    text = (out / "x.lmp").read_text()
    assert "atom_style charge" in text.splitlines()[0] and "Atoms  # charge" in text
    atoms, total = charge_sum(out / "x.lmp", tmp_path)
    assert atoms == report["n_atoms"] and total == pytest.approx(report["net_charge"], abs=1e-8)
    atoms = ase.io.read(out / "x.xyz")  # ASE's extended XYZ reader: initial_charges
    assert atoms.get_initial_charges().sum() == pytest.approx(4.0, abs=1e-8)
    by_element = {s: q for s, q in zip(atoms.get_chemical_symbols(), atoms.get_initial_charges())}
    assert by_element == {"Sr": 2.0, "Ti": 4.0, "O": -2.0}


def test_defects_never_share_a_site_across_overlapping_targets(cli, recipe_file, tmp_path):
    # `A` and `Mg` name the same sites of rock salt: all 108 can be used, not more
    result, report, _ = _make(cli, recipe_file, tmp_path / "a", MGO, defects={
        "vacancies": [{"count": 60, "on": "A"}],
        "substitutions": [{"element": "Ca", "count": 48, "on": "Mg"}]})
    assert result.exit_code == 0 and report["sublattices"]["A"] == {"Ca": 48}
    result, _, out = _make(cli, recipe_file, tmp_path / "b", MGO, defects={
        "vacancies": [{"count": 60, "on": "A"}],
        "substitutions": [{"element": "Ca", "count": 49, "on": "Mg"}]})
    assert result.exit_code == 2 and "defects.substitutions[0].count" in result.output
    assert not out.exists()


def test_elemental_outputs_keep_their_bytes_with_a_label_target(cli, recipe_file, tmp_path):
    fcc = {"element": "Cu", "lattice": "fcc", "a": 3.615}
    a = _make(cli, recipe_file, tmp_path / "a", fcc, defects={"vacancies": {"count": 3}})[1]
    b = _make(cli, recipe_file, tmp_path / "b", fcc,
              defects={"vacancies": {"count": 3, "on": "A"}})[1]
    assert a["outputs"]["lammps-data"]["sha256"] == b["outputs"]["lammps-data"]["sha256"]


@pytest.mark.parametrize("crystal,extra,key", [
    (MGO, {"defects": {"vacancies": {"count": 1, "on": "X"}}}, "defects.vacancies.on"),
    (MGO, {"defects": {"antisites": {"count": 1, "pair": ["Mg", "A"]}}},
     "defects.antisites[0].pair"),
    (MGO, {"defects": {"antisites": {"count": 1, "pair": ["Mg"]}}}, "defects.antisites[0].pair"),
    (MGO, {"defects": {"antisites": {"count": 200, "pair": ["A", "B"]}}},
     "defects.antisites[0].count"),
    (MGO, {"defects": {"antisites": {"fraction": 0.1, "pair": ["A", "B"]}}},
     "defects.antisites[0].fraction"),
    (MGO, {"defects": {"schottky": {"count": 109}}}, "defects.schottky.count"),
    (MGO, {"defects": {"schottky": {}}}, "defects.schottky.count"),
    (MGO, {"defects": {"substitutions": [{"element": "O", "count": 1, "on": "B"}]}},
     "defects.substitutions[0].element"),
    (MGO, {"charges": {"Mg": 2}}, "charges"),
    (MGO, {"charges": {"Mg": 2, "O": "minus two"}}, "charges.O"),
    (MGO, {"charges": [2, -2]}, "charges"),
    (MGO, {"checks": {"net_charge": "zero"}}, "checks.net_charge"),
    ({"element": "Cu", "lattice": "fcc", "a": 3.615},
     {"defects": {"vacancies": {"count": 1, "on": "octahedral"}}}, "defects.vacancies.on"),
])
def test_bad_sublattice_requests_exit_2_in_one_sentence(cli, recipe_file, tmp_path, crystal,
                                                        extra, key):
    result, _, out = _make(cli, recipe_file, tmp_path, crystal, **extra)
    assert result.exit_code == 2, result.output
    assert key in result.output and "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) == 1, result.output
    assert not out.exists()
