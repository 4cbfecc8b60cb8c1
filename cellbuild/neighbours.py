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
import os
from dataclasses import dataclass

import numpy as np

# Grids with more sites than this are "absurdly large": the occupancy grid
# would cost more memory than the general engine needs (2**26 = 67,108,864).
MAX_GRID_SITES = 1 << 26
# Offsets enumerated by the grid path; beyond this the general engine is cheaper.
MAX_GRID_OFFSETS = 1 << 22
# Atoms looked at to guess a grid before the O(N) verification of every atom.
_GRID_SAMPLE = 4096
# Largest multiple j in the guess M = j / smallest_gap (coordinates such as
# {0, 0.4} have smallest gap 0.4 but live on the M = 5 grid, j = 2).
_GRID_GAP_MULTIPLES = 8
# Candidate pairs examined per chunk of centre atoms in the cell list: large
# enough to amortise numpy call overhead, small enough (2 MB per array) to stay
# in cache; measured best of 2**16 ... 2**20.
_PAIRS_PER_CHUNK = 1 << 18
# Bins per atom allowed in the cell list: finer bins only add empty bins.
_BINS_PER_ATOM = 2
# Bins along the third axis are cut to cutoff / _Z_SPLIT: the candidate runs
# along that axis are contiguous in memory, so thinner bins there trim
# candidates at no extra cost per column (measured: about 15% faster than 1,
# while 3 was no better).
_Z_SPLIT = 2
# Grid path strategy, measured per offset on 1M-atom sc, fcc and diamond
# grids: adding a shifted uint8 occupancy grid costs 0.1-1.3 ns per site,
# gathering the occupancy of the atoms' shifted sites 7-9 ns per atom; so
# shifts win unless the grid has over ~25 sites per atom.
_SHIFT_COST_PER_SITE = 0.3
_GATHER_COST_PER_ATOM = 8.0
# Kepler's bound: no packing of equal spheres is denser than pi / sqrt(18), so
# N atoms in volume V always have a pair (or an atom and an image) closer than
# (6 V / (N sqrt(18)))**(1/3) = 1.1225 (V / N)**(1/3).
_KEPLER_FACTOR = (6.0 / math.sqrt(18.0)) ** (1.0 / 3.0)


# --------------------------------------------------------------------------
# Cell geometry and input checks
# --------------------------------------------------------------------------

def perpendicular_widths(cell) -> np.ndarray:
    """Distances between opposite faces of the cell, (3,) float64, Angstrom.

    Width k is the cell volume divided by the area of the face spanned by the
    two other lattice vectors (volume / |b x c| for k = 0, and so on).
    """
    cell = np.asarray(cell, dtype=np.float64)
    volume = abs(np.linalg.det(cell))
    face_normals = np.cross(cell[[1, 2, 0]], cell[[2, 0, 1]])
    return volume / np.linalg.norm(face_normals, axis=1)


def _checked_cell(cell) -> np.ndarray:
    """The cell as a (3, 3) float64 array; ValueError if not a finite 3D cell."""
    cell = np.asarray(cell, dtype=np.float64)
    if cell.shape != (3, 3) or not np.all(np.isfinite(cell)):
        raise ValueError(f"cell must be a finite 3x3 array, got shape {cell.shape}")
    scale = float(np.prod(np.linalg.norm(cell, axis=1)))
    # A relative volume this small means the lattice vectors are (nearly)
    # coplanar, and no periodic 3D neighbour search makes sense.
    if scale == 0.0 or abs(np.linalg.det(cell)) <= 1e-10 * scale:
        raise ValueError("cell is singular (lattice vectors are coplanar)")
    return cell


def _checked_positions(positions) -> np.ndarray:
    """The positions as an (N, 3) float64 array; ValueError if not finite."""
    positions = np.asarray(positions, dtype=np.float64)
    if positions.ndim != 2 or positions.shape[1] != 3:
        raise ValueError(f"positions must be (N, 3), got shape {positions.shape}")
    if not np.all(np.isfinite(positions)):
        raise ValueError("positions must be finite")
    return positions


def _checked_radius(r, name: str) -> float:
    """A positive finite distance in Angstrom."""
    r = float(r)
    if not (r > 0.0 and math.isfinite(r)):
        raise ValueError(f"{name} must be a positive finite distance, got {r}")
    return r


def _thread_count(workers: int) -> int:
    """Threads to use; like scipy, -1 (or any value < 1) means every CPU."""
    return int(workers) if workers >= 1 else (os.cpu_count() or 1)


