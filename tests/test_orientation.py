"""Oriented boxes (`crystal.axes`) and supercell matrices (`size.matrix`), against
outside sources: box lengths from textbook geometry (the shortest lattice
translation along a direction: fcc [1-10] a/sqrt2, [11-2] a sqrt6/2, [111] a sqrt3;
bcc [11-2] a sqrt6, [-110] a sqrt2, [111] a sqrt3/2; hcp a1, a1 + 2 a2 = sqrt3 a, c),
bulk coordination by ASE's neighbour list, the cubic space group by spglib, the
same crystal as a plain cubic supercell by pymatgen's StructureMatcher, matrices
against pymatgen's `make_supercell`, and LAMMPS reading triclinic files with
`coord/atom` equal to the report. Lattice constants are handbook values, from memory.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from lammps_run import coordination_histogram

CU = {"element": "Cu", "lattice": "fcc", "a": 3.615}
W = {"element": "W", "lattice": "bcc", "a": 3.165}
FCC_111 = {"x": [1, -1, 0], "y": [1, 1, -2], "z": [1, 1, 1]}
BCC_111 = {"x": [1, 1, -2], "y": [-1, 1, 0], "z": [1, 1, 1]}


def _make(cli, recipe_file, tmp_path, crystal, size, name="x", **extra):
    data = {"name": name, "crystal": crystal, "size": size, "seed": 3, **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    path = out / f"{name}.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None), out


@pytest.mark.parametrize("crystal,axes,repeat,edges,z_per_a3", [
    (CU, FCC_111, (3, 2, 2), (1 / math.sqrt(2), math.sqrt(6) / 2, math.sqrt(3)), 4),
    (W, BCC_111, (2, 3, 4), (math.sqrt(6), math.sqrt(2), math.sqrt(3) / 2), 2),
    (CU, {"x": [1, 0, 0], "y": [0, 1, 1], "z": [0, -1, 1]}, (2, 2, 2),
     (1.0, 1 / math.sqrt(2), 1 / math.sqrt(2)), 4),
])
def test_oriented_box_edges_counts_and_bulk_coordination(cli, recipe_file, tmp_path, crystal,
                                                         axes, repeat, edges, z_per_a3):
    import ase.io
    import spglib
    from ase.neighborlist import neighbor_list

    a = crystal["a"]
    result, report, out = _make(cli, recipe_file, tmp_path, {**crystal, "axes": axes},
                                {"repeat": list(repeat)})
    assert result.exit_code == 0 and report["passed"], result.output
    assert np.allclose(report["cell_lengths"], np.array(edges) * a * np.array(repeat), rtol=1e-12)
    # atoms = box volume x atoms per conventional cell / a^3 (an exactly periodic box)
    assert report["n_atoms"] == round(report["volume"] * z_per_a3 / a**3)
    atoms = ase.io.read(out / "x.xyz")
    assert np.allclose(atoms.cell[:], np.diag(atoms.cell.lengths()))  # orthogonal, along x y z
    nearest = a / math.sqrt(2) if crystal["lattice"] == "fcc" else a * math.sqrt(3) / 2
    i, d = neighbor_list("id", atoms, nearest * 1.05)
    counts = np.bincount(i, minlength=len(atoms))
    assert set(counts.tolist()) == {12 if crystal["lattice"] == "fcc" else 8}
    assert np.allclose(d, nearest)
    number = spglib.get_symmetry_dataset((atoms.cell[:], atoms.get_scaled_positions(),
                                          atoms.numbers), symprec=1e-5).number
    assert number == (225 if crystal["lattice"] == "fcc" else 229)


def test_oriented_box_is_the_same_crystal_as_the_cubic_supercell(cli, recipe_file, tmp_path):
    from pymatgen.analysis.structure_matcher import StructureMatcher
    from pymatgen.io.ase import AseAtomsAdaptor
    import ase.io

    _, oriented, out1 = _make(cli, recipe_file, tmp_path / "a", {**CU, "axes": FCC_111},
                              {"repeat": [3, 2, 2]})
    _, cubic, out2 = _make(cli, recipe_file, tmp_path / "b", CU, {"repeat": [3, 3, 2]})
    assert oriented["n_atoms"] == cubic["n_atoms"] == 72
    assert oriented["volume"] == pytest.approx(cubic["volume"], rel=1e-12)
    s1 = AseAtomsAdaptor.get_structure(ase.io.read(out1 / "x.cif"))
    s2 = AseAtomsAdaptor.get_structure(ase.io.read(out2 / "x.cif"))
    assert StructureMatcher(ltol=1e-4, stol=1e-4, angle_tol=1e-3).fit(s1, s2)


def test_supercell_matrix_matches_pymatgens_make_supercell(cli, recipe_file, tmp_path):
    """sqrt2 x sqrt2 x 2 MgO from a matrix, against pymatgen's make_supercell of the
    conventional rock-salt cell (ASE's bulk)."""
    import ase.io
    from ase.build import bulk
    from pymatgen.io.ase import AseAtomsAdaptor

    matrix = [[1, 1, 0], [-1, 1, 0], [0, 0, 2]]
    crystal = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}
    result, report, out = _make(cli, recipe_file, tmp_path, crystal, {"matrix": matrix},
                                charges={"Mg": 2, "O": -2})
    assert result.exit_code == 0 and report["passed"], result.output
    reference = AseAtomsAdaptor.get_structure(bulk("MgO", "rocksalt", a=4.212, cubic=True))
    reference.make_supercell(matrix)
    atoms = ase.io.read(out / "x.xyz")
    assert np.allclose(atoms.cell[:], reference.lattice.matrix, atol=1e-9)
    mine = np.array(atoms.get_chemical_symbols())
    theirs = np.array([site.specie.symbol for site in reference])
    for element in ("Mg", "O"):
        a = np.mod(atoms.get_scaled_positions()[mine == element], 1.0)
        b = np.mod(reference.frac_coords[theirs == element], 1.0)
        assert len(a) == len(b) == 16
        diff = a[:, None, :] - b[None, :, :]
        diff -= np.round(diff)
        assert np.all(np.min(np.linalg.norm(diff, axis=2), axis=1) < 1e-9)
    assert report["space_group"]["number"] == 225


