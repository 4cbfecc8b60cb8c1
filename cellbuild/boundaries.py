"""Symmetric tilt grain boundaries: two grains mirrored about the boundary plane.

:func:`tilt_boundary` cuts a cubic crystal into the box with x along the tilt
``axis``, z along the boundary ``plane`` normal and y = z x x; grain 1 fills
0 <= z <= H (``grains`` repeat units of that box along z, both end planes
included; by default the fewest units giving 20 A) and grain 2 is its mirror image z -> 2H - z. With no vacuum the cell
is 2H high and periodic, holding two boundaries (z = H and z = 0); with vacuum,
one boundary and two free surfaces. Atoms of grain 2 closer than ``min_distance``
to an atom of grain 1 (the shared planes first of all) are removed, so the
result is deterministic. The bicrystal becomes the repeat unit of a new
:class:`~cellbuild.crystal.Crystal`, so the audit counts each atom against the
neighbours the planned bicrystal gives it. For a cubic crystal the two grains
are related by a 180-degree rotation about the plane normal; the report gives
its misorientation (the smallest rotation angle among the cubic equivalents)
and the coincidence-site-lattice Sigma (the odd part of the denominator of the
rotation matrix). Lengths in Angstrom, angles in degrees.
"""
from __future__ import annotations

import itertools
import math

import numpy as np

from .crystal import Crystal
from .errors import InputError
from .orientation import MAX_UNIT_SITES, oriented, unit_crystal


#: Default thickness of each grain, Angstrom (the repeat units along z rounded up).
DEFAULT_GRAIN = 20.0


def cubic_rotations() -> np.ndarray:
    """The 24 proper rotations of the cube (signed permutation matrices, det +1)."""
    out = []
    for perm in itertools.permutations(range(3)):
        for signs in itertools.product((1, -1), repeat=3):
            m = np.zeros((3, 3))
            for row, (col, sign) in enumerate(zip(perm, signs)):
                m[row, col] = sign
            if np.linalg.det(m) > 0:
                out.append(m)
    return np.array(out)


def misorientation(normal) -> float:
    """Smallest rotation angle (degrees) between two cubic grains related by a
    180-degree rotation about ``normal`` (integer plane normal)."""
    n = np.array(normal, dtype=float)
    n /= np.linalg.norm(n)
    rotation = 2.0 * np.outer(n, n) - np.eye(3)
    angles = [math.degrees(math.acos(max(-1.0, min(1.0, (np.trace(s @ rotation) - 1) / 2))))
              for s in cubic_rotations()]
    return min(angles)


def sigma(normal) -> int:
    """CSL Sigma of the 180-degree rotation about integer ``normal`` in a cubic
    lattice: R = (2 n n^T - |n|^2 I) / |n|^2; Sigma is the denominator in lowest
    terms with factors of 2 removed (common practice for cubic lattices)."""
    n = np.array(normal, dtype=np.int64)
    n2 = int(n @ n)
    numerator = 2 * np.outer(n, n) - n2 * np.eye(3, dtype=np.int64)
    g = math.gcd(n2, *[abs(int(x)) for x in numerator.ravel()])
    s = n2 // g
    while s % 2 == 0:
        s //= 2
    return s


def tilt_boundary(crystal: Crystal, axis, plane, grains: int | None, vacuum: float,
                  min_distance: float | None) -> Crystal:
    """The bicrystal repeat unit (see the module docstring)."""
    value = {"axis": list(axis), "plane": list(plane)}
    if not np.allclose(crystal.cell, crystal.cell[0, 0] * np.eye(3)):
        raise InputError(f"is for cubic cells; {crystal.prototype} is not cubic",
                         key="grain_boundary", value=value)
    if int(np.dot(axis, plane)) != 0:
        raise InputError("has a tilt axis that does not lie in the boundary plane",
                         key="grain_boundary.axis", value=value,
                         hint="for a tilt boundary the axis is perpendicular to the plane normal")
    a_, n_ = np.array(axis), np.array(plane)
    y = np.cross(n_, a_)
    y //= math.gcd(*[abs(int(v)) for v in y])
    unit = oriented(crystal, (tuple(int(v) for v in a_), tuple(int(v) for v in y),
                              tuple(int(v) for v in n_)))
    lattice = np.array(unit.site_kind) == "lattice"
    frac = unit.site_frac[lattice]
    period = float(unit.cell[2, 2])
    if grains is None:  # default: the fewest repeat units giving grains 20 A thick
        grains = max(1, math.ceil(DEFAULT_GRAIN / period - 1e-9))
    height = grains * period
    # grain 1: `grains` units and the plane at z = H (both end planes)
    shifts = np.arange(grains + 1, dtype=np.float64)
    stacked = (frac[None, :, :] + np.stack([0 * shifts, 0 * shifts, shifts], axis=1)[:, None, :])
    local = np.tile(np.arange(len(frac)), grains + 1)
    z = stacked.reshape(-1, 3)[:, 2] * period
    keep = z < height + 1e-6
    xy = stacked.reshape(-1, 3)[keep, :2] * np.array([unit.cell[0, 0], unit.cell[1, 1]])
    z, local = z[keep], local[keep]
    positions = np.concatenate([np.column_stack([xy, z]),
                                np.column_stack([xy, 2 * height - z])])
    grain = np.repeat([1, 2], len(z))
    local = np.concatenate([local, local])
    total = 2 * height + vacuum
    cell = np.diag([unit.cell[0, 0], unit.cell[1, 1], total])
    threshold = min_distance if min_distance is not None else 0.5 * crystal.nearest
    removed = _close_to_grain_one(cell, positions, grain, threshold)
    keep = np.ones(len(positions), dtype=bool)
    keep[removed] = False
    positions, grain, local = positions[keep], grain[keep], local[keep]
    if len(positions) > MAX_UNIT_SITES:
        raise InputError(f"gives {len(positions):,} atoms per in-plane period, more than "
                         f"{MAX_UNIT_SITES:,}", key="grain_boundary.grains", value=grains,
                         hint="fewer repeat units per grain")
    order = np.lexsort((positions[:, 0], positions[:, 1], np.round(positions[:, 2], 6)))
    positions, grain, local = positions[order], grain[order], local[order]
    basis = positions / np.diag(cell)
    basis[basis >= 1.0 - 1e-12] -= 1.0
    facts = {"axis": list(axis), "plane": list(plane), "grains": grains, "vacuum": vacuum,
             "misorientation": misorientation(plane), "sigma": sigma(plane),
             "boundaries": 1 if vacuum > 0 else 2, "removed_per_period": int(len(removed)),
             "min_distance": threshold, "area": float(cell[0, 0] * cell[1, 1])}
    return unit_crystal(unit, cell, basis, local, boundary=facts, unit_rows=None)


def _close_to_grain_one(cell: np.ndarray, positions: np.ndarray, grain: np.ndarray,
                        threshold: float) -> np.ndarray:
    """Indices of grain-2 atoms closer than ``threshold`` to a grain-1 atom or to an
    earlier-kept grain-2 atom (periodic distances), in index order."""
    from scipy.spatial import cKDTree

    box = np.diag(cell)
    tree = cKDTree(np.mod(positions, box), boxsize=box)
    pairs = tree.query_pairs(threshold, output_type="ndarray")
    removed: set[int] = set()
    for i, j in sorted(map(tuple, pairs.tolist())):  # a handful of pairs per period
        if i in removed or j in removed:
            continue
        if grain[i] == 2 or grain[j] == 2:
            removed.add(j if grain[j] == 2 else i)
    return np.array(sorted(removed), dtype=np.int64)
