"""The pw.x input (`espresso-in`) and the KPOINTS file (`kpoints`).

Read back by ASE's `espresso-in` reader (positions and cell to 1e-8 A against the
POSCAR written beside it and against the built structure) and by pymatgen's KPOINTS
parser; the mesh checked against the reciprocal cell ASE computes, with the rule
VASP documents for KSPACING (N_i = max(1, ceil(2 pi |b_i| / spacing)), b_i without
the 2 pi); masses against ASE's table of standard atomic weights.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

RECIPES = {
    "fcc-vacancy": {"crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615}, "size": {"repeat": 2},
                    "defects": {"vacancies": {"count": 1}}},
    "hcp": {"crystal": {"element": "Ti", "lattice": "hcp", "a": 2.95, "c": 4.68},
            "size": {"repeat": [3, 2, 2]}},
    "rocksalt-doped": {"crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"},
                                   "a": 4.212}, "size": {"repeat": 1},
                       "defects": {"substitutions": [{"element": "Ni", "count": 1, "on": "A"}]}},
}


def _make(cli, recipe_file, tmp_path, name, positions="angstrom", centring="gamma",
          spacing=0.3):
    data = {"name": name, **RECIPES[name], "outputs": ["espresso-in", "kpoints", "poscar"],
            "kpoints": {"spacing": spacing, "centring": centring},
            "espresso": {"ecutwfc": 45, "positions": positions,
                         "pseudopotentials": {"O": "O.pbe-n-kjpaw.UPF"}}}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    assert result.exit_code == 0, result.output
    return out, json.loads((out / f"{name}.report.json").read_text())


@pytest.mark.parametrize("name", list(RECIPES))
@pytest.mark.parametrize("positions", ["angstrom", "crystal"])
def test_ase_reads_the_pw_input_back(cli, recipe_file, tmp_path, name, positions):
    import ase.io
    from ase.data import atomic_masses, atomic_numbers

    out, report = _make(cli, recipe_file, tmp_path, name, positions)
    pw = ase.io.read(out / f"{name}.pwi", format="espresso-in")
    poscar = ase.io.read(out / f"{name}.vasp", format="vasp")
    assert len(pw) == report["n_atoms"]
    assert np.abs(pw.cell[:] - np.array(report["cell"])).max() < 1e-8
    assert np.abs(pw.positions - poscar.positions).max() < 1e-8
    assert pw.get_chemical_symbols() == poscar.get_chemical_symbols()
    text = (out / f"{name}.pwi").read_text().splitlines()
    at = text.index("ATOMIC_SPECIES")
    species = {}
    for line in text[at + 1:]:
        if line.startswith("CELL_PARAMETERS"):
            break
        element, mass, pseudo = line.split()
        species[element] = (float(mass), pseudo)
    assert set(species) == set(report["composition"])
    for element, (mass, pseudo) in species.items():
        assert mass == pytest.approx(atomic_masses[atomic_numbers[element]])
        # named in the recipe, else the documented default pattern {element}.UPF
        assert pseudo == ("O.pbe-n-kjpaw.UPF" if element == "O" else f"{element}.UPF")
    assert f"  ntyp = {len(species)}" in text and f"  nat = {report['n_atoms']}" in text
    assert "  ibrav = 0" in text and "  ecutwfc = 45.0" in text


@pytest.mark.parametrize("name", list(RECIPES))
@pytest.mark.parametrize("centring", ["gamma", "monkhorst-pack"])
def test_the_mesh_follows_the_reciprocal_cell(cli, recipe_file, tmp_path, name, centring):
    from ase.geometry import Cell
    from pymatgen.io.vasp.inputs import Kpoints

    spacing = 0.3
    out, report = _make(cli, recipe_file, tmp_path, name, centring=centring, spacing=spacing)
    reciprocal = Cell(np.array(report["cell"])).reciprocal()  # rows b_i, no 2 pi (ASE)
    expected = [max(1, math.ceil(2 * math.pi * np.linalg.norm(b) / spacing)) for b in reciprocal]
    kpoints = Kpoints.from_file(out / f"{name}.kpoints")
    assert list(kpoints.kpts[0]) == expected
    assert kpoints.style.name.lower() == ("gamma" if centring == "gamma" else "monkhorst")
    line = (out / f"{name}.pwi").read_text().splitlines()
    mesh = line[line.index("K_POINTS automatic") + 1].split()
    assert [int(x) for x in mesh[:3]] == expected
    # Monkhorst-Pack: a half-step offset along each axis with an even count (pw.x's flags)
    offsets = [(1 if n % 2 == 0 else 0) if centring != "gamma" else 0 for n in expected]
    assert [int(x) for x in mesh[3:]] == offsets


@pytest.mark.parametrize("extra,key", [
    ({"outputs": ["espresso-in"]}, "espresso.ecutwfc"),
    ({"outputs": ["espresso-in"], "espresso": {"pseudopotentials": {"Cu": "Cu.UPF"}}},
     "espresso.ecutwfc"),
    ({"outputs": ["kpoints"]}, "outputs"),
    ({"kpoints": {"spacing": 0.2, "centring": "shifted"}}, "kpoints.centring"),
    ({"kpoints": {"spacing": -0.2}}, "kpoints.spacing"),
    ({"kpoints": {}}, "kpoints.spacing"),
    ({"espresso": {"ecutwfc": 40, "pattern": "pseudo.UPF"}}, "espresso.pattern"),
    ({"espresso": {"ecutwfc": 40, "pseudopotentials": {"Cu": "my dir/Cu.UPF"}}},
     "espresso.pseudopotentials.Cu"),
    ({"espresso": {"ecutwfc": 40, "positions": "bohr"}}, "espresso.positions"),
    ({"espresso": {"ecutwfc": 40, "smearing": 0.01}}, "espresso.smearing"),
])
def test_bad_settings_exit_2_in_one_sentence(cli, recipe_file, tmp_path, extra, key):
    data = {"name": "b", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615},
            "size": {"repeat": 1}, **extra}
    result = cli("make", recipe_file(data, "b.yaml"), "--out", tmp_path / "out")
    assert result.exit_code == 2, result.output
    assert f"`{key}`" in result.output and len(result.output.strip().splitlines()) == 1, \
        result.output
    assert not (tmp_path / "out").exists()


def test_a_sweep_over_the_spacing_gives_a_convergence_series(cli, recipe_file, tmp_path):
    """Denser meshes for smaller spacings (a k-point convergence study from one recipe);
    a = 3.615 A cubic cell: |b| = 2 pi / a = 1.738 1/A, so 0.2 -> 9 and 0.4 -> 5 points."""
    data = {"name": "k", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615},
            "size": {"repeat": 1}, "outputs": ["kpoints"], "kpoints": {"spacing": 0.3},
            "sweep": {"kpoints.spacing": [0.2, 0.4]}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data, "k.yaml"), "--out", out).exit_code == 0
    meshes = [(out / f"k__spacing-{s}.kpoints").read_text().splitlines()[3] for s in (0.2, 0.4)]
    assert meshes == ["9 9 9", "5 5 5"]


def test_the_mgo_vacancy_demo_needs_no_hand_edits(cli, tmp_path):
    """recipes/dft/mgo-vacancy-dft.yaml: the pw.x input (calculation 'relax', if_pos
    flags) and the POSCAR (selective dynamics) fix the same atoms, as ASE reads them;
    pymatgen reads the KPOINTS file."""
    from pathlib import Path

    import ase.io
    from pymatgen.io.vasp.inputs import Kpoints

    root = Path(__file__).resolve().parent.parent
    out = tmp_path / "out"
    result = cli("make", root / "recipes" / "dft" / "mgo-vacancy-dft.yaml", "--out", out)
    assert result.exit_code == 0, result.output
    pw = ase.io.read(out / "mgo-vo-dft.pwi", format="espresso-in")
    poscar = ase.io.read(out / "mgo-vo-dft.vasp", format="vasp")
    assert np.abs(pw.positions - poscar.positions).max() < 1e-8
    assert set(pw.constraints[0].get_indices()) == set(poscar.constraints[0].get_indices())
    report = json.loads((out / "mgo-vo-dft.report.json").read_text())
    # the 2 x 2 x 2 cell folds the sixth-nearest O pair onto one atom each (periodic
    # images at +-a): 6 Mg + 12 O + 8 Mg + 3 O within 4.5 A of the vacant O site
    assert report["relax"]["free"] == 29 and len(pw.constraints[0].get_indices()) == 63 - 29
    text = (out / "mgo-vo-dft.pwi").read_text()
    assert "calculation = 'relax'" in text and "Mg.pbe-spnl-kjpaw.UPF" in text
    assert list(Kpoints.from_file(out / "mgo-vo-dft.kpoints").kpts[0]) == [3, 3, 3]