def test_lammps_reads_a_triclinic_matrix_cell_and_counts_like_the_report(cli, recipe_file,
                                                                         tmp_path):
    """The fcc primitive-like cell [[1,1,0],[0,1,1],[1,0,1]] (60-degree angles)
    repeated by a matrix: LAMMPS reads the tilted box and its coord/atom histogram
    equals the report's, vacancies included."""
    matrix = [[2, 2, 0], [0, 2, 2], [2, 0, 2]]
    result, report, out = _make(cli, recipe_file, tmp_path, CU, {"matrix": matrix},
                                outputs=["lammps-data", "xyz"],
                                defects={"vacancies": {"count": 3}})
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["n_atoms"] == 16 * 4 - 3  # det 16 conventional cells
    header = (out / "x.lmp").read_text().split("Masses")[0].splitlines()
    # "0.0 lx xlo xhi": box length per axis
    lengths = {ln.split()[2][0]: float(ln.split()[1]) for ln in header if ln.endswith(("xhi", "yhi"))}
    tilts = [ln for ln in header if ln.endswith("xy xz yz")]
    assert tilts, header  # a triclinic box
    xy, xz, yz = (float(x) for x in tilts[0].split()[:3])
    # within LAMMPS's limits (LAMMPS read_data documentation)
    assert abs(xy) <= lengths["x"] / 2 + 1e-9 and abs(xz) <= lengths["x"] / 2 + 1e-9
    assert abs(yz) <= lengths["y"] / 2 + 1e-9
    got = coordination_histogram(out / "x.lmp", report["coordination"]["cutoff"], tmp_path)
    assert got == report["coordination"]["histogram"]


def test_lammps_tilts_are_reduced_to_lammps_limits(cli, recipe_file, tmp_path):
    # a skewed matrix of determinant 1 is the cubic cell itself: the box comes out cubic
    result, report, out = _make(cli, recipe_file, tmp_path, CU,
                                {"matrix": [[1, 0, 0], [3, 1, 0], [2, 1, 1]]},
                                outputs=["lammps-data"])
    assert result.exit_code == 0 and report["passed"]
    text = (out / "x.lmp").read_text()
    assert "xy xz yz" not in text and "0.0000000000 3.6150000000 ylo yhi" in text
    # hcp with more repeats along b than a: |xy| = 3a/2 > lx/2 = a/2 before reduction
    hcp = {"element": "Ti", "lattice": "hcp", "a": 2.951, "c": 4.686}
    result, report, out = _make(cli, recipe_file, tmp_path / "h", hcp, {"repeat": [1, 3, 1]},
                                outputs=["lammps-data"])
    assert result.exit_code == 0
    line = next(ln for ln in (out / "x.lmp").read_text().splitlines() if ln.endswith("xy xz yz"))
    xy = float(line.split()[0])
    assert abs(xy) <= 2.951 / 2 + 1e-9


