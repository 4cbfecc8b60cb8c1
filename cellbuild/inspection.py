"""Inspect any periodic structure: neighbour shells, cutoff, lattice, defects, checks.

The audit of :mod:`cellbuild.audit` knows what a structure should be (it built
it). Here nothing is known but the coordinates, so everything is inferred:

1. **Pair distribution.** Distances of all pairs (atoms and periodic images)
   up to ``SHELL_RANGE`` x the mean spacing ``s = (V/N)^(1/3)``, from
   :func:`cellbuild.neighbours.pair_sample`, sampling centre atoms above
   ``MAX_SAMPLED_PAIRS`` pairs so that a million atoms (or a thousand on top of
   one another) cost a fraction of a second (:mod:`cellbuild.pair_shells`).
2. **Shells.** The per-atom neighbour histogram is smoothed (Gaussian, width
   ``SMOOTH_FRACTION`` s) and its peaks are the shells; the boundary between
   two shells is the smoothed minimum between their peaks, moved to the middle
   of the empty gap when the distances leave one (a perfect crystal). Each
   shell reports its mean distance and neighbours per atom. Working on the
   neighbour count rather than g(r) keeps a single overlapping pair from
   looking like a peak (g divides by r^2, which is small there).
3. **Cutoff.** The first boundary: the first minimum of the pair distribution
   after the first peak (``--cutoff`` overrides it).
4. **Lattice.** The cumulative neighbour counts between the ideal shells of
   sc, bcc, fcc, diamond and ideal hcp are compared with the distribution,
   at the robust nearest-neighbour distance (median of the first shell); the
   implied lattice constant must also give about the right number of sites
   for the volume (:mod:`cellbuild.lattice_match`). Species are ignored there;
   with two or more elements the compound prototypes are then tried per
   species pair (:mod:`cellbuild.prototype_match`), and a match names the
   lattice (rock salt ``rocksalt``, its sites' ``sc`` kept in ``prototype``).
5. **Defects** against the matched lattice: vacancy-like atoms (too few
   neighbours), crowded atoms (too many, or closer than ``CROWDED_FRACTION``
   of the nearest-neighbour distance to another) and, among these, the
   interstitial-like atoms that sit on no lattice site.
6. **Space group** of the cell reduced to its smallest repeating unit, with
   spglib (:mod:`cellbuild.repeating_unit`).
7. **Checks**: ``min_distance``, ``physical_spacing`` (nearest-neighbour
   distances against covalent radii, :mod:`cellbuild.spacing`), for CIFs
   ``site_occupancy``, and on request ``potential_cutoff`` and
   ``expected_lattice``.

Pair searches are bounded (:mod:`cellbuild.neighbours`): a file whose atoms
overlap by the million, or a ``--cutoff`` that would count billions of pairs,
is refused with a sentence saying how many pairs there would be.

All lengths are in Angstrom, volumes in Angstrom^3, densities in g/cm^3.
"""
from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from . import neighbours
from .checks_common import (ANGSTROM3_TO_CM3, AVOGADRO, MAX_CLOSE_PAIRS_LISTED, histogram,
                            standard_atomic_weight)
from .errors import InputError
from .lattice_match import (CROWDED_FRACTION, PATTERN_NAMES, LatticeMatch, defects_note,
                            first_shell, infer_defects, match_lattice, patterns,
                            site_count_reliable)
from .pair_shells import (MAX_SAMPLED_PAIRS, SHELL_RANGE, PairDistribution, find_shells,
                          pair_distribution)
from .inspect_text import describe  # noqa: F401  (the text summary, importable from here)
from .inspection_checks import (expected_lattice_check, min_distance_check,
                                physical_spacing_check, potential_cutoff_check,
                                site_occupancy_check, typical_spacing)
from .prototype_match import expected_names, match_prototype
from .repeating_unit import repeating_unit, space_group
from .short_range_order import SHELLS as SRO_SHELLS, order_of_file
from .structure import Structure

