"""The grid fast path of :mod:`cellbuild.neighbours`: atoms on the sites of a
regular M1 x M2 x M3 grid of their cell (freshly built crystals) are counted by
adding shifted occupancy grids instead of searching pairs. Lengths in Angstrom."""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property, lru_cache

import numpy as np

from .cellgeom import (_checked_cell, _checked_positions, _times, _wrapped_fractional,
                       perpendicular_widths)

# would cost more memory than the general engine needs (2**28 = 268,435,456 sites:
# an int64 atom index per site is 2.1 GB, within the 400 bytes per atom a build
# budgets for fcc up to 134M atoms, so every fcc or bcc build that fits this
# machine's memory is counted on the grid).
MAX_GRID_SITES = 1 << 28
# Offsets enumerated by the grid path; beyond this the general engine is cheaper
# (the box of candidate offsets, 8x this, stays at 12 MB).
MAX_GRID_OFFSETS = 1 << 16
# Grid sites per atom beyond which the grid path is not used. Built crystals
# need at most 32 (bcc with tetrahedral interstitial sites: a 4 x 4 x 4 grid per
# 2 atoms); an atom moved by 1e-4 A makes a grid of 10^5 sites per atom, whose
# per-offset cost (up to 2^26 sites shifted, or ~10^6 offsets gathered) took
# minutes where the general engine takes milliseconds.
MAX_GRID_SITES_PER_ATOM = 64
# Atoms looked at to guess a grid before the O(N) verification of every atom.
_GRID_SAMPLE = 4096
# Largest multiple j in the guess M = j / smallest_gap (coordinates such as
# {0, 0.4} have smallest gap 0.4 but live on the M = 5 grid, j = 2).
_GRID_GAP_MULTIPLES = 8
# Candidate pairs examined per chunk of centre atoms in the cell list: large
# Grid path strategy, measured per offset on 1M-atom sc, fcc and diamond
# grids: adding a shifted uint8 occupancy grid costs 0.1-1.3 ns per site,
# gathering the occupancy of the atoms' shifted sites 7-9 ns per atom; so
# shifts win unless the grid has over ~25 sites per atom.
_SHIFT_COST_PER_SITE = 0.3
_GATHER_COST_PER_ATOM = 8.0
# Kepler's bound: no packing of equal spheres is denser than pi / sqrt(18), so

#: Atoms per chunk of :func:`locate_grid`'s pass: its temporaries (a few arrays
#: of 3 floats per atom, 3 MB each) stay in cache and come back from the
#: allocator's free list instead of fresh pages from the kernel (page faults
#: were half the CPU time of a 10M-atom build).
_LOCATE_CHUNK = 1 << 17


@dataclass(frozen=True, eq=False)
class GridSites:
    """Where atoms sit on a regular grid of their cell (see :func:`locate_grid`).

    Attributes:
        grid: (3,) int64 divisions (M1, M2, M3) of the cell.
        flat: (N,) int64 C-order index of each atom's grid site.
        cell: (3, 3) the cell (Angstrom) the grid divides.
        positions: (N, 3) the Cartesian positions (Angstrom) located (not copied).
        tol: largest distance (Angstrom) of an atom from its site that was
            accepted.
        worst: an upper bound (Angstrom) of the distances of the atoms from
            their sites, as found (at most ``tol``).
    """

    grid: np.ndarray
    flat: np.ndarray
    cell: np.ndarray
    positions: np.ndarray
    tol: float = 1e-6
    worst: float = 1e-6

    def frac_of(self, rows) -> np.ndarray:
        """Wrapped fractional coordinates, relative to atom 0, of the atoms ``rows``."""
        return _wrapped_fractional(self.cell, self.positions[rows] - self.positions[0])

    @property
    def frac(self) -> np.ndarray:
        """(N, 3) wrapped fractional coordinates relative to atom 0 (computed on use)."""
        return self.frac_of(slice(None))

    @cached_property
    def occupancy(self) -> np.ndarray:
        """(M1 * M2 * M3,) uint8, 1 on the sites that hold an atom (C order); made
        once and shared by the counts and the closest pair."""
        occupied = np.zeros(int(np.prod(self.grid)), dtype=np.uint8)
        occupied[self.flat] = 1
        return occupied

    @cached_property
    def residuals(self) -> np.ndarray:
        """(N, 3) Cartesian offset (Angstrom) of each atom from its grid site, made
        once for the pair queries: an actual pair vector is the site offset's
        vector plus the difference of the two atoms' residuals."""
        scaled = self.frac * self.grid
        scaled -= np.rint(scaled)
        return _times(scaled / self.grid, self.cell)

    @cached_property
    def atom_at(self) -> np.ndarray:
        """(M1 * M2 * M3,) int64 atom on each site, -1 where none (C order); made once
        for the pair queries (:mod:`cellbuild.grid_pairs`). Meaningful without shared sites."""
        atoms = np.full(int(np.prod(self.grid)), -1, dtype=np.int64)
        atoms[self.flat] = np.arange(len(self.flat))
        return atoms

    @cached_property
    def shared(self) -> bool:
        """Whether two atoms sit on one site (an overlap, left to the general engine)."""
        return int(np.count_nonzero(self.occupancy)) < len(self.flat)


