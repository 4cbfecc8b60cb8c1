"""The atoms free to relax around the defects (``relax: {within: R}``).

An atom is free when it is a defect (a substituted, antisite or interstitial
atom) or lies within R Angstrom, periodic distance in the written cell's ideal
geometry, of a defect's site (a vacancy counts by its empty site). The rest are
fixed. POSCAR writes the selection as selective dynamics (T T T / F F F), extended
XYZ as the per-atom ``move_mask`` (ASE's convention: T moves), and LAMMPS gets
``NAME.lammps-groups``, an ``include`` file defining the groups ``free`` and
``fixed`` by atom id.
"""
from __future__ import annotations

import numpy as np

from . import neighbours
from .build import site_positions
from .defects import atom_indices

#: Extension of the LAMMPS group file.
GROUPS_EXTENSION = ".lammps-groups"


def free_atoms(plan, structure, placements, within: float) -> np.ndarray:
    """(N,) bool: atoms of ``structure`` (ideal positions, file order) free to move."""
    n = structure.n_atoms
    atoms = atom_indices(structure, [p.site_ids for p in placements
                                     if p.kind != "vacancy" and p.count])
    holes = [site_positions(plan.crystal, plan.repeat, p.site_ids)
             for p in placements if p.kind == "vacancy" and p.count]
    free = np.zeros(n, dtype=bool)
    centres = np.concatenate(atoms) if atoms else np.zeros(0, dtype=np.int64)
    free[centres] = True
    points = np.concatenate([structure.positions, *holes]) if holes else structure.positions
    centres = np.concatenate([centres, np.arange(n, points.shape[0])])
    if centres.size:
        _, j, _ = neighbours.pairs_of(structure.cell, points, centres, within)
        free[j[j < n]] = True
    return free


def groups_text(free: np.ndarray) -> str:
    """LAMMPS commands defining ``free`` and ``fixed`` (atom ids 1..N in file order),
    ids as ``a:b`` ranges, continued with ``&`` every few ranges."""
    ids = np.flatnonzero(free) + 1
    if ids.size == 0:
        return "group free empty\ngroup fixed subtract all free\n"
    breaks = np.flatnonzero(np.diff(ids) != 1)
    starts = np.concatenate([[ids[0]], ids[breaks + 1]])
    ends = np.concatenate([ids[breaks], [ids[-1]]])
    ranges = [f"{a}" if a == b else f"{a}:{b}" for a, b in zip(starts.tolist(), ends.tolist())]
    lines = [" ".join(ranges[k:k + 12]) for k in range(0, len(ranges), 12)]
    return ("# atoms free to relax (cellbuild relax.within); include this after read_data\n"
            "group free id " + " &\n  ".join(lines) + "\ngroup fixed subtract all free\n")
