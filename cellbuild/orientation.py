"""Boxes along any crystal direction: a resolved crystal re-cut into a new repeat unit.

An oriented box (``crystal.axes``) or a supercell matrix (``size.matrix``) is made
here into a new :class:`~cellbuild.crystal.Crystal` whose conventional cell is
the new repeat unit and whose basis holds every site inside it (lattice sites,
then interstitial sites, each with its sublattice, element and kind). Every later
stage (site numbering, replication, defects, the audit's topology) then works on
it unchanged: a box of ``repeat`` such units is a supercell like any other.

Directions are integer indices on the crystal's own lattice vectors (cubic: the
cube edges; hcp: a1, a2, c). The edge of an oriented box along a direction is the
shortest translation of the Bravais lattice along it, found with the centring
translations of the cell (those that map every site onto a site of the same
kind, sublattice and element): fcc [1 -1 0] has a/sqrt2, not a sqrt2.
Lengths in Angstrom.
"""
from __future__ import annotations

import dataclasses
import math
from functools import lru_cache
from itertools import product

import numpy as np

from .crystal import Crystal, neighbour_offsets
from .errors import InputError

#: Most grid sites (lattice and interstitial) a repeat unit may hold: its
#: neighbour table costs the square of it. A larger diagonal supercell is a
#: repeat of a smaller unit (``size.repeat``).
MAX_UNIT_SITES = 3000
#: Fractional tolerance for sites on the unit's faces and for centrings.
_TOL = 1e-7
#: Fractions q/k in (0, 1], smallest first: the steps tried along a direction
#: (centring denominators of real cells are 2, 3, 4 or 6; 48 leaves room).
_STEPS = np.array(sorted({q / k for k in range(1, 49) for q in range(1, k + 1)}))


@lru_cache(maxsize=64)
def centrings(crystal: Crystal) -> np.ndarray:
    """(k, 3) translations in conventional-cell fractions (0 first) that map the
    crystal's grid onto itself, each site onto one of the same kind, sublattice and
    element: the centring vectors of its Bravais lattice."""
    frac = np.mod(crystal.site_frac, 1.0)
    kinds = np.array([f"{k}|{lb}|{e}" for k, lb, e in zip(
        crystal.site_kind, crystal.sublattice + ("",) * (crystal.n_grid - crystal.n_basis),
        crystal.elements + ("",) * (crystal.n_grid - crystal.n_basis))])
    found = [np.zeros(3)]
    for j in range(1, crystal.n_grid):
        if kinds[j] != kinds[0]:
            continue
        t = np.mod(frac[j] - frac[0], 1.0)
        moved = np.mod(frac + t, 1.0)
        diff = moved[:, None, :] - frac[None, :, :]
        diff -= np.round(diff)
        same = np.all(np.abs(diff) < _TOL, axis=2) & (kinds[:, None] == kinds[None, :])
        if np.all(same.any(axis=1)) and not any(np.allclose(t, f, atol=_TOL) for f in found):
            found.append(t)
    return np.array(found)


def shortest_translation(crystal: Crystal, direction, key: str) -> np.ndarray:
    """The shortest lattice translation along integer ``direction`` (conventional
    fractions): t * direction / gcd for the smallest t in (0, 1] that is a lattice
    vector, the centrings counted."""
    d = np.array(direction, dtype=np.int64)
    g = math.gcd(*[abs(int(x)) for x in d])
    d = d // g
    shifts = centrings(crystal)
    t = np.mod(d[None, :] * _STEPS[:, None], 1.0)  # (steps, 3)
    t[t > 1 - _TOL] = 0.0
    hit = np.all(np.abs(t[:, None, :] - shifts[None, :, :]) < _TOL, axis=2).any(axis=1)
    if hit.any():
        return d * _STEPS[int(np.argmax(hit))]
    raise InputError(f"has no lattice translation along {list(direction)} within 48 steps",
                     key=key, value=list(direction), hint="give a lattice direction")


@lru_cache(maxsize=64)
def oriented(crystal: Crystal, axes: tuple[tuple[int, int, int], ...]) -> Crystal:
    """The crystal cut into the orthogonal box whose x, y, z edges run along
    ``axes`` (integer directions on the crystal's lattice vectors), rotated so
    that those edges lie along Cartesian x, y, z."""
    cart = np.array(axes, dtype=np.float64) @ crystal.cell
    names = ("x", "y", "z")
    for i, j in ((0, 1), (0, 2), (1, 2)):
        cosine = float(cart[i] @ cart[j]) / float(np.linalg.norm(cart[i]) * np.linalg.norm(cart[j]))
        if abs(cosine) > 1e-9:
            raise InputError(
                f"directions {names[i]} and {names[j]} are not orthogonal (angle "
                f"{math.degrees(math.acos(max(-1.0, min(1.0, cosine)))):.3f} degrees)",
                key="crystal.axes", value={n: list(a) for n, a in zip(names, axes)},
                hint="give three mutually orthogonal directions, such as [1,-1,0], [1,1,-2], [1,1,1]")
    if np.linalg.det(cart) <= 0:
        raise InputError("is left-handed (x cross y points against z)", key="crystal.axes",
                         value={n: list(a) for n, a in zip(names, axes)},
                         hint="negate one direction")
    rows = np.array([shortest_translation(crystal, a, f"crystal.axes.{n}")
                     for n, a in zip(names, axes)])
    lengths = np.linalg.norm(rows @ crystal.cell, axis=1)
    return _recut(crystal, rows, np.diag(lengths), "crystal.axes")


