"""Inspect any periodic structure: neighbour shells, cutoff, lattice, defects, checks.

The audit of :mod:`cellbuild.audit` knows what a structure should be (it built
it). Here nothing is known but the coordinates, so everything is inferred:

1. **Pair distribution.** Distances of all pairs (atoms and periodic images)
   up to ``SHELL_RANGE`` x the mean spacing ``s = (V/N)^(1/3)``, from
   :func:`cellbuild.neighbours.pair_distances`, sampling centre atoms above
   ``MAX_SAMPLED_PAIRS`` pairs so that a million atoms cost a fraction of a
   second.
2. **Shells.** The per-atom neighbour histogram is smoothed (Gaussian, width
   ``SMOOTH_FRACTION`` s) and its peaks are the shells; the boundary between
   two shells is the smoothed minimum between their peaks, moved to the middle
   of the empty gap when the distances leave one (a perfect crystal). Each
   shell reports its mean distance and neighbours per atom. Working on the
   neighbour count rather than g(r) keeps a single overlapping pair from
   looking like a peak (g divides by r^2, which is small there).
3. **Cutoff.** The first boundary: the first minimum of the pair distribution
   after the first peak (``--cutoff`` overrides it).
4. **Lattice.** The most common coordination at the cutoff and the ratio of
   the first two shell distances are compared with sc, bcc, fcc and diamond
   (ratios from the basis geometry in :mod:`cellbuild.lattices`); the implied
   lattice constant must also give about the right number of sites for the
   volume. Species are ignored: rock salt matches sc, CsCl bcc, zincblende
   diamond (the space group tells them apart).
5. **Defects** against the matched lattice: atoms with fewer neighbours than
   the ideal coordination are vacancy-like; atoms with more, or closer than
   ``CROWDED_FRACTION`` of the nearest-neighbour distance to another, are
   crowded.
6. **Space group** of the whole cell with spglib, after removing pure
   translations along the cell vectors (a 63^3 supercell becomes its
   conventional cell). spglib's cost grows about as N^2 (measured: 4,000 atoms
   in 1.4 s, 32,000 in 72 s; with displaced atoms 4,000 take 17 s), so cells
   that do not reduce below ``SPGLIB_MAX_ATOMS`` atoms report no space group
   and say why.

All lengths are in Angstrom, volumes in Angstrom^3, densities in g/cm^3.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from . import neighbours
from .audit import MAX_CLOSE_PAIRS_LISTED, Check, histogram, spacegroup
from .build import ANGSTROM3_TO_CM3, AVOGADRO, standard_atomic_weight
from .lattices import LATTICES, shells as lattice_shells
from .structure import Structure

#: Pair distances are collected up to this many mean spacings (V/N)^(1/3):
#: enough for at least three closed shells of sc, bcc, fcc and diamond
#: (fcc's fifth shell sits at 2.51 spacings).
SHELL_RANGE = 2.7
#: Above this many pairs, centre atoms are sampled (seeded) for the distribution.
MAX_SAMPLED_PAIRS = 500_000
#: Histogram bin width and smoothing width, in mean spacings.
BIN_FRACTION = 1.0 / 400.0
SMOOTH_FRACTION = 0.02
#: A shell peak must stand out by this fraction of the highest smoothed peak,
#: and two peaks closer than ``PEAK_SEPARATION`` spacings are one shell (both
#: keep sampling noise from splitting a broadened shell).
PEAK_PROMINENCE = 0.08
PEAK_SEPARATION = 0.06
#: Relative tolerance on the ratio of the second to the first shell distance.
RATIO_TOLERANCE = 0.03
#: Atoms per site implied by the lattice constant and the volume must lie
#: within this fraction of 1 (allows a few per cent vacancies or interstitials).
SITE_FILL_TOLERANCE = 0.10
#: Closer than this fraction of the nearest-neighbour distance: crowded.
CROWDED_FRACTION = 0.85
#: The min_distance check: no pair closer than this fraction of the first
#: shell distance, or than the floor (Angstrom) when no shell is found.
MIN_DISTANCE_FRACTION = 0.5
MIN_DISTANCE_FLOOR = 0.5
#: Cutoff used when the distribution has no minimum after a first peak, in
#: mean spacings (between the first two shells of every lattice here).
FALLBACK_CUTOFF = 1.25
#: Symmetry tolerance (Angstrom) for spglib and for the translation search.
SYMPREC = 0.01
#: Largest cell (after removing pure translations) handed to spglib.
SPGLIB_MAX_ATOMS = 1000
#: Pairs and atom indices listed in the result (all are counted).
CLOSEST_PAIRS_LISTED = 5
ATOMS_LISTED = 20


@dataclass(frozen=True)
class PairDistribution:
    """Pair distances and what one of them stands for.

    Attributes:
        distances: ascending pair distances, Angstrom.
        weight: neighbours per atom that one distance represents (2/N when
            every pair is counted once, 1/m when m centre atoms were sampled).
        number_density: atoms per Angstrom^3.
        r_max: distances were collected below this, Angstrom.
    """

    distances: np.ndarray
    weight: float
    number_density: float
    r_max: float

    def per_atom_histogram(self, width: float) -> tuple[np.ndarray, np.ndarray]:
        """(bin edges, neighbours per atom in each bin) for bins ``width`` Angstrom wide."""
        n_bins = max(1, math.ceil(self.r_max / width))
        edges = np.arange(n_bins + 1) * width
        index = np.minimum((self.distances / width).astype(np.int64), n_bins - 1)
        return edges, np.bincount(index, minlength=n_bins) * self.weight

    def g(self, width: float) -> tuple[np.ndarray, np.ndarray]:
        """(bin centres, radial distribution g(r)): neighbours per atom in each
        spherical shell over the number an ideal gas of the same density holds."""
        edges, per_atom = self.per_atom_histogram(width)
        ideal = self.number_density * (4.0 / 3.0) * math.pi * np.diff(edges ** 3)
        return 0.5 * (edges[1:] + edges[:-1]), per_atom / ideal


@dataclass(frozen=True)
class LatticeMatch:
    """The cubic lattice a structure matches, with its implied lattice constant (A)."""

    name: str
    lattice_constant: float
    nearest: float        # ideal nearest-neighbour distance, Angstrom
    coordination: int     # ideal first-shell coordination
    sites: float          # lattice sites the volume holds at this lattice constant


# ----------------------------------------------------------------------------- entry points


def inspect_structure(structure: Structure, *, file: str, cutoff: float | None = None,
                      expect: str | None = None, potential_cutoff: float | None = None,
                      workers: int = 2, source: dict | None = None) -> dict:
    """Everything :func:`analyse` finds, as a JSON-ready dict."""
    return analyse(structure, file=file, cutoff=cutoff, expect=expect,
                   potential_cutoff=potential_cutoff, workers=workers, source=source)[0]


def analyse(structure: Structure, *, file: str, cutoff: float | None = None,
            expect: str | None = None, potential_cutoff: float | None = None,
            workers: int = 2, source: dict | None = None) -> tuple[dict, PairDistribution]:
    """Inspect ``structure`` (read from ``file``); returns the result and the pair
    distribution (for the plot).

    Args:
        cutoff: neighbour cutoff (A) for coordination; None: automatic.
        expect: lattice name the structure should match (check ``expected_lattice``).
        potential_cutoff: interaction cutoff R (A) of the potential (check that
            every perpendicular box width is at least 2R).
        workers: threads of the neighbour engine.
        source: extra fields placed after ``file`` (format, reader, warnings).
    """
    cell, positions = structure.cell, structure.positions
    volume, n = structure.volume, structure.n_atoms
    spacing = (volume / n) ** (1.0 / 3.0)
    distribution = pair_distribution(structure, spacing, workers)
    shells, boundaries = find_shells(distribution, spacing)
    ci, cj, cd = _closest_pairs(structure, distribution, workers)
    cut, cut_source = _choose_cutoff(cutoff, boundaries, spacing)
    counts = neighbours.coordination_counts(cell, positions, cut, workers=workers)
    match, match_info = match_lattice(counts, shells, volume, n)

    threshold, threshold_source = _distance_threshold(shells)
    crowded_r = CROWDED_FRACTION * match.nearest if match else 0.0
    pi, pj, pd = _pairs_below(structure, max(threshold, crowded_r), float(cd[0]), workers)

    result = {"file": file, **(source or {})}
    result.update(_cell_facts(structure))
    result.update(_distance_facts(ci, cj, cd, pi, pj, pd, threshold))
    result["shells"] = shells
    result["coordination"] = _coordination_facts(structure, counts, cut, cut_source)
    result["lattice"] = match.name if match else None
    result["lattice_match"] = match_info
    result["defects"] = infer_defects(counts, match, pi, pj, pd) if match else None
    if match and not _site_count_reliable(shells, n):
        result["defects"]["estimated_vacancies_from_sites"] = None  # see the note
    if match:
        result["defects"]["note"] = _defects_note(shells, result["defects"])
    result["space_group"], note = space_group(structure)
    if note:
        result["space_group_note"] = note
    checks = [_min_distance_check(cd, ci, cj, pd, threshold, threshold_source)]
    if potential_cutoff is not None:
        checks.append(_potential_cutoff_check(cell, potential_cutoff))
    if expect is not None:
        checks.append(_expected_lattice_check(match, match_info, expect))
    result["checks"] = [c.as_dict() for c in checks]
    result["passed"] = all(c.passed for c in checks)
    return result, distribution


# ----------------------------------------------------------------------------- distances


def pair_distribution(structure: Structure, spacing: float, workers: int = 2) -> PairDistribution:
    """Pair distances up to ``SHELL_RANGE`` mean spacings (sampled centres when many)."""
    cell, n = structure.cell, structure.n_atoms
    r_max = SHELL_RANGE * spacing
    centres = neighbours.sampled_centre_count(cell, n, r_max, MAX_SAMPLED_PAIRS)
    distances = neighbours.pair_distances(cell, structure.positions, r_max, workers=workers,
                                          max_pairs=MAX_SAMPLED_PAIRS)
    # every pair once (2/N per distance) or each sampled centre's neighbours (1/m)
    weight = 2.0 / n if centres >= n else 1.0 / centres
    return PairDistribution(distances, weight, n / structure.volume, r_max)


def find_shells(distribution: PairDistribution, spacing: float) -> tuple[list[dict], list[float]]:
    """Neighbour shells and the boundaries between them (Angstrom).

    Returns shells as ``{"distance", "count", "spread"}`` (mean distance, mean
    neighbours per atom, standard deviation of the distances) and the radii
    that separate shell k from shell k + 1. Only shells closed by a minimum
    on their far side are returned; the last peak before ``r_max`` may be cut.
    """
    width = spacing * BIN_FRACTION
    _, per_atom = distribution.per_atom_histogram(width)
    smooth = _smoothed(per_atom, SMOOTH_FRACTION / BIN_FRACTION)
    if smooth.max() <= 0.0:
        return [], []
    peaks = _peaks(smooth, PEAK_PROMINENCE * smooth.max(),
                   max(1, int(PEAK_SEPARATION / BIN_FRACTION)))
    if len(peaks) < 2:
        return [], []
    d = distribution.distances
    boundaries = []
    for p, q in zip(peaks[:-1], peaks[1:]):
        low = p + int(np.argmin(smooth[p:q + 1]))
        boundaries.append(_gap_middle(d, (low + 0.5) * width, width))
    # below the first peak: as far as the first boundary lies above it, so that
    # a rare overlapping pair is not averaged into the first shell
    first_peak = (peaks[0] + 0.5) * width
    edges = [max(0.0, 2.0 * first_peak - boundaries[0])] + boundaries
    shells = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        members = d[np.searchsorted(d, lo):np.searchsorted(d, hi)]
        if members.size == 0:
            continue
        shells.append({"distance": float(members.mean()),
                       "count": round(float(members.size * distribution.weight), 3),
                       "spread": float(members.std())})
    return shells, boundaries


def _smoothed(values: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian smoothing with standard deviation ``sigma`` bins, zeros beyond the ends.

    (numpy rather than scipy.signal / scipy.ndimage: importing those costs up to
    0.9 s, more than the smoothing of a million atoms' distances.)
    """
    reach = int(math.ceil(4.0 * sigma))
    kernel = np.exp(-0.5 * (np.arange(-reach, reach + 1) / sigma) ** 2)
    smooth = np.convolve(values, kernel / kernel.sum(), mode="full")
    return smooth[reach:reach + len(values)]