__all__ = ["EXPECT_CHOICES", "LatticeMatch", "PairDistribution", "analyse", "density",
           "describe", "find_shells", "inspect_file", "inspect_structure", "pair_distribution",
           "plot_paths", "repeating_unit", "space_group"]

#: Every lattice and compound prototype name ``inspect --expect`` accepts.
EXPECT_CHOICES = PATTERN_NAMES + expected_names()
#: The min_distance check: no pair closer than this fraction of the first
#: shell distance, or than the floor (Angstrom) when no shell is found.
MIN_DISTANCE_FRACTION = 0.5
MIN_DISTANCE_FLOOR = 0.5
#: Cutoff used when the distribution has no minimum after a first peak, in
#: mean spacings (between the first two shells of every lattice here).
FALLBACK_CUTOFF = 1.25
#: Pairs and atom indices listed in the result (all are counted).
CLOSEST_PAIRS_LISTED = 5
#: Largest distance (A) of an atom from its site for a file to count as on a
#: grid (atoms written with 6 or more decimals of Angstrom, or fractions, are).
GRID_TOL = 1e-6
#: Crowded atoms beyond which interstitial-like atoms are not told apart.
MAX_CROWDED_EXAMINED = 200_000


# ----------------------------------------------------------------------------- entry points


def inspect_structure(structure: Structure, *, file: str, cutoff: float | None = None,
                      expect: str | None = None, potential_cutoff: float | None = None,
                      workers: int = 2, source: dict | None = None) -> dict:
    """Everything :func:`analyse` finds, as a JSON-ready dict."""
    return analyse(structure, file=file, cutoff=cutoff, expect=expect,
                   potential_cutoff=potential_cutoff, workers=workers, source=source)[0]


def analyse(structure: Structure, *, file: str, cutoff: float | None = None,
            expect: str | None = None, potential_cutoff: float | None = None,
            workers: int = 2, source: dict | None = None,
            partial_occupancy: list[dict] | None = None) -> tuple[dict, PairDistribution]:
    """Inspect ``structure`` (read from ``file``); returns the result and the pair
    distribution (for the plot).

    Args:
        cutoff: neighbour cutoff (A) for coordination; None: automatic.
        expect: lattice name the structure should match (check ``expected_lattice``).
        potential_cutoff: interaction cutoff R (A) of the potential (check that
            every perpendicular box width is at least 2R).
        workers: threads of the neighbour engine.
        source: extra fields placed after ``file`` (format, reader, warnings).
        partial_occupancy: for a CIF, its atom-site rows with occupancy below 1
            (check ``site_occupancy``); None for other formats.

    Raises:
        InputError: when a pair search would exceed its bounds (atoms on top of
            one another by the million, a ``--cutoff`` far beyond the cell).
    """
    from .slab_detect import find_vacuum, with_bulk_view

    try:
        result, distribution = _analyse(structure, file, cutoff, expect, potential_cutoff,
                                        workers, source, partial_occupancy)
        slab = find_vacuum(structure)
        result["slab"] = None
        if slab is not None:  # surfaces are not defects: judge the lattice without the gap
            result = with_bulk_view(result, _bulk_view(structure, slab, file, cutoff, expect,
                                                       workers), slab)
        return result, distribution
    except neighbours.PairLimitError as exc:
        raise InputError(f"holds {exc}, too many to examine", file=file) from None


def _bulk_view(structure, slab, file, cutoff, expect, workers) -> dict:
    """The analysis of the slab with its gap closed, leaving out up to
    MAX_DROPPED_PLANES top planes: the first view with a lattice and no
    vacancy-like atoms, else the first with a lattice, else the whole slab's."""
    from .slab_detect import MAX_DROPPED_PLANES, closed

    views = []
    for drop in range(MAX_DROPPED_PLANES + 1):
        view, _ = _analyse(closed(structure, slab, drop), file, cutoff, expect, None, workers,
                           None, None)
        if view["lattice"] and not (view["defects"] or {}).get("vacancy_like"):
            return view
        views.append(view)
    return next((v for v in views if v["lattice"]), views[0])


