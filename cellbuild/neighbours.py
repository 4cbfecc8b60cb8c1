"""Periodic neighbour counting, closest pairs and pair distances.

Everything here works on a periodic cell in all three directions, orthogonal or
triclinic:

* ``cell`` is a (3, 3) array with the lattice vectors as rows, in Angstrom;
* ``positions`` is an (N, 3) array of Cartesian coordinates in Angstrom. Atoms
  may lie outside the cell (fractional coordinates outside [0, 1)); they are
  wrapped internally and the caller's array is never modified;
* distances and cutoffs are in Angstrom, and "closer than r" is strict (< r).

A neighbour of an atom is any other atom *or periodic image* (also an image of
the atom itself) closer than the cutoff, so the results stay right when the
cutoff exceeds half of a box width: a one-atom simple cubic cell of side a with
cutoff 1.2 a has 6 neighbours, a one-atom fcc primitive cell has 12.

Two engines, both vectorized with numpy and linear in memory (no N x N array):

* the *grid* fast path (:func:`grid_counts`) for atoms that all sit on the sites
  of a regular M1 x M2 x M3 grid of the cell, as freshly built crystals do: it
  marks the occupied sites in a 3D occupancy grid and adds up, for every
  integer grid offset shorter than the cutoff, the occupancy at the shifted
  site;
* the *general* engine (:func:`general_counts`), a numpy cell list: atoms are
  sorted into bins at least ``cutoff`` wide (perpendicular widths, so triclinic
  cells work too; half as wide along the third axis), the bins are padded with
  periodic image copies, and the candidates of each column of bins are
  contiguous index ranges of the sorted copies, so they are generated with one
  repeat + arange per chunk; each pair is visited once (half stencil). Chunks
  of centre atoms run in ``workers`` threads: numpy releases the GIL in its
  array loops, and two threads gave 1.3-1.8x here (the gathers are bound by
  memory).

Which general engine won, measured with ``benchmarks/bench_neighbours.py`` on
the 2-core development machine (median of 3, 2 workers, 1,000,188 fcc atoms,
a = 3.615 A, cutoff 3.086 A, atoms displaced at random by up to 0.1 A):

* scipy ``cKDTree(boxsize=L)`` with ``query_ball_point(...,
  return_length=True, workers=2)``: 1.7-2.1 s;
* cKDTree on a copy padded with the images within the cutoff of the faces
  (what triclinic and small cells need): 1.75-3.5 s;
* this numpy cell list: 0.5-0.9 s.

The cell list won in every run and is the general engine; cKDTree is not used.
On lattice sites the grid path takes 0.07-0.2 s for the same atoms. These are
runs on a quiet machine; while other jobs shared it, every timing rose up to
2-3x (the cell list to 1.2 s, cKDTree to 6 s). The benchmark script
re-measures all of these.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .cell_list import (MAX_COUNTED_PAIRS, MAX_LISTED_PAIRS, PairLimitError, _build_bins,
                        _check_budget,
                        _chunks, _collect_distances, _collect_pairs, _count_chunks,
                        _estimated_pairs, _in_threads, _pairs_in_chunk, _shortest,
                        _total_half_candidates, uniform_pairs)
from .cellgeom import (_checked_cell, _checked_positions, _checked_radius, _thread_count,
                       _wrapped_fractional, perpendicular_widths)
from .neighbour_grid import (MAX_GRID_OFFSETS, MAX_GRID_SITES, GridSites,
                             _count_occupied_offsets, _grid_min_distance,
                             _grid_offsets, _grid_sites, locate_grid)
from .grid_pairs import (grid_close_pairs, grid_nearest, grid_pair_chunks, grid_pair_sample,
                         grid_pairs_of)
from .neighbourhood import REUSE_FACTOR, Neighbourhood

__all__ = ["GridSites", "MAX_COUNTED_PAIRS", "MAX_GRID_OFFSETS", "MAX_GRID_SITES",
           "MAX_LISTED_PAIRS", "PairLimitError", "PairSample", "close_pairs",
           "coordination_counts", "general_counts", "grid_close_pairs", "grid_counts", "locate_grid",
           "min_distance", "Neighbourhood", "nearest_neighbours", "pair_distances", "pair_sample", "pairs_of",
           "perpendicular_widths", "sampled_centre_count", "uniform_pairs"]

# N atoms in volume V always have a pair (or an atom and an image) closer than
# (6 V / (N sqrt(18)))**(1/3) = 1.1225 (V / N)**(1/3).
_KEPLER_FACTOR = (6.0 / math.sqrt(18.0)) ** (1.0 / 3.0)


# --------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------



def coordination_counts(cell, positions, cutoff, *, workers=2,
                        sites: GridSites | None = None, locate: bool = True) -> np.ndarray:
    """Neighbours of each atom closer than ``cutoff`` (Angstrom), (N,) int32.

    Neighbours are other atoms and periodic images, including images of the
    atom itself. Uses the grid fast path when every atom sits on a regular grid
    of the cell (within 1e-6 A) and no two atoms share a site, otherwise the
    general cell-list engine with ``workers`` threads. ``sites`` passes a grid
    already located for these positions; ``locate=False`` says that the caller
    looked for one and found none (``sites`` None: straight to the general engine).
    """
    counts = grid_counts(cell, positions, cutoff, sites=sites) if locate or sites is not None else None
    if counts is None:
        counts = general_counts(cell, positions, cutoff, workers=workers)
    return counts


def general_counts(cell, positions, cutoff, *, workers=2) -> np.ndarray:
    """Neighbours of each atom closer than ``cutoff`` (A), (N,) int32, any atoms.

    The general engine: a numpy cell list with image copies around the cell,
    each pair visited once, chunks of centre atoms run in ``workers`` threads.
    Memory is linear in N (plus the chunk buffers).
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    cutoff = _checked_radius(cutoff, "cutoff")
    if len(positions) == 0:
        return np.zeros(0, dtype=np.int32)
    bins = _build_bins(cell, positions, cutoff)
    chunks = _chunks(bins, half=True,
                     limit=(cutoff, MAX_COUNTED_PAIRS, "a neighbour count handles"))
    per_thread = _in_threads(
        lambda group: _count_chunks(bins, group, cutoff * cutoff),
        chunks, _thread_count(workers))
    sorted_counts = np.sum(per_thread, axis=0)
    counts = np.empty(bins.n_atoms, dtype=np.int32)
    counts[bins.order] = sorted_counts
    return counts