def _peaks(y: np.ndarray, prominence: float, separation: int) -> np.ndarray:
    """Indices of the local maxima of ``y`` at least ``separation`` bins from a higher
    one and standing at least ``prominence`` above the higher of the two lowest
    points that separate them from higher ground on either side, ascending."""
    inner = np.flatnonzero((y[1:-1] > y[:-2]) & (y[1:-1] >= y[2:])) + 1
    kept: list[int] = []
    for i in sorted(inner.tolist(), key=lambda k: -y[k]):  # highest first
        if all(abs(i - k) >= separation for k in kept) and _prominence(y, i) >= prominence:
            kept.append(i)
    return np.array(sorted(kept), dtype=np.int64)


def _prominence(y: np.ndarray, i: int) -> float:
    """Height of peak ``i`` above its higher base: on each side, the lowest value
    before the curve rises above y[i] again (or ends)."""
    higher = np.flatnonzero(y > y[i])
    left_end = higher[higher < i].max() if np.any(higher < i) else 0
    right_end = higher[higher > i].min() if np.any(higher > i) else len(y) - 1
    base = max(y[left_end:i + 1].min(), y[i:right_end + 1].min())
    return float(y[i] - base)


def _gap_middle(distances: np.ndarray, r: float, width: float) -> float:
    """``r``, or the middle of the empty stretch of distances around it if there is one
    (a perfect crystal: the cutoff falls midway between two shells)."""
    k = int(np.searchsorted(distances, r))
    if 0 < k < len(distances):
        lo, hi = float(distances[k - 1]), float(distances[k])
        if hi - lo >= 2.0 * width:
            return 0.5 * (lo + hi)
    return float(r)