def test_hcp_orthogonal_box(cli, recipe_file, tmp_path):
    hcp = {"element": "Ti", "lattice": "hcp", "a": 2.951, "c": 4.686,
           "axes": {"x": [1, 0, 0], "y": [1, 2, 0], "z": [0, 0, 1]}}
    result, report, out = _make(cli, recipe_file, tmp_path, hcp, {"repeat": [3, 2, 2]},
                                defects={"interstitials": [{"element": "O", "site": "octahedral",
                                                            "count": 1}]})
    assert result.exit_code == 0 and report["passed"], result.output
    # a, sqrt3 a, c (textbook hexagonal geometry); 4 atoms per orthogonal unit
    assert np.allclose(report["cell_lengths"], [3 * 2.951, 2 * math.sqrt(3) * 2.951, 2 * 4.686])
    assert report["n_atoms"] == 3 * 2 * 2 * 4 + 1


def test_defects_keep_their_separation_in_an_oriented_box(cli, recipe_file, tmp_path):
    import ase.geometry

    result, report, out = _make(cli, recipe_file, tmp_path, {**W, "axes": BCC_111},
                                {"repeat": [2, 3, 6]},
                                defects={"vacancies": {"count": 6}, "min_separation": 6.0})
    assert result.exit_code == 0 and report["passed"]
    sites = json.loads((out / "x.defects.json").read_text())["defects"][0]["positions"]
    cell = np.diag(report["cell_lengths"])
    _, d = ase.geometry.get_distances(np.array(sites), cell=cell, pbc=True)
    assert np.min(d[np.triu_indices(len(sites), 1)]) >= 6.0


@pytest.mark.parametrize("crystal,size,key", [
    ({**CU, "axes": {"x": [1, 0, 0], "y": [1, 1, 0], "z": [0, 0, 1]}}, {"repeat": 1}, "crystal.axes"),
    ({**CU, "axes": {"x": [0, 1, 0], "y": [1, 0, 0], "z": [0, 0, 1]}}, {"repeat": 1}, "crystal.axes"),
    ({**CU, "axes": {"x": [0, 0, 0], "y": [1, 0, 0], "z": [0, 0, 1]}}, {"repeat": 1},
     "crystal.axes.x"),
    ({**CU, "axes": {"x": [0.5, 0, 0], "y": [0, 1, 0], "z": [0, 0, 1]}}, {"repeat": 1},
     "crystal.axes.x[0]"),
    ({**CU, "axes": {"x": [1, 0, 0], "y": [0, 1, 0]}}, {"repeat": 1}, "crystal.axes"),
    (CU, {"matrix": [[1, 0, 0], [0, 1, 0], [1, 1, 0]]}, "size.matrix"),
    (CU, {"matrix": [[0, 1, 0], [1, 0, 0], [0, 0, 1]]}, "size.matrix"),
    (CU, {"matrix": [[1, 0], [0, 1]]}, "size.matrix"),
    (CU, {"matrix": [[40, 0, 0], [0, 40, 0], [0, 0, 40]]}, "size.matrix"),
    ({**CU, "axes": FCC_111}, {"matrix": [[1, 0, 0], [0, 1, 0], [0, 0, 1]]}, "size.matrix"),
    (CU, {"matrix": [[1, 0, 0], [0, 1, 0], [0, 0, 1]], "repeat": 2}, "size"),
])
def test_bad_axes_and_matrices_exit_2_in_one_sentence(cli, recipe_file, tmp_path, crystal, size,
                                                      key):
    result, _, out = _make(cli, recipe_file, tmp_path, crystal, size)
    assert result.exit_code == 2, result.output
    assert f"`{key}" in result.output and "Traceback" not in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not out.exists()
