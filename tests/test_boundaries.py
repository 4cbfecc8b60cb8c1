"""Symmetric tilt grain boundaries (`grain_boundary:`), against textbook geometry
(common practice for cubic coincidence-site lattices): Sigma 5 (310)[001]
36.87 degrees, Sigma 5 (210)[001] 53.13 degrees, Sigma 13 (320)[001] 67.38
degrees, Sigma 17 (410)[001] 28.07 degrees, Sigma 3 (111)[1-10] 60 degrees
(the 180-degree rotation about <111>), for [001] tilts 2 atan of the plane's
index ratio, reported as the disorientation (the smallest angle among the
cube's equivalent rotations: 53.13 -> 36.87, 67.38 -> 22.62); ASE and LAMMPS
read the bicrystals back.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from lammps_run import coordination_histogram

CU = {"element": "Cu", "lattice": "fcc", "a": 3.615}


def _make(cli, recipe_file, tmp_path, gb, repeat=(1, 1, 1), name="x", crystal=CU, **extra):
    data = {"name": name, "crystal": crystal, "grain_boundary": gb,
            "size": {"repeat": list(repeat)}, **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    path = out / f"{name}.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None), out


@pytest.mark.parametrize("axis,plane,angle,sigma", [
    ([0, 0, 1], [3, 1, 0], 2 * math.degrees(math.atan(1 / 3)), 5),
    # 2 atan(1/2) = 53.13 and 2 atan(2/3) = 67.38 degrees about [001] are, by the
    # cube's 90-degree rotation, the disorientations 36.87 and 22.62 degrees
    ([0, 0, 1], [2, 1, 0], 90 - 2 * math.degrees(math.atan(1 / 2)), 5),
    ([0, 0, 1], [3, 2, 0], 90 - 2 * math.degrees(math.atan(2 / 3)), 13),
    ([0, 0, 1], [4, 1, 0], 2 * math.degrees(math.atan(1 / 4)), 17),
    ([1, -1, 0], [1, 1, 1], 60.0, 3),
])
def test_misorientation_and_sigma(axis, plane, angle, sigma):
    from cellbuild.boundaries import misorientation, sigma as csl_sigma

    assert misorientation(plane) == pytest.approx(angle, abs=1e-9)
    assert csl_sigma(plane) == sigma


def test_sigma5_tilt_boundary_in_copper(cli, recipe_file, tmp_path):
    import ase.io
    from ase.neighborlist import neighbor_list

    result, report, out = _make(cli, recipe_file, tmp_path,
                                {"axis": [0, 0, 1], "plane": [3, 1, 0], "grains": 4}, (2, 1, 1))
    assert result.exit_code == 0 and report["passed"], result.output
    gb = report["grain_boundary"]
    assert gb["sigma"] == 5 and gb["misorientation"] == pytest.approx(36.8699, abs=1e-4)
    assert gb["boundaries"] == 2
    a = 3.615
    # box: x the [001] axis (a per unit), y [1-30]/2 and z 2 x 4 units of [310]/2: a sqrt10/2
    assert report["cell_lengths"] == pytest.approx([2 * a, a * math.sqrt(10) / 2,
                                                    8 * a * math.sqrt(10) / 2])
    # per in-plane period: 2 grains of 4 units (10 atoms per unit: volume 2.5 a^3
    # at 4 atoms per a^3, one atom on each of its 10 (310) planes) plus the plane at
    # z = H, less the atoms removed; those are at least the two shared planes' copies
    periods = 2
    assert report["n_atoms"] == periods * 2 * (4 * 10 + 1) - gb["removed"]
    assert gb["removed"] >= periods * 2
    atoms = ase.io.read(out / "x.xyz")
    assert len(atoms) == report["n_atoms"]
    # away from the boundaries every atom is bulk fcc: 12 neighbours at a/sqrt2
    counts = np.bincount(neighbor_list("i", atoms, 0.5 * (a / math.sqrt(2) + a)),
                         minlength=len(atoms))
    z = atoms.positions[:, 2] % atoms.cell[2, 2]
    height = atoms.cell[2, 2] / 2
    far = (np.abs(z - height / 2) < 3.0) | (np.abs(z - 1.5 * height) < 3.0)
    assert far.any() and set(counts[far].tolist()) == {12}
    hist = report["coordination"]["histogram"]
    assert {int(k): n for k, n in hist.items()} == {
        int(k): int(n) for k, n in zip(*np.unique(counts, return_counts=True))}
    assert report["min_distance"] > 0.5 * a / math.sqrt(2)


def test_lammps_reads_the_bicrystal_and_counts_like_the_report(cli, recipe_file, tmp_path):
    result, report, out = _make(cli, recipe_file, tmp_path,
                                {"axis": [0, 0, 1], "plane": [2, 1, 0], "grains": 3,
                                 "vacuum": 10.0}, (2, 1, 1), outputs=["lammps-data", "xyz"])
    assert result.exit_code == 0 and report["passed"]
    assert report["grain_boundary"]["boundaries"] == 1
    got = coordination_histogram(out / "x.lmp", report["coordination"]["cutoff"], tmp_path)
    assert got == report["coordination"]["histogram"]


def test_the_same_recipe_gives_the_same_bytes(cli, recipe_file, tmp_path):
    gb = {"axis": [0, 0, 1], "plane": [3, 1, 0], "grains": 2}
    first = _make(cli, recipe_file, tmp_path / "a", gb)[1]
    second = _make(cli, recipe_file, tmp_path / "b", gb)[1]
    assert first["outputs"]["xyz"]["sha256"] == second["outputs"]["xyz"]["sha256"]


@pytest.mark.parametrize("gb,crystal,repeat,key", [
    ({"axis": [0, 0, 1], "plane": [3, 1, 1]}, CU, (1, 1, 1), "grain_boundary.axis"),
    ({"axis": [0, 0, 1]}, CU, (1, 1, 1), "grain_boundary.plane"),
    ({"axis": [0, 0, 1], "plane": [3, 1, 0], "vacuum": -2}, CU, (1, 1, 1), "grain_boundary.vacuum"),
    ({"axis": [0, 0, 1], "plane": [3, 1, 0], "grains": 0}, CU, (1, 1, 1), "grain_boundary.grains"),
    ({"axis": [0, 0, 1], "plane": [3, 1, 0]}, CU, (1, 1, 2), "size"),
    ({"axis": [0, 0, 1], "plane": [1, 0, 0]},
     {"element": "Ti", "lattice": "hcp", "a": 2.95}, (1, 1, 1), "grain_boundary"),
])
def test_bad_boundaries_exit_2_in_one_sentence(cli, recipe_file, tmp_path, gb, crystal, repeat,
                                               key):
    result, _, out = _make(cli, recipe_file, tmp_path, gb, repeat, crystal=crystal)
    assert result.exit_code == 2, result.output
    assert f"`{key}" in result.output and "Traceback" not in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not out.exists()