def _choose_cutoff(cutoff: float | None, boundaries: list[float],
                   spacing: float) -> tuple[float, str]:
    if cutoff is not None:
        return float(cutoff), "--cutoff"
    if boundaries:
        return boundaries[0], "automatic: first minimum of the pair distribution after the first peak"
    return FALLBACK_CUTOFF * spacing, (f"fallback: no minimum after a first peak was found; "
                                       f"{FALLBACK_CUTOFF} x (V/N)^(1/3)")


def _closest_pairs(structure: Structure, distribution: PairDistribution, workers: int):
    """The ``CLOSEST_PAIRS_LISTED`` shortest pairs (i, j, d), exactly.

    The shortest sampled distance bounds the true minimum from above, so all
    pairs up to it contain the closest ones; min_distance is the fallback.
    """
    cell, positions = structure.cell, structure.positions
    if distribution.distances.size:
        r = float(distribution.distances[0]) * (1.0 + 1e-9) + 1e-12
        i, j, d = neighbours.close_pairs(cell, positions, r, workers=workers,
                                         limit=CLOSEST_PAIRS_LISTED)
        if d.size:
            return i, j, d
    d, i, j = neighbours.min_distance(cell, positions, workers=workers)
    return np.array([i]), np.array([j]), np.array([d])


