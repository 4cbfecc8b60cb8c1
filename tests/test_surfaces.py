"""Slabs with vacuum (`surface:`), against textbook geometry (common practice):
surface coordination fcc(111) 9, fcc(100) 8, fcc(110) 7, bcc(110) 6, bcc(100) 4,
hcp(0001) 9 (nearest neighbours lost with the half-space above the plane);
interplanar spacings d = a / sqrt(h^2 + k^2 + l^2) halved where the centring
puts a plane midway (fcc (100) a/2, (110) a/(2 sqrt2), (111) a/sqrt3; bcc (110)
a/sqrt2, (100) a/2); atoms per area of a plane fcc(111) 4/(sqrt3 a^2), fcc(100)
2/a^2, bcc(110) sqrt2/a^2; rock salt (111) planes hold one species (polar), (100)
planes both (not polar). ASE's neighbour list and LAMMPS's coord/atom count the
files. Lattice constants are handbook values, from memory.
"""
from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest

from lammps_run import coordination_histogram

CU = {"element": "Cu", "lattice": "fcc", "a": 3.615}
W = {"element": "W", "lattice": "bcc", "a": 3.165}


def _make(cli, recipe_file, tmp_path, crystal, surface, repeat=(3, 3, 1), name="x", **extra):
    data = {"name": name, "crystal": crystal, "surface": surface,
            "size": {"repeat": list(repeat)}, "seed": 2, **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    path = out / f"{name}.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None), out


@pytest.mark.parametrize("crystal,miller,surface_z,spacing,per_area", [
    (CU, [1, 1, 1], 9, 1 / math.sqrt(3), 4 / math.sqrt(3)),
    (CU, [1, 0, 0], 8, 1 / 2, 2.0),
    (CU, [1, 1, 0], 7, 1 / (2 * math.sqrt(2)), math.sqrt(2)),
    (W, [1, 1, 0], 6, 1 / math.sqrt(2), math.sqrt(2)),
    (W, [1, 0, 0], 4, 1 / 2, 1.0),
])
def test_slab_surface_coordination_spacing_and_density(cli, recipe_file, tmp_path, crystal,
                                                       miller, surface_z, spacing, per_area):
    import ase.io
    from ase.neighborlist import neighbor_list

    a, layers, vacuum = crystal["a"], 7, 14.0
    result, report, out = _make(cli, recipe_file, tmp_path, crystal,
                                {"miller": miller, "layers": layers, "vacuum": vacuum})
    assert result.exit_code == 0 and report["passed"], result.output
    facts = report["surface"]
    assert facts["layers"] == layers
    assert facts["interlayer_spacing"] == [pytest.approx(spacing * a, abs=1e-5)]
    assert facts["top_plane_atoms_per_area"] == pytest.approx(per_area / a**2, rel=1e-9)
    assert report["cell_lengths"][2] == pytest.approx((layers - 1) * spacing * a + vacuum)
    per_plane = report["n_atoms"] // layers
    hist = report["coordination"]["histogram"]
    assert hist[str(surface_z)] == 2 * per_plane  # top and bottom planes
    # ASE's neighbour list on the file read back: the same counts from geometry
    atoms = ase.io.read(out / "x.xyz")
    nearest = a / math.sqrt(2) if crystal["lattice"] == "fcc" else a * math.sqrt(3) / 2
    counts = np.bincount(neighbor_list("i", atoms, nearest * 1.05), minlength=len(atoms))
    z = atoms.positions[:, 2]
    outer = (np.abs(z - z.min()) < 1e-6) | (np.abs(z - z.max()) < 1e-6)
    assert set(counts[outer].tolist()) == {surface_z}
    bulk_z = 12 if crystal["lattice"] == "fcc" else 8
    assert counts.max() == bulk_z and report["surface"]["polar"] is False


def test_hcp_basal_slab_with_axes(cli, recipe_file, tmp_path):
    hcp = {"element": "Ti", "lattice": "hcp", "a": 2.951, "c_over_a": math.sqrt(8 / 3),
           "axes": {"x": [1, 0, 0], "y": [1, 2, 0], "z": [0, 0, 1]}}
    result, report, _ = _make(cli, recipe_file, tmp_path, hcp,
                              {"miller": [0, 0, 1], "layers": 6, "vacuum": 12.0}, (2, 2, 1))
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["coordination"]["histogram"]["9"] == 2 * report["n_atoms"] // 6
    assert report["surface"]["interlayer_spacing"] == [pytest.approx(2.951 * math.sqrt(8 / 3) / 2,
                                                                     abs=1e-5)]


def test_rock_salt_111_is_polar_with_its_termination_and_100_is_not(cli, recipe_file, tmp_path):
    mgo = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}
    for label in ("A", "B"):
        result, report, _ = _make(cli, recipe_file, tmp_path / label, mgo,
                                  {"miller": [1, 1, 1], "layers": 6, "vacuum": 12.0,
                                   "termination": label}, (2, 2, 1),
                                  charges={"Mg": 2, "O": -2})
        assert result.exit_code == 0 and report["passed"]
        assert report["surface"]["polar"] is True and report["surface"]["top_plane_sublattices"] == [label]
        assert any("polar" in w for w in report["warnings"])
    result, report, _ = _make(cli, recipe_file, tmp_path / "100", mgo,
                              {"miller": [1, 0, 0], "layers": 4, "vacuum": 12.0}, (2, 2, 1))
    assert result.exit_code == 0 and report["passed"]
    assert report["surface"]["polar"] is False and not report["warnings"]
    # rock salt (100): surface ions keep 5 of their 6 neighbours
    assert set(report["coordination"]["histogram"]) == {"5", "6"}


