"""Compound prototypes as data: sublattices, their sites and the expected space group.

Each prototype is one table entry: the conventional cell (units of ``a``), and
for each named sublattice its sites in fractional coordinates of that cell.
Everything else (the basis, the sublattice of each basis site, nearest
distances and first-shell coordination per sublattice pair) is derived from
these sites by geometry in :func:`basis` and :func:`first_shells`, through the
cell metric, so non-cubic cells measure right.

Positions are the standard settings of the International Tables for
Crystallography, Vol. A (spinel and C15 in origin choice 2, centre at -3m).
Recipes name every entry (:mod:`cellbuild.recipe_lattices`); hcp takes ``c``
or ``c_over_a`` for its cell, spinel ``u`` for its oxygen sites. The table is held against spglib, textbook coordination, ASE's
``bulk`` and handbook densities in ``tests/test_prototypes.py``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from itertools import product
from typing import Callable

import numpy as np

Site = tuple[float, float, float]

#: Relative width within which neighbour distances count as one shell: spinel's
#: oxygen sees its one A and three B cations at distances 0.5 % apart for the
#: default ``u``; the closest distinct shells of the table (fluorite's anion sees
#: 4 cations at 0.433 a and 6 anions at 0.5 a) are 15 % apart.
SHELL_TOLERANCE = 0.05

_FCC = ((0.0, 0.0, 0.0), (0.0, 0.5, 0.5), (0.5, 0.0, 0.5), (0.5, 0.5, 0.0))
_CUBIC = ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0), (0.0, 0.0, 1.0))


def _wrap(points) -> tuple[Site, ...]:
    """Sorted unique sites wrapped into [0, 1), rounded to 1e-12 so that
    symmetry copies of one site compare equal."""
    return tuple(sorted({tuple(round(c % 1.0, 12) % 1.0 for c in p) for p in points}))


def _fcc_plus(*offsets: Site) -> tuple[Site, ...]:
    """Every offset plus the four face-centring translations."""
    return _wrap((x + t[0], y + t[1], z + t[2]) for x, y, z in offsets for t in _FCC)


def _spinel_oxygen(u: float) -> tuple[Site, ...]:
    """Spinel's 32e sites (origin choice 2) for oxygen parameter ``u``."""
    return _fcc_plus((u, u, u), (u - 0.25, u - 0.25, -u), (u - 0.25, -u, u - 0.25),
                     (-u, u - 0.25, u - 0.25), (-u, -u, -u), (u, 0.75 - u, 0.75 - u),
                     (0.75 - u, u, 0.75 - u), (0.75 - u, 0.75 - u, u))


@dataclass(frozen=True)
class Prototype:
    """A crystal prototype with named sublattices.

    Attributes:
        name: table key (``rocksalt``, ...).
        title: human name, with the Strukturbericht symbol where there is one.
        sublattices: label -> fractional sites of that sublattice in the cell
            (a function taking every internal parameter as a keyword, for spinel).
        space_group: (Hermann-Mauguin symbol, International Tables number).
        example: a real compound, sublattice label -> element.
        cell: conventional cell, rows in units of ``a``.
        parameters: internal parameters and their defaults (spinel ``u``).
        example_a: room-temperature lattice constant of ``example`` (Angstrom,
            from memory), for the starter recipe.
        interstitials: site kind -> fractional sites of that kind in the cell
            (empty in the perfect crystal).
        cell_of: the cell as a function of the internal parameters, when they
            change it (hcp's ``c_over_a``); ``cell`` is then the default's.
        example_parameters: internal parameters of ``example`` for the starter
            recipe (from memory), where they differ from the defaults.
        example_charges: formal oxidation states of an ionic ``example`` (common
            practice), for the starter recipe's commented ``charges``.
    """

    name: str
    title: str
    sublattices: dict
    space_group: tuple[str, int]
    example: dict[str, str]
    cell: tuple[Site, Site, Site] = _CUBIC
    parameters: dict[str, float] = field(default_factory=dict)
    example_a: float | None = None
    interstitials: dict[str, tuple[Site, ...]] = field(default_factory=dict)
    cell_of: Callable[..., tuple[Site, Site, Site]] | None = None
    example_parameters: dict[str, float] = field(default_factory=dict)
    example_charges: dict[str, int] = field(default_factory=dict)

    @property
    def n_sublattices(self) -> int:
        return len(self.sublattices)

    def cell_rows(self, **params: float) -> tuple[Site, Site, Site]:
        """The conventional cell (rows, units of ``a``) for these internal parameters."""
        if self.cell_of is None:
            return self.cell
        return self.cell_of(**{**self.parameters, **params})

    def sites(self, **params: float) -> dict[str, tuple[Site, ...]]:
        """Sublattice label -> sites, internal parameters filled in from defaults."""
        values = {**self.parameters, **params}
        unknown = set(values) - set(self.parameters)
        if unknown:
            raise KeyError(f"{self.name} has no parameter {sorted(unknown)[0]!r}")
        return {label: (make(**values) if callable(make) else make)
                for label, make in self.sublattices.items()}