def _pairs_below(structure: Structure, r: float, shortest: float, workers: int):
    """All pairs closer than ``r`` (A); skips the search when the shortest is not."""
    if shortest >= r or r <= 0.0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
    return neighbours.close_pairs(structure.cell, structure.positions, r, workers=workers)


def _distance_threshold(shells: list[dict]) -> tuple[float, str]:
    if shells:
        d1 = shells[0]["distance"]
        return MIN_DISTANCE_FRACTION * d1, (f"{MIN_DISTANCE_FRACTION} x the first shell "
                                            f"distance {d1:.4f} A")
    return MIN_DISTANCE_FLOOR, f"absolute floor {MIN_DISTANCE_FLOOR} A: no neighbour shell found"


# ----------------------------------------------------------------------------- lattice, defects


def match_lattice(counts: np.ndarray, shells: list[dict], volume: float,
                  n_atoms: int) -> tuple[LatticeMatch | None, dict]:
    """The cubic lattice whose coordination, shell ratio and site density fit.

    Returns the match (or None) and the numbers it was judged on, with a
    sentence saying why when nothing matched.
    """
    if len(shells) < 2 or counts.size == 0:
        return None, {"reason": "fewer than two neighbour shells were found"}
    z = int(np.bincount(counts, minlength=1).argmax())
    ratio = shells[1]["distance"] / shells[0]["distance"]
    info = {"coordination": z, "shell_ratio": ratio}
    tried = []
    for name, lattice in LATTICES.items():
        geometry = lattice_shells(name)
        ideal = geometry.distances[1] / geometry.distances[0]
        tried.append(f"{name} {geometry.coordination}/{ideal:.4f}")
        if z != geometry.coordination or abs(ratio / ideal - 1.0) > RATIO_TOLERANCE:
            continue
        a = _nearest_distance(shells[0]) / geometry.nearest
        sites = volume * lattice.n_basis / a ** 3
        info.update(lattice_constant=a, sites=sites, site_fill=n_atoms / sites)
        if abs(n_atoms / sites - 1.0) > SITE_FILL_TOLERANCE:
            info["reason"] = (f"coordination and shell ratio fit {name}, but its lattice constant "
                              f"{a:.4f} A gives {sites:.1f} sites for {n_atoms} atoms")
            return None, info
        return LatticeMatch(name, a, geometry.nearest * a, geometry.coordination, sites), info
    info["reason"] = (f"most common coordination {z} and shell ratio d2/d1 = {ratio:.4f} fit "
                      f"none of (coordination/ratio) {', '.join(tried)} within "
                      f"{RATIO_TOLERANCE:.0%}")
    return None, info


