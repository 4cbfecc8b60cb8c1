"""Which lattice a structure's atoms sit on, and the point defects against it
(steps 4-5 of :mod:`cellbuild.inspection`).

**Patterns.** Every candidate lattice is a list of neighbour shells (distance
in units of the nearest-neighbour distance d, neighbours per atom), derived
here from its lattice vectors and basis: sc, bcc, fcc and diamond from the
table of :mod:`cellbuild.lattices`, and ideal hcp (c/a = sqrt(8/3)) from the
hexagonal cell. The first shell count, the second-to-first distance ratio and
the site density of fcc and ideal hcp are the same (12, sqrt 2, sqrt 2 / d^3);
they part from the third shell on (fcc: 24 at sqrt 3 d; hcp: 2 at sqrt(8/3) d,
then 18 at sqrt 3 d).

**Matching.** d is the mean of the first-shell pair distances near their
median (corrected for thermal lengthening), so that a few interstitials do
not move it. For each pattern the cumulative neighbours per atom are read off the pair distribution
at the *probes*: the midpoints of the gaps between consecutive ideal shells,
out to the reach of the distribution. Measured over ideal counts at each probe
gives a ratio; vacancies lower all of them alike (the median ratio is the
fill), so the misfit is the largest departure of a ratio from the fill. The
pattern with the smallest misfit wins if it is below ``PROBE_TOLERANCE`` and
the implied lattice constant gives about one site per atom. The probes reach
far enough that every two patterns differ by more than twice the tolerance
(``tests/test_inspect_lattices.py`` holds them to that).

**Defects.** Atoms with fewer neighbours than the ideal coordination are
vacancy-like. Atoms with more, or closer than ``CROWDED_FRACTION`` d to
another, are crowded. Among crowded atoms, the *interstitial-like* ones are
those not on a lattice site: an interstitial adds one neighbour to each atom
around it and has many extra neighbours itself, so atoms are taken greedily
by most extra neighbours (in rounds, each atom that outranks every crowded
neighbour), and each one taken removes one extra neighbour from each atom
around it, until no extra neighbour is left unexplained.

Lengths in Angstrom.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from itertools import product
from types import MappingProxyType

import numpy as np

from .lattices import LATTICES, shells as lattice_shells

#: c/a of hcp with touching spheres (common practice: sqrt(8/3) = 1.633).
HCP_IDEAL_C_OVER_A = math.sqrt(8.0 / 3.0)
#: Every lattice name the matcher knows (hcp has no recipe lattice yet).
PATTERN_NAMES = tuple(LATTICES) + ("hcp",)
#: Largest relative misfit of the cumulative neighbour counts at the probes.
PROBE_TOLERANCE = 0.045
#: Probes sit only in gaps between ideal shells at least this wide (units of
#: d): narrower gaps fill with the tails of displaced atoms' shells.
MIN_PROBE_GAP = 0.06
#: Probes stay below this fraction of the distribution's reach.
PROBE_REACH = 0.97
#: The fill (measured over ideal neighbours) must lie in this range.
FILL_RANGE = (0.8, 1.2)
#: Atoms per site implied by the lattice constant and the volume must lie
#: within this fraction of 1 (allows a few per cent vacancies or interstitials).
SITE_FILL_TOLERANCE = 0.10
#: Closer than this fraction of the nearest-neighbour distance: crowded.
CROWDED_FRACTION = 0.85
#: Atom indices listed in the result (all are counted).
ATOMS_LISTED = 20
#: Rounds of the interstitial search; each takes every atom that outranks its
#: crowded neighbours, so a handful of rounds settle realistic clusters.
INTERSTITIAL_ROUNDS = 64
#: Shells are derived out to this many d (beyond every probe).
_PATTERN_REACH = 3.5
#: Median absolute deviation to standard deviation of a normal distribution.
_MAD_TO_SIGMA = 1.4826
#: First-shell distances within this many (robust) standard deviations of the
#: median make the nearest-neighbour distance.
_CORE_SIGMAS = 3.5


@dataclass(frozen=True)
class Pattern:
    """Neighbour shells of a lattice in units of its nearest-neighbour distance d.

    Attributes:
        name: ``sc``, ``bcc``, ``fcc``, ``diamond`` or ``hcp``.
        distances: shell radii / d, ascending (the first is 1).
        counts: neighbours per atom in each shell.
        sites_per_d3: lattice sites per d^3.
        a_per_d: lattice constant a over d (hcp: a = d).
    """

    name: str
    distances: tuple[float, ...]
    counts: tuple[int, ...]
    sites_per_d3: float
    a_per_d: float

    @property
    def coordination(self) -> int:
        return self.counts[0]

    def probes(self, reach: float) -> tuple[np.ndarray, np.ndarray]:
        """(probe radii / d, ideal neighbours per atom closer than each) below ``reach`` / d."""
        r = np.array(self.distances)
        cumulative = np.cumsum(self.counts)
        middle = 0.5 * (r[1:] + r[:-1])
        keep = (np.diff(r) >= MIN_PROBE_GAP) & (middle < PROBE_REACH * reach)
        return middle[keep], cumulative[:-1][keep].astype(np.float64)


def _shells_of(cell: np.ndarray, basis: np.ndarray) -> tuple[tuple[float, ...], tuple[int, ...]]:
    """Shells seen from basis atom 0: (radii / d, counts) out to _PATTERN_REACH d.

    ``cell`` rows are lattice vectors, ``basis`` fractional; every basis atom of
    the lattices here sees the same shells.
    """
    span = range(-6, 7)
    shifts = np.array(list(product(span, span, span)), dtype=np.float64)
    points = (basis[None, :, :] + shifts[:, None, :]).reshape(-1, 3) @ cell
    d = np.linalg.norm(points - basis[0] @ cell, axis=1)
    d = np.sort(d[d > 1e-9])
    d = d[d < _PATTERN_REACH * d[0]] / d[0]
    radii, counts = np.unique(np.round(d, 9), return_counts=True)
    return tuple(radii.tolist()), tuple(int(c) for c in counts)


@lru_cache(maxsize=1)
def patterns() -> MappingProxyType[str, Pattern]:
    """The candidate lattices, derived from their lattice vectors and bases (once
    per process: the tables are fixed; read-only)."""
    found = {}
    for name, lattice in LATTICES.items():
        distances, counts = _shells_of(np.eye(3), lattice.basis_array())
        nearest = lattice_shells(name).nearest  # d / a
        found[name] = Pattern(name, distances, counts, lattice.n_basis * nearest ** 3,
                              1.0 / nearest)
    hexagonal = np.array([[1.0, 0.0, 0.0], [-0.5, math.sqrt(3.0) / 2.0, 0.0],
                          [0.0, 0.0, HCP_IDEAL_C_OVER_A]])
    distances, counts = _shells_of(hexagonal, np.array([[0.0, 0.0, 0.0],
                                                        [1.0 / 3.0, 2.0 / 3.0, 0.5]]))
    found["hcp"] = Pattern("hcp", distances, counts, 2.0 / abs(np.linalg.det(hexagonal)), 1.0)
    return MappingProxyType(found)


@dataclass(frozen=True)
class FirstShell:
    """The robust nearest-neighbour distance (Angstrom): the mean of the first-shell
    pair distances within 3.5 sigma of their median (sigma from the median
    absolute deviation) less the thermal lengthening sigma^2 / d; ``sigma`` is
    the spread of those distances."""

    distance: float
    sigma: float


def first_shell(distances: np.ndarray, shells: list[dict],
                boundaries: list[float]) -> FirstShell | None:
    """The first shell of ``shells`` (pair ``distances`` ascending), or None."""
    if not shells or not boundaries:
        return None
    low = max(0.0, 2.0 * shells[0]["distance"] - boundaries[0])
    members = distances[np.searchsorted(distances, low):np.searchsorted(distances, boundaries[0])]
    if members.size == 0:
        return None
    median = float(np.median(members))
    sigma = _MAD_TO_SIGMA * float(np.median(np.abs(members - median)))
    # the mean of the members near the median: as robust as the median to a few
    # interstitials' distances, with the smaller sampling error of a mean
    core = members[np.abs(members - median) <= max(_CORE_SIGMAS * sigma, 1e-9 * median)]
    mean, spread = float(core.mean()), float(core.std())
    # displacements across a bond also lengthen it, by about sigma^2 / d
    return FirstShell(mean - spread ** 2 / mean, spread)


@dataclass(frozen=True)
class LatticeMatch:
    """The lattice a structure matches, with its implied lattice constant (A)."""

    name: str
    lattice_constant: float
    nearest: float        # ideal nearest-neighbour distance, Angstrom
    coordination: int     # ideal first-shell coordination
    sites: float          # lattice sites the volume holds at this lattice constant


def misfit(distribution, d: float, pattern: Pattern) -> tuple[float, float, int]:
    """(misfit, fill, probes) of the measured distribution against ``pattern`` at
    nearest-neighbour distance ``d`` (A); misfit is inf with no probe."""
    radii, ideal = pattern.probes(distribution.r_max / d)
    if radii.size == 0:
        return math.inf, 0.0, 0
    measured = np.searchsorted(distribution.distances, radii * d) * distribution.weight
    ratios = measured / ideal
    fill = float(np.median(ratios))
    if fill <= 0.0:
        return math.inf, fill, int(radii.size)
    return float(np.max(np.abs(ratios / fill - 1.0))), fill, int(radii.size)


def match_lattice(counts: np.ndarray, shells: list[dict], first: FirstShell | None,
                  distribution, volume: float,
                  n_atoms: int) -> tuple[LatticeMatch | None, dict]:
    """The lattice whose neighbour counts at the probes and site density fit.

    Returns the match (or None) and the numbers it was judged on, with a
    sentence saying why when nothing matched.
    """
    if len(shells) < 2 or counts.size == 0 or first is None:
        return None, {"reason": "fewer than two neighbour shells were found"}
    z = int(np.bincount(counts, minlength=1).argmax())
    d = first.distance
    info = {"coordination": z, "shell_ratio": shells[1]["distance"] / shells[0]["distance"],
            "nearest_distance": d}
    scores = {name: misfit(distribution, d, p) for name, p in patterns().items()}
    info["shell_misfit"] = {name: round(s[0], 4) for name, s in scores.items()}
    name = min(scores, key=lambda k: scores[k][0])
    score, fill, n_probes = scores[name]
    pattern = patterns()[name]
    shown = ", ".join(f"{k} {v[0]:.3f}" for k, v in scores.items())
    if score > PROBE_TOLERANCE or not FILL_RANGE[0] <= fill <= FILL_RANGE[1]:
        info["reason"] = (f"the neighbour counts out to {distribution.r_max:.2f} A fit no "
                          f"lattice within {PROBE_TOLERANCE:.0%} (misfit: {shown}; best "
                          f"{name} with {fill:.2f} of its neighbours)")
        return None, info
    a = pattern.a_per_d * d
    sites = volume * pattern.sites_per_d3 / d ** 3
    info.update(lattice_constant=a, sites=sites, site_fill=n_atoms / sites, probes=n_probes)
    if name == "hcp":
        info["c_ideal"] = HCP_IDEAL_C_OVER_A * a
    if abs(n_atoms / sites - 1.0) > SITE_FILL_TOLERANCE:
        info["reason"] = (f"the neighbour counts fit {name}, but its lattice constant "
                          f"{a:.4f} A gives {sites:.1f} sites for {n_atoms} atoms")
        return None, info
    return LatticeMatch(name, a, d, pattern.coordination, sites), info


def site_count_reliable(match: LatticeMatch, first: FirstShell, n_atoms: int) -> bool:
    """Whether sites = V / (a^3 / n_basis) is good to half a site: its relative error
    is 3x that of a, taken as no better than the displacement correction (sigma/d)^2.
    Never for hcp, whose c/a is free (the volume then does not count its sites)."""
    relative = (first.sigma / first.distance) ** 2
    return match.name != "hcp" and 3.0 * relative * n_atoms < 0.5


def infer_defects(counts: np.ndarray, match: LatticeMatch, pair_i: np.ndarray,
                  pair_j: np.ndarray, pair_d: np.ndarray,
                  neighbour_pairs: tuple[np.ndarray, np.ndarray, np.ndarray] | None) -> dict:
    """Vacancy-like, crowded and interstitial-like atoms against ``match``.

    Each vacancy takes one neighbour from each of the z atoms around it, so the
    missing neighbours divided by z estimate the vacancies; the volume and
    lattice constant give a second estimate (sites minus atoms).
    ``neighbour_pairs`` are (i, j, distance) with j within the cutoff of a
    crowded atom i (None: too many to list, and interstitial-like atoms are
    not counted).
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
    off_site = None if neighbour_pairs is None else interstitial_like(
        counts, z, crowded_r, pair_i[close], pair_j[close], *neighbour_pairs)
    return {
        "ideal_coordination": z,
        "vacancy_like": int(low.sum()),
        "missing_neighbours": missing,
        "estimated_vacancies": round(missing / z, 3),
        "expected_sites": expected_sites,
        "estimated_vacancies_from_sites": expected_sites - len(counts),
        "crowded": int(crowded.sum()),
        "crowded_distance": crowded_r,
        "interstitial_like": None if off_site is None else int(off_site.sum()),
        "vacancy_like_atoms": np.flatnonzero(low)[:ATOMS_LISTED].tolist(),
        "crowded_atoms": np.flatnonzero(crowded)[:ATOMS_LISTED].tolist(),
        "interstitial_like_atoms": (None if off_site is None
                                    else np.flatnonzero(off_site)[:ATOMS_LISTED].tolist()),
    }