def _hcp_cell(c_over_a: float) -> tuple[Site, Site, Site]:
    return ((1.0, 0.0, 0.0), (-0.5, math.sqrt(3.0) / 2.0, 0.0), (0.0, 0.0, c_over_a))


#: Ideal c/a of touching spheres, sqrt(8/3) (textbook geometry).
IDEAL_C_OVER_A = math.sqrt(8.0 / 3.0)

PROTOTYPES: dict[str, Prototype] = {p.name: p for p in (
    # interstitial sites (textbook geometry): rock salt's empty tetrahedra, each
    # between 4 A and 4 B at sqrt(3)/4 a; zinc blende's empty tetrahedra, 4 A
    # (tetrahedral-A) or 4 B (tetrahedral-B) at sqrt(3)/4 a with 6 of the other
    # sublattice at a/2; fluorite's empty cube centres (the octahedral site of
    # UO2), 8 X at sqrt(3)/4 a and 6 A at a/2
    Prototype("rocksalt", "rock salt (B1)",
              {"A": _FCC, "B": _fcc_plus((0.5, 0.0, 0.0))},
              ("Fm-3m", 225), {"A": "Mg", "B": "O"}, example_a=4.212,
              example_charges={"Mg": 2, "O": -2},
              interstitials={"tetrahedral": _wrap(product((0.25, 0.75), repeat=3))}),
    Prototype("cesium-chloride", "cesium chloride (B2)",
              {"A": ((0.0, 0.0, 0.0),), "B": ((0.5, 0.5, 0.5),)},
              ("Pm-3m", 221), {"A": "Cs", "B": "Cl"}, example_a=4.12,
              example_charges={"Cs": 1, "Cl": -1}),
    Prototype("zincblende", "zinc blende (B3)",
              {"A": _FCC, "B": _fcc_plus((0.25, 0.25, 0.25))},
              ("F-43m", 216), {"A": "Ga", "B": "As"}, example_a=5.653,
              interstitials={"tetrahedral-A": _fcc_plus((0.75, 0.75, 0.75)),
                             "tetrahedral-B": _fcc_plus((0.5, 0.5, 0.5))}),
    Prototype("fluorite", "fluorite (C1)",
              {"A": _FCC, "X": _wrap(product((0.25, 0.75), repeat=3))},
              ("Fm-3m", 225), {"A": "U", "X": "O"}, example_a=5.47,
              example_charges={"U": 4, "O": -2},
              interstitials={"octahedral": _fcc_plus((0.5, 0.5, 0.5))}),
    Prototype("perovskite", "cubic perovskite (E2_1)",
              {"A": ((0.0, 0.0, 0.0),), "B": ((0.5, 0.5, 0.5),),
               "X": ((0.5, 0.5, 0.0), (0.5, 0.0, 0.5), (0.0, 0.5, 0.5))},
              ("Pm-3m", 221), {"A": "Sr", "B": "Ti", "X": "O"}, example_a=3.905,
              example_charges={"Sr": 2, "Ti": 4, "O": -2}),
    Prototype("l1_2", "L1_2 (Cu3Au type)",
              {"A": ((0.0, 0.0, 0.0),), "B": ((0.5, 0.5, 0.0), (0.5, 0.0, 0.5), (0.0, 0.5, 0.5))},
              ("Pm-3m", 221), {"A": "Au", "B": "Cu"}, example_a=3.75),
    # A at 2a, B at 6c (chains along the cube edges)
    Prototype("a15", "A15 (Cr3Si type)",
              {"A": ((0.0, 0.0, 0.0), (0.5, 0.5, 0.5)),
               "B": ((0.25, 0.0, 0.5), (0.75, 0.0, 0.5), (0.5, 0.25, 0.0),
                     (0.5, 0.75, 0.0), (0.0, 0.5, 0.25), (0.0, 0.5, 0.75))},
              ("Pm-3n", 223), {"A": "Si", "B": "Cr"}, example_a=4.56),
    # A at 8a, B at 16d, origin choice 2
    Prototype("c15", "C15 Laves phase (MgCu2 type)",
              {"A": _fcc_plus((0.125, 0.125, 0.125), (0.875, 0.875, 0.875)),
               "B": _fcc_plus((0.5, 0.5, 0.5), (0.25, 0.25, 0.5), (0.25, 0.5, 0.25),
                              (0.5, 0.25, 0.25))},
              ("Fd-3m", 227), {"A": "Mg", "B": "Cu"}, example_a=7.05),
    # X2YZ: Y at 4a, Z at 4b, X at 8c
    Prototype("heusler", "full Heusler (L2_1, Cu2MnAl type)",
              {"X": _fcc_plus((0.25, 0.25, 0.25), (0.75, 0.75, 0.75)),
               "Y": _FCC, "Z": _fcc_plus((0.5, 0.5, 0.5))},
              ("Fm-3m", 225), {"X": "Cu", "Y": "Mn", "Z": "Al"}, example_a=5.95),
    # XYZ: Y at 4a, Z at 4b, X at 4c; 4d empty
    Prototype("half-heusler", "half Heusler (C1_b, MgAgAs type)",
              {"X": _fcc_plus((0.25, 0.25, 0.25)), "Y": _FCC, "Z": _fcc_plus((0.5, 0.5, 0.5))},
              ("F-43m", 216), {"X": "Ni", "Y": "Ti", "Z": "Sn"}, example_a=5.93),
    # AB2X4: A at 8a (tetrahedral), B at 16d (octahedral), X at 32e; origin choice 2.
    # u = 0.2624 for MgAl2O4 (from memory of published refinements; u = 1/4 is
    # ideal cubic close packing of X in this origin choice).
    Prototype("spinel", "spinel (H1_1, MgAl2O4 type)",
              {"A": _fcc_plus((0.125, 0.125, 0.125), (0.875, 0.875, 0.875)),
               "B": _fcc_plus((0.5, 0.5, 0.5), (0.25, 0.25, 0.5), (0.25, 0.5, 0.25),
                              (0.5, 0.25, 0.25)),
               "X": lambda u, **_: _spinel_oxygen(u)},
              ("Fd-3m", 227), {"A": "Mg", "B": "Al", "X": "O"}, parameters={"u": 0.2624},
              example_a=8.08, example_charges={"Mg": 2, "Al": 3, "O": -2}),
    # atoms at 2c (1/3, 2/3, 1/4); octahedral holes at 2a (0, 0, 0), tetrahedral
    # holes at 4f (1/3, 2/3, z) with z = 1/4 +- 3/8 and their inversions, the
    # positions of touching spheres (textbook geometry; kept for any c/a)
    Prototype("hcp", "hexagonal close-packed (A3)",
              {"A": ((1.0 / 3.0, 2.0 / 3.0, 0.25), (2.0 / 3.0, 1.0 / 3.0, 0.75))},
              ("P6_3/mmc", 194), {"A": "Ti"}, cell=_hcp_cell(IDEAL_C_OVER_A), example_a=2.95,
              parameters={"c_over_a": IDEAL_C_OVER_A},
              interstitials={"octahedral": ((0.0, 0.0, 0.0), (0.0, 0.0, 0.5)),
                             "tetrahedral": ((1.0 / 3.0, 2.0 / 3.0, 0.625),
                                             (1.0 / 3.0, 2.0 / 3.0, 0.875),
                                             (2.0 / 3.0, 1.0 / 3.0, 0.125),
                                             (2.0 / 3.0, 1.0 / 3.0, 0.375))},
              cell_of=lambda c_over_a, **_: _hcp_cell(c_over_a),
              example_parameters={"c_over_a": 1.588}),
)}


