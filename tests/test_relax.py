"""`relax: {within: R}`: the atoms free to relax around the defects, written into POSCAR
(selective dynamics), extended XYZ (`move_mask`) and a LAMMPS group file.

Checked against fcc geometry (12 first neighbours at a/sqrt2 and 6 second at a: common
practice), ASE's readers (the constraints they build from both files) and LAMMPS itself
(the groups its `include` defines).
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from lammps_run import run_lammps

CU = {"element": "Cu", "lattice": "fcc", "a": 3.615}


def _make(cli, recipe_file, tmp_path, defects, within, outputs=("lammps-data", "xyz", "poscar")):
    data = {"name": "r", "crystal": CU, "size": {"repeat": 3}, "seed": 2,
            "outputs": list(outputs), "defects": defects, "relax": {"within": within}}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, "r.yaml"), "--out", out)
    path = out / "r.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None), out


@pytest.mark.parametrize("within,free", [(3.0, 12), (4.0, 18)])
def test_a_vacancy_frees_its_neighbour_shells(cli, recipe_file, tmp_path, within, free):
    import ase.io

    result, report, out = _make(cli, recipe_file, tmp_path, {"vacancies": {"count": 1}}, within)
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["relax"] == {"within": within, "free": free, "fixed": 107 - free,
                               "lammps_groups": "r.lammps-groups"}
    fixed = {}
    for name, fmt in (("r.vasp", "vasp"), ("r.xyz", "extxyz")):
        atoms = ase.io.read(out / name, format=fmt)
        (constraint,) = atoms.constraints
        fixed[name] = set(constraint.get_indices().tolist())
    assert fixed["r.vasp"] == fixed["r.xyz"] and len(fixed["r.vasp"]) == 107 - free
    # the free atoms are those near the vacancy's site (periodic distances)
    hole = np.array(json.loads((out / "r.defects.json").read_text())["defects"][0]["positions"][0])
    atoms = ase.io.read(out / "r.xyz")
    gap = atoms.positions - hole
    gap -= 3 * 3.615 * np.round(gap / (3 * 3.615))
    near = set(np.flatnonzero(np.linalg.norm(gap, axis=1) < within).tolist())
    assert near == set(range(107)) - fixed["r.xyz"]
    screen = run_lammps(f"""units metal
atom_style atomic
boundary p p p
read_data {out / 'r.lmp'}
include {out / 'r.lammps-groups'}
print "GROUPS $(count(free)) $(count(fixed))"
""", tmp_path)
    counts = screen.split("GROUPS ")[1].split()[:2]
    assert [int(float(x)) for x in counts] == [free, 107 - free]


def test_a_substituted_atom_is_free_with_its_neighbours(cli, recipe_file, tmp_path):
    result, report, out = _make(cli, recipe_file, tmp_path,
                                {"substitutions": [{"element": "Ni", "count": 1}]}, 3.0,
                                outputs=("xyz",))
    assert result.exit_code == 0, result.output
    assert report["relax"]["free"] == 13 and report["relax"]["lammps_groups"] is None
    import ase.io

    atoms = ase.io.read(out / "r.xyz")
    moving = set(range(len(atoms))) - set(atoms.constraints[0].get_indices().tolist())
    ni = [i for i, s in enumerate(atoms.get_chemical_symbols()) if s == "Ni"]
    assert set(ni) <= moving


def test_a_library_records_the_group_file(cli, recipe_file, tmp_path):
    lib = tmp_path / "lib"
    lib.mkdir()
    (lib / "r.yaml").write_text(
        "name: r\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\nsize: {repeat: 2}\n"
        "outputs: [lammps-data]\ndefects: {vacancies: {count: 1}}\nrelax: {within: 3.0}\n")
    out = tmp_path / "built"
    assert cli("batch", lib, "--out", out, "--workers", "1").exit_code == 0
    entry = json.loads((out / "manifest.json").read_text())["structures"][0]
    assert entry["outputs"]["lammps_groups"]["path"] == "r.lammps-groups"
    assert cli("verify", out).exit_code == 0


@pytest.mark.parametrize("defects,within,key", [
    ({}, 3.0, "relax"),
    ({"vacancies": {"count": 1}}, -1.0, "relax.within"),
    ({"vacancies": {"count": 1}}, "far", "relax.within"),
])
def test_bad_relax_exits_2(cli, recipe_file, tmp_path, defects, within, key):
    result, _, out = _make(cli, recipe_file, tmp_path, defects, within)
    assert result.exit_code == 2 and f"`{key}`" in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1 and not out.exists()