def interstitial_like(counts: np.ndarray, z: int, crowded_r: float, close_i: np.ndarray,
                      close_j: np.ndarray, pair_i: np.ndarray, pair_j: np.ndarray,
                      pair_d: np.ndarray) -> np.ndarray:
    """(N,) bool: atoms whose extra neighbours the others' do not explain.

    An atom's extra neighbours are those beyond ``z`` within the cutoff plus its
    contacts closer than ``crowded_r`` A (``close_i``/``close_j``, each pair
    once). ``pair_i``/``pair_j``/``pair_d``: j within the cutoff of i, for every
    atom i with extra neighbours. Taking an atom removes one extra neighbour
    from each atom around it, and a second one from each it touched closer
    than ``crowded_r``. Ties go to the lower index.
    """
    n = len(counts)
    extra = np.maximum(counts.astype(np.int64) - z, 0)
    extra += np.bincount(close_i, minlength=n) + np.bincount(close_j, minlength=n)
    distinct = pair_i != pair_j  # an atom and its own image say nothing here
    pair_i, pair_j = pair_i[distinct], pair_j[distinct]
    weight = 1 + (pair_d[distinct] < crowded_r)
    taken = np.zeros(n, dtype=bool)
    key = np.empty(n, dtype=np.int64)
    for _ in range(INTERSTITIAL_ROUNDS):
        left = extra > 0
        if not left.any():
            break
        key[np.lexsort((-np.arange(n), extra))] = np.arange(n)
        pick = left.copy()
        beaten = left[pair_i] & left[pair_j] & (key[pair_j] > key[pair_i])
        pick[pair_i[beaten]] = False
        taken |= pick
        extra[pick] = 0
        gone = pick[pair_i]
        extra -= np.bincount(pair_j[gone], weights=weight[gone], minlength=n).astype(np.int64)
        np.maximum(extra, 0, out=extra)
    return taken


def defects_note(shells: list[dict], defects: dict, match: LatticeMatch) -> str | None:
    """Why the defect counts may be rough, or None."""
    notes = []
    if _shells_overlap(shells):
        notes.append("the first two shells overlap (displaced atoms): counts at the cutoff, and "
                     "the vacancy-like and crowded atoms inferred from them, include thermal noise")
    if defects["estimated_vacancies_from_sites"] is None:
        notes.append("hcp's c/a is free, so the volume does not count its sites"
                     if match.name == "hcp" else
                     "atoms are too displaced from ideal sites for the lattice constant to "
                     "count the sites of this many atoms to one site")
    if defects.get("interstitial_like") is None:
        notes.append("too many crowded atoms to tell interstitials apart")
    return "; ".join(notes) or None


def _shells_overlap(shells: list[dict]) -> bool:
    """True when the first two shells come within 3 standard deviations each of each
    other, so that some pairs may fall on the wrong side of the cutoff."""
    first, second = shells[0], shells[1]
    return second["distance"] - first["distance"] < 3.0 * (first["spread"] + second["spread"])