def _nearest_distance(shell: dict) -> float:
    """First-shell distance (A) corrected for displaced atoms.

    Displacements across a bond of length d, with spread sigma along it, also
    spread across it and lengthen the mean distance by about sigma^2 / d
    (isotropic displacements); perfect crystals are unaffected.
    """
    return shell["distance"] - shell["spread"] ** 2 / shell["distance"]


def _site_count_reliable(shells: list[dict], n_atoms: int) -> bool:
    """Whether sites = V n_basis / a^3 is good to half a site: its relative error is
    3x that of a, taken as no better than the displacement correction (sigma/d)^2."""
    relative = (shells[0]["spread"] / shells[0]["distance"]) ** 2
    return 3.0 * relative * n_atoms < 0.5


def infer_defects(counts: np.ndarray, match: LatticeMatch, pair_i: np.ndarray,
                  pair_j: np.ndarray, pair_d: np.ndarray) -> dict:
    """Vacancy-like and crowded atoms against the ideal coordination of ``match``.

    Each vacancy takes one neighbour from each of the z atoms around it, so the
    missing neighbours divided by z estimate the vacancies; the volume and
    lattice constant give a second estimate (sites minus atoms).
    """
    z = match.coordination
    low = counts < z
    missing = int((z - counts[low]).sum())
    crowded = counts > z
    crowded_r = CROWDED_FRACTION * match.nearest
    close = pair_d < crowded_r
    crowded[pair_i[close]] = True
    crowded[pair_j[close]] = True
    expected_sites = int(round(match.sites))
    return {
        "ideal_coordination": z,
        "vacancy_like": int(low.sum()),
        "missing_neighbours": missing,
        "estimated_vacancies": round(missing / z, 3),
        "expected_sites": expected_sites,
        "estimated_vacancies_from_sites": expected_sites - len(counts),
        "crowded": int(crowded.sum()),
        "crowded_distance": crowded_r,
        "vacancy_like_atoms": np.flatnonzero(low)[:ATOMS_LISTED].tolist(),
        "crowded_atoms": np.flatnonzero(crowded)[:ATOMS_LISTED].tolist(),
    }


def _defects_note(shells: list[dict], defects: dict) -> str | None:
    notes = []
    if _shells_overlap(shells):
        notes.append("the first two shells overlap (displaced atoms): counts at the cutoff, and "
                     "the vacancy-like and crowded atoms inferred from them, include thermal noise")
    if defects["estimated_vacancies_from_sites"] is None:
        notes.append("atoms are too displaced from ideal sites for the lattice constant to "
                     "count the sites of this many atoms to one site")
    return "; ".join(notes) or None


def _shells_overlap(shells: list[dict]) -> bool:
    """True when the first two shells come within 3 standard deviations each of each
    other, so that some pairs may fall on the wrong side of the cutoff."""
    first, second = shells[0], shells[1]
    return second["distance"] - first["distance"] < 3.0 * (first["spread"] + second["spread"])


# ----------------------------------------------------------------------------- space group