def _analyse(structure, file, cutoff, expect, potential_cutoff, workers, source,
             partial_occupancy):
    if workers <= 1:
        return _analysis(structure, file, cutoff, expect, potential_cutoff, workers, source,
                         partial_occupancy, None)
    with ThreadPoolExecutor(max_workers=1) as pool:
        return _analysis(structure, file, cutoff, expect, potential_cutoff, workers, source,
                         partial_occupancy, pool)


def _analysis(structure, file, cutoff, expect, potential_cutoff, workers, source,
              partial_occupancy, pool):
    cell, positions = structure.cell, structure.positions
    volume, n = structure.volume, structure.n_atoms
    spacing = (volume / n) ** (1.0 / 3.0)
    # atoms on the sites of a grid (files of built crystals): the pair queries
    # and the coordination read the occupancy grid, without a cell list
    sites = neighbours.locate_grid(cell, positions, GRID_TOL)
    # every neighbour search below shares its cell lists and fractional coordinates
    near = neighbours.Neighbourhood(cell, positions, sites)
    # the space group needs nothing found below: on the second core (``pool``),
    # while the pairs are analysed (the same answer either way)
    symmetry = pool.submit(lambda: space_group(structure, frac=near.frac)) if pool else None
    distribution = _pair_distribution(structure, spacing, workers, near)
    shells, boundaries = find_shells(distribution, spacing)
    threshold, threshold_source = _distance_threshold(shells)
    _refuse_overlap(distribution, threshold, n, file)
    ci, cj, cd = _closest_pairs(structure, distribution, workers, near, sites)
    cut, cut_source = _choose_cutoff(cutoff, boundaries, spacing)
    if cutoff is not None:
        _refuse_cutoff(structure, distribution, cutoff)
    counts = neighbours.coordination_counts(cell, positions, cut, workers=workers, sites=sites,
                                            locate=False)
    first = first_shell(distribution.distances, shells, boundaries)
    match, match_info = match_lattice(counts, shells, first, distribution, volume, n)
    per_species = structure.counts()  # O(N): once for every fact below that needs it
    prototype, prototype_note = match_prototype(structure, pattern=match.name if match else None,
                                                near=near, counts=per_species)

    crowded_r = CROWDED_FRACTION * match.nearest if match else 0.0
    pi, pj, pd = _pairs_below(structure, max(threshold, crowded_r), float(cd[0]), workers, near)

    result = {"file": file, **(source or {})}
    result.update(_cell_facts(structure, per_species))
    result.update(_distance_facts(ci, cj, cd, pi, pj, pd, threshold))
    result["net_charge"] = structure.net_charge()  # atoms' charges (e), if the file has them
    result["shells"] = shells
    result["coordination"] = _coordination_facts(structure, counts, cut, cut_source, per_species)
    result["lattice"] = prototype["name"] if prototype else match.name if match else None
    result["prototype"] = prototype
    if prototype_note:
        result["prototype_note"] = prototype_note
    result["lattice_match"] = match_info
    result["defects"] = None
    if match:
        close = pd < crowded_r
        result["defects"] = infer_defects(counts, match, pi, pj, pd, _crowded_neighbours(
            structure, counts, match, cut, pi[close], pj[close], near))
        if not site_count_reliable(match, first, n):
            result["defects"]["estimated_vacancies_from_sites"] = None  # see the note
        result["defects"]["note"] = defects_note(shells, result["defects"], match)
    radii = ([r * match.nearest for r in patterns()[match.name].distances[:SRO_SHELLS + 1]]
             if match else None)
    result["short_range_order"] = order_of_file(structure, prototype, radii, near=near)
    result["space_group"], note = (symmetry.result() if symmetry
                                   else space_group(structure, frac=near.frac))
    if note:
        result["space_group_note"] = note
    typical = typical_spacing(structure, distribution, workers, near=near)
    result["nearest_neighbour_median"] = typical[0]
    checks = [min_distance_check(cd, ci, cj, pd, threshold, threshold_source),
              physical_spacing_check(structure, (float(cd[0]), int(ci[0]), int(cj[0])),
                                     typical)]
    if partial_occupancy is not None:
        result["partial_occupancy"] = partial_occupancy[:CLOSEST_PAIRS_LISTED]
        checks.append(site_occupancy_check(partial_occupancy))
    if potential_cutoff is not None:
        checks.append(potential_cutoff_check(cell, potential_cutoff))
    if expect is not None:
        checks.append(expected_lattice_check(match, match_info, expect, prototype))
    result["checks"] = [c.as_dict() for c in checks]
    result["passed"] = all(c.passed for c in checks)
    return result, distribution


