"""Warren-Cowley short-range order of a built structure, per sublattice.

alpha_i(A, B) = 1 - P_i(B | A) / c_B for the i-th neighbour shell of a
sublattice (J. M. Cowley, Phys. Rev. 77, 669 (1950)): P_i(B | A) is the share of
B among the occupied i-th shell sites around A atoms, c_B the share of B among
the atoms on the sublattice. Zero for a random arrangement, negative where unlike
neighbours are favoured (ordering), positive for clustering; alpha(A, B) equals
alpha(B, A).

Shells are those of the sublattice's own sites (distances from the crystal's
geometry, equal within 1e-6 a), and pairs are counted on the grid of sites the
structure was built on: one shifted copy of the species grid per neighbour
offset, no neighbour search, so a 1M-atom alloy takes a fraction of a second.
Vacant sites take no part in the atoms' alphas; a sublattice with vacancies
also gives the alphas of the pairs with a vacant site (``Va``) under
``vacancies``, over all its sites (so a pure metal's divacancy has them).
Interstitial atoms take no part.
"""
from __future__ import annotations

import math
from functools import lru_cache
from itertools import product

import numpy as np

#: Neighbour shells reported per sublattice.
SHELLS = 3

#: The name of a vacant lattice site in the vacancies' pairs.
VACANCY = "Va"


@lru_cache(maxsize=64)
def sublattice_shells(crystal, label: str, n_shells: int = SHELLS):
    """(distances in Angstrom, offsets per shell): the first ``n_shells`` distances
    between sites of sublattice ``label`` and, for each, the ``(s, (di, dj, dk), t)``
    pairs of grid sites of that sublattice at that distance (tuples, read-only).

    Cached per crystal object (crystals are frozen, compared by identity, and
    resolved once per process): a library of many structures of one crystal
    finds its shells once, not per structure.
    """
    sites = [i for i, lb in enumerate(crystal.sublattice) if lb == label]
    frac = crystal.site_frac[sites]
    cell = crystal.cell
    widths = abs(np.linalg.det(cell)) / np.linalg.norm(np.cross(cell[[1, 2, 0]], cell[[2, 0, 1]]),
                                                       axis=1)
    # far enough for three shells of any lattice: a few nearest distances
    reach = 3.0 * crystal.nearest * 1.8
    span = [math.ceil(reach / w) + 1 for w in widths]
    cells = np.array(list(product(*(range(-k, k + 1) for k in span))), dtype=np.float64)
    d = np.linalg.norm((cells[:, None, None, :] + frac[None, None, :, :] - frac[None, :, None, :])
                       @ cell, axis=3)  # (cells, s, t)
    scale = crystal.a * 1e-6
    keys = np.unique(np.round(d[d > scale] / scale).astype(np.int64))
    distances = [round(float(k * scale), 9) for k in keys[:n_shells]]
    shells = []
    for r in distances:
        c, s, t = np.nonzero(np.abs(d - r) < 2 * scale)
        shells.append(tuple((sites[int(a)], tuple(int(x) for x in cells[int(ci)]), sites[int(b)])
                            for ci, a, b in zip(c, s, t)))
    return tuple(distances), tuple(shells)


def alpha_table(counts, names, conc, present=None) -> dict:
    """``{"A-B": [alpha per shell]}`` from pair counts ``(shells, m, m)`` (each
    bond counted from both ends) and the concentration of each of the ``m``
    species, for every pair of the ``present`` species (default all) in code
    order, like pairs included; None for a shell where A has no neighbours."""
    present = range(len(names)) if present is None else present
    out = {}
    for x, y in ((x, y) for i, x in enumerate(present) for y in list(present)[i:]):
        values = []
        for n in counts:
            around = n[x].sum()
            values.append(float(1.0 - (n[x, y] / around) / conc[y]) if around else None)
        out[f"{names[x]}-{names[y]}"] = values
    return out


