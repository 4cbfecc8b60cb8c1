"""Pair queries of :mod:`cellbuild.neighbours` answered from the occupancy grid,
for atoms that sit on the sites of a regular grid of their cell, no two on one
site (:class:`~cellbuild.neighbour_grid.GridSites`): files of built crystals.

A neighbour of an atom on site s is the atom on site s + o for an integer grid
offset o shorter than the radius (offsets longer than the cell stand for
images), so a query is a gather of the site-to-atom table per offset instead of
a cell list over all atoms: at a million atoms the cell list takes 0.1-0.4 s
to build and search, a few thousand sampled centres take milliseconds here.

Which pairs are found is decided by the ideal (site) distances, widened by
twice the grid's tolerance (the most an actual distance differs from its
site distance) so that no pair is missed; the distances returned are those of the
actual positions (the grid offset corrected by both atoms' residuals), and the
radius is applied to them, as the cell list does (atoms within EXACT_SITES
of their sites get the sites' distances). Results equal the cell
list's up to the rounding of the distances and the order of pairs within one
centre. Lengths in Angstrom.
"""
from __future__ import annotations

import math

import numpy as np

from .cell_list import MAX_LISTED_PAIRS, PairLimitError
from .cellgeom import _times
from .neighbour_grid import _LOCATE_CHUNK, GridSites, _grid_offsets, _shifted_sites

#: Atoms closer than this (A) to their sites count as on them: their distances
#: are those of the sites, without gathering every atom's residual (written
#: coordinates carry 1e-10 A at best, so nothing a file says is lost).
EXACT_SITES = 1e-9
#: Ideal offset lengths closer than this (relative) are one distance: the
#: rounding of symmetric offsets' lengths differs in the last bits.
_SAME_LENGTH = 1e-9