def _times(points: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """points @ matrix for many 3-vectors (n, 3) @ (3, k), without BLAS.

    OpenBLAS runs a (1M, 3) @ (3, 3) product in threads that keep spinning
    after the call and then compete with our worker threads: measured 5 ms to
    400 ms depending on what ran before. einsum's own loop takes a steady
    20-50 ms.
    """
    return np.einsum("ij,jk->ik", points, matrix)


def _wrapped_fractional(cell: np.ndarray, positions: np.ndarray) -> np.ndarray:
    """Fractional coordinates wrapped into [0, 1), (N, 3)."""
    frac = _times(positions, np.linalg.inv(cell))
    frac -= np.floor(frac)
    # floor() of a tiny negative number leaves exactly 1.0 after rounding.
    frac[frac >= 1.0] = 0.0
    return frac


# --------------------------------------------------------------------------
# Public API
# --------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class GridSites:
    """Where atoms sit on a regular grid of their cell (see :func:`locate_grid`).

    Attributes:
        grid: (3,) int64 divisions (M1, M2, M3) of the cell.
        flat: (N,) int64 C-order index of each atom's grid site.
        frac: (N, 3) wrapped fractional coordinates relative to atom 0.
    """

    grid: np.ndarray
    flat: np.ndarray
    frac: np.ndarray


def locate_grid(cell, positions, tol=1e-6) -> GridSites | None:
    """The smallest regular grid through atom 0 that holds every atom within
    ``tol`` Angstrom, or None. Computing it once lets :func:`coordination_counts`
    and :func:`min_distance` share the work on large structures."""
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    if len(positions) == 0:
        return None
    frac = _wrapped_fractional(cell, positions - positions[0])
    located = _find_grid_sites(cell, frac, tol)
    return None if located is None else GridSites(located[0], located[1], frac)


def coordination_counts(cell, positions, cutoff, *, workers=2,
                        sites: GridSites | None = None) -> np.ndarray:
    """Neighbours of each atom closer than ``cutoff`` (Angstrom), (N,) int32.

    Neighbours are other atoms and periodic images, including images of the
    atom itself. Uses the grid fast path when every atom sits on a regular grid
    of the cell (within 1e-6 A) and no two atoms share a site, otherwise the
    general cell-list engine with ``workers`` threads. ``sites`` passes a grid
    already located for these positions.
    """
    counts = grid_counts(cell, positions, cutoff, sites=sites)
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
    per_thread = _in_threads(
        lambda chunks: _count_chunks(bins, chunks, cutoff * cutoff),
        _chunks(bins, half=True), _thread_count(workers))
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
    if sites is not None:
        located = (sites.grid, sites.flat)
    elif grid is None:
        frac = _wrapped_fractional(cell, positions - positions[0])
        located = _find_grid_sites(cell, frac, tol)
    else:
        frac = _wrapped_fractional(cell, positions - positions[0])
        grid = np.asarray(grid, dtype=np.int64).reshape(3)
        if np.any(grid < 1):
            raise ValueError(f"grid divisions must be >= 1, got {tuple(grid)}")
        flat = _grid_sites(cell, frac, grid, tol)
        located = None if flat is None else (grid, flat)
    if located is None:
        return None
    grid, flat = located
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


def close_pairs(cell, positions, r, *, workers=2, limit=None
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """All pairs closer than ``r`` (Angstrom), sorted by distance.

    Returns:
        ``(i, j, distance)``: int64 atom indices with i <= j (i == j for an
        atom and its own image) and float64 distances in Angstrom, ascending
        (ties by i, then j). Each pair appears once; an atom and another atom's
        image at a different lattice shift is a different pair.
        With ``limit``, only the ``limit`` shortest pairs are kept (memory
        stays O(limit + chunk) however many pairs there are).
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    r = _checked_radius(r, "r")
    if limit is not None and limit < 0:
        raise ValueError(f"limit must be >= 0, got {limit}")
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float64))
    if len(positions) == 0 or limit == 0:
        return empty
    bins = _build_bins(cell, positions, r)
    per_thread = _in_threads(
        lambda chunks: _collect_pairs(bins, chunks, r * r, limit),
        _chunks(bins, half=True), _thread_count(workers))
    i, j, d2 = (np.concatenate(parts) for parts in zip(*per_thread))
    i, j, d2 = _shortest(i, j, d2, limit)
    i, j = bins.order[i], bins.order[j]
    i, j = np.minimum(i, j), np.maximum(i, j)
    rank = np.lexsort((j, i, d2))
    return i[rank], j[rank], np.sqrt(d2[rank])


def pair_distances(cell, positions, r_max, *, workers=2, max_pairs=None) -> np.ndarray:
    """Distances (Angstrom) of all pairs closer than ``r_max``, ascending, (P,).

    Each pair (atom-atom or atom-image) is counted once, so a histogram of the
    result times 2 / N gives the average neighbours per atom in each bin.

    Sampling: if ``max_pairs`` is given and the expected number of pairs
    (see :func:`sampled_centre_count`) exceeds it, ``m`` centre atoms are drawn
    without replacement with ``numpy.random.default_rng(0)`` and the result
    holds the distances from each of them to all its neighbours (a pair whose
    two ends were both drawn appears twice). The histogram divided by ``m``
    then estimates the neighbours per atom; ``m`` is
    ``sampled_centre_count(cell, N, r_max, max_pairs)``.
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    r_max = _checked_radius(r_max, "r_max")
    n = len(positions)
    if n == 0:
        return np.zeros(0, dtype=np.float64)
    bins = _build_bins(cell, positions, r_max)
    n_centres = n if max_pairs is None else sampled_centre_count(cell, n, r_max, max_pairs)
    half = n_centres >= n
    if half:
        chunks = _chunks(bins, half=True)
    else:
        drawn = np.random.default_rng(0).choice(n, size=n_centres, replace=False)
        chunks = _chunks(bins, half=False, centres=np.sort(bins.rank[drawn]))
    per_thread = _in_threads(
        lambda group: _collect_distances(bins, group, r_max * r_max, half),
        chunks, _thread_count(workers))
    d2 = np.concatenate(per_thread)
    d2.sort()
    return np.sqrt(d2)


def sampled_centre_count(cell, n_atoms, r_max, max_pairs) -> int:
    """Centre atoms :func:`pair_distances` samples for ``max_pairs``.

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


# --------------------------------------------------------------------------
# Grid fast path
# --------------------------------------------------------------------------

def _find_grid_sites(cell: np.ndarray, frac: np.ndarray, tol: float):
    """(grid, flat site of each atom) for the smallest grid found, or None.

    A seeded sample of the atoms proposes the grid, which is cheap; only if
    some atom is then off that grid are all atoms sorted to find the grid.
    Any grid that holds all atoms holds the sample too, so a sample that fits
    no grid rules the whole set out.
    """
    sample = frac[np.random.default_rng(0).integers(0, len(frac), _GRID_SAMPLE)]
    for atoms in (sample, frac):
        grid = _detect_grid(cell, atoms, tol)
        if grid is None:
            return None
        flat = _grid_sites(cell, frac, grid, tol)
        if flat is not None:
            return grid, flat
    return None


def _detect_grid(cell: np.ndarray, frac: np.ndarray, tol: float) -> np.ndarray | None:
    """Smallest grid (M1, M2, M3) of the cell that holds these atoms, or None.

    ``frac`` are wrapped fractional coordinates; None when no grid of at most
    MAX_GRID_SITES sites is found.
    """
    frac_tol = tol / perpendicular_widths(cell)
    grid = np.empty(3, dtype=np.int64)
    for axis in range(3):
        size = _axis_grid(frac[:, axis], frac_tol[axis])
        if size is None:
            return None
        grid[axis] = size
    return grid if np.prod(grid, dtype=np.float64) <= MAX_GRID_SITES else None


def _axis_grid(values: np.ndarray, frac_tol: float) -> int | None:
    """Smallest M with values * M integral within M * frac_tol, from the gaps.

    ``values`` are fractional coordinates in [0, 1) along one axis. Gaps up to
    2 * frac_tol are noise within one grid plane; the smallest real gap g is
    j / M for a small integer j.
    """
    v = np.sort(values)
    gaps = np.append(np.diff(v), 1.0 - v[-1] + v[0])  # last gap wraps around
    gaps = gaps[gaps > 2.0 * frac_tol]
    if len(gaps) == 0:
        return 1  # all atoms in one plane
    smallest = float(gaps.min())
    for multiple in range(1, _GRID_GAP_MULTIPLES + 1):
        size = round(multiple / smallest)
        if size > MAX_GRID_SITES:
            return None  # only finer grids remain
        scaled = v * size
        if size >= 1 and np.all(np.abs(scaled - np.rint(scaled)) <= size * frac_tol):
            return int(size)
    return None


def _grid_sites(cell: np.ndarray, frac: np.ndarray, grid: np.ndarray,
                tol: float) -> np.ndarray | None:
    """Flat index of each atom's grid site (C order), or None if one is > tol A off.

    None also when the grid has more than MAX_GRID_SITES sites.
    """
    if np.prod(grid, dtype=np.float64) > MAX_GRID_SITES:
        return None
    scaled = frac * grid
    nearest = np.rint(scaled)
    residual = scaled - nearest  # in grid steps, per axis
    # |residual @ step| <= sum |residual_k| |step_k|: a cheap bound that
    # settles every atom exactly on its site; only atoms it cannot settle get
    # the exact Cartesian distance.
    step = cell / grid[:, None]
    bound = _times(np.abs(residual), np.linalg.norm(step, axis=1)[:, None])[:, 0]
    unsure = np.flatnonzero(bound > tol)
    if len(unsure):
        offset = _times(residual[unsure], step)
        if np.einsum("ij,ij->i", offset, offset).max() > tol * tol:
            return None
    # Coordinates just below 1 round up to M: 'wrap' folds them onto site 0.
    return np.ravel_multi_index(nearest.astype(np.int64).T, tuple(grid), mode="wrap")


def _grid_offsets(cell: np.ndarray, grid: np.ndarray, cutoff: float) -> np.ndarray | None:
    """Nonzero integer grid offsets d (K, 3) with |d @ (cell / M)| < cutoff.

    The box of offsets searched is wide enough along each axis to cover the
    cutoff across the perpendicular width of one grid step; offsets longer
    than the cell wrap around it and stand for images. None if there would be
    more than MAX_GRID_OFFSETS.
    """
    step = cell / grid[:, None]
    reach = np.floor(cutoff / perpendicular_widths(step)).astype(np.int64)
    if np.prod(2 * reach + 1, dtype=np.float64) > 8 * MAX_GRID_OFFSETS:
        return None
    axes = [np.arange(-k, k + 1) for k in reach]
    box = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    vectors = _times(box.astype(np.float64), step)
    inside = np.einsum("ij,ij->i", vectors, vectors) < cutoff * cutoff
    inside &= np.any(box != 0, axis=1)
    offsets = box[inside]
    return offsets if len(offsets) <= MAX_GRID_OFFSETS else None


def _count_occupied_offsets(occupancy: np.ndarray, grid: np.ndarray,
                            offsets: np.ndarray, flat: np.ndarray) -> np.ndarray:
    """For each atom, the occupied sites among its site + offsets (mod grid), int32.

    ``occupancy`` is the flat (C order) 0/1 grid, ``flat`` the atoms' sites.
    """
    if len(offsets) == 0:
        return np.zeros(len(flat), dtype=np.int32)  # cutoff shorter than any grid step
    n_sites = int(np.prod(grid))
    if n_sites * _SHIFT_COST_PER_SITE < len(flat) * _GATHER_COST_PER_ATOM:
        return _count_by_shifts(occupancy.reshape(tuple(grid)), offsets, flat)
    return _count_by_gather(occupancy, grid, offsets, flat)


def _count_by_shifts(occupancy: np.ndarray, offsets: np.ndarray,
                     flat: np.ndarray) -> np.ndarray:
    """Sum of the whole occupancy grid shifted by each offset, read at the atoms.

    The grid is padded periodically (several times around for long offsets),
    so each shift is a plain strided view and no array is allocated per offset.
    """
    reach = np.abs(offsets).max(axis=0)
    padded = np.pad(occupancy, [(k, k) for k in reach], mode="wrap")
    total = np.zeros(occupancy.shape, dtype=_count_dtype(len(offsets)))
    m0, m1, m2 = occupancy.shape
    for d0, d1, d2 in (offsets + reach).tolist():
        total += padded[d0:d0 + m0, d1:d1 + m1, d2:d2 + m2]
    return np.take(total.ravel(), flat).astype(np.int32)


def _count_by_gather(occupancy: np.ndarray, grid: np.ndarray, offsets: np.ndarray,
                     flat: np.ndarray) -> np.ndarray:
    """Occupancy at site + offset (mod grid) gathered for the atoms, per offset."""
    sites = np.unravel_index(flat, tuple(grid))
    total = np.zeros(len(flat), dtype=np.int32)
    shifted = np.empty(len(flat), dtype=np.int64)
    for d in offsets.tolist():
        total += occupancy[_shifted_sites(grid, sites, d, out=shifted)]
    return total


def _shifted_sites(grid: np.ndarray, sites: tuple, offset, out: np.ndarray) -> np.ndarray:
    """Flat (C-order) index of each site + ``offset`` (mod grid), written to ``out``.

    ``sites`` are per-axis site indices (from ``np.unravel_index``). The index is
    a sum of three per-axis lookup tables, which avoids a modulo over all atoms.
    """
    strides = (int(grid[1] * grid[2]), int(grid[2]), 1)
    tables = [((np.arange(grid[k]) + offset[k]) % grid[k]) * strides[k] for k in range(3)]
    np.take(tables[0], sites[0], out=out)
    out += tables[1][sites[1]]
    out += tables[2][sites[2]]
    return out


def _grid_min_distance(cell: np.ndarray, positions: np.ndarray, radius: float,
                       tol: float = 1e-6, sites: GridSites | None = None
                       ) -> tuple[float, int, int] | None:
    """:func:`min_distance` for atoms on a grid, or None (off grid, shared site,
    no pair within ``radius``).

    Offsets are tried shortest first; the first one that joins two occupied
    sites gives the closest pair, found with one gather over the atoms per
    offset tried instead of a neighbour search.
    """
    sites = sites or locate_grid(cell, positions, tol)
    if sites is None:
        return None
    grid, flat, frac = sites.grid, sites.flat, sites.frac
    atom_at = np.full(int(np.prod(grid)), -1, dtype=np.int64)
    atom_at[flat] = np.arange(len(flat))
    if np.count_nonzero(atom_at >= 0) < len(flat):
        return None  # two atoms share a site: the general engine reports it
    offsets = _grid_offsets(cell, grid, radius)
    if offsets is None or len(offsets) == 0:
        return None
    lengths = np.linalg.norm(_times(offsets.astype(np.float64), cell / grid[:, None]), axis=1)
    axis_sites = np.unravel_index(flat, tuple(grid))
    shifted = np.empty(len(flat), dtype=np.int64)
    for k in np.argsort(lengths, kind="stable"):
        partner = atom_at[_shifted_sites(grid, axis_sites, offsets[k].tolist(), out=shifted)]
        hits = np.flatnonzero(partner >= 0)
        if hits.size:
            i, j = int(hits[0]), int(partner[hits[0]])
            # the actual vector: the grid offset corrected by both atoms' residuals
            step = offsets[k] / grid
            diff = frac[j] - frac[i]
            vector = _times((diff + np.rint(step - diff))[None, :], cell)[0]
            return float(np.linalg.norm(vector)), min(i, j), max(i, j)
    return None


def _count_dtype(n_offsets: int):
    """Narrowest unsigned type that holds counts up to n_offsets (less memory traffic)."""
    if n_offsets < 1 << 8:
        return np.uint8
    return np.uint16 if n_offsets < 1 << 16 else np.int32


# --------------------------------------------------------------------------
# General engine: cell list with image copies
# --------------------------------------------------------------------------

@dataclass(frozen=True, eq=False)
class _Bins:
    """Atoms sorted into bins of a periodic cell, with a shell of image bins.

    "Sorted" arrays are indexed by the atoms' rank in bin order. The padded
    grid is the bin grid extended by ``reach`` bins on each side; its bins
    hold image copies ("entries") of the atoms of the bin they wrap onto. The
    entries of one padded bin, and of consecutive bins along the third axis,
    are contiguous.
    """

    order: np.ndarray         # (N,) original index of the atom of each rank
    rank: np.ndarray          # (N,) rank of each original atom
    x: np.ndarray             # (3, N) wrapped Cartesian positions by rank, x/y/z rows
    home: np.ndarray          # (N,) padded bin of each atom (rank order)
    own_entry: np.ndarray     # (N,) entry of each atom's unshifted copy
    entry_start: np.ndarray   # (padded bins + 1,) first entry of each padded bin
    entry_atom: np.ndarray    # (E,) rank of the atom each entry copies
    entry_x: np.ndarray       # (3, E) Cartesian position of each entry, x/y/z rows
    later_columns: np.ndarray  # padded-bin offsets of the half-stencil columns
    all_columns: np.ndarray    # padded-bin offsets of every stencil column
    reach_z: int               # stencil reach along the third axis, in bins

    @property
    def n_atoms(self) -> int:
        return len(self.order)


def _bin_counts(cell: np.ndarray, r: float, n_atoms: int) -> np.ndarray:
    """Bins per axis: at least r / split wide (perpendicular), not many more than atoms."""
    widths = perpendicular_widths(cell)
    split = np.array([1.0, 1.0, _Z_SPLIT])
    counts = np.maximum(1, np.floor(widths * split / r)).astype(np.int64)
    limit = max(27, _BINS_PER_ATOM * n_atoms)
    if np.prod(counts, dtype=np.float64) > limit:
        # Shrink uniformly: very fine bins would be almost all empty.
        scale = (limit / np.prod(counts, dtype=np.float64)) ** (1.0 / 3.0)
        counts = np.maximum(1, np.floor(counts * scale)).astype(np.int64)
    return counts


def _build_bins(cell: np.ndarray, positions: np.ndarray, r: float) -> _Bins:
    """Sort atoms into bins for neighbours closer than r, with image copies."""
    frac = _wrapped_fractional(cell, positions)
    n_bins = _bin_counts(cell, r, len(frac))
    # Bins this many apart along an axis can still hold a pair closer than r.
    reach = np.maximum(1, np.ceil(r * n_bins / perpendicular_widths(cell))).astype(np.int64)
    bin_of = np.minimum((frac * n_bins).astype(np.int64), n_bins - 1)
    flat_bin = np.ravel_multi_index(bin_of.T, tuple(n_bins))
    order = np.argsort(flat_bin, kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(len(order))
    # Rows of x, y, z: gathers and arithmetic on 1D arrays are about three
    # times faster than on (n, 3) rows (measured).
    x = np.ascontiguousarray(_times(np.take(frac, order, axis=0), cell).T)
    atoms_in_bin = np.bincount(flat_bin, minlength=int(np.prod(n_bins)))
    bin_start = np.concatenate([[0], np.cumsum(atoms_in_bin)])

    padded = n_bins + 2 * reach
    entry_start, entry_atom, entry_x = _image_entries(
        cell, x, n_bins, reach, atoms_in_bin, bin_start)
    sorted_bin = np.take(flat_bin, order)
    home = np.take(_padded_index_of_bins(n_bins, reach), sorted_bin)
    own_entry = entry_start[home] + np.arange(len(order)) - bin_start[sorted_bin]
    later, every = _stencil_columns(reach, padded)
    return _Bins(order=order, rank=rank, x=x, home=home,
                 own_entry=own_entry, entry_start=entry_start, entry_atom=entry_atom,
                 entry_x=entry_x,
                 later_columns=later, all_columns=every, reach_z=int(reach[2]))


def _padded_index_of_bins(n_bins: np.ndarray, reach: np.ndarray) -> np.ndarray:
    """Flat index in the padded grid of each bin of the cell, (bins,)."""
    padded = n_bins + 2 * reach
    i0, i1, i2 = (np.arange(n_bins[k]) + reach[k] for k in range(3))
    return ((i0[:, None, None] * padded[1] + i1[None, :, None]) * padded[2]
            + i2[None, None, :]).ravel()


def _image_entries(cell, x, n_bins, reach, atoms_in_bin, bin_start):
    """Entries of the padded bin grid: start per padded bin, atom rank, position.

    Each padded bin holds copies of the atoms of the bin it wraps onto, in
    rank order, moved by the lattice shift of the wrap.
    """
    shift_1d, source_bin = _padded_bin_sources(n_bins, reach)
    per_bin = atoms_in_bin[source_bin]
    entry_start = np.concatenate([[0], np.cumsum(per_bin)])
    entry_atom = _concatenated_ranges(bin_start[source_bin], per_bin)
    entry_x = np.take(x, entry_atom, axis=1)
    # Only the bins outside the cell need a lattice shift; they are few.
    padded = tuple(n_bins + 2 * reach)
    outside = np.zeros(padded, dtype=bool)
    for k in range(3):
        outside |= (shift_1d[k] != 0).reshape([-1 if a == k else 1 for a in range(3)])
    outside_bins = np.flatnonzero(outside.ravel())
    counts = per_bin[outside_bins]
    moved = _concatenated_ranges(entry_start[outside_bins], counts)
    i0, i1, i2 = np.unravel_index(outside_bins, padded)
    lattice_shift = np.stack([shift_1d[0][i0], shift_1d[1][i1], shift_1d[2][i2]], axis=1)
    shift_xyz = _times(lattice_shift.astype(np.float64), cell)
    for axis in range(3):
        entry_x[axis, moved] += np.repeat(shift_xyz[:, axis], counts)
    return entry_start, entry_atom, entry_x


def _padded_bin_sources(n_bins: np.ndarray, reach: np.ndarray):
    """Per axis the lattice shift of each padded index; flat source bin of each padded bin."""
    index_1d = [np.arange(-reach[k], n_bins[k] + reach[k]) for k in range(3)]
    shift_1d = [np.floor_divide(index_1d[k], n_bins[k]) for k in range(3)]
    s0, s1, s2 = (index_1d[k] - shift_1d[k] * n_bins[k] for k in range(3))
    source_bin = ((s0[:, None, None] * n_bins[1] + s1[None, :, None]) * n_bins[2]
                  + s2[None, None, :]).ravel()
    return shift_1d, source_bin


def _concatenated_ranges(starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """arange(starts[0], starts[0] + lengths[0]), then the next range, ... as one array.

    Vectorized: one arange over the total, shifted per range by a repeat.
    """
    before = np.cumsum(lengths) - lengths
    return np.repeat(starts - before, lengths) + np.arange(int(lengths.sum()))


def _stencil_columns(reach: np.ndarray, padded: np.ndarray):
    """Padded-bin offsets of the columns (dx, dy) > (0, 0), and of all columns.

    A column is the run of 2 * reach_z + 1 bins along the third axis; its
    entries are contiguous. Half the columns (plus the later part of the own
    column) visit every pair exactly once.
    """
    dx, dy = np.meshgrid(np.arange(-reach[0], reach[0] + 1),
                         np.arange(-reach[1], reach[1] + 1), indexing="ij")
    dx, dy = dx.ravel(), dy.ravel()
    offsets = (dx * padded[1] + dy) * padded[2]
    later = (dx > 0) | ((dx == 0) & (dy > 0))
    return offsets[later], offsets


def _candidate_ranges(bins: _Bins, centres: np.ndarray, half: bool):
    """First and past-last entry (m, columns) of the candidate runs of each centre.

    In half mode the own column starts right after the centre's own entry
    (within a bin, entries follow rank order), in full mode it is whole and
    the caller drops the centre's own entry.
    """
    home = bins.home[centres][:, None]
    rz = bins.reach_z
    columns = bins.later_columns if half else bins.all_columns
    first = bins.entry_start[home + columns - rz]
    last = bins.entry_start[home + columns + rz + 1]
    if half:
        own_first = bins.own_entry[centres][:, None] + 1
        own_last = bins.entry_start[home + rz + 1]
        first = np.concatenate([own_first, first], axis=1)
        last = np.concatenate([own_last, last], axis=1)
    return first, last


def _chunks(bins: _Bins, half: bool, centres: np.ndarray | None = None) -> list:
    """Centre ranks split into chunks of about _PAIRS_PER_CHUNK candidate pairs."""
    if centres is None:
        centres = np.arange(bins.n_atoms)
    candidates = np.cumsum(_candidate_counts(bins, centres, half))
    n_chunks = max(1, int(candidates[-1] // _PAIRS_PER_CHUNK))
    cuts = np.searchsorted(candidates, np.arange(1, n_chunks) * _PAIRS_PER_CHUNK)
    return [c for c in np.split(centres, cuts) if len(c)]


def _candidate_counts(bins: _Bins, centres: np.ndarray, half: bool) -> np.ndarray:
    """Candidate entries of each centre, (m,): the runs' lengths, column by column."""
    home = bins.home[centres]
    rz = bins.reach_z
    counts = np.zeros(len(centres), dtype=np.int64)
    if half:
        counts += bins.entry_start[home + rz + 1] - bins.own_entry[centres] - 1
    for column in (bins.later_columns if half else bins.all_columns).tolist():
        counts += bins.entry_start[home + (column + rz + 1)]
        counts -= bins.entry_start[home + (column - rz)]
    return counts


def _candidates(bins: _Bins, centres: np.ndarray, half: bool):
    """Candidate entries of each centre: (entries, candidates per centre)."""
    first, last = _candidate_ranges(bins, centres, half)
    run = (last - first).ravel()
    per_centre = run.reshape(len(centres), -1).sum(axis=1)
    return _concatenated_ranges(first.ravel(), run), per_centre


def _squared_distances(bins: _Bins, centres: np.ndarray, entry: np.ndarray,
                       per_centre: np.ndarray) -> np.ndarray:
    """Squared distance (A^2) from each centre to each of its candidate entries."""
    d2 = np.zeros(len(entry))
    for axis in range(3):
        diff = np.take(bins.entry_x[axis], entry)
        diff -= np.repeat(bins.x[axis][centres], per_centre)
        diff *= diff
        d2 += diff
    return d2


def _pairs_in_chunk(bins: _Bins, centres: np.ndarray, r2: float, half: bool):
    """Pairs (centre rank, entry, squared distance) closer than sqrt(r2) A."""
    entry, per_centre = _candidates(bins, centres, half)
    d2 = _squared_distances(bins, centres, entry, per_centre)
    close = d2 < r2
    centre = np.repeat(centres, per_centre)
    if not half:
        close &= entry != bins.own_entry[centre]
    return centre[close], entry[close], d2[close]


def _count_chunks(bins: _Bins, chunks: list, r2: float) -> np.ndarray:
    """Neighbour counts by rank from a list of half-stencil chunks, (N,) int64."""
    counts = np.zeros(bins.n_atoms, dtype=np.int64)
    for centres in chunks:
        entry, per_centre = _candidates(bins, centres, half=True)
        close = _squared_distances(bins, centres, entry, per_centre) < r2
        _add_counts(counts, np.repeat(centres, per_centre)[close])
        _add_counts(counts, bins.entry_atom[entry[close]])
    return counts


def _add_counts(counts: np.ndarray, ranks: np.ndarray) -> None:
    """counts[ranks] += 1 with repeats, by a bincount over the ranks' span only.

    A chunk's neighbours are nearby in bin order, so the span is usually much
    shorter than N, and the bincount does not touch the whole array.
    """
    if len(ranks) == 0:
        return
    low, high = int(ranks.min()), int(ranks.max())
    counts[low:high + 1] += np.bincount(ranks - low, minlength=high - low + 1)


def _collect_pairs(bins: _Bins, chunks: list, r2: float, limit: int | None):
    """Half-stencil pairs (rank i, rank j, d2) of the chunks, the shortest ``limit``."""
    kept_i, kept_j, kept_d2 = [np.zeros(0, np.int64)], [np.zeros(0, np.int64)], [np.zeros(0)]
    for centres in chunks:
        centre, entry, d2 = _pairs_in_chunk(bins, centres, r2, half=True)
        kept_i.append(centre)
        kept_j.append(bins.entry_atom[entry])
        kept_d2.append(d2)
        if limit is not None:
            # Trim as we go so memory stays O(limit + chunk).
            merged = _shortest(*(np.concatenate(p) for p in (kept_i, kept_j, kept_d2)), limit)
            kept_i, kept_j, kept_d2 = ([a] for a in merged)
    return np.concatenate(kept_i), np.concatenate(kept_j), np.concatenate(kept_d2)


def _shortest(i: np.ndarray, j: np.ndarray, d2: np.ndarray, limit: int | None):
    """The ``limit`` pairs of smallest d2 (all of them if limit is None), any order."""
    if limit is None or len(d2) <= limit:
        return i, j, d2
    keep = np.argpartition(d2, limit - 1)[:limit]
    return i[keep], j[keep], d2[keep]


def _collect_distances(bins: _Bins, chunks: list, r2: float, half: bool) -> np.ndarray:
    """Squared distances of the pairs of the chunks (half or full stencil)."""
    parts = [np.zeros(0)]
    for centres in chunks:
        parts.append(_pairs_in_chunk(bins, centres, r2, half=half)[2])
    return np.concatenate(parts)


def _closest_pair_within(cell: np.ndarray, positions: np.ndarray, radius: float,
                         workers: int) -> tuple[float, int, int] | None:
    """Shortest pair closer than ``radius`` as (distance, i, j), i <= j, or None."""
    i, j, d = close_pairs(cell, positions, radius, workers=workers, limit=1)
    if len(d) == 0:
        return None
    return float(d[0]), int(i[0]), int(j[0])


def _in_threads(task, chunks: list, workers: int) -> list:
    """Run ``task`` on ``workers`` interleaved groups of chunks; list of results.

    Numpy releases the GIL inside its array loops, so plain threads use
    several cores without copying the (large) shared arrays. Each group is
    reduced inside its thread, so results do not pile up per chunk.
    """
    groups = [chunks[k::workers] for k in range(min(workers, len(chunks)))] or [[]]
    if len(groups) == 1:
        return [task(groups[0])]
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=len(groups)) as pool:
        return list(pool.map(task, groups))