def test_a_damaged_slab_fails_the_audit(cli, recipe_file, tmp_path):
    from cellbuild.audit import audit
    from cellbuild.pipeline import build
    from cellbuild.recipe import parse_recipe

    recipe = parse_recipe({"name": "s", "crystal": CU, "size": {"repeat": [2, 2, 1]},
                           "surface": {"miller": [1, 1, 1], "layers": 5, "vacuum": 12.0}})
    b = build(recipe)
    assert audit(b.plan, b.structure, b.placements).passed
    s = b.structure
    positions = s.positions.copy()
    top = int(np.argmax(positions[:, 2]))
    positions[top, 2] += 1.0  # a surface atom lifted off its site
    failed = {c.name for c in audit(b.plan, dataclasses.replace(s, positions=positions),
                                    b.placements).checks if not c.passed}
    assert "coordination" in failed


def test_lammps_reads_the_slab_and_counts_like_the_report(cli, recipe_file, tmp_path):
    result, report, out = _make(cli, recipe_file, tmp_path, CU,
                                {"miller": [1, 1, 0], "layers": 6, "vacuum": 15.0},
                                outputs=["lammps-data"], defects={"vacancies": {"count": 2}})
    assert result.exit_code == 0 and report["passed"]
    got = coordination_histogram(out / "x.lmp", report["coordination"]["cutoff"], tmp_path)
    assert got == report["coordination"]["histogram"]


@pytest.mark.parametrize("crystal,surface,repeat,key", [
    (CU, {"miller": [0, 0, 0], "layers": 4, "vacuum": 10.0}, (2, 2, 1), "surface.miller"),
    (CU, {"miller": [1, 1, 1], "layers": 0, "vacuum": 10.0}, (2, 2, 1), "surface.layers"),
    (CU, {"miller": [1, 1, 1], "layers": 4, "vacuum": -1.0}, (2, 2, 1), "surface.vacuum"),
    (CU, {"miller": [1, 1, 1], "layers": 4}, (2, 2, 1), "surface.vacuum"),
    (CU, {"miller": [1, 1, 1], "layers": 4, "vacuum": 10.0}, (2, 2, 2), "size"),
    (CU, {"miller": [1, 1, 1], "layers": 4, "vacuum": 10.0, "termination": "B"}, (2, 2, 1),
     "surface.termination"),
    ({"element": "Ti", "lattice": "hcp", "a": 2.951}, {"miller": [0, 0, 1], "layers": 4,
                                                       "vacuum": 10.0}, (2, 2, 1), "surface"),
    ({**CU, "axes": {"x": [1, -1, 0], "y": [0, 0, 1], "z": [1, 1, 0]}},
     {"miller": [1, 1, 1], "layers": 4, "vacuum": 10.0}, (2, 2, 1), "crystal.axes"),
])
def test_bad_surfaces_exit_2_in_one_sentence(cli, recipe_file, tmp_path, crystal, surface,
                                             repeat, key):
    result, _, out = _make(cli, recipe_file, tmp_path, crystal, surface, repeat)
    assert result.exit_code == 2, result.output
    assert f"`{key}" in result.output and "Traceback" not in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not out.exists()


@pytest.mark.parametrize("crystal,miller,layers,lattice", [
    (CU, [1, 1, 1], 7, "fcc"), (CU, [1, 0, 0], 7, "fcc"), (CU, [1, 1, 0], 6, "fcc"),
    (W, [1, 1, 0], 5, "bcc"),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}, [1, 0, 0], 5,
     "rocksalt"),
])
def test_inspect_recognises_a_slab_and_its_lattice_not_defects(cli, recipe_file, tmp_path,
                                                                crystal, miller, layers, lattice):
    result, report, out = _make(cli, recipe_file, tmp_path, crystal,
                                {"miller": miller, "layers": layers, "vacuum": 12.0},
                                outputs=["cif", "xyz"])
    assert result.exit_code == 0
    for name in ("x.cif", "x.xyz"):
        found = json.loads(cli("inspect", out / name, "--json").output)
        assert found["slab"]["axis"] == "c"
        assert found["slab"]["vacuum"] == pytest.approx(12.0, abs=1e-6)
        spacing = report["surface"]["interlayer_spacing"][0]
        assert found["slab"]["plane_spacing"] == pytest.approx(spacing, abs=1e-4)
        assert found["lattice"] == lattice
        assert found["defects"]["vacancy_like"] == 0, found["defects"]


def test_inspect_finds_no_slab_in_a_bulk_box(cli, recipe_file, tmp_path):
    data = {"name": "bulk", "crystal": CU, "size": {"repeat": 3}, "outputs": ["xyz"]}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    found = json.loads(cli("inspect", out / "bulk.xyz", "--json").output)
    assert found["slab"] is None and found["lattice"] == "fcc"


def test_a_sweep_over_the_layers_gives_a_slab_thickness_series(cli, recipe_file, tmp_path):
    """fcc(111): one close-packed plane per layer, each holding the same atoms (fcc
    geometry, common practice): five layers hold 5/4 of four layers' atoms."""
    import json

    data = {"name": "s", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615},
            "size": {"repeat": [1, 1, 1]}, "outputs": ["xyz"],
            "surface": {"miller": [1, 1, 1], "layers": 4, "vacuum": 10.0},
            "sweep": {"surface.layers": [4, 5]}}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, "s.yaml"), "--out", out)
    assert result.exit_code == 0, result.output
    n = [json.loads((out / f"s__layers-{k}.report.json").read_text())["n_atoms"] for k in (4, 5)]
    assert n[1] - n[0] == n[0] // 4