def grid_close_pairs(sites: GridSites, r: float, limit: int
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """The ``limit`` closest pairs of atoms on a grid, or None (shared site, no
    pair closer than ``r`` A between the ideal sites, too many offsets).

    Pairs are chosen by their ideal (grid site) distance, ties by atom indices
    (i, then j, i <= j); a pair is an atom and another atom or image, as in
    :func:`cellbuild.neighbours.close_pairs`. The distances returned are those
    of the actual positions (within the grid tolerance of the ideal ones),
    ascending, ties by (i, j). Returns int64 i, j and float64 Angstrom.

    Which offsets join occupied sites, and how many pairs each gives, is one
    AND of the uint8 occupancy grid with its shifted view per offset; the atoms
    are then scanned in index order, in chunks, only until the pairs needed
    are found: a few milliseconds where a cell list over a million atoms takes
    half a second.
    """
    if sites.shared or limit < 1:
        return None
    found = _sorted_offsets(sites, r, half=True)
    if found is None or len(found[0]) == 0:
        return None
    offsets, lengths = found
    grid = sites.grid
    occupancy = sites.occupancy.reshape(tuple(grid))
    reach = np.abs(offsets).max(axis=0)
    padded = np.pad(occupancy, [(k, k) for k in reach], mode="wrap")
    joined = np.empty_like(occupancy)
    m0, m1, m2 = occupancy.shape
    groups, count, start = [], 0, 0
    while start < len(offsets) and count < limit:  # shortest distances first
        stop = int(np.searchsorted(lengths, lengths[start] * (1.0 + _SAME_LENGTH), "right"))
        pairs = 0
        for d0, d1, d2 in (offsets[start:stop] + reach).tolist():
            np.bitwise_and(occupancy, padded[d0:d0 + m0, d1:d1 + m1, d2:d2 + m2], out=joined)
            pairs += int(np.count_nonzero(joined))
        if pairs:
            groups.append((offsets[start:stop], min(pairs, limit - count)))
            count += pairs
        start = stop
    if count == 0:
        return None
    picked = [_first_pairs(sites, group, need) for group, need in groups]
    i, j, shift = (np.concatenate(parts) for parts in zip(*picked))
    d = _actual_distances(sites, i, j, shift)
    rank = np.lexsort((j, i, d))
    return i[rank], j[rank], d[rank]


def grid_pairs_of(sites: GridSites, centres: np.ndarray, r: float, max_pairs: float
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """:func:`cellbuild.neighbours.pairs_of` on the grid, or None (too many offsets).

    Returns ``(i, j, distance)`` grouped by centre in the order of ``centres``,
    each neighbour (atom or image) closer than ``r`` once. PairLimitError when
    more than ``max_pairs`` sites within the radius are occupied.
    """
    found = _neighbours(sites, centres, r, max_pairs)
    if found is None:
        return None
    slot, j, which, offsets = found
    i = centres[slot]
    d = _offset_distances(sites, i, j, offsets, which)
    keep = np.flatnonzero(d < r)
    slot = slot[keep]
    # grouped by centre, stably: numpy's radix sort for 16-bit keys, when they fit
    order = keep[np.argsort(slot.astype(np.uint16) if len(centres) <= 1 << 16 else slot,
                            kind="stable")]
    return i[order], j[order], d[order]


def grid_pair_chunks(sites: GridSites, centres: np.ndarray, r: float):
    """The pairs of :func:`grid_pairs_of` one grid offset at a time, for callers that
    only count them (no pair list in memory, no grouping), or None (too many
    offsets): an iterator of ``(i, j, distance)``, i a centre's atom index, each
    neighbour (atom or image) closer than ``r`` once, distances as
    :func:`grid_pairs_of` gives them."""
    found = _sorted_offsets(sites, r, half=False)
    return None if found is None else _offset_chunks(sites, centres, r, found[0])


def _offset_chunks(sites: GridSites, centres: np.ndarray, r: float, offsets: np.ndarray):
    exact = sites.worst <= EXACT_SITES
    lengths = _offset_lengths(sites, offsets) if exact else None
    axes = np.unravel_index(sites.flat[centres], tuple(sites.grid))
    shifted = np.empty(len(centres), dtype=np.int64)
    for k, o in enumerate(offsets.tolist()):
        if exact and not lengths[k] < r:
            continue
        j = sites.atom_at[_shifted_sites(sites.grid, axes, o, out=shifted)]
        has = np.flatnonzero(j >= 0)
        if not has.size:
            continue
        i, j = centres[has], j[has]
        if exact:
            yield i, j, np.full(has.size, lengths[k])
            continue
        d = _offset_distances(sites, i, j, offsets, np.full(has.size, k))
        keep = d < r
        yield i[keep], j[keep], d[keep]


def grid_nearest(sites: GridSites, centres: np.ndarray, r: float
                 ) -> tuple[np.ndarray, np.ndarray] | None:
    """:func:`cellbuild.neighbours.nearest_neighbours` on the grid, or None.

    Returns ``(distance, partner)`` per centre: the shortest actual distance
    (A) to an atom or image closer than ``r`` (inf and -1 when none). Offsets
    are tried by ideal length; a centre is settled by the first distance at
    which it has a neighbour, with all offsets up to twice the margin (2 x 2
    tol) beyond it compared by their actual distances.
    """
    found = _sorted_offsets(sites, r, half=False)
    if found is None:
        return None
    offsets, lengths = found
    best = np.full(len(centres), np.inf)
    partner = np.full(len(centres), -1, dtype=np.int64)
    open_ = np.arange(len(centres))
    start = 0
    while start < len(offsets) and open_.size:
        stop = int(np.searchsorted(lengths, lengths[start] + 4.0 * sites.tol, "right"))
        axes = np.unravel_index(sites.flat[centres[open_]], tuple(sites.grid))
        shifted = np.empty(open_.size, dtype=np.int64)
        for o in offsets[start:stop].tolist():
            j = sites.atom_at[_shifted_sites(sites.grid, axes, o, out=shifted)]
            has = np.flatnonzero(j >= 0)
            if has.size == 0:
                continue
            rows = open_[has]
            d = _actual_distances(sites, centres[rows], j[has], o)
            better = (d < best[rows]) & (d < r)
            best[rows[better]] = d[better]
            partner[rows[better]] = j[has][better]
        open_ = open_[partner[open_] < 0]
        start = stop
    return best, partner


def grid_pair_sample(sites: GridSites, r_max: float, m: int, max_pairs: int | None
                     ) -> tuple[np.ndarray, int] | None:
    """The distances (A, ascending) and centre count of
    :func:`cellbuild.neighbours.pair_sample` on the grid, or None.

    ``m`` is the uniform structure's centre count; with ``m`` equal to the
    number of atoms every pair is listed once (half of the offsets). Where the
    neighbours actually counted (exactly, on the grid) exceed the budget, the
    centres are fewer, by the same rule as the cell list's estimate.
    """
    n = len(sites.flat)
    cap = MAX_LISTED_PAIRS if max_pairs is None else int(max_pairs)
    offsets = _sorted_offsets(sites, r_max, half=m >= n)
    if offsets is None:
        return None
    if m >= n:
        pairs = _occupied_count(sites, np.arange(n), offsets[0])
        if pairs <= cap:
            return _sample_distances(sites, np.arange(n), offsets[0], r_max), n
        if max_pairs is None:
            raise PairLimitError(pairs, r_max, cap, "a pair list holds")
        per_centre = 2.0 * pairs / n
        offsets = _sorted_offsets(sites, r_max, half=False)
    else:
        drawn = np.random.default_rng(0).choice(n, size=m, replace=False)
        per_centre = _occupied_count(sites, drawn, offsets[0]) / m
        if m * per_centre <= cap:
            return _sample_distances(sites, drawn, offsets[0], r_max), m
    m = int(min(m, n - 1, max(1, math.ceil(cap / per_centre))))
    drawn = np.random.default_rng(0).choice(n, size=m, replace=False)
    return _sample_distances(sites, drawn, offsets[0], r_max), m


# ----------------------------------------------------------------------------- helpers


def _sorted_offsets(sites: GridSites, r: float, half: bool
                    ) -> tuple[np.ndarray, np.ndarray] | None:
    """Grid offsets whose ideal length is below r + 2 tol, shortest first, and
    their lengths (A); with ``half`` one of each pair +-o (first nonzero
    component positive). None when there would be too many."""
    offsets = _grid_offsets(sites.cell, sites.grid, r + 2.0 * sites.tol)
    if offsets is None:
        return None
    if half and len(offsets):
        sign = np.sign(offsets)
        offsets = offsets[sign[np.arange(len(offsets)), np.argmax(sign != 0, axis=1)] > 0]
    lengths = np.linalg.norm(
        _times(offsets.astype(np.float64), sites.cell / sites.grid[:, None]), axis=1)
    order = np.argsort(lengths, kind="stable")
    return offsets[order], lengths[order]


def _actual_distances(sites: GridSites, i: np.ndarray, j: np.ndarray,
                      shift: np.ndarray) -> np.ndarray:
    """Distances (A) from atom i to the image of atom j at grid offset ``shift``
    ((3,) or one per pair) from i's site: the offset's vector corrected by both
    atoms' residuals."""
    vector = _times(np.atleast_2d(np.asarray(shift, np.float64)),
                    sites.cell / sites.grid[:, None])
    if sites.worst <= EXACT_SITES:
        return np.broadcast_to(np.sqrt(np.einsum("ij,ij->i", vector, vector)), len(i)).copy()
    vector = vector + sites.residuals[j] - sites.residuals[i]
    return np.sqrt(np.einsum("ij,ij->i", vector, vector))


def _offset_distances(sites: GridSites, i: np.ndarray, j: np.ndarray, offsets: np.ndarray,
                      which: np.ndarray) -> np.ndarray:
    """:func:`_actual_distances` for pairs at grid offsets ``offsets[which]``: on
    exact sites each offset's length once, gathered per pair."""
    if sites.worst <= EXACT_SITES:
        return _offset_lengths(sites, offsets)[which]
    return _actual_distances(sites, i, j, offsets[which])


def _offset_lengths(sites: GridSites, offsets: np.ndarray) -> np.ndarray:
    """(K,) length (A) of each grid offset, as :func:`_actual_distances` gives an
    exact site's distance."""
    vector = _times(offsets.astype(np.float64), sites.cell / sites.grid[:, None])
    return np.sqrt(np.einsum("ij,ij->i", vector, vector))


def _neighbours(sites: GridSites, centres: np.ndarray, r: float, max_pairs: float):
    """(slot in centres, neighbour atom, index of its offset, the offsets (K, 3))
    of the occupied sites within the ideal radius r + 2 tol of each centre, or
    None (too many offsets)."""
    found = _sorted_offsets(sites, r, half=False)
    if found is None:
        return None
    offsets = found[0]
    pairs = _occupied_count(sites, centres, offsets)
    if pairs > max_pairs:
        raise PairLimitError(pairs, r, int(max_pairs), "a pair list holds")
    axes = np.unravel_index(sites.flat[centres], tuple(sites.grid))
    shifted = np.empty(len(centres), dtype=np.int64)
    slots, partners, counts = [], [], []
    for o in offsets.tolist():
        j = sites.atom_at[_shifted_sites(sites.grid, axes, o, out=shifted)]
        has = np.flatnonzero(j >= 0)
        slots.append(has)
        partners.append(j[has])
        counts.append(has.size)
    if not slots:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.int64), offsets
    return (np.concatenate(slots), np.concatenate(partners),
            np.repeat(np.arange(len(offsets)), counts), offsets)


def _occupied_count(sites: GridSites, centres: np.ndarray, offsets: np.ndarray) -> int:
    """Occupied sites at centre + offset, summed over centres and offsets."""
    axes = np.unravel_index(sites.flat[centres], tuple(sites.grid))
    shifted = np.empty(len(centres), dtype=np.int64)
    return sum(int(np.count_nonzero(sites.occupancy[_shifted_sites(sites.grid, axes, o,
                                                                    out=shifted)]))
               for o in offsets.tolist())


def _sample_distances(sites: GridSites, centres: np.ndarray, offsets: np.ndarray,
                      r_max: float) -> np.ndarray:
    """Sorted actual distances (A) below r_max from the centres to the atoms at
    centre + offset."""
    axes = np.unravel_index(sites.flat[centres], tuple(sites.grid))
    shifted = np.empty(len(centres), dtype=np.int64)
    parts = []
    for o in offsets.tolist():
        j = sites.atom_at[_shifted_sites(sites.grid, axes, o, out=shifted)]
        has = np.flatnonzero(j >= 0)
        if has.size:
            parts.append(_actual_distances(sites, centres[has], j[has], o))
    d = np.concatenate(parts) if parts else np.zeros(0)
    d = d[d < r_max]
    d.sort()
    return d


def _first_pairs(sites: GridSites, offsets: np.ndarray, need: int
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The ``need`` pairs (i, j, offset from i's site to j's) with the smallest
    (i, j), i <= j, joined by one of ``offsets`` (a half space) or their negatives.

    A pair (atom a on site s, atom b on s + o) is listed from its smaller index:
    from a with +o when b >= a, from b with -o when a > b (an atom and its own
    image, a == b, once). Atoms are scanned in index order in chunks, so the
    scan stops at the chunk that completes the pairs.
    """
    grid, flat = sites.grid, sites.flat
    signed = np.concatenate([offsets, -offsets])
    plus = np.r_[np.ones(len(offsets), bool), np.zeros(len(offsets), bool)]
    got_i, got_j, got_o = [], [], []
    count = 0
    size = _LOCATE_CHUNK // 8
    for start in range(0, len(flat), size):
        part = np.arange(start, min(start + size, len(flat)))
        axes = np.unravel_index(flat[part], tuple(grid))
        shifted = np.empty(len(part), dtype=np.int64)
        for k, o in enumerate(signed.tolist()):
            partner = sites.atom_at[_shifted_sites(grid, axes, o, out=shifted)]
            keep = (partner >= part) if plus[k] else (partner > part)
            keep &= partner >= 0
            if keep.any():
                got_i.append(part[keep])
                got_j.append(partner[keep])
                got_o.append(np.broadcast_to(np.asarray(o, np.float64), (int(keep.sum()), 3)))
                count += int(keep.sum())
        if count >= need:  # later chunks hold larger first indices only
            break
    i, j, o = np.concatenate(got_i), np.concatenate(got_j), np.concatenate(got_o)
    take = np.lexsort((j, i))[:need]
    return i[take], j[take], o[take]
