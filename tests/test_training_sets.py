"""`batch --collect FILE` (one multi-frame extended XYZ) and `batch --db DB` (an ASE
database), read with ASE itself: every frame and row holds the written geometry and
the structure's metadata; a second build updates rows instead of duplicating them;
`verify --db` finds a row that no longer matches the manifest.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

RECIPES = {
    "cu.yaml": "name: cu\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\nsize: {repeat: 2}\n"
               "outputs: [xyz, lammps-data]\ndefects: {vacancies: {count: 1}}\n"
               "strain: {volumetric: 0.0}\nsweep: {strain.volumetric: [-0.01, 0.01]}\n",
    "pair.yaml": "name: pair\ncrystal: {element: Al, lattice: fcc, a: 4.05}\nsize: {repeat: 2}\n"
                 "outputs: [poscar]\ndefects: {substitutions: [{element: Cu, count: 2}], "
                 "placement: distinct}\n",
}


@pytest.fixture
def library(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    for name, text in RECIPES.items():
        (src / name).write_text(text)
    return src, tmp_path / "built"


def test_collect_gathers_every_structure_as_a_frame(cli, library, tmp_path):
    import ase.io

    src, out = library
    frames_path = tmp_path / "lib.extxyz"
    result = cli("batch", src, "--out", out, "--workers", "1", "--collect", frames_path)
    assert result.exit_code == 0, result.output
    manifest = json.loads((out / "manifest.json").read_text())
    frames = ase.io.read(frames_path, index=":", format="extxyz")
    assert [f.info["structure"] for f in frames] == [e["name"] for e in manifest["structures"]]
    for frame, entry in zip(frames, manifest["structures"]):
        key = "xyz" if "xyz" in entry["outputs"] else "poscar"
        written = ase.io.read(out / entry["outputs"][key]["path"],
                              format="extxyz" if key == "xyz" else "vasp")
        assert np.abs(frame.positions - written.positions).max() < 1e-8
        assert frame.get_chemical_symbols() == written.get_chemical_symbols()
        assert frame.info["seed"] == entry["seed"] and frame.info["passed"] is True
    strained = [f for f in frames if f.info["structure"].startswith("cu__")]
    assert sorted(round(f.info["strain_volumetric"], 12) for f in strained) == [-0.01, 0.01]
    pairs = [f for f in frames if f.info["structure"].startswith("pair__")]
    # solute-pair multiplicities count every pair of the 32 sites once (combinatorics)
    assert sum(f.info["multiplicity"] for f in pairs) == 32 * 31 // 2


def test_the_database_is_updated_not_duplicated_and_verified(cli, library, tmp_path):
    import ase.db

    src, out = library
    db_path = tmp_path / "lib.db"
    assert cli("batch", src, "--out", out, "--workers", "1", "--db", db_path).exit_code == 0
    manifest = json.loads((out / "manifest.json").read_text())
    n = len(manifest["structures"])
    again = cli("batch", src, "--out", out, "--workers", "1", "--db", db_path)
    assert again.exit_code == 0 and f"0 row(s) written, {n} updated" in again.output
    db = ase.db.connect(db_path)
    assert db.count() == n
    row = next(db.select(structure="cu__volumetric-0.01"))
    assert row.natoms == 31 and row.n_vacancy == 1 and row.seed == 0
    assert row.strain_volumetric == pytest.approx(0.01, abs=1e-12)
    assert json.loads(row.sweep) == {"strain.volumetric": 0.01}
    assert cli("verify", out / "manifest.json", "--db", db_path).exit_code == 0
    db.update(row.id, data={"sha256": {"xyz": "0" * 64}, "sweep": {}})
    result = cli("verify", out / "manifest.json", "--db", db_path)
    assert result.exit_code == 1 and "cu__volumetric-0.01" in result.output, result.output


def test_a_bad_database_name_exits_2(cli, library, tmp_path):
    src, out = library
    result = cli("batch", src, "--out", out, "--workers", "1", "--db", tmp_path / "lib.txt")
    assert result.exit_code == 2 and "`--db`" in result.output, result.output
    assert not out.exists()  # refused before anything was built


def test_the_demo_training_library_lands_in_one_file_and_one_database(cli, tmp_path):
    """recipes/training: 200 strained, rattled, thermal and defected structures from
    sweeps, each a frame and a row with its metadata."""
    import ase.db
    import ase.io
    from pathlib import Path

    import shutil

    root = Path(__file__).resolve().parent.parent
    shutil.copytree(root / "recipes" / "training", tmp_path / "training")
    out = tmp_path / "lib"
    result = cli("batch", tmp_path / "training", "--out", out,
                 "--collect", tmp_path / "lib.extxyz", "--db", tmp_path / "lib.db")
    assert result.exit_code == 0, result.output
    frames = ase.io.read(tmp_path / "lib.extxyz", index=":")
    db = ase.db.connect(tmp_path / "lib.db")
    assert len(frames) == db.count() == 200
    kinds = {f.info["structure"].split("__")[0] for f in frames}
    assert kinds == {"cu-eos", "cu-thermal", "cu-vac-shear", "cuni-strained", "mgo-rattled"}
    row = next(db.select(structure="cu-eos__volumetric-0.04__seed-3"))
    assert row.sweep_strain_volumetric == 0.04 and row.sweep_seed == 3
    assert row.strain_volumetric == pytest.approx(0.04, abs=1e-12)
    manifest = json.loads((out / "manifest.json").read_text())
    entry = next(e for e in manifest["structures"] if e["name"] == row.structure)
    assert row.sha256_xyz == entry["outputs"]["xyz"]["sha256"]