def space_group(structure: Structure) -> tuple[dict | None, str | None]:
    """({"symbol", "number", "symprec", "atoms_analysed"}, None) or (None, why not)."""
    unit = repeating_unit(structure, SYMPREC)
    if unit.n_atoms > SPGLIB_MAX_ATOMS:
        return None, (f"not determined: the cell has no smaller repeating unit along its "
                      f"vectors and {unit.n_atoms:,} atoms are more than spglib handles in "
                      f"seconds (limit {SPGLIB_MAX_ATOMS:,})")
    symbol, number = spacegroup(unit, symprec=SYMPREC)
    if number == 0:
        return None, f"spglib found no space group (symprec {SYMPREC} A)"
    return {"symbol": symbol, "number": number, "symprec": SYMPREC,
            "atoms_analysed": unit.n_atoms}, None


def repeating_unit(structure: Structure, tol: float) -> Structure:
    """The cell with pure translations a_k / q removed along each cell vector.

    A translation that maps every atom onto an atom of the same species
    (within about ``tol`` A) means the cell is q copies of a smaller one with the
    same space group. Structures without such a translation come back as they are.
    """
    frac = _wrapped(structure)
    for axis in range(3):
        q = _translation_order(structure, frac, axis, tol)
        if q > 1:
            reduced = _slab(structure, frac, axis, q, tol)
            if reduced is not None:
                structure = reduced
                frac = _wrapped(structure)
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