def grid_counts(cell, positions, cutoff, grid=None, tol=1e-6,
                sites: GridSites | None = None) -> np.ndarray | None:
    """Neighbour counts for atoms on the sites of a regular grid, or None.

    Args:
        cell: (3, 3) lattice vectors as rows, Angstrom.
        positions: (N, 3) Cartesian positions, Angstrom.
        cutoff: neighbours are closer than this (Angstrom).
        grid: (M1, M2, M3) grid divisions of the cell; detected when None.
            The grid passes through the first atom: atom k sits on it when
            its fractional coordinates minus those of atom 0, times M, are
            integers.
        tol: largest distance (Angstrom) of an atom from its grid site.

    Returns:
        (N,) int32 counts of neighbours (atoms and images) closer than the
        cutoff, with distances measured between the ideal grid sites. None
        when some atom is more than ``tol`` off the grid, when two atoms share
        a site (an overlap: the general engine handles it), or when the grid
        or the set of offsets within the cutoff would be absurdly large.
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    cutoff = _checked_radius(cutoff, "cutoff")
    if len(positions) == 0:
        return np.zeros(0, dtype=np.int32)
    # Relative to the first atom: a rigidly shifted crystal qualifies too.
    if sites is None and grid is None:
        sites = locate_grid(cell, positions, tol)  # in chunks: no full fractional copy
        if sites is None:
            return None
    if sites is not None:
        if sites.shared:
            return None  # two atoms on one site
        offsets = _grid_offsets(cell, sites.grid, cutoff)
        if offsets is None:
            return None
        return _count_occupied_offsets(sites.occupancy, sites.grid, offsets, sites.flat)
    frac = _wrapped_fractional(cell, positions - positions[0])
    grid = np.asarray(grid, dtype=np.int64).reshape(3)
    if np.any(grid < 1):
        raise ValueError(f"grid divisions must be >= 1, got {tuple(grid)}")
    found = _grid_sites(cell, frac, grid, tol)
    if found is None:
        return None
    flat = found[0]
    occupancy = np.bincount(flat, minlength=int(np.prod(grid)))
    if occupancy.max() > 1:
        return None  # two atoms on one site
    offsets = _grid_offsets(cell, grid, cutoff)
    if offsets is None:
        return None
    return _count_occupied_offsets(occupancy.astype(np.uint8), grid, offsets, flat)


def min_distance(cell, positions, *, workers=2,
                 sites: GridSites | None = None) -> tuple[float, int, int]:
    """Shortest periodic distance (Angstrom) and one pair (i, j), i <= j, at it.

    The pair may be an atom and an image of another atom, or of itself
    (i == j): for a one-atom cell this is the shortest lattice vector.
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    n = len(positions)
    if n == 0:
        raise ValueError("min_distance needs at least one atom")
    volume = abs(np.linalg.det(cell))
    # Kepler's bound guarantees a pair within this radius; the margin covers
    # rounding. The loop only guards against a bound that failed anyway.
    radius = 1.01 * _KEPLER_FACTOR * (volume / n) ** (1.0 / 3.0)
    on_grid = _grid_min_distance(cell, positions, radius, sites=sites)
    if on_grid is not None:
        return on_grid
    while True:
        best = _closest_pair_within(cell, positions, radius, workers)
        if best is not None:
            return best
        radius *= 2.0


