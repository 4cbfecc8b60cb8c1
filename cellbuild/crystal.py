"""The resolved crystal: a lattice-table entry turned into numbers, once.

:func:`resolve_crystal` takes a table entry (:mod:`cellbuild.lattices`), the
lattice constant and the element on each sublattice, and returns a frozen
:class:`Crystal` holding everything the later stages need: the conventional
cell in Angstrom, the basis, the grid of every site a structure can occupy
(basis first, then the interstitial kinds), the neighbour shells and the
audit's neighbour-offset table, all measured with the cell metric. The plan
carries it; building, defect placement and the audit never look a lattice up
by name again.
"""
from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from itertools import product

import numpy as np

from .lattices import LATTICES, Shells, shells
from .prototypes import PROTOTYPES, FirstShell, basis as prototype_basis, first_shells


@dataclass(frozen=True, eq=False)
class Crystal:
    """A crystal ready to build. Lengths in Angstrom.

    Attributes:
        prototype: the lattice-table key (``fcc``, ...).
        title: human name of the prototype.
        a: lattice constant.
        cell: (3, 3) conventional cell, lattice vectors as rows.
        basis: (n_basis, 3) fractional coordinates of the atoms of one cell.
        sublattice: sublattice label of each basis site.
        elements: element on each basis site (from the sublattice's species).
        site_frac: (n_grid, 3) fractional coordinates of every grid site of a
            cell: the basis, then each interstitial kind in table order.
        site_kind: ``"lattice"`` or the interstitial kind of each grid site.
        space_group: (symbol, International Tables number) of the ideal crystal.
        shells: neighbour shells of the lattice sites, distances in Angstrom.
            For a compound prototype: one shell, the closest distance of any
            sublattice pair and the coordination of the first sublattice at it.
        audit_cutoff: midway between the first two neighbour shells (for a
            compound: the largest of :attr:`site_cutoff`).
        offsets: audit neighbour table: entries ``(s, (di, dj, dk), t)`` where
            grid site ``t`` of the cell displaced by ``(di, dj, dk)`` lies within
            the cutoff of grid site ``s`` (:attr:`site_cutoff` for basis sites,
            :attr:`audit_cutoff` for interstitial sites).
        first_shells: sublattice label -> its first shell (distances in Angstrom),
            neighbours counted per sublattice.
        site_cutoff: audit cutoff of each basis site (Angstrom): midway between
            its sublattice's first shell and the next distance, so perovskite's
            B sees its 6 X at 0.5 a and A its 12 X at 0.707 a.
        parameters: internal parameters of a prototype as (name, value) pairs
            (hcp ``c_over_a``, spinel ``u``); empty for the cubic lattices.
        occupancy: for a crystal from a CIF, ``(label, ((element, occupancy),
            ...))`` per site label; :attr:`elements` holds each label's majority
            element, the rest is placed as defects (:mod:`cellbuild.defect_plan`).
        parent: for a crystal re-cut into an oriented box or a supercell matrix
            (:mod:`cellbuild.orientation`), the crystal in its conventional cell;
            None otherwise.
        unit_rows: with ``parent``, the rows of this cell in the parent's
            conventional fractions.
        surface: for a slab (:mod:`cellbuild.surfaces`), its facts per in-plane
            period (area, planes, spacings, polarity); None for bulk.
        boundary: for a bicrystal (:mod:`cellbuild.boundaries`), its facts per
            in-plane period (misorientation, Sigma, atoms removed); None otherwise.
    """

    prototype: str
    title: str
    a: float
    cell: np.ndarray
    basis: np.ndarray
    sublattice: tuple[str, ...]
    elements: tuple[str, ...]
    site_frac: np.ndarray
    site_kind: tuple[str, ...]
    space_group: tuple[str, int]
    shells: Shells
    audit_cutoff: float
    offsets: tuple[tuple[int, tuple[int, int, int], int], ...]
    first_shells: dict[str, FirstShell]
    site_cutoff: tuple[float, ...]
    parameters: tuple[tuple[str, float], ...] = ()
    occupancy: tuple[tuple[str, tuple[tuple[str, float], ...]], ...] = ()
    parent: "Crystal | None" = None
    unit_rows: tuple[tuple[float, float, float], ...] | None = None
    surface: dict | None = None
    boundary: dict | None = None

    @property
    def n_basis(self) -> int:
        return len(self.basis)

    @property
    def n_grid(self) -> int:
        return len(self.site_frac)

    @property
    def interstitial_kinds(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(k for k in self.site_kind if k != "lattice"))

    @property
    def grid_cutoff(self) -> np.ndarray:
        """Audit cutoff (Angstrom) of every grid site: :attr:`site_cutoff` on the
        basis, :attr:`audit_cutoff` on interstitial sites; (n_grid,) float64."""
        return _grid_cutoffs(self.n_grid, self.audit_cutoff, self.site_cutoff)

    @property
    def nearest(self) -> float:
        """Nearest-neighbour distance of the ideal crystal, Angstrom."""
        return self.shells.nearest

    @property
    def volume(self) -> float:
        """Conventional cell volume, Angstrom^3."""
        return float(abs(np.linalg.det(self.cell)))

    def supercell(self, repeat: tuple[int, int, int]) -> np.ndarray:
        """Lattice vectors (rows, Angstrom) of ``repeat`` conventional cells."""
        return self.cell * np.asarray(repeat, dtype=np.float64)[:, None]

    def to_cartesian(self, frac: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Cartesian positions (Angstrom) of points in conventional-cell fractions.

        A cubic cell takes the elementwise product (exactly what ``frac * a``
        gives, so outputs keep their bytes); any other cell a matrix product.
        """
        if _is_diagonal(self.cell):
            return np.multiply(frac, np.diag(self.cell), out=out)
        result = frac @ self.cell
        if out is None:
            return result
        out[...] = result
        return out

    def to_fractional(self, positions: np.ndarray) -> np.ndarray:
        """Conventional-cell fractions of Cartesian positions (Angstrom)."""
        if _is_diagonal(self.cell):
            return positions / np.diag(self.cell)
        return positions @ np.linalg.inv(self.cell)


def _grid_cutoffs(n_grid: int, cutoff: float, site_cutoff) -> np.ndarray:
    """Per grid site: ``site_cutoff`` on the basis, ``cutoff`` on interstitial sites."""
    out = np.full(n_grid, cutoff)
    out[:len(site_cutoff)] = site_cutoff
    return out


def _is_diagonal(m: np.ndarray) -> bool:
    return not np.any(m - np.diag(np.diag(m)))


def resolve_crystal(prototype: str, a: float, species: tuple[tuple[str, str], ...],
                    parameters: tuple[tuple[str, float], ...] = ()) -> Crystal:
    """The :class:`Crystal` of table entry ``prototype`` (a lattice of
    :mod:`cellbuild.lattices` or a compound of :mod:`cellbuild.prototypes`) with
    lattice constant ``a`` (Angstrom), ``species`` as (sublattice label, element)
    pairs and a prototype's internal ``parameters`` as (name, value) pairs
    (defaults for those left out).

    Cached: a library of many structures of one crystal resolves it once per process.
    """
    return _resolve(prototype, float(a), tuple(species),
                    tuple((k, float(x)) for k, x in parameters))


@lru_cache(maxsize=256)
def _resolve(prototype: str, a: float, species: tuple[tuple[str, str], ...],
             parameters: tuple[tuple[str, float], ...]) -> Crystal:
    if prototype in PROTOTYPES:
        return _resolve_compound(prototype, a, species, dict(parameters))
    lat = LATTICES[prototype]
    cell = np.array(lat.cell, dtype=np.float64) * a
    basis = lat.basis_array()
    geometry = shells(prototype)
    scaled = Shells(tuple(d * a for d in geometry.distances), geometry.counts)
    cutoff = geometry.audit_cutoff * a  # (d1 + d2) / 2 in units of a, then scaled
    unit = first_shells(lat.cell, basis, lat.sublattices)
    return _crystal(prototype, lat.title, a, cell, basis, lat.sublattices, dict(species),
                    lat.interstitials, lat.space_group, scaled, cutoff,
                    (cutoff,) * lat.n_basis, unit)


def _resolve_compound(prototype: str, a: float, species, parameters: dict) -> Crystal:
    proto = PROTOTYPES[prototype]
    parameters = {**proto.parameters, **parameters}
    unit_cell = proto.cell_rows(**parameters)
    cell = np.array(unit_cell, dtype=np.float64) * a
    basis, labels = prototype_basis(proto, **parameters)
    unit = first_shells(unit_cell, basis, labels)
    # each sublattice's cutoff midway between its first shell and the next distance
    site_cutoff = tuple(0.5 * (unit[lb].outer + unit[lb].next_distance) * a for lb in labels)
    closest = min(unit.values(), key=lambda sh: sh.distance)  # first in table order on ties
    scaled = Shells((closest.distance * a,), (closest.coordination,))
    return dataclasses.replace(
        _crystal(prototype, proto.title, a, cell, basis, labels, dict(species),
                 proto.interstitials, proto.space_group, scaled, max(site_cutoff), site_cutoff,
                 unit),
        parameters=tuple(sorted(parameters.items())))


def resolve_cif(source, a: float, species: tuple[tuple[str, str], ...]) -> Crystal:
    """The :class:`Crystal` of a CIF's conventional cell (a
    :class:`cellbuild.cif_crystal.CifCrystal`) scaled so that its first lattice
    vector is ``a`` Angstrom long; ``species`` gives each label's element."""
    return _resolve_cif(source, float(a), tuple(species))


