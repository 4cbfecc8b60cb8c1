"""The space group of a defected supercell from the operations of its crystal.

spglib's dataset for one vacancy in a 108-site fcc supercell costs about 5 ms (it
searches the cell's translations and rotations from the coordinates), the largest
single cost of a small structure in a library. When the structure is a supercell
of a crystal with some sites emptied or given other species, its operations are
known in advance: they are the operations of the perfect pattern, (R, t + n) for
each operation (R, t) spglib finds for the crystal's cell and each lattice
translation n, that keep every site's type. :func:`defected_spacegroup` finds
those (integer arithmetic on site indices, never a search over coordinates) and
asks spglib only for the space-group type of that set of operations.

It answers only where that set is provably the structure's whole symmetry (see
:func:`defected_spacegroup`) and returns None otherwise, so that the caller asks
spglib for the full dataset; both give the same number and symbol
(tests/test_site_symmetry.py holds them against each other). Perfect structures
always go to spglib: their space group is a check, and a check is measured on
the built coordinates, not derived from the crystal's table.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

#: Fractional tolerance for an operation of the crystal's cell mapping a basis site
#: onto a basis site; operations that hold only within spglib's tolerance (a CIF's
#: rounded coordinates) are left to spglib, which judges them on the built structure.
EXACT = 1e-9
#: Positions (Angstrom) and cell of the structure must be the ideal ones this
#: closely: displaced or strained structures are left to spglib.
IDEAL = 1e-9
#: Candidate operations examined at most (each is checked on every changed site).
MAX_CANDIDATES = 1 << 20
#: spglib tolerance (Angstrom) for the crystal's cell and the type of the operations.
SYMPREC = 1e-4


@dataclass(frozen=True, eq=False)
class UnitOperations:
    """The operations of a crystal's cell as actions on its basis sites.

    Attributes:
        rotations: (g, 3, 3) int, in the cell's fractional basis (spglib's).
        translations: (g, 3) float, fractions of the cell.
        image: (g, B) int, the basis site each basis site goes to.
        shift: (g, B, 3) int, the cell the image lies in, relative to the original.
        types: (B,) int, the element class of each basis site.
    """

    rotations: np.ndarray
    translations: np.ndarray
    image: np.ndarray
    shift: np.ndarray
    types: np.ndarray


@lru_cache(maxsize=64)
def unit_operations(crystal) -> UnitOperations | None:
    """The operations spglib finds for one cell of ``crystal`` (a
    :class:`~cellbuild.crystal.Crystal`), sites typed by element, as basis
    permutations; None if an operation is not exact (cached per crystal)."""
    import spglib

    basis = np.asarray(crystal.basis, dtype=np.float64)
    classes = {e: k for k, e in enumerate(dict.fromkeys(crystal.elements))}
    types = np.array([classes[e] for e in crystal.elements], dtype=np.int64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        sym = spglib.get_symmetry((crystal.cell, basis, types), symprec=SYMPREC)
    if not sym or len(sym["rotations"]) == 0:
        return None
    rotations = np.asarray(sym["rotations"], dtype=np.int64)
    translations = np.asarray(sym["translations"], dtype=np.float64)
    moved = np.einsum("gij,bj->gbi", rotations, basis) + translations[:, None, :]
    # (g, B_image, B_target) differences, periodic: small for the image's site
    delta = moved[:, :, None, :] - basis[None, None, :, :]
    off = np.abs(delta - np.rint(delta)).max(axis=3)
    image = off.argmin(axis=2)
    if not np.all(np.take_along_axis(off, image[..., None], axis=2) < EXACT):
        return None
    if not np.array_equal(types[image], np.broadcast_to(types, image.shape)):
        return None
    shift = np.rint(np.take_along_axis(delta, image[..., None, None], axis=2)[:, :, 0, :])
    return UnitOperations(rotations, translations, image, shift.astype(np.int64), types)


def defected_spacegroup(crystal, repeat, structure, n_vacancies: int) -> tuple[str, int] | None:
    """(international symbol, number) of ``structure``, a ``repeat`` supercell of
    ``crystal`` with ``n_vacancies`` sites emptied and some given other species,
    as spglib would find it with the vacant sites marked; None where this
    function cannot say (the caller then asks spglib).

    It answers when: every atom sits exactly on its lattice site (no interstitial,
    no displacement, the ideal cell); exactly ``n_vacancies`` lattice sites are
    empty; some site differs from the perfect crystal; every type (species, or
    vacancy) sits on sites of one element of the perfect crystal only (then every
    symmetry keeps the perfect pattern, so it is one of the crystal's operations
    combined with a lattice translation); and the operations found include no
    translation shorter than the supercell's (then every symmetry also keeps the
    supercell lattice, which is the set searched).
    """
    ops = unit_operations(crystal)
    if ops is None or structure.n_atoms == 0:
        return None
    repeat = np.asarray(repeat, dtype=np.int64)
    n_basis, n_grid = crystal.n_basis, crystal.n_grid
    site = structure.site
    cell_id, basis_id = np.divmod(site, n_grid)
    n_cells = int(np.prod(repeat))
    if site.min() < 0 or basis_id.max() >= n_basis or cell_id.max() >= n_cells:
        return None  # interstitials, or atoms without a site
    flat = cell_id * n_basis + basis_id
    n_sites = n_cells * n_basis
    if (n_sites - structure.n_atoms != n_vacancies
            or np.count_nonzero(np.bincount(flat, minlength=n_sites) > 1)):
        return None
    if not _ideal_geometry(crystal, repeat, structure):
        return None
    marker = len(structure.symbols)
    kind = np.full(n_sites, marker, dtype=np.int64)  # the structure's type of every site
    kind[flat] = structure.species
    element = np.tile(ops.types, n_cells)  # the perfect crystal's element class
    perfect_code = np.array([structure.symbols.index(e) for e in dict.fromkeys(crystal.elements)])
    changed = np.flatnonzero(kind != perfect_code[element])
    if changed.size == 0:
        return None
    pairs = np.unique(kind * (len(perfect_code) + 1) + element)
    if len(pairs) != len(np.unique(kind)):
        return None  # a type on two elements' sites: symmetries may leave the pattern
    keep = _lattice_preserving(ops.rotations, repeat)
    found = _stabiliser(ops, keep, repeat, kind, changed)
    if found is None:
        return None
    g, n = found
    rot, trans = ops.rotations[g], ops.translations[g] + n
    identity = np.all(rot == np.eye(3, dtype=np.int64), axis=(1, 2))
    if np.count_nonzero(identity) != 1:
        return None  # a shorter translation: the symmetry may not keep the supercell
    # Origin on the first changed site: the type of a set of operations does not
    # depend on the origin, and so written, the same defect anywhere in the
    # supercell gives the same operations (a library of them asks spglib once).
    cell_ijk, basis_id = _cell_of(changed[:1], n_basis, repeat)
    origin = cell_ijk[0] + np.asarray(crystal.basis, dtype=np.float64)[basis_id[0]]
    trans = trans + np.einsum("gij,j->gi", rot, origin) - origin
    return _space_group_type(rot, trans, repeat, structure.cell)


def _ideal_geometry(crystal, repeat, structure) -> bool:
    """Whether the cell and every position are the ideal ones (within IDEAL A)."""
    from .build import site_positions

    if not np.allclose(structure.cell, crystal.supercell(tuple(int(r) for r in repeat)),
                       rtol=0.0, atol=IDEAL):
        return False
    ideal = site_positions(crystal, tuple(int(r) for r in repeat), structure.site)
    return bool(np.abs(ideal - structure.positions).max() <= IDEAL)


def _lattice_preserving(rotations: np.ndarray, repeat: np.ndarray) -> np.ndarray:
    """Indices of the rotations that map the supercell lattice onto itself:
    diag(1/N) R diag(N) is an integer matrix."""
    scaled = rotations * repeat[None, None, :]
    return np.flatnonzero(np.all(scaled % repeat[None, :, None] == 0, axis=(1, 2)))


def _stabiliser(ops: UnitOperations, keep: np.ndarray, repeat: np.ndarray,
                kind: np.ndarray, changed: np.ndarray):
    """The operations (index into ``ops``, lattice translation n in cells) that
    keep the type of every changed site; None if there are too many candidates.

    Candidates map the first site of the rarest changed type onto a site of that
    type; each is then checked on every changed site, a few sites at a time so
    that the candidates thin out before the bulk of the sites is checked."""
    n_basis = ops.image.shape[1]
    values, counts = np.unique(kind[changed], return_counts=True)
    rarest = values[counts.argmin()]
    targets = changed[kind[changed] == rarest]
    if len(keep) * len(targets) > MAX_CANDIDATES:
        return None
    t_cell, t_basis = _cell_of(targets, n_basis, repeat)
    s_cell, s_basis = t_cell[0], t_basis[0]
    # image of the first target under each kept operation, before the translation
    landed = np.einsum("gij,j->gi", ops.rotations[keep], s_cell) + ops.shift[keep, s_basis]
    where = ops.image[keep, s_basis]
    g_idx, t_idx = np.nonzero(where[:, None] == t_basis[None, :])
    g = keep[g_idx]
    n = (t_cell[t_idx] - landed[g_idx]) % repeat
    order = np.argsort(changed != targets[0], kind="stable")  # the first target's checked
    sites = changed[order]
    start, step = 0, 8
    while start < len(sites) and len(g):
        part = sites[start:start + step]
        cell, basis = _cell_of(part, n_basis, repeat)
        moved = (np.einsum("gij,kj->gki", ops.rotations[g], cell) + ops.shift[g][:, basis]
                 + n[:, None, :]) % repeat
        index = ((moved[..., 0] * repeat[1] + moved[..., 1]) * repeat[2]
                 + moved[..., 2]) * n_basis + ops.image[g][:, basis]
        ok = np.all(kind[index] == kind[part][None, :], axis=1)
        g, n = g[ok], n[ok]
        start, step = start + step, step * 8
    return g, n


def _cell_of(flat: np.ndarray, n_basis: int, repeat: np.ndarray):
    """(cell (k, 3), basis site (k,)) of site indices ``cell * n_basis + basis``."""
    cell, basis = np.divmod(flat, n_basis)
    i, rest = np.divmod(cell, repeat[1] * repeat[2])
    j, k = np.divmod(rest, repeat[2])
    return np.stack([i, j, k], axis=1), basis


def _space_group_type(rot: np.ndarray, trans: np.ndarray, repeat: np.ndarray,
                      cell: np.ndarray) -> tuple[str, int] | None:
    """spglib's space-group type of operations (R, t) given in the crystal's cell,
    rewritten in the supercell's basis: diag(1/N) R diag(N), t / N (translations
    rounded to 1e-12 and wrapped into [0, 1), so equal sets give equal keys)."""
    r_super = (rot * repeat[None, None, :] // repeat[None, :, None]).astype(np.intc)
    t_super = np.round((trans / repeat[None, :]) % 1.0, 12) % 1.0
    return _type_of_operations(r_super.tobytes(), t_super.tobytes(),
                               np.asarray(cell, dtype=np.float64).tobytes())


#: Sets of operations whose space-group type is kept per process.
_TYPE_CACHE = 256


@lru_cache(maxsize=_TYPE_CACHE)
def _type_of_operations(rotations: bytes, translations: bytes,
                        cell: bytes) -> tuple[str, int] | None:
    """spglib's (short symbol, number) for operations given as the bytes of
    (g, 3, 3) intc rotations and (g, 3) float64 translations in a (3, 3) cell."""
    import spglib

    rot = np.frombuffer(rotations, dtype=np.intc).reshape(-1, 3, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        found = spglib.get_spacegroup_type_from_symmetry(
            rot, np.frombuffer(translations, dtype=np.float64).reshape(-1, 3),
            lattice=np.frombuffer(cell, dtype=np.float64).reshape(3, 3), symprec=SYMPREC)
    if found is None:
        return None
    return str(found.international_short), int(found.number)