# ----------------------------------------------------------------------------- bounds


def _refuse_overlap(distribution: PairDistribution, threshold: float, n: int, file: str) -> None:
    """InputError when the sampled distribution says that more pairs than a pair list
    holds are closer than the min_distance threshold (the atoms overlap en masse)."""
    below = distribution.neighbours_below(threshold) * n / 2.0
    if below > neighbours.MAX_LISTED_PAIRS:
        raise InputError(f"has about {below:,.0f} pairs closer than {threshold:.4g} A: the file "
                         "overlaps itself (atoms on top of one another)", file=file)


def _refuse_cutoff(structure: Structure, distribution: PairDistribution, cutoff: float) -> None:
    """InputError when ``--cutoff`` would have the neighbour count visit more pairs
    than it handles: counted in the distribution where it reaches, else estimated
    from the density."""
    n = structure.n_atoms
    if cutoff < distribution.r_max:
        pairs = distribution.neighbours_below(cutoff) * n / 2.0
    else:
        pairs = neighbours.uniform_pairs(structure.cell, n, cutoff)
    if pairs > neighbours.MAX_COUNTED_PAIRS:
        raise InputError(f"would list about {pairs:,.0f} pairs, more than the "
                         f"{neighbours.MAX_COUNTED_PAIRS:,} a neighbour count handles",
                         key="--cutoff", value=cutoff,
                         hint="give a cutoff of a few neighbour shells")


def _pair_distribution(structure: Structure, spacing: float, workers: int,
                       near: neighbours.Neighbourhood) -> PairDistribution:
    """:func:`cellbuild.pair_shells.pair_distribution` with the structure's
    Neighbourhood, so that its cell list serves the later searches at r_max."""
    n = structure.n_atoms
    r_max = SHELL_RANGE * spacing
    sample = neighbours.pair_sample(structure.cell, structure.positions, r_max, workers=workers,
                                    max_pairs=MAX_SAMPLED_PAIRS, near=near)
    # every pair once (2/N per distance) or each sampled centre's neighbours (1/m)
    weight = 2.0 / n if sample.centres >= n else 1.0 / sample.centres
    return PairDistribution(sample.distances, weight, n / structure.volume, r_max)


def _crowded_neighbours(structure: Structure, counts: np.ndarray, match: LatticeMatch,
                        cut: float, close_i: np.ndarray, close_j: np.ndarray,
                        near: neighbours.Neighbourhood | None = None):
    """(i, j, distance) with j within the cutoff of a crowded atom i (more than
    the ideal coordination, or in a close pair ``close_i``/``close_j``); None
    when there are too many such atoms to examine."""
    crowded = counts > match.coordination
    crowded[close_i] = True
    crowded[close_j] = True
    centres = np.flatnonzero(crowded)
    if centres.size > MAX_CROWDED_EXAMINED:
        return None
    try:
        return neighbours.pairs_of(structure.cell, structure.positions, centres, cut, near=near)
    except neighbours.PairLimitError:
        return None


# ----------------------------------------------------------------------------- distances


def _choose_cutoff(cutoff: float | None, boundaries: list[float],
                   spacing: float) -> tuple[float, str]:
    if cutoff is not None:
        return float(cutoff), "--cutoff"
    if boundaries:
        return boundaries[0], "automatic: first minimum of the pair distribution after the first peak"
    return FALLBACK_CUTOFF * spacing, (f"fallback: no minimum after a first peak was found; "
                                       f"{FALLBACK_CUTOFF} x (V/N)^(1/3)")