@lru_cache(maxsize=32)
def _resolve_cif(source, a: float, species) -> Crystal:
    unit_cell = source.cell / source.a  # rows in units of a
    labels = source.sublattice
    unit = first_shells(unit_cell, source.basis, labels, every_site=False)
    site_cutoff = tuple(0.5 * (unit[lb].outer + unit[lb].next_distance) * a for lb in labels)
    closest = min(unit.values(), key=lambda sh: sh.distance)
    scaled = Shells((closest.distance * a,), (closest.coordination,))
    name = Path(source.source).name
    return dataclasses.replace(
        _crystal("cif", f"crystal of {name}", a, unit_cell * a, source.basis, labels,
                 dict(species), {}, source.space_group, scaled, max(site_cutoff), site_cutoff,
                 unit),
        occupancy=source.occupancy)


def _crystal(prototype, title, a, cell, basis, labels, on, interstitials, space_group,
             scaled, cutoff, site_cutoff, unit) -> Crystal:
    """The :class:`Crystal`; ``unit`` holds the first shells in units of ``a``."""
    missing = [lb for lb in dict.fromkeys(labels) if lb not in on]
    if missing:
        raise KeyError(f"{prototype}: no element for sublattice {missing[0]}")
    parts, kinds = [basis], ["lattice"] * len(basis)
    for kind, sites in interstitials.items():
        parts.append(np.array(sites, dtype=np.float64))
        kinds += [kind] * len(sites)
    site_frac = np.concatenate(parts)
    in_angstrom = {lb: FirstShell(sh.distance * a, sh.counts, sh.outer * a, sh.next_distance * a)
                   for lb, sh in unit.items()}
    return Crystal(
        prototype=prototype, title=title, a=a, cell=cell, basis=basis,
        sublattice=tuple(labels), elements=tuple(on[label] for label in labels),
        site_frac=site_frac, site_kind=tuple(kinds), space_group=space_group,
        shells=scaled, audit_cutoff=cutoff,
        offsets=neighbour_offsets(cell, site_frac,
                                   _grid_cutoffs(len(site_frac), cutoff, site_cutoff)),
        first_shells=in_angstrom, site_cutoff=tuple(float(c) for c in site_cutoff),
    )