@lru_cache(maxsize=64)
def with_matrix(crystal: Crystal, matrix: tuple[tuple[int, int, int], ...]) -> Crystal:
    """The crystal re-cut into the cell whose rows are ``matrix`` (integers) times
    the conventional cell's rows, in the crystal's own frame."""
    rows = np.array(matrix, dtype=np.float64)
    return _recut(crystal, rows, rows @ crystal.cell, "size.matrix")


def _recut(crystal: Crystal, rows: np.ndarray, cell: np.ndarray, key: str) -> Crystal:
    """The new crystal: cell ``cell`` (Angstrom), spanned in the crystal's
    conventional fractions by ``rows``; sites found inside it."""
    volume_ratio = abs(float(np.linalg.det(rows)))
    expected = volume_ratio * crystal.n_grid
    if round(expected) > MAX_UNIT_SITES:
        raise InputError(f"gives a repeat unit of {round(expected):,} sites, more than the "
                         f"{MAX_UNIT_SITES:,} one unit may hold", key=key,
                         hint="use size.repeat for the diagonal part of the supercell")
    inverse = np.linalg.inv(rows)
    corners = np.array(list(product((0, 1), repeat=3)), dtype=np.float64) @ rows
    lo = np.floor(corners.min(axis=0)).astype(int) - 1
    hi = np.ceil(corners.max(axis=0)).astype(int) + 1
    shifts = np.array(list(product(*(range(a, b + 1) for a, b in zip(lo, hi)))), dtype=np.float64)
    # every conventional translate of every grid site, in the new cell's fractions
    frac = ((shifts[:, None, :] + crystal.site_frac[None, :, :]) @ inverse)
    local = np.broadcast_to(np.arange(crystal.n_grid), frac.shape[:2]).ravel()
    frac = frac.reshape(-1, 3)
    inside = np.all((frac > -_TOL) & (frac < 1.0 - _TOL), axis=1)
    frac, local = np.where(np.abs(frac[inside]) < _TOL, 0.0, frac[inside]), local[inside]
    if len(frac) != round(expected) or abs(expected - round(expected)) > 1e-6:
        raise InputError(f"does not span a whole number of lattice periods ({len(frac)} sites "
                         f"found, {expected:.3f} expected)", key=key,
                         hint="give lattice directions (integer indices)")
    # deterministic order: by the original site, then by position (z, y, x)
    rounded = np.round(frac, 9)
    order = np.lexsort((rounded[:, 0], rounded[:, 1], rounded[:, 2], local))
    frac, local = frac[order], local[order]
    return unit_crystal(crystal, cell, frac, local, unit_rows=tuple(map(tuple, rows.tolist())))


def unit_crystal(parent: Crystal, cell: np.ndarray, frac: np.ndarray, local: np.ndarray,
                 **fields) -> Crystal:
    """A new repeat unit of ``parent``'s sites: site k at ``frac[k]`` (fractions of
    ``cell``, Angstrom rows) is grid site ``local[k]`` of ``parent`` and keeps its
    kind, sublattice, element and audit cutoff. Lattice sites come first, then each
    interstitial kind, each in the given order; ``fields`` are set on the result."""
    kinds = np.array(parent.site_kind)[local]
    lattice = local < parent.n_basis
    basis = frac[lattice]
    parts = [frac[kinds == kind] for kind in parent.interstitial_kinds]
    site_frac = np.concatenate([basis] + parts)
    site_kind = ("lattice",) * len(basis) + tuple(
        kind for kind, part in zip(parent.interstitial_kinds, parts) for _ in part)
    site_cutoff = tuple(float(c) for c in np.array(parent.site_cutoff)[local[lattice]])
    cutoffs = np.full(len(site_frac), parent.audit_cutoff)
    cutoffs[:len(basis)] = site_cutoff
    cell = np.ascontiguousarray(cell, dtype=np.float64)
    return dataclasses.replace(
        parent, cell=cell, basis=basis,
        sublattice=tuple(np.array(parent.sublattice)[local[lattice]].tolist()),
        elements=tuple(np.array(parent.elements)[local[lattice]].tolist()),
        site_frac=site_frac, site_kind=site_kind, site_cutoff=site_cutoff,
        offsets=neighbour_offsets(cell, site_frac, cutoffs), parent=parent.parent or parent,
        **fields)
