"""The general engine of :mod:`cellbuild.neighbours`: a numpy cell list with
periodic image copies, any atoms, any cell. Lengths in Angstrom."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .cellgeom import _times, _wrapped_fractional, perpendicular_widths

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
#: Pairs a search may hold in memory: (i, j, d) of 5 million pairs are 120 MB,
#: and sorting them takes about three times that.
MAX_LISTED_PAIRS = 5_000_000
#: Pairs a count (or a shortest-pair search) may visit: about 10 s on one core.
MAX_COUNTED_PAIRS = 50_000_000
#: Image copies of atoms the padded bins may hold (32 bytes each), at least
#: this many, else twice the atoms.
_MAX_IMAGE_ENTRIES = 1 << 23
#: Candidate pairs examined to estimate the pairs of a crowded structure.
_ESTIMATE_CANDIDATES = 1 << 21


class PairLimitError(ValueError):
    """A pair search would exceed its budget; nothing was allocated for it.

    Attributes:
        pairs: estimated pairs closer than ``r`` (each pair once).
        r: the search radius, Angstrom.
        limit: the budget that was exceeded.
    """

    def __init__(self, pairs: float, r: float, limit: int, what: str) -> None:
        self.pairs, self.r, self.limit = pairs, r, limit
        super().__init__(f"about {pairs:,.0f} pairs closer than {r:g} A, more than the "
                         f"{limit:,} {what}")

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
    bin_home: np.ndarray       # (bins,) padded bin of each bin of the cell
    atoms_in_bin: np.ndarray   # (bins,) atoms of each bin of the cell
    r: float                   # the radius (A) the bins were built for

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


def uniform_pairs(cell: np.ndarray, n_atoms: int, r: float) -> float:
    """Pairs closer than ``r`` (A) in a uniform structure of this density (images
    included, each pair once): N * (N / V) * (4/3) pi r^3 / 2."""
    volume = abs(float(np.linalg.det(cell)))
    return n_atoms * (n_atoms / volume) * (4.0 / 3.0) * math.pi * r ** 3 / 2.0


def _check_budget(cell: np.ndarray, n_atoms: int, r: float, limit: float) -> float:
    """Pairs within r (A) of a uniform structure of this density; PairLimitError
    when they exceed ``limit``."""
    expected = uniform_pairs(cell, n_atoms, r)
    if expected > limit:
        raise PairLimitError(expected, r, limit, "a neighbour search handles")
    return expected


def _build_bins(cell: np.ndarray, positions: np.ndarray, r: float,
                limit: int = MAX_COUNTED_PAIRS, frac: np.ndarray | None = None) -> _Bins:
    """Sort atoms into bins for neighbours closer than r, with image copies.

    PairLimitError, before anything large is allocated, when a uniform structure
    of this density would have more than ``limit`` pairs within r, or when the
    image copies would not fit their budget (a cell much thinner than r).
    ``frac``: the positions' wrapped fractional coordinates, when already known.
    """
    expected = _check_budget(cell, len(positions), r, limit)
    if frac is None:
        frac = _wrapped_fractional(cell, positions)
    n_bins = _bin_counts(cell, r, len(frac))
    # Bins this many apart along an axis can still hold a pair closer than r.
    reach = np.maximum(1, np.ceil(r * n_bins / perpendicular_widths(cell))).astype(np.int64)
    copies = len(frac) * float(np.prod((n_bins + 2 * reach) / n_bins))
    if copies > max(_MAX_IMAGE_ENTRIES, 2 * len(frac)):
        raise PairLimitError(expected, r, limit, "a neighbour search handles (the cell is "
                             f"much thinner than {r:g} A: {copies:,.0f} image copies)")
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
    bin_home = _padded_index_of_bins(n_bins, reach)
    home = np.take(bin_home, sorted_bin)
    own_entry = entry_start[home] + np.arange(len(order)) - bin_start[sorted_bin]
    later, every = _stencil_columns(reach, padded)
    return _Bins(order=order, rank=rank, x=x, home=home,
                 own_entry=own_entry, entry_start=entry_start, entry_atom=entry_atom,
                 entry_x=entry_x,
                 later_columns=later, all_columns=every, reach_z=int(reach[2]),
                 bin_home=bin_home, atoms_in_bin=atoms_in_bin, r=float(r))


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


def _chunks(bins: _Bins, half: bool, centres: np.ndarray | None = None,
            limit: tuple[float, int, str] | None = None) -> list:
    """Centre ranks split into chunks of about _PAIRS_PER_CHUNK candidate pairs.

    ``limit`` = (r, most pairs, what): when the candidates exceed the limit,
    the pairs closer than r are estimated from a sample of centres, and
    PairLimitError is raised if the estimate exceeds it too.
    """
    if centres is None:
        centres = np.arange(bins.n_atoms)
    per_centre = _candidate_counts(bins, centres, half)
    candidates = np.cumsum(per_centre)
    if limit is not None and candidates[-1] > limit[1]:
        r, most, what = limit
        pairs = _estimated_pairs(bins, r * r, len(centres), half)
        if pairs > most:
            raise PairLimitError(pairs, r, most, what)
    n_chunks = max(1, int(candidates[-1] // _PAIRS_PER_CHUNK))
    cuts = np.searchsorted(candidates, np.arange(1, n_chunks) * _PAIRS_PER_CHUNK)
    return [c for c in np.split(centres, cuts) if len(c)]


def _estimated_pairs(bins: _Bins, r2: float, n_centres: int, half: bool) -> float:
    """Pairs closer than sqrt(r2) A from ``n_centres`` centres (each once when
    ``half``), estimated from a seeded sample of centres with about
    _ESTIMATE_CANDIDATES candidates in all."""
    drawn = np.random.default_rng(0).permutation(bins.n_atoms)
    m = max(1, _centres_within(bins, drawn, _ESTIMATE_CANDIDATES))
    sample = np.sort(drawn[:m])
    found = 0
    for centres in _chunks(bins, half=False, centres=sample):
        found += len(_pairs_in_chunk(bins, centres, r2, half=False)[0])
    return found / m * n_centres * (0.5 if half else 1.0)


def _centres_within(bins: _Bins, drawn: np.ndarray, budget: int) -> int:
    """How many of the first ``drawn`` centres come before the running total of
    their full-stencil candidates reaches ``budget`` (the searchsorted of that
    total): counted on growing prefixes, since a few thousand centres reach it
    and counting all N took 0.1 s of a 1M-atom inspect."""
    start, total, size = 0, 0, 4096
    while start < len(drawn):
        cost = total + np.cumsum(_candidate_counts(bins, drawn[start:start + size], half=False))
        if cost[-1] >= budget:
            return start + int(np.searchsorted(cost, budget))
        start, total, size = start + len(cost), int(cost[-1]), size * 4
    return len(drawn)


def _total_half_candidates(bins: _Bins) -> int:
    """``_candidate_counts(bins, every atom, half=True).sum()``, per bin instead of
    per atom (a bin's atoms share their runs; ten times fewer bins than atoms).

    The atom t of a bin of c atoms (t = 0 ... c - 1) has the later columns' runs
    and its own column after its own entry: the bin's own-column run minus t + 1.
    """
    home, c = bins.bin_home, bins.atoms_in_bin
    rz = bins.reach_z
    per_bin = np.zeros(len(home), dtype=np.int64)
    for column in bins.later_columns.tolist():
        per_bin += bins.entry_start[home + (column + rz + 1)]
        per_bin -= bins.entry_start[home + (column - rz)]
    own = bins.entry_start[home + rz + 1] - bins.entry_start[home]
    return int(per_bin @ c) + int(own @ c) - int((c * (c + 1) // 2).sum())


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


def _collect_pairs(bins: _Bins, chunks: list, r2: float, limit: int | None,
                   most: int = MAX_LISTED_PAIRS):
    """Half-stencil pairs (rank i, rank j, d2) of the chunks, the shortest ``limit``.

    PairLimitError once more than ``most`` pairs are held (the estimate that let
    the search start was low).
    """
    kept_i, kept_j, kept_d2 = [np.zeros(0, np.int64)], [np.zeros(0, np.int64)], [np.zeros(0)]
    held = 0
    for centres in chunks:
        centre, entry, d2 = _pairs_in_chunk(bins, centres, r2, half=True)
        held += len(d2)
        if limit is None and held > most:
            raise PairLimitError(held, float(np.sqrt(r2)), most, "a pair list holds")
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
    parts, held = [np.zeros(0)], 0
    for centres in chunks:
        parts.append(_pairs_in_chunk(bins, centres, r2, half=half)[2])
        held += len(parts[-1])
        if held > MAX_LISTED_PAIRS:
            raise PairLimitError(held, float(np.sqrt(r2)), MAX_LISTED_PAIRS, "a pair list holds")
    return np.concatenate(parts)


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