def _closest_pairs(structure: Structure, distribution: PairDistribution, workers: int,
                   near: neighbours.Neighbourhood | None = None,
                   sites: neighbours.GridSites | None = None):
    """The ``CLOSEST_PAIRS_LISTED`` shortest pairs (i, j, d).

    The shortest sampled distance bounds the true minimum from above, so all
    pairs up to it contain the closest ones; min_distance is the fallback.
    Atoms on a grid (``sites``) are paired by their sites' distances, which are
    within 2 GRID_TOL of the actual ones (ties among equal site distances by
    atom index; the distances listed are the actual ones); elsewhere the pairs
    are exactly the shortest.
    """
    cell, positions = structure.cell, structure.positions
    if distribution.distances.size:
        r = float(distribution.distances[0]) * (1.0 + 1e-9) + 1e-12
        found = None
        if sites is not None:
            found = neighbours.grid_close_pairs(sites, r, CLOSEST_PAIRS_LISTED)
        if found is None:
            found = neighbours.close_pairs(cell, positions, r, workers=workers,
                                           limit=CLOSEST_PAIRS_LISTED, near=near)
        if found[2].size:
            return found
    d, i, j = neighbours.min_distance(cell, positions, workers=workers, sites=sites)
    return np.array([i]), np.array([j]), np.array([d])


def _pairs_below(structure: Structure, r: float, shortest: float, workers: int,
                 near: neighbours.Neighbourhood | None = None):
    """All pairs closer than ``r`` (A); skips the search when the shortest is not."""
    if shortest >= r or r <= 0.0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0)
    return neighbours.close_pairs(structure.cell, structure.positions, r, workers=workers,
                                  near=near)


def _distance_threshold(shells: list[dict]) -> tuple[float, str]:
    if shells:
        d1 = shells[0]["distance"]
        return MIN_DISTANCE_FRACTION * d1, (f"{MIN_DISTANCE_FRACTION} x the first shell "
                                            f"distance {d1:.4f} A")
    return MIN_DISTANCE_FLOOR, f"absolute floor {MIN_DISTANCE_FLOOR} A: no neighbour shell found"


# ----------------------------------------------------------------------------- facts and checks


def _cell_facts(structure: Structure, per_species: np.ndarray) -> dict:
    """Cell, composition and density (``per_species``: atoms per species code)."""
    cell = structure.cell
    lengths = np.linalg.norm(cell, axis=1)

    def angle(u: int, v: int) -> float:
        cosine = float(cell[u] @ cell[v] / (lengths[u] * lengths[v]))
        return math.degrees(math.acos(max(-1.0, min(1.0, cosine))))

    return {
        "n_atoms": structure.n_atoms,
        "composition": {s: int(c) for s, c in zip(structure.symbols, per_species) if c > 0},
        "cell": cell.tolist(),
        "cell_lengths": lengths.tolist(),
        "cell_angles": [angle(1, 2), angle(0, 2), angle(0, 1)],  # alpha, beta, gamma
        "volume": structure.volume,
        "perpendicular_widths": neighbours.perpendicular_widths(cell).tolist(),
        "density": density(structure, per_species),
    }


def density(structure: Structure, counts: np.ndarray | None = None) -> float:
    """Mass density in g/cm^3 from standard atomic weights and the cell volume
    (``counts``: the structure's atoms per species code, if known)."""
    weights = np.array([standard_atomic_weight(s) for s in structure.symbols])
    counts = structure.counts() if counts is None else counts
    return float(counts @ weights) / (
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
                        source: str, per_species: np.ndarray) -> dict:
    present = np.flatnonzero(per_species)
    return {
        "cutoff": cutoff,
        "cutoff_source": source,
        "histogram": histogram(counts),
        "by_species": {structure.symbols[code]: histogram(counts[structure.species == code])
                       for code in present},
    }


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
                                   workers=workers, source=source,
                                   partial_occupancy=read.partial_occupancy)
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