def close_pairs(cell, positions, r, *, workers=2, limit=None, max_pairs=MAX_LISTED_PAIRS,
                near: Neighbourhood | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """All pairs closer than ``r`` (Angstrom), sorted by distance.

    Returns:
        ``(i, j, distance)``: int64 atom indices with i <= j (i == j for an
        atom and its own image) and float64 distances in Angstrom, ascending
        (ties by i, then j). Each pair appears once; an atom and another atom's
        image at a different lattice shift is a different pair.
        With ``limit``, only the ``limit`` shortest pairs are kept (memory
        stays O(limit + chunk) however many pairs there are).

    Raises:
        PairLimitError: (a ValueError) before the search, when there are about
            more than ``max_pairs`` pairs closer than r (without ``limit``), or
            more than MAX_COUNTED_PAIRS to visit (with it).

    ``near``: the structure's :class:`Neighbourhood`, whose cell list for r is
    used (or built and kept there).
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    r = _checked_radius(r, "r")
    if limit is not None and limit < 0:
        raise ValueError(f"limit must be >= 0, got {limit}")
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float64))
    if len(positions) == 0 or limit == 0:
        return empty
    budget = (MAX_COUNTED_PAIRS, "a shortest-pair search handles") if limit is not None \
        else (int(max_pairs), "a pair list holds")
    # a closest-pair radius serves no later query: its cell list is not kept
    bins = _bins_for(near, cell, positions, r, budget[0], keep=False)
    chunks = _chunks(bins, half=True, limit=(r, *budget))
    per_thread = _in_threads(
        lambda group: _collect_pairs(bins, group, r * r, limit, most=budget[0]),
        chunks, _thread_count(workers))
    i, j, d2 = (np.concatenate(parts) for parts in zip(*per_thread))
    i, j, d2 = _shortest(i, j, d2, limit)
    i, j = bins.order[i], bins.order[j]
    i, j = np.minimum(i, j), np.maximum(i, j)
    rank = np.lexsort((j, i, d2))
    return i[rank], j[rank], np.sqrt(d2[rank])


def pair_chunks(cell, positions, centres, r, *, near: Neighbourhood | None = None,
                workers=2):
    """The pairs of :func:`pairs_of` as an iterable of ``(i, j, distance)`` parts in
    no particular order, for callers that count them: on a grid one offset at a
    time (no pair list in memory, so no limit on their number), else one part
    (PairLimitError beyond MAX_LISTED_PAIRS pairs, as :func:`pairs_of`)."""
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    centres = np.asarray(centres, dtype=np.int64)
    sites = _sites_of(near, cell, positions) if len(positions) and len(centres) else None
    chunks = None if sites is None else grid_pair_chunks(sites, centres, _checked_radius(r, "r"))
    if chunks is not None:
        return chunks
    return [pairs_of(cell, positions, centres, r, near=near, workers=workers)]


def pairs_of(cell, positions, centres, r, *, max_pairs=MAX_LISTED_PAIRS,
             near: Neighbourhood | None = None, workers=2
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every neighbour (atom or image) closer than ``r`` (A) of the given centres.

    Returns ``(i, j, distance)``: i a centre's atom index, j the neighbour's,
    float64 Angstrom, grouped by centre (each neighbour of a centre once per
    image). PairLimitError (a ValueError) beyond ``max_pairs`` pairs.

    ``near``: the structure's :class:`Neighbourhood`; a cell list it holds for up
    to REUSE_FACTOR x r serves (the same pairs; their order within a centre
    follows the cell list). Chunks of centres run in ``workers`` threads; the
    result is the same for any number.
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    r = _checked_radius(r, "r")
    centres = np.asarray(centres, dtype=np.int64)
    if len(positions) == 0 or len(centres) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
    sites = _sites_of(near, cell, positions)
    found = None if sites is None else grid_pairs_of(sites, centres, r, max_pairs)
    if found is not None:
        return found
    bins = _bins_for(near, cell, positions, r, math.inf, REUSE_FACTOR)
    chunks = _chunks(bins, half=False, centres=np.sort(bins.rank[centres]),
                     limit=(r, int(max_pairs), "a pair list holds"))
    threads = min(_thread_count(workers), len(chunks))
    per_group = _in_threads(
        lambda group: [_pairs_in_chunk(bins, chunk, r * r, half=False) for chunk in group],
        chunks, threads)
    # group k ran chunks k, k + threads, ...: put the parts back in chunk order
    parts = [per_group[c % threads][c // threads] for c in range(len(chunks))]
    i = bins.order[np.concatenate([p[0] for p in parts])]
    j = bins.order[bins.entry_atom[np.concatenate([p[1] for p in parts])]]
    return i, j, np.sqrt(np.concatenate([p[2] for p in parts]))


def nearest_neighbours(cell, positions, r, *, centres=None, workers=2,
                       near: Neighbourhood | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Nearest neighbour (atom or image) of each centre atom, within ``r`` (A).

    Args:
        centres: atom indices to look at (default: every atom).
        near: the structure's :class:`Neighbourhood` (its cell list for r).

    Returns:
        ``(distance, partner)`` per centre: float64 Angstrom (inf when nothing
        is closer than r) and the neighbour's atom index (-1 then).
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    r = _checked_radius(r, "r")
    n = len(positions)
    centres = np.arange(n) if centres is None else np.asarray(centres, dtype=np.int64)
    best = np.full(len(centres), np.inf)
    partner = np.full(len(centres), -1, dtype=np.int64)
    if n == 0 or len(centres) == 0:
        return best, partner
    sites = _sites_of(near, cell, positions)
    if sites is not None:
        _check_budget(cell, n, r, MAX_COUNTED_PAIRS)  # the cell list's refusal, kept
        found = grid_nearest(sites, centres, r)
        if found is not None:
            return found
    bins = _bins_for(near, cell, positions, r, MAX_COUNTED_PAIRS)
    ranks = bins.rank[centres]
    order = np.argsort(ranks, kind="stable")
    chunks = _chunks(bins, half=False, centres=ranks[order],
                     limit=(r, MAX_COUNTED_PAIRS, "a nearest-neighbour search handles"))

    def task(group):
        found = []
        for chunk in group:
            centre, entry, d2 = _pairs_in_chunk(bins, chunk, r * r, half=False)
            first = np.lexsort((d2, centre))  # each centre's shortest first
            keep = first[np.r_[True, centre[first][1:] != centre[first][:-1]]]
            found.append((centre[keep], bins.entry_atom[entry[keep]], d2[keep]))
        return found

    by_rank = np.full(bins.n_atoms, np.inf)
    partner_rank = np.full(bins.n_atoms, -1, dtype=np.int64)
    for found in _in_threads(task, chunks, _thread_count(workers)):
        for centre, other, d2 in found:
            by_rank[centre] = d2
            partner_rank[centre] = other
    best = np.sqrt(by_rank[ranks])
    got = partner_rank[ranks] >= 0
    partner[got] = bins.order[partner_rank[ranks][got]]
    return best, partner


@dataclass(frozen=True)
class PairSample:
    """Pair distances from :func:`pair_sample`.

    Attributes:
        distances: ascending distances, Angstrom.
        centres: centre atoms they were collected from; equal to the number
            of atoms when every pair is listed once.
    """

    distances: np.ndarray
    centres: int


def pair_sample(cell, positions, r_max, *, max_pairs=None, workers=2,
                near: Neighbourhood | None = None) -> PairSample:
    """Distances (Angstrom) of the pairs closer than ``r_max``, sampled when many.

    Without sampling each pair (atom-atom or atom-image) is listed once, so a
    histogram of the distances times 2 / N gives the average neighbours per
    atom in each bin.

    Sampling: if ``max_pairs`` is given and there are more pairs than that,
    ``m`` centre atoms are drawn without replacement with
    ``numpy.random.default_rng(0)`` and the result holds the distances from
    each of them to all its neighbours (a pair whose two ends were both drawn
    appears twice); the histogram divided by ``m`` then estimates the
    neighbours per atom. ``m`` is :func:`sampled_centre_count` for a uniform
    structure; where atoms crowd together (many atoms at one place), it comes
    from the pairs actually counted on a sample of centres instead, so the
    result stays near ``max_pairs`` distances however the atoms are placed.

    ``near``: the structure's :class:`Neighbourhood` (its cell list for r_max).

    Raises:
        PairLimitError: without ``max_pairs``, when there are more than
            MAX_LISTED_PAIRS pairs.
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    r_max = _checked_radius(r_max, "r_max")
    n = len(positions)
    if n == 0:
        return PairSample(np.zeros(0, dtype=np.float64), 0)
    cap = MAX_LISTED_PAIRS if max_pairs is None else int(max_pairs)
    m = n if max_pairs is None else sampled_centre_count(cell, n, r_max, max_pairs)
    sites = _sites_of(near, cell, positions)
    if sites is not None:
        if max_pairs is None:
            _check_budget(cell, n, r_max, MAX_LISTED_PAIRS)  # the cell list's refusal, kept
        found = grid_pair_sample(sites, r_max, m, max_pairs)
        if found is not None:
            return PairSample(*found)
    bins = _bins_for(near, cell, positions, r_max,
                     MAX_LISTED_PAIRS if max_pairs is None else math.inf)
    # candidates the m centres would examine (each pair once when m = N)
    candidates = float(_total_half_candidates(bins))
    if m < n:
        candidates *= 2.0 * m / n
    if candidates > cap:
        pairs = _estimated_pairs(bins, r_max * r_max, n, half=True)
        per_centre = 2.0 * pairs / n
        if (m if m < n else 0.5 * n) * per_centre > cap:
            if max_pairs is None:
                raise PairLimitError(pairs, r_max, cap, "a pair list holds")
            m = int(min(m, n - 1, max(1, math.ceil(cap / per_centre))))
    half = m >= n
    if half:
        chunks = _chunks(bins, half=True)
    else:
        drawn = np.random.default_rng(0).choice(n, size=m, replace=False)
        chunks = _chunks(bins, half=False, centres=np.sort(bins.rank[drawn]))
    per_thread = _in_threads(
        lambda group: _collect_distances(bins, group, r_max * r_max, half),
        chunks, _thread_count(workers))
    d2 = np.concatenate(per_thread)
    d2.sort()
    return PairSample(np.sqrt(d2), m)


def pair_distances(cell, positions, r_max, *, workers=2, max_pairs=None) -> np.ndarray:
    """The distances of :func:`pair_sample` (Angstrom, ascending)."""
    return pair_sample(cell, positions, r_max, max_pairs=max_pairs, workers=workers).distances


def sampled_centre_count(cell, n_atoms, r_max, max_pairs) -> int:
    """Centre atoms :func:`pair_sample` samples for ``max_pairs`` in a uniform structure.

    The expected pairs are N * c / 2 with c = (N / V) * (4/3) pi r_max**3, the
    neighbours of an atom in a uniform structure. If they fit in
    ``max_pairs`` the answer is N (no sampling), else ceil(max_pairs / c)
    (at least 1), which returns about ``max_pairs`` distances.
    """
    cell = _checked_cell(cell)
    n_atoms = int(n_atoms)
    volume = abs(np.linalg.det(cell))
    per_atom = n_atoms / volume * (4.0 / 3.0) * math.pi * float(r_max) ** 3
    if max_pairs is None or n_atoms * per_atom / 2.0 <= max_pairs:
        return n_atoms
    return int(min(n_atoms, max(1, math.ceil(max_pairs / per_atom))))



def _bins_for(near: Neighbourhood | None, cell: np.ndarray, positions: np.ndarray, r: float,
              limit: float, reuse: float = 1.0, keep: bool = True):
    """The cell list of a query: from ``near`` when it is this structure's (built
    there once, kept there if ``keep``), else a new one."""
    if near is not None and near.same(cell, positions):
        return near.bins(r, limit, reuse, keep)
    return _build_bins(cell, positions, r, limit=limit)


def _sites_of(near: Neighbourhood | None, cell: np.ndarray,
              positions: np.ndarray) -> GridSites | None:
    """The grid of a query's atoms when ``near`` (this structure's) holds one
    with no shared site: the grid answers the query (:mod:`cellbuild.grid_pairs`)."""
    if near is None or near.sites is None or near.sites.shared:
        return None
    return near.sites if near.same(cell, positions) else None


def _closest_pair_within(cell: np.ndarray, positions: np.ndarray, radius: float,
                         workers: int) -> tuple[float, int, int] | None:
    """Shortest pair closer than ``radius`` as (distance, i, j), i <= j, or None."""
    i, j, d = close_pairs(cell, positions, radius, workers=workers, limit=1)
    if len(d) == 0:
        return None
    return float(d[0]), int(i[0]), int(j[0])