def neighbour_offsets(cell: np.ndarray, frac: np.ndarray, cutoffs: np.ndarray):
    """Grid-site pairs ``(s, cell offset, t)`` with ``t`` within ``cutoffs[s]``
    (Angstrom) of ``s``, through the cell metric."""
    # cells far enough out: the cutoff over the smallest perpendicular width
    widths = abs(np.linalg.det(cell)) / np.linalg.norm(np.cross(cell[[1, 2, 0]],
                                                                cell[[2, 0, 1]]), axis=1)
    span = [math.ceil(float(cutoffs.max()) / w) + 1 for w in widths]
    cells = np.array(list(product(*(range(-s, s + 1) for s in span))), dtype=np.float64)
    entries = []
    for s, origin in enumerate(frac):
        # (cells, sites) distances from site s to every site of the nearby cells
        d = np.linalg.norm((cells[:, None, :] + frac[None, :, :] - origin) @ cell, axis=2)
        ci, t = np.nonzero((d < cutoffs[s]) & (d > 1e-9 * cutoffs[s]))
        entries += [(s, tuple(int(x) for x in cells[c]), int(u)) for c, u in zip(ci, t)]
    return tuple(entries)


def supercell_bonds(repeat: tuple[int, int, int], n_grid: int,
                    bonds) -> tuple[np.ndarray, np.ndarray]:
    """Both ends of every bond ``(s, (di, dj, dk), t)`` (entries of an offset
    table) in every cell of a ``repeat`` supercell, as flat grid-site ids
    ``cell * n_grid + site`` (C-order cells): ``(centre, partner)``, each
    (cells, bonds) int64; the partner's cell is wrapped periodically."""
    n_cells = math.prod(repeat)
    cell = np.arange(n_cells, dtype=np.int64)
    if not bonds:
        empty = np.zeros((n_cells, 0), dtype=np.int64)
        return empty, empty
    s = np.array([b[0] for b in bonds], dtype=np.int64)
    d = np.array([b[1] for b in bonds], dtype=np.int64).reshape(-1, 3)
    t = np.array([b[2] for b in bonds], dtype=np.int64)
    axes = np.unravel_index(cell, repeat)
    shifted = [(axes[a][:, None] + d[None, :, a]) % repeat[a] for a in range(3)]
    partner = np.ravel_multi_index(shifted, repeat) * n_grid + t[None, :]
    return cell[:, None] * n_grid + s[None, :], partner