def locate_grid(cell, positions, tol=1e-6) -> GridSites | None:
    """The smallest regular grid through atom 0 that holds every atom within
    ``tol`` Angstrom, or None. Computing it once lets :func:`coordination_counts`
    and :func:`min_distance` share the work on large structures.

    A seeded sample of the atoms proposes the grid; every atom is then checked
    against it in chunks (no array of all the fractional coordinates). Only if
    some atom is off that grid are all atoms sorted to find the grid.
    """
    cell = _checked_cell(cell)
    positions = _checked_positions(positions)
    n = len(positions)
    if n == 0:
        return None
    origin = positions[0]
    if n <= _LOCATE_CHUNK:  # one chunk: the fractional coordinates of all atoms at once
        located = _find_grid_sites(cell, _wrapped_fractional(cell, positions - origin), tol)
        return None if located is None else GridSites(*located[:2], cell, positions, tol,
                                                       located[2])
    sample = _wrapped_fractional(
        cell, positions[np.random.default_rng(0).integers(0, n, _GRID_SAMPLE)] - origin)
    grid = _detect_grid(cell, sample, tol)
    if grid is None or np.prod(grid, dtype=np.float64) > MAX_GRID_SITES_PER_ATOM * n:
        return None  # a grid that holds all atoms holds the sample too
    flat = np.empty(n, dtype=np.int64)
    worst = 0.0
    for start in range(0, n, _LOCATE_CHUNK):
        part = slice(start, min(start + _LOCATE_CHUNK, n))
        chunk = _grid_sites(cell, _wrapped_fractional(cell, positions[part] - origin), grid, tol)
        if chunk is None:
            break
        flat[part], worst = chunk[0], max(worst, chunk[1])
    else:
        return GridSites(grid, flat, cell, positions, tol, worst)
    located = _find_grid_sites(cell, _wrapped_fractional(cell, positions - origin), tol)
    return None if located is None else GridSites(*located[:2], cell, positions, tol,
                                                   located[2])


