"""Space group of a structure on its smallest repeating unit along the cell
vectors (step 6 of :mod:`cellbuild.inspection`). Lengths in Angstrom."""
from __future__ import annotations

from fractions import Fraction

import numpy as np

from . import neighbours
from .checks_common import spacegroup
from .structure import Structure

#: Symmetry tolerance (Angstrom) for spglib and for the translation search.
SYMPREC = 0.01
#: Largest cell (after removing pure translations) handed to spglib.
SPGLIB_MAX_ATOMS = 1000

def space_group(structure: Structure, frac: np.ndarray | None = None
                ) -> tuple[dict | None, str | None]:
    """({"symbol", "number", "symprec", "atoms_analysed"}, None) or (None, why not).
    ``frac``: the structure's wrapped fractional coordinates, when already known."""
    unit = repeating_unit(structure, SYMPREC, frac)
    if unit.n_atoms > SPGLIB_MAX_ATOMS:
        return None, (f"not determined: the cell has no smaller repeating unit along its "
                      f"vectors and {unit.n_atoms:,} atoms are more than spglib handles in "
                      f"seconds (limit {SPGLIB_MAX_ATOMS:,})")
    symbol, number = spacegroup(unit, symprec=SYMPREC)
    if number == 0:
        return None, f"spglib found no space group (symprec {SYMPREC} A)"
    return {"symbol": symbol, "number": number, "symprec": SYMPREC,
            "atoms_analysed": unit.n_atoms}, None


def repeating_unit(structure: Structure, tol: float, frac: np.ndarray | None = None
                   ) -> Structure:
    """The cell with pure translations a_k / q removed along each cell vector.

    A translation that maps every atom onto an atom of the same species
    (within about ``tol`` A) means the cell is q copies of a smaller one with the
    same space group. Structures without such a translation come back as they are.
    ``frac``: the structure's fractional coordinates wrapped into [0, 1), if known.
    """
    if frac is None:
        frac = _wrapped(structure)
    binned = None  # position bins and sorted keys, shared by the axes until the cell shrinks
    for axis in range(3):
        q, binned = _translation_order(structure, frac, axis, tol, binned)
        if q > 1:
            reduced = _slab(structure, frac, axis, q, tol)
            if reduced is not None:
                structure = reduced
                frac, binned = _wrapped(structure), None
    return structure


def _wrapped(structure: Structure) -> np.ndarray:
    # einsum rather than @: see neighbours._times on OpenBLAS threads
    frac = np.einsum("ij,jk->ik", structure.positions, np.linalg.inv(structure.cell))
    frac -= np.floor(frac)
    frac[frac >= 1.0] = 0.0
    return frac


#: Bin offset (an irrational fraction) so that the tidy coordinates of crystals
#: (multiples of 1/2, 1/4, ...) do not sit on bin edges.
_BIN_OFFSET = 0.3183098861837907
#: Atoms tried first when testing a translation: one that does not map rules
#: it out without sorting every atom.
_TRANSLATION_SAMPLE = 256


def _cells(frac: np.ndarray, bins: np.ndarray) -> np.ndarray:
    """Position bins (N, 3) of ``tol``-sized cells along each axis."""
    return np.floor(frac * bins + _BIN_OFFSET).astype(np.int64) % bins


def _keys(cells: np.ndarray, species: np.ndarray, bins: np.ndarray) -> np.ndarray:
    """One int64 per atom from its species and position bins."""
    return ((species.astype(np.int64) * bins[0] + cells[:, 0]) * bins[1]
            + cells[:, 1]) * bins[2] + cells[:, 2]


def _bins(structure: Structure, tol: float) -> np.ndarray:
    widths = neighbours.perpendicular_widths(structure.cell)
    return np.maximum(1, np.floor(widths / (2.0 * tol))).astype(np.int64)


def _translation_order(structure: Structure, frac: np.ndarray, axis: int, tol: float,
                       binned: list | None = None) -> tuple[int, list | None]:
    """(Largest q with a_axis / q a symmetry translation found from atom 0's row, or
    1; ``binned``: [position bins of :func:`_cells`, sorted keys or None], computed
    once for these coordinates and passed back in for the next axis).

    The candidate comes from the atoms in the same row along ``axis`` as atom 0
    (same bins on the other axes, same species): the shortest shift to one of
    them is p / q of the cell vector, and a_axis / q is then tested on a sample
    of atoms, then on all of them.
    """
    bins = _bins(structure, tol)
    too_fine = float(np.prod(bins.astype(np.float64))) * (int(structure.species.max()) + 1)
    if structure.n_atoms < 2 or too_fine >= 2.0 ** 62:  # keys would overflow int64
        return 1, binned
    if binned is None:
        binned = [_cells(frac, bins), None]
    cells = binned[0]
    others = [k for k in range(3) if k != axis]
    same_row = cells[:, others[0]] == cells[0, others[0]]
    same_row &= cells[:, others[1]] == cells[0, others[1]]
    same_row &= structure.species == structure.species[0]
    shift = (frac[same_row, axis] - frac[0, axis]) % 1.0
    shift = shift[(shift > 1.0 / bins[axis]) & (shift < 1.0 - 1.0 / bins[axis])]
    if shift.size == 0:
        return 1, binned
    q = Fraction(float(shift.min())).limit_denominator(structure.n_atoms).denominator
    if q < 2 or structure.n_atoms % q:
        return 1, binned
    if binned[1] is None:
        binned[1] = np.sort(_keys(cells, structure.species, bins))
    keys = binned[1]
    sample = _moved_keys(cells, frac, structure.species, bins, axis, q,
                         slice(None, None, max(1, structure.n_atoms // _TRANSLATION_SAMPLE)))
    found = np.searchsorted(keys, sample)
    if np.any(found >= len(keys)) or np.any(keys[np.minimum(found, len(keys) - 1)] != sample):
        return 1, binned
    moved_keys = _moved_keys(cells, frac, structure.species, bins, axis, q, slice(None))
    return (q if np.array_equal(keys, np.sort(moved_keys)) else 1), binned


def _moved_keys(cells: np.ndarray, frac: np.ndarray, species: np.ndarray, bins: np.ndarray,
                axis: int, q: int, rows: slice) -> np.ndarray:
    """Keys of the atoms ``rows`` moved by a_axis / q: only that coordinate's bins
    change (elementwise, as :func:`_cells` of the moved coordinates gives them)."""
    moved = cells[rows].copy()
    moved[:, axis] = _cells(((frac[rows, axis] + 1.0 / q) % 1.0)[:, None],
                            bins[axis:axis + 1])[:, 0]
    return _keys(moved, species[rows], bins)


def _slab(structure: Structure, frac: np.ndarray, axis: int, q: int,
          tol: float) -> Structure | None:
    """The atoms of the first 1/q of the cell along ``axis``, with that cell."""
    half_bin = 0.5 / _bins(structure, tol)[axis]
    keep = ((frac[:, axis] + half_bin) % 1.0) < 1.0 / q
    if int(keep.sum()) * q != structure.n_atoms:
        return None
    cell = structure.cell.copy()
    cell[axis] /= q
    return Structure(cell=cell, positions=structure.positions[keep],
                     species=structure.species[keep], symbols=structure.symbols)