def _translation_order(structure: Structure, frac: np.ndarray, axis: int, tol: float) -> int:
    """Largest q with a_axis / q a symmetry translation found from atom 0's row, or 1.

    The candidate comes from the atoms in the same row along ``axis`` as atom 0
    (same bins on the other axes, same species): the shortest shift to one of
    them is p / q of the cell vector, and a_axis / q is then tested on a sample
    of atoms, then on all of them.
    """
    bins = _bins(structure, tol)
    too_fine = float(np.prod(bins.astype(np.float64))) * (int(structure.species.max()) + 1)
    if structure.n_atoms < 2 or too_fine >= 2.0 ** 62:  # keys would overflow int64
        return 1
    cells = _cells(frac, bins)
    others = [k for k in range(3) if k != axis]
    same_row = np.all(cells[:, others] == cells[0, others], axis=1)
    same_row &= structure.species == structure.species[0]
    shift = (frac[same_row, axis] - frac[0, axis]) % 1.0
    shift = shift[(shift > 1.0 / bins[axis]) & (shift < 1.0 - 1.0 / bins[axis])]
    if shift.size == 0:
        return 1
    q = Fraction(float(shift.min())).limit_denominator(structure.n_atoms).denominator
    if q < 2 or structure.n_atoms % q:
        return 1
    keys = np.sort(_keys(cells, structure.species, bins))
    moved = frac.copy()
    moved[:, axis] = (moved[:, axis] + 1.0 / q) % 1.0
    moved_keys = _keys(_cells(moved, bins), structure.species, bins)
    sample = moved_keys[:: max(1, structure.n_atoms // _TRANSLATION_SAMPLE)]
    found = np.searchsorted(keys, sample)
    if np.any(found >= len(keys)) or np.any(keys[np.minimum(found, len(keys) - 1)] != sample):
        return 1
    return q if np.array_equal(keys, np.sort(moved_keys)) else 1


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


# ----------------------------------------------------------------------------- facts and checks


def _cell_facts(structure: Structure) -> dict:
    cell = structure.cell
    lengths = np.linalg.norm(cell, axis=1)

    def angle(u: int, v: int) -> float:
        cosine = float(cell[u] @ cell[v] / (lengths[u] * lengths[v]))
        return math.degrees(math.acos(max(-1.0, min(1.0, cosine))))

    return {
        "n_atoms": structure.n_atoms,
        "composition": structure.composition(),
        "cell": cell.tolist(),
        "cell_lengths": lengths.tolist(),
        "cell_angles": [angle(1, 2), angle(0, 2), angle(0, 1)],  # alpha, beta, gamma
        "volume": structure.volume,
        "perpendicular_widths": neighbours.perpendicular_widths(cell).tolist(),
        "density": density(structure),
    }


def density(structure: Structure) -> float:
    """Mass density in g/cm^3 from standard atomic weights and the cell volume."""
    weights = np.array([standard_atomic_weight(s) for s in structure.symbols])
    return float(structure.counts() @ weights) / (
        AVOGADRO * structure.volume * ANGSTROM3_TO_CM3)


def _distance_facts(ci, cj, cd, pi, pj, pd, threshold: float) -> dict:
    below = pd < threshold
    listed = slice(0, MAX_CLOSE_PAIRS_LISTED)
    return {
        "min_distance": float(cd[0]),
        "min_distance_pair": [int(ci[0]), int(cj[0])],
        "closest_pairs": [[int(a), int(b), float(c)] for a, b, c in zip(ci, cj, cd)],
        "close_pairs": {
            "threshold": threshold,
            "count": int(below.sum()),
            "pairs": [[int(a), int(b), float(c)] for a, b, c in
                      zip(pi[below][listed], pj[below][listed], pd[below][listed])],
        },
    }


def _coordination_facts(structure: Structure, counts: np.ndarray, cutoff: float,
                        source: str) -> dict:
    present = np.flatnonzero(structure.counts())
    return {
        "cutoff": cutoff,
        "cutoff_source": source,
        "histogram": histogram(counts),
        "by_species": {structure.symbols[code]: histogram(counts[structure.species == code])
                       for code in present},
    }


def _min_distance_check(cd, ci, cj, pd, threshold: float, source: str) -> Check:
    n_close = int((pd < threshold).sum())
    return Check("min_distance", n_close == 0,
                 f"closest pair {float(cd[0]):.4f} A (atoms {int(ci[0])} and {int(cj[0])}); "
                 f"{n_close} pair(s) closer than {threshold:.4f} A ({source})")


def _potential_cutoff_check(cell: np.ndarray, r: float) -> Check:
    widths = neighbours.perpendicular_widths(cell)
    narrowest = int(np.argmin(widths))
    ok = bool(widths.min() >= 2.0 * r)
    shown = ", ".join(f"{w:.4f}" for w in widths)
    return Check("potential_cutoff", ok,
                 f"perpendicular box widths {shown} A; the minimum-image convention with "
                 f"cutoff {r:g} A needs every width >= 2R = {2.0 * r:g} A "
                 f"(narrowest: along cell vector {'abc'[narrowest]}, {widths[narrowest]:.4f} A)")


def _expected_lattice_check(match: LatticeMatch | None, info: dict, expect: str) -> Check:
    if match is None:
        return Check("expected_lattice", False,
                     f"matches no cubic lattice ({info.get('reason', '')}); expected {expect}")
    return Check("expected_lattice", match.name == expect,
                 f"matches {match.name} (a = {match.lattice_constant:.4f} A, coordination "
                 f"{match.coordination}); expected {expect}")


# ----------------------------------------------------------------------------- files, text


def inspect_file(path, *, types: list[str] | None = None, cutoff: float | None = None,
                 expect: str | None = None, potential_cutoff: float | None = None,
                 plot=None, workers: int = 2) -> dict:
    """Read ``path``, inspect it and (with ``plot``) write the figure there.

    Raises InputError for an unreadable file; OSError if the figure cannot be written.
    """
    from .readers import FORMAT_TITLES, read_file

    read = read_file(path, types)
    notes = list(read.warnings)
    if types and read.format != "lammps-data":
        notes.append("--types applies to LAMMPS data files only; ignored")
    source = {"format": read.format, "reader": read.reader, "warnings": notes}
    result, distribution = analyse(read.structure, file=str(path), cutoff=cutoff,
                                   expect=expect, potential_cutoff=potential_cutoff,
                                   workers=workers, source=source)
    result["format_title"] = FORMAT_TITLES[read.format]
    if plot is not None:
        from .plots import plot_inspection

        plot_inspection(result, distribution, plot)
        result["plot"] = str(plot)
    return result


def plot_paths(plot, files: list) -> list:
    """One PNG per input: ``plot`` itself for one file, else ``<stem>-<file stem><suffix>``
    beside it (the whole file name where two inputs share a stem)."""
    from pathlib import Path

    if plot is None:
        return [None] * len(files)
    plot = Path(plot)
    if len(files) == 1:
        return [plot]
    stems = [Path(f).stem for f in files]
    names = [Path(f).name if stems.count(s) > 1 else s for f, s in zip(files, stems)]
    paths = [plot.with_name(f"{plot.stem}-{name}{plot.suffix or '.png'}") for name in names]
    if len(set(paths)) < len(paths):  # same name in different folders: number them
        paths = [plot.with_name(f"{plot.stem}-{k}-{name}{plot.suffix or '.png'}")
                 for k, name in enumerate(names, start=1)]
    return paths


def describe(result: dict) -> str:
    """A plain-text summary of one inspection result."""
    lengths = " x ".join(f"{x:.4f}" for x in result["cell_lengths"])
    angles = " ".join(f"{x:.2f}" for x in result["cell_angles"])
    formula = " ".join(f"{k} {v:,}" for k, v in result["composition"].items())
    close = result["close_pairs"]
    coordination = result["coordination"]
    lines = [
        f"{result['file']}  [{result.get('format_title', result.get('format', '?'))}, "
        f"read by {result.get('reader', '?')}]",
        f"  atoms         {result['n_atoms']:,} ({formula})",
        f"  cell          {lengths} A; angles {angles} deg; volume {result['volume']:.3f} A^3",
        f"  box widths    {' '.join(f'{w:.4f}' for w in result['perpendicular_widths'])} A "
        "(between opposite faces)",
        f"  density       {result['density']:.4f} g/cm^3",
        f"  closest pair  {result['min_distance']:.4f} A (atoms "
        f"{result['min_distance_pair'][0]} and {result['min_distance_pair'][1]}); "
        f"{close['count']} pair(s) closer than {close['threshold']:.4f} A",
        "  shells        " + (" | ".join(f"{s['distance']:.4f} A x {s['count']:g}"
                                       for s in result["shells"]) or "none found")
        + ("  (neighbours per atom)" if result["shells"] else ""),
        f"  cutoff        {coordination['cutoff']:.4f} A ({coordination['cutoff_source']})",
    ]
    for symbol, hist in coordination["by_species"].items():
        counts = ", ".join(f"{n:,} atoms with {k}" for k, n in hist.items())
        lines.append(f"  coordination  {symbol}: {counts}")
    lines.append("  lattice       " + _lattice_text(result))
    if result["defects"] is not None:
        lines.append("  defects       " + _defects_text(result["defects"]))
    group = result["space_group"]
    lines.append("  space group   " + (f"{group['symbol']} ({group['number']})" if group
                                      else result.get("space_group_note", "not determined")))
    for note in result.get("warnings", []):
        lines.append(f"  warning       {note}")
    for check in result["checks"]:
        state = "passed" if check["passed"] else "FAILED"
        lines.append(f"  check         {check['name']} {state}: {check['detail']}")
    failed = [c["name"] for c in result["checks"] if not c["passed"]]
    lines.append("  result        " + ("all checks passed" if not failed
                                      else "CHECKS FAILED: " + ", ".join(failed)))
    if result.get("plot"):
        lines.append(f"  plot          {result['plot']}")
    return "\n".join(lines)


def _lattice_text(result: dict) -> str:
    info = result["lattice_match"]
    if result["lattice"] is None:
        return f"none ({info.get('reason', 'no match')})"
    return (f"{result['lattice']}, a = {info['lattice_constant']:.4f} A (most common "
            f"coordination {info['coordination']}, d2/d1 = {info['shell_ratio']:.4f}, "
            f"{info['sites']:.1f} sites for {result['n_atoms']:,} atoms)")


def _or_unknown(value) -> str:
    return "unknown" if value is None else f"{value:,}"


def _defects_text(defects: dict) -> str:
    note = f"; note: {defects['note']}" if defects.get("note") else ""
    if defects["vacancy_like"] == 0 and defects["crowded"] == 0:
        return "none inferred (every atom has the ideal coordination, none crowded)" + note
    return (f"{defects['vacancy_like']:,} vacancy-like atom(s) (about "
            f"{defects['estimated_vacancies']:g} vacancies from missing neighbours, "
            f"{_or_unknown(defects['estimated_vacancies_from_sites'])} from sites minus atoms); "
            f"{defects['crowded']:,} crowded atom(s) (more than "
            f"{defects['ideal_coordination']} neighbours or closer than "
            f"{defects['crowded_distance']:.4f} A){note}")