def warren_cowley(structure, crystal, repeat: tuple[int, int, int],
                  n_shells: int = SHELLS) -> dict | None:
    """Per sublattice holding two or more species: ``{"shells": [A...],
    "concentration": {element: c}, "alpha": {"A-B": [alpha_1, ...]}}`` (pairs in
    type order, like pairs included); None when no sublattice is mixed."""
    n_grid, m = crystal.n_grid, len(structure.symbols)
    k = m + 1  # species codes, and m for an empty site (a bin dropped at the end)
    grid = np.full(math.prod(repeat) * n_grid, m, dtype=np.int32)
    on = structure.site >= 0
    grid[structure.site[on]] = structure.species[on]
    grid = grid.reshape(*repeat, n_grid)
    out = {}
    for label in dict.fromkeys(crystal.sublattice):
        sites = [i for i, lb in enumerate(crystal.sublattice) if lb == label]
        on_sites = np.bincount(grid[..., sites].ravel(), minlength=k)  # vacancies last
        per = on_sites[:m]
        present = np.flatnonzero(per)
        if len(present) < 2 and not (on_sites[m] and len(present)):
            continue
        conc = per / per.sum()
        distances, shells = sublattice_shells(crystal, label, n_shells)
        pair_counts = []
        for offsets, ends in zip(shells, _shell_ends(crystal, label, n_shells, tuple(repeat))):
            half = _bond_counts(grid, ends, offsets, k).reshape(k, k)
            pair_counts.append(half + half.T)
        pair_counts = np.array(pair_counts)
        alphas = alpha_table(pair_counts[:, :m, :m], structure.symbols, conc, present)
        out[label] = {"shells": list(distances),
                      "concentration": {structure.symbols[e]: float(conc[e]) for e in present},
                      "alpha": alphas, "vacancies": None}
        if on_sites[m]:
            out[label]["vacancies"] = _vacancy_order(pair_counts, on_sites, structure.symbols)
    return out or None


#: Bonds x cells up to which a shell's pairs are gathered in one pass (small
#: structures: one bincount per shell instead of a shifted copy per offset,
#: whose fixed cost was most of the order's time in a library of 107-atom cells).
_GATHER_BONDS = 1 << 16


def _bond_counts(grid: np.ndarray, ends, offsets, k: int) -> np.ndarray:
    """(k * k,) int64 counts of (centre code, partner code) over the bonds
    ``offsets`` of one shell, each bond once (its reverse offset would give the
    transposed counts); ``grid`` is (R1, R2, R3, sites per cell) of codes < k.
    ``ends``: the bonds' flat (centre, partner) site ids from :func:`_shell_ends`,
    or None for a grid too large to gather in one pass."""
    if ends is not None:
        flat = grid.reshape(-1)
        centre, partner = ends
        return np.bincount((flat[centre] * k + flat[partner]).ravel(), minlength=k * k)
    counts = np.zeros(k * k, dtype=np.int64)
    for s, (di, dj, dk), t in _one_way(offsets):  # large grids: a shifted copy per offset streams
        partner = np.roll(grid[..., t], (-di, -dj, -dk), axis=(0, 1, 2))
        counts += np.bincount((grid[..., s] * k + partner).ravel(), minlength=k * k)
    return counts


def _one_way(offsets) -> list:
    """The bonds of a shell each once: of an offset and its reverse, the smaller."""
    return [(s, d, t) for s, d, t in offsets if not (t, tuple(-x for x in d), s) < (s, d, t)]


#: Supercells whose shell ends are kept per process (a library of one size asks
#: again for every structure); each entry is at most 2 x _GATHER_BONDS int64 per shell.
_ENDS_CACHE = 16


@lru_cache(maxsize=_ENDS_CACHE)
def _shell_ends(crystal, label: str, n_shells: int, repeat: tuple[int, int, int]) -> tuple:
    """Per shell of sublattice ``label``: the (centre, partner) flat site ids of
    its bonds (each once) in every cell, read-only, or None where bonds x cells
    exceed :data:`_GATHER_BONDS`."""
    from .crystal import supercell_bonds

    out = []
    for offsets in sublattice_shells(crystal, label, n_shells)[1]:
        bonds = _one_way(offsets)
        if math.prod(repeat) * len(bonds) > _GATHER_BONDS:
            out.append(None)
            continue
        ends = supercell_bonds(repeat, crystal.n_grid, bonds)
        for array in ends:
            array.flags.writeable = False
        out.append(ends)
    return tuple(out)