def basis(proto: Prototype, **params: float) -> tuple[np.ndarray, tuple[str, ...]]:
    """The (n, 3) fractional basis of ``proto`` and the sublattice label of each
    site, sublattices in table order."""
    groups = proto.sites(**params)
    frac = np.array([s for sites in groups.values() for s in sites], dtype=np.float64)
    labels = tuple(label for label, sites in groups.items() for _ in sites)
    return frac, labels


@dataclass(frozen=True)
class FirstShell:
    """The first neighbour shell of the sites of one sublattice.

    Attributes:
        distance: nearest distance, units of ``a``.
        counts: sublattice label -> neighbours of that sublattice in the shell.
        outer: the shell's widest distance (units of ``a``), within
            :data:`SHELL_TOLERANCE` of ``distance``.
        next_distance: the next distance beyond the shell (units of ``a``); an
            audit cutoff lies between ``outer`` and this.
    """

    distance: float
    counts: dict[str, int]
    outer: float
    next_distance: float

    @property
    def coordination(self) -> int:
        return sum(self.counts.values())


def first_shells(cell, frac: np.ndarray, labels: tuple[str, ...], *,
                 every_site: bool = True) -> dict[str, FirstShell]:
    """First shell of each sublattice: distances through the cell metric to every
    site of the surrounding 5x5x5 cells, equal within :data:`SHELL_TOLERANCE`.

    Every site of a sublattice must see the same shell (checked, not assumed);
    ``every_site=False`` measures the first site of each sublattice only (a
    CIF's labels are symmetry-equivalent sites by construction).
    """
    cell = np.asarray(cell, dtype=np.float64)
    images = np.array(list(product(range(-2, 3), repeat=3)), dtype=np.float64)
    grid = (images[:, None, :] + frac[None, :, :]).reshape(-1, 3)
    grid_labels = np.tile(np.array(labels), len(images))
    result: dict[str, FirstShell] = {}
    sites = range(len(labels)) if every_site else [labels.index(lb) for lb in dict.fromkeys(labels)]
    for s in sites:
        label = labels[s]
        d = np.linalg.norm((grid - frac[s]) @ cell, axis=1)
        keep = d > 1e-9
        d, near_labels = d[keep], grid_labels[keep]
        nearest = d.min()
        inside = d <= nearest * (1.0 + SHELL_TOLERANCE)
        names, counts = np.unique(near_labels[inside], return_counts=True)
        shell = FirstShell(float(nearest), dict(zip(names.tolist(), counts.tolist())),
                           float(d[inside].max()), float(d[~inside].min()))
        seen = result.setdefault(label, shell)
        if seen.counts != shell.counts or not math.isclose(seen.distance, shell.distance,
                                                           rel_tol=1e-9):
            raise ValueError(f"sites of sublattice {label} see different first shells")
    return result


def density(proto: Prototype, a: float, species: dict[str, str], **params: float) -> float:
    """Mass density (g/cm^3) of the ideal crystal with lattice constant ``a``
    (Angstrom) and ``species`` (sublattice label -> element); standard atomic
    weights of ``ase.data``."""
    from ase.data import atomic_masses, atomic_numbers

    _, labels = basis(proto, **params)
    mass = sum(float(atomic_masses[atomic_numbers[species[label]]]) for label in labels)
    volume = abs(float(np.linalg.det(np.asarray(proto.cell_rows(**params)) * a)))  # Angstrom^3
    avogadro = 6.02214076e23  # mol^-1, exact (SI 2019)
    return mass / avogadro / (volume * 1e-24)
