"""The checks of :mod:`cellbuild.inspection` (min_distance, physical_spacing,
site_occupancy, potential_cutoff, expected_lattice) and the median nearest
neighbour that physical_spacing judges. Lengths in Angstrom.
"""
from __future__ import annotations

import numpy as np

from . import neighbours, spacing as physical
from .checks_common import Check
from .lattice_match import LatticeMatch
from .pair_shells import PairDistribution
from .prototype_match import prototype_text
from .structure import Structure

#: Atoms whose nearest neighbour is measured for the typical spacing (seeded sample).
SPACING_SAMPLE = 2000


def typical_spacing(structure: Structure, distribution: PairDistribution,
                     workers: int, near: neighbours.Neighbourhood | None = None
                     ) -> tuple[float | None, int, int]:
    """(median nearest-neighbour distance over a seeded sample of atoms, atom, its
    neighbour) for the median atom; (None, -1, -1) when no sampled atom has a
    neighbour within the distribution's reach. ``near``: the structure's
    Neighbourhood (its cell list at the distribution's reach)."""
    n = structure.n_atoms
    sample = np.arange(n) if n <= SPACING_SAMPLE else np.sort(
        np.random.default_rng(0).choice(n, size=SPACING_SAMPLE, replace=False))
    d, partner = neighbours.nearest_neighbours(structure.cell, structure.positions,
                                               distribution.r_max, centres=sample,
                                               workers=workers, near=near)
    found = np.flatnonzero(np.isfinite(d))
    if found.size * 2 < sample.size:
        return None, -1, -1
    # the median of all sampled atoms, counting those without a neighbour as farthest
    k = found[np.argsort(d[found], kind="stable")][min(found.size - 1, sample.size // 2)]
    return float(d[k]), int(sample[k]), int(partner[k])


def physical_spacing_check(structure: Structure, closest: tuple[float, int, int],
                            typical: tuple[float | None, int, int]) -> Check:
    """Closest pair not closer, and the median nearest neighbour not farther, than
    any solid allows for their elements (:func:`cellbuild.spacing.judge`)."""
    symbols = structure.symbols
    species = structure.species

    def pair(i: int, j: int) -> tuple[str, str]:
        return symbols[species[i]], symbols[species[j]]

    d_min, i, j = closest
    near = physical.judge(d_min, *pair(i, j))
    detail = f"closest pair {d_min:.4f} A ({'-'.join(pair(i, j))})"
    median, a, b = typical
    if median is None:
        return Check("physical_spacing", False,
                     detail + "; most atoms have no neighbour within the reach of the pair "
                     "distribution (2.7 mean spacings): farther apart than any solid allows")
    far = physical.judge(median, *pair(a, b))
    detail += f", median nearest neighbour {median:.4f} A ({'-'.join(pair(a, b))})"
    if median > far.upper:
        return Check("physical_spacing", False,
                     f"the median nearest neighbour ({'-'.join(pair(a, b))}) " + far.describe())
    if d_min < near.lower:
        typical_close = median < far.lower
        text = near.describe() if typical_close else (
            f"the closest pair ({'-'.join(pair(i, j))}, atoms {i} and {j}) is {d_min:.4g} A "
            f"apart, closer than any solid allows ({near.lower:.3g} to {near.upper:.3g} A)")
        return Check("physical_spacing", False, text)
    return Check("physical_spacing", True,
                 detail + f"; within {physical.LOW} to {physical.HIGH} x the sum of covalent "
                 f"radii ({physical.SOURCE})")


def site_occupancy_check(partial: list[dict]) -> Check:
    if not partial:
        return Check("site_occupancy", True, "every atom site is fully occupied by one species")
    shown = "; ".join(f"{p['label']} {p['symbol']} occupancy {p['occupancy']:g} (line {p['line']})"
                      for p in partial[:3])
    return Check("site_occupancy", False,
                 f"{len(partial)} atom-site row(s) with occupancy below 1 ({shown}): the file "
                 "describes a disordered crystal, while the structure inspected holds one "
                 "species per site as the CIF reader resolved it")


def min_distance_check(cd, ci, cj, pd, threshold: float, source: str) -> Check:
    n_close = int((pd < threshold).sum())
    return Check("min_distance", n_close == 0,
                 f"closest pair {float(cd[0]):.4f} A (atoms {int(ci[0])} and {int(cj[0])}); "
                 f"{n_close} pair(s) closer than {threshold:.4f} A ({source})")


def potential_cutoff_check(cell: np.ndarray, r: float) -> Check:
    widths = neighbours.perpendicular_widths(cell)
    narrowest = int(np.argmin(widths))
    ok = bool(widths.min() >= 2.0 * r)
    shown = ", ".join(f"{w:.4f}" for w in widths)
    return Check("potential_cutoff", ok,
                 f"perpendicular box widths {shown} A; the minimum-image convention with "
                 f"cutoff {r:g} A needs every width >= 2R = {2.0 * r:g} A "
                 f"(narrowest: along cell vector {'abc'[narrowest]}, {widths[narrowest]:.4f} A)")


def expected_lattice_check(match: LatticeMatch | None, info: dict, expect: str,
                            prototype: dict | None = None) -> Check:
    """Passes when ``expect`` names the compound prototype found or the species-blind
    lattice of the sites (rock salt passes ``rocksalt`` and ``sc``)."""
    if prototype is not None:
        names = (prototype["name"], prototype["pattern"])
        return Check("expected_lattice", expect in names,
                     f"matches {prototype_text(prototype)}; expected {expect}")
    if match is None:
        return Check("expected_lattice", False,
                     f"matches no known lattice ({info.get('reason', '')}); expected {expect}")
    return Check("expected_lattice", match.name == expect,
                 f"matches {match.name} (a = {match.lattice_constant:.4f} A, coordination "
                 f"{match.coordination}); expected {expect}")