def _find_grid_sites(cell: np.ndarray, frac: np.ndarray, tol: float):
    """(grid, flat site of each atom, bound of the atoms' distances from their
    sites in A) for the smallest grid found, or None.

    None also for a grid of more than MAX_GRID_SITES_PER_ATOM sites per atom:
    such a fine grid is slower than the general engine.

    A seeded sample of the atoms proposes the grid, which is cheap; only if
    some atom is then off that grid are all atoms sorted to find the grid.
    Up to :data:`_GRID_SAMPLE` atoms, all of them propose it at once.
    Any grid that holds all atoms holds the sample too, so a sample that fits
    no grid rules the whole set out.
    """
    if len(frac) <= _GRID_SAMPLE:  # a draw of this many would only repeat atoms
        tries = (frac,)
    else:
        tries = (frac[np.random.default_rng(0).integers(0, len(frac), _GRID_SAMPLE)], frac)
    for atoms in tries:
        grid = _detect_grid(cell, atoms, tol)
        if grid is None or np.prod(grid, dtype=np.float64) > MAX_GRID_SITES_PER_ATOM * len(frac):
            return None
        found = _grid_sites(cell, frac, grid, tol)
        if found is not None:
            return grid, *found
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
                tol: float) -> tuple[np.ndarray, float] | None:
    """Flat index of each atom's grid site (C order) and an upper bound (A) of the
    atoms' distances from their sites, or None if one is > tol A off.

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
    worst = float(bound.max()) if len(bound) else 0.0
    if len(unsure):
        offset = _times(residual[unsure], step)
        worst = float(np.sqrt(np.einsum("ij,ij->i", offset, offset).max()))
        if worst > tol:
            return None
    # Coordinates just below 1 round up to M: 'wrap' folds them onto site 0.
    return np.ravel_multi_index(nearest.astype(np.int64).T, tuple(grid), mode="wrap"), worst


def _grid_offsets(cell: np.ndarray, grid: np.ndarray, cutoff: float) -> np.ndarray | None:
    """Nonzero integer grid offsets d (K, 3) with |d @ (cell / M)| < cutoff.

    The box of offsets searched is wide enough along each axis to cover the
    cutoff across the perpendicular width of one grid step; offsets longer
    than the cell wrap around it and stand for images. None if there would be
    more than MAX_GRID_OFFSETS. The array is read-only: it is kept per process
    for each (cell, grid, cutoff), since the audit asks twice per structure and
    a library of structures of one size asks the same question every time.
    """
    cell = np.ascontiguousarray(cell, dtype=np.float64)
    key = tuple(int(m) for m in np.asarray(grid).reshape(3))
    return _offsets_within(cell.tobytes(), key, float(cutoff))


#: (cell, grid, cutoff) questions whose offsets are kept; each holds at most
#: MAX_GRID_OFFSETS x 3 int64 (1.5 MB)
_OFFSET_CACHE = 32


@lru_cache(maxsize=_OFFSET_CACHE)
def _offsets_within(cell_bytes: bytes, grid: tuple[int, int, int],
                    cutoff: float) -> np.ndarray | None:
    cell = np.frombuffer(cell_bytes, dtype=np.float64).reshape(3, 3)
    step = cell / np.array(grid, dtype=np.float64)[:, None]
    reach = np.floor(cutoff / perpendicular_widths(step)).astype(np.int64)
    if np.prod(2 * reach + 1, dtype=np.float64) > 8 * MAX_GRID_OFFSETS:
        return None
    axes = [np.arange(-k, k + 1) for k in reach]
    box = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    vectors = _times(box.astype(np.float64), step)
    inside = np.einsum("ij,ij->i", vectors, vectors) < cutoff * cutoff
    inside &= np.any(box != 0, axis=1)
    offsets = box[inside]
    if len(offsets) > MAX_GRID_OFFSETS:
        return None
    offsets.flags.writeable = False
    return offsets


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
    sites gives the closest pair. Whether an offset joins two is one AND of the
    uint8 occupancy grid with its shifted view (a byte per site, no gather over
    the atoms); only for that offset are the atoms gathered, to name the pair:
    the first atom in atom order whose shifted site is occupied, and the atom
    there.
    """
    sites = sites or locate_grid(cell, positions, tol)
    if sites is None or sites.shared:
        return None  # two atoms share a site: the general engine reports it
    grid, flat = sites.grid, sites.flat
    offsets = _grid_offsets(cell, grid, radius)
    if offsets is None or len(offsets) == 0:
        return None
    lengths = np.linalg.norm(_times(offsets.astype(np.float64), cell / grid[:, None]), axis=1)
    occupancy = sites.occupancy.reshape(tuple(grid))
    reach = np.abs(offsets).max(axis=0)
    padded = np.pad(occupancy, [(k, k) for k in reach], mode="wrap")
    joined = np.empty_like(occupancy)
    m0, m1, m2 = occupancy.shape
    for k in np.argsort(lengths, kind="stable"):
        d0, d1, d2 = (offsets[k] + reach).tolist()
        np.bitwise_and(occupancy, padded[d0:d0 + m0, d1:d1 + m1, d2:d2 + m2], out=joined)
        if not joined.any():
            continue
        i, target = _first_joined(sites, offsets[k].tolist())
        j = _atom_at(flat, target)
        # the actual vector: the grid offset corrected by both atoms' residuals
        step = offsets[k] / grid
        frac = sites.frac_of([i, j])
        diff = frac[1] - frac[0]
        vector = _times((diff + np.rint(step - diff))[None, :], cell)[0]
        return float(np.linalg.norm(vector)), min(i, j), max(i, j)
    return None


def _first_joined(sites: GridSites, offset) -> tuple[int, int]:
    """The first atom (in atom order) whose site + ``offset`` is occupied, and
    that site's flat index; atoms gathered in chunks, stopping at the first hit."""
    grid, flat = sites.grid, sites.flat
    shifted = np.empty(min(len(flat), _LOCATE_CHUNK), dtype=np.int64)
    for start in range(0, len(flat), _LOCATE_CHUNK):
        part = flat[start:start + _LOCATE_CHUNK]
        out = _shifted_sites(grid, np.unravel_index(part, tuple(grid)), offset,
                             out=shifted[:len(part)])
        hits = np.flatnonzero(sites.occupancy[out])
        if hits.size:
            return start + int(hits[0]), int(out[hits[0]])
    raise RuntimeError("an offset that joins two occupied sites has an atom at each end")


def _atom_at(flat: np.ndarray, site: int) -> int:
    """The atom on grid site ``site`` (the first, in chunks, stopping at the hit)."""
    for start in range(0, len(flat), _LOCATE_CHUNK):
        hits = np.flatnonzero(flat[start:start + _LOCATE_CHUNK] == site)
        if hits.size:
            return start + int(hits[0])
    raise RuntimeError("an occupied site holds an atom")


def _count_dtype(n_offsets: int):
    """Narrowest unsigned type that holds counts up to n_offsets (less memory traffic)."""
    if n_offsets < 1 << 8:
        return np.uint8
    return np.uint16 if n_offsets < 1 << 16 else np.int32