def _vacancy_order(pair_counts, on_sites, symbols) -> dict:
    """The alphas of the pairs with a vacant site (``Va``), the sublattice's sites
    counted vacancies included (concentrations are shares of its sites): a
    divacancy or vacancy clustering shows here, the atoms' alphas stay as they are."""
    names = list(symbols) + [VACANCY]
    present = np.flatnonzero(on_sites)
    conc = on_sites / on_sites.sum()
    every = alpha_table(pair_counts, names, conc, present)
    return {"concentration": {names[e]: float(conc[e]) for e in present},
            "alpha": {pair: v for pair, v in every.items() if VACANCY in pair.split("-")}}


#: Centre atoms drawn (seeded) for the alphas of a file: exact up to this many atoms.
INSPECT_CENTRES = 20_000


def warren_cowley_of_file(structure, shell_radii: list[float], near=None,
                          members: np.ndarray | None = None) -> dict | None:
    """Alphas of a structure read from a file whose atoms share one lattice (an
    alloy): ``shell_radii`` are the ideal shell distances (A); pairs are assigned to
    the nearest shell within half the gap to its neighbours. Up to INSPECT_CENTRES
    centres (all atoms when fewer; else a seeded draw, whose count is reported);
    None with fewer than two species. ``near``: the structure's Neighbourhood
    (:mod:`cellbuild.neighbourhood`), whose cell lists or grid the pair search uses.
    ``members``: (N,) bool, the atoms of one sublattice, when only they share the
    lattice (the others are left out of the pairs, as if absent)."""
    from .neighbours import pair_chunks

    m = len(structure.symbols)
    species = structure.species if members is None else structure.species[members]
    per = np.bincount(species, minlength=m)
    present = np.flatnonzero(per)
    if len(present) < 2 or len(shell_radii) < 2:
        return None
    radii = np.array(shell_radii[:SHELLS + 1], dtype=float)
    edges = np.concatenate([[0.5 * radii[0]], 0.5 * (radii[1:] + radii[:-1])])
    n_shells = len(radii) - 1  # the last radius only bounds the last shell
    n = len(species)
    centres = np.arange(n) if n <= INSPECT_CENTRES else np.sort(
        np.random.default_rng(0).choice(n, INSPECT_CENTRES, replace=False))
    if members is not None:  # the i-th member is atom flatnonzero(members)[i]
        centres = np.flatnonzero(members)[centres]
    counts = np.zeros(n_shells * m * m, dtype=np.int64)
    for i, j, d in pair_chunks(structure.cell, structure.positions, centres,
                               float(edges[n_shells]), near=near):
        shell = np.searchsorted(edges, d) - 1  # edges[k] <= d < edges[k + 1]: shell k
        ok = (shell >= 0) & (shell < n_shells)
        if members is not None:
            ok &= members[j]
        code = structure.species[i[ok]] * m + structure.species[j[ok]]
        counts += np.bincount(shell[ok] * m * m + code, minlength=n_shells * m * m)
    conc = per / n
    counts = counts.reshape(n_shells, m, m)
    alphas = alpha_table(counts, structure.symbols, conc, present)
    return {"shells": [float(r) for r in radii[:n_shells]], "centres": int(len(centres)),
            "concentration": {structure.symbols[e]: float(conc[e]) for e in present},
            "alpha": alphas}


def order_of_file(structure, prototype: dict | None, lattice_radii: list[float] | None,
                  near=None) -> dict | None:
    """``inspect``'s alphas per sublattice, like the report's: for a compound
    prototype match, each sublattice holding two or more elements (``occupants``),
    shells from that sublattice's own geometry at the matched lattice constant;
    otherwise, when the atoms share one lattice (``lattice_radii``, its ideal shell
    distances in Angstrom), that lattice as sublattice ``A``. None when no
    sublattice is mixed. ``near``: the structure's Neighbourhood (shared cell lists
    or grid)."""
    from .crystal import resolve_crystal

    if prototype is None:
        if lattice_radii is None:
            return None
        found = warren_cowley_of_file(structure, lattice_radii, near)
        return None if found is None else {"A": found}
    out = {}
    species = tuple((label, text.split("+")[0]) for label, text in prototype["species"].items())
    crystal = resolve_crystal(prototype["name"], prototype["lattice_constant"], species)
    for label, occupants in (prototype.get("occupants") or {}).items():
        distances, _ = sublattice_shells(crystal, label, SHELLS + 1)
        keep = np.isin(structure.species, [structure.symbols.index(e) for e in occupants])
        found = warren_cowley_of_file(structure, distances, near, members=keep)
        if found is not None:
            out[label] = found
    return out or None
