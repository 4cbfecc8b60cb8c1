"""Cubic lattices as data: basis, interstitial sites and expected space group.

Each lattice is one table entry. Everything else (neighbour shells, nearest-
neighbour distance, coordination, packing, touching-sphere radius) is derived
from the basis by geometry in :func:`shells`, so adding a lattice is adding an
entry here and a test with an outside check value.

All fractional coordinates refer to the conventional cubic cell of side ``a``.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
import math
from itertools import permutations, product


@dataclass(frozen=True)
class Lattice:
    """A cubic lattice.

    Attributes:
        name: recipe key (``sc``, ``bcc``, ``fcc``, ``diamond``).
        title: human name.
        basis: fractional coordinates of the atoms of the conventional cell.
        interstitials: site kind -> fractional coordinates of those sites in
            the conventional cell.
        space_group: (Hermann-Mauguin symbol, International Tables number) that
            the perfect crystal is expected to have; the audit compares it with
            what spglib finds from coordinates.
    """

    name: str
    title: str
    basis: tuple[tuple[float, float, float], ...]
    interstitials: dict[str, tuple[tuple[float, float, float], ...]]
    space_group: tuple[str, int]
    sublattices: tuple[str, ...] | None = None
    cell: tuple[tuple[float, float, float], ...] = ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0),
                                                    (0.0, 0.0, 1.0))

    def __post_init__(self) -> None:
        if self.sublattices is None:  # one species: every basis site on sublattice A
            object.__setattr__(self, "sublattices", ("A",) * len(self.basis))
        if len(self.sublattices) != len(self.basis):
            raise ValueError(f"{self.name}: one sublattice label per basis site")

    @property
    def n_basis(self) -> int:
        return len(self.basis)

    def cartesian(self, frac) -> tuple[float, float, float]:
        """Fractional coordinates to Cartesian, in units of ``a`` (pure Python)."""
        return tuple(sum(frac[k] * self.cell[k][j] for k in range(3)) for j in range(3))

    def basis_array(self):
        """The basis as a (n_basis, 3) float64 array."""
        import numpy as np  # lazily: `cellbuild plan` works without numpy's start-up cost

        return np.array(self.basis, dtype=np.float64)


def _unique_sites(points) -> tuple[tuple[float, float, float], ...]:
    """Sorted unique fractional sites wrapped into [0, 1)."""
    wrapped = {tuple(float(c % 1.0) for c in p) for p in points}
    return tuple(sorted(wrapped))


_FCC_BASIS = ((0.0, 0.0, 0.0), (0.0, 0.5, 0.5), (0.5, 0.0, 0.5), (0.5, 0.5, 0.0))
_CUBE_CENTRE_AND_EDGES = ((0.5, 0.5, 0.5), (0.5, 0.0, 0.0), (0.0, 0.5, 0.0), (0.0, 0.0, 0.5))

LATTICES: dict[str, Lattice] = {
    lat.name: lat
    for lat in (
        Lattice(
            name="sc",
            title="simple cubic",
            basis=((0.0, 0.0, 0.0),),
            interstitials={"cube-centre": ((0.5, 0.5, 0.5),)},
            space_group=("Pm-3m", 221),
        ),
        Lattice(
            name="bcc",
            title="body-centred cubic",
            basis=((0.0, 0.0, 0.0), (0.5, 0.5, 0.5)),
            interstitials={
                # face centres and edge centres
                "octahedral": _unique_sites(
                    set(permutations((0.5, 0.5, 0.0))) | set(permutations((0.5, 0.0, 0.0)))
                ),
                # one coordinate 0, one 1/2, one 1/4 or 3/4
                "tetrahedral": _unique_sites(
                    p for q in (0.25, 0.75) for p in permutations((0.0, 0.5, q))
                ),
            },
            space_group=("Im-3m", 229),
        ),
        Lattice(
            name="fcc",
            title="face-centred cubic",
            basis=_FCC_BASIS,
            interstitials={
                "octahedral": _CUBE_CENTRE_AND_EDGES,
                "tetrahedral": _unique_sites(product((0.25, 0.75), repeat=3)),
            },
            space_group=("Fm-3m", 225),
        ),
        Lattice(
            name="diamond",
            title="diamond cubic",
            basis=_FCC_BASIS + tuple(
                (x + 0.25, y + 0.25, z + 0.25) for x, y, z in _FCC_BASIS
            ),
            # the empty tetrahedra of the structure: cube centre and edge centres
            interstitials={"tetrahedral": _CUBE_CENTRE_AND_EDGES},
            space_group=("Fd-3m", 227),
        ),
    )
}


@dataclass(frozen=True)
class Shells:
    """Neighbour shells of a lattice, distances in units of the lattice constant.

    Attributes:
        distances: shell radii, ascending (units of ``a``).
        counts: neighbours in each shell, per atom.
    """

    distances: tuple[float, ...]
    counts: tuple[int, ...]

    @property
    def nearest(self) -> float:
        return self.distances[0]

    @property
    def coordination(self) -> int:
        return self.counts[0]

    @property
    def audit_cutoff(self) -> float:
        """Midway between the first and second shells (units of ``a``)."""
        return 0.5 * (self.distances[0] + self.distances[1])


@lru_cache(maxsize=None)
def shells(name: str, n_shells: int = 4) -> Shells:
    """Neighbour shells of lattice ``name`` from the basis geometry.

    Distances from each basis atom to all atoms of the surrounding 5x5x5
    conventional cells; every basis atom of these lattices sees the same shells,
    which is verified here rather than assumed.
    """
    lat = LATTICES[name]
    # distances through the cell metric, so non-cubic cells measure right
    images = [lat.cartesian((i + x, j + y, k + z))
              for i, j, k in product(range(-2, 3), repeat=3) for x, y, z in lat.basis]
    per_atom = []
    for origin in (lat.cartesian(b) for b in lat.basis):
        d = sorted(r for r in (math.dist(origin, p) for p in images) if r > 1e-9)
        # group equal distances (to 1e-9 a), keep the exact value of each group
        radii: list[float] = []
        counts: list[int] = []
        for r in d:
            if radii and r - radii[-1] <= 1e-9:
                counts[-1] += 1
            else:
                radii.append(r)
                counts.append(1)
        per_atom.append((tuple(radii[:n_shells]), tuple(counts[:n_shells])))
    ref_r, ref_c = per_atom[0]
    if any(c != ref_c or not all(math.isclose(u, v, abs_tol=1e-9) for u, v in zip(r, ref_r))
           for r, c in per_atom):
        raise AssertionError(f"basis atoms of {name} see different shells")
    return Shells(*per_atom[0])


def touching_radius_factor(name: str) -> float:
    """Radius of touching spheres in units of ``a``: half the nearest-neighbour distance."""
    return 0.5 * shells(name).nearest


def packing_fraction(name: str) -> float:
    """Fraction of the cell volume filled by touching spheres on the basis sites."""
    r = touching_radius_factor(name)
    lat = LATTICES[name]
    return lat.n_basis * (4.0 / 3.0) * math.pi * r**3 / abs(_det3(lat.cell))


def _det3(m) -> float:
    """Determinant of a 3x3 matrix given as nested tuples (pure Python)."""
    return (m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
            - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
            + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0]))


def site_table(name: str):
    """The grid of every site a structure of this lattice can occupy.

    Returns:
        fractional coordinates (n_sites_per_cell, 3) of the lattice basis followed
        by each interstitial kind in table order; the kind of each site
        (``"lattice"`` or the interstitial kind); and the start offset of each
        kind in that order (lattice first).
    """
    import numpy as np

    lat = LATTICES[name]
    parts = [lat.basis_array()]
    kinds = ["lattice"] * lat.n_basis
    for kind, sites in lat.interstitials.items():
        parts.append(np.array(sites, dtype=np.float64))
        kinds += [kind] * len(sites)
    frac = np.concatenate(parts)
    return frac, tuple(kinds), np.array([0] + [len(p) for p in parts]).cumsum()[:-1]
