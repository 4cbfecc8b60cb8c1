"""Defect atom ids in NAME.defects.json point at the right atom in every output file.

Each file is read back by an outside reader (ASE's readers for LAMMPS data, CIF,
extended XYZ and POSCAR); the element at every listed 1-based id must be the
substituted or interstitial element, the interstitial's position must match the
listed one, and no atom may sit at a listed vacancy position (periodic distance).
"""
from __future__ import annotations

import json

import ase.io
import numpy as np
import pytest

from conftest import recipe_dict

READERS = {  # format key -> (extension, ase.io.read keyword arguments)
    "lammps-data": (".lmp", {"format": "lammps-data", "atom_style": "atomic"}),
    "cif": (".cif", {"format": "cif"}),
    "xyz": (".xyz", {"format": "extxyz"}),
    "poscar": (".vasp", {"format": "vasp"}),
}


def _periodic_gap(atoms, point) -> np.ndarray:
    """Minimum-image distances from ``point`` to every atom (Angstrom)."""
    cell = atoms.cell[:]
    frac = np.linalg.solve(cell.T, (atoms.positions - point).T).T
    frac -= np.round(frac)
    return np.linalg.norm(frac @ cell, axis=1)


@pytest.mark.parametrize("lattice,site", [("fcc", "octahedral"), ("bcc", "tetrahedral"),
                                          ("diamond", "tetrahedral")])
def test_defect_atom_ids_hold_in_every_format(cli, recipe_file, tmp_path, lattice, site):
    defects = {"vacancies": {"count": 3},
               "substitutions": [{"element": "Ni", "count": 4}, {"element": "Au", "count": 2}],
               "interstitials": [{"element": "C", "site": site, "count": 2}]}
    data = recipe_dict("Cu", lattice, 3.6, (3, 3, 3), defects=defects, seed=7)
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    sites = json.loads((out / f"cu-{lattice}.defects.json").read_text())
    report = json.loads((out / f"cu-{lattice}.report.json").read_text())
    for key, (ext, kwargs) in READERS.items():
        path = out / f"cu-{lattice}{ext}"
        if key == "lammps-data":
            numbers = [ase.data.atomic_numbers[s] for s in report["types"]]
            atoms = ase.io.read(path, Z_of_type={i + 1: z for i, z in enumerate(numbers)},
                                **kwargs)
        else:
            atoms = ase.io.read(path, **kwargs)
        symbols = np.array(atoms.get_chemical_symbols())
        assert len(atoms) == report["n_atoms"]
        for entry in sites["defects"]:
            if entry["kind"] == "vacancy":
                for point in entry["positions"]:
                    # half the nearest-neighbour distance: no atom left on the site
                    assert _periodic_gap(atoms, np.array(point)).min() > 0.5, key
                continue
            ids = np.array(entry["atom_ids"]) - 1
            assert (symbols[ids] == entry["element"]).all(), (key, entry["element"])
            if entry["kind"] == "interstitial":
                for idx, point in zip(ids, entry["positions"]):
                    assert _periodic_gap(atoms[[int(idx)]], np.array(point))[0] < 1e-6, key


def test_atom_order_is_the_same_in_every_format(cli, recipe_file, tmp_path):
    """One file order for all formats: the element sequence read back by ASE is
    identical across LAMMPS data, CIF, extended XYZ and POSCAR."""
    defects = {"substitutions": [{"element": "Ni", "count": 5}]}
    data = recipe_dict("Cu", "fcc", 3.615, (2, 2, 2), defects=defects, seed=3)
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    sequences = []
    for key, (ext, kwargs) in READERS.items():
        if key == "lammps-data":
            kwargs = dict(kwargs, Z_of_type={1: 29, 2: 28})
        sequences.append(ase.io.read(out / f"cu-fcc{ext}", **kwargs).get_chemical_symbols())
    assert all(s == sequences[0] for s in sequences)
