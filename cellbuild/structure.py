"""The core structure: plain arrays, no per-atom objects.

A :class:`Structure` holds a periodic cell and its atoms as numpy arrays. Richer
objects (ASE ``Atoms``, pymatgen ``Structure``) are made on request at the edge.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: ``site`` value for atoms that did not come from a lattice site grid
#: (for example atoms read from a foreign file).
NO_SITE = -1


@dataclass(frozen=True, eq=False)
class Structure:
    """A periodic atomic structure as arrays.

    Attributes:
        cell: (3, 3) float64, lattice vectors as rows, Angstrom.
        positions: (N, 3) float64, Cartesian coordinates, Angstrom.
        species: (N,) integer codes indexing ``symbols``.
        symbols: element symbol for each species code, in type order (LAMMPS
            type = code + 1). May list elements that no atom carries, so that
            a series of structures can share one type map.
        site: (N,) int64, index of the grid site each atom occupies
            (see :mod:`cellbuild.build` for the numbering), or ``NO_SITE``.
        charges: (N,) float64 ionic charge of each atom in elementary charges,
            or None for a structure without charges.
    """

    cell: np.ndarray
    positions: np.ndarray
    species: np.ndarray
    symbols: tuple[str, ...]
    site: np.ndarray = field(default=None)  # type: ignore[assignment]
    charges: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.site is None:
            object.__setattr__(
                self, "site", np.full(len(self.positions), NO_SITE, dtype=np.int64)
            )
        if self.cell.shape != (3, 3):
            raise ValueError(f"cell must be 3x3, got {self.cell.shape}")
        n = len(self.positions)
        if self.positions.shape != (n, 3) or self.species.shape != (n,) or self.site.shape != (n,):
            raise ValueError("positions, species and site must describe the same atoms")
        if self.charges is not None and self.charges.shape != (n,):
            raise ValueError("charges must give one value per atom")

    @property
    def n_atoms(self) -> int:
        return int(self.positions.shape[0])

    @property
    def volume(self) -> float:
        """Cell volume in Angstrom^3."""
        return float(abs(np.linalg.det(self.cell)))

    def counts(self) -> np.ndarray:
        """Atoms per species code, length ``len(symbols)`` (O(N))."""
        return np.bincount(self.species, minlength=len(self.symbols))

    def composition(self) -> dict[str, int]:
        """Element -> count for the elements present, in type order (O(N))."""
        return {s: int(c) for s, c in zip(self.symbols, self.counts()) if c > 0}

    def chemical_symbols(self) -> np.ndarray:
        """Per-atom element symbols as a numpy string array (for edge conversions)."""
        return np.asarray(self.symbols, dtype="<U3")[self.species]

    def fractional(self) -> np.ndarray:
        """Fractional coordinates, (N, 3)."""
        return self.positions @ np.linalg.inv(self.cell)

    def to_ase(self):
        """An ``ase.Atoms`` with the same cell, positions and elements, periodic in 3D."""
        from ase import Atoms

        return Atoms(
            symbols=list(self.chemical_symbols()),
            positions=self.positions,
            cell=self.cell,
            pbc=True,
        )

    def to_pymatgen(self):
        """A ``pymatgen.core.Structure`` (imported here: pymatgen is slow to import)."""
        from pymatgen.core import Lattice, Structure as PmgStructure

        return PmgStructure(
            Lattice(self.cell),
            list(self.chemical_symbols()),
            self.positions,
            coords_are_cartesian=True,
        )

    def grouped_by_species(self) -> "Structure":
        """The same atoms reordered by species code (stable within a species).

        Every writer keeps this order, so 1-based atom ids mean the same atom in
        every output format (POSCAR needs atoms grouped by species). Returns
        ``self`` when the atoms are already grouped (O(N) check).
        """
        if np.all(self.species[1:] >= self.species[:-1]):
            return self
        order = np.argsort(self.species, kind="stable")
        return Structure(self.cell, self.positions[order], self.species[order], self.symbols,
                         self.site[order],
                         None if self.charges is None else self.charges[order])

    def with_charges(self, charge_of: dict[str, float] | None) -> "Structure":
        """The same atoms with each atom's charge taken from its element's entry
        in ``charge_of`` (elementary charges); ``None`` returns ``self``."""
        if charge_of is None:
            return self
        table = np.array([charge_of.get(s, 0.0) for s in self.symbols], dtype=np.float64)
        return Structure(self.cell, self.positions, self.species, self.symbols, self.site,
                         table[self.species])

    def net_charge(self) -> float | None:
        """Sum of the atoms' charges (elementary charges), or None without charges."""
        return None if self.charges is None else float(np.sum(self.charges))

    @classmethod
    def from_ase(cls, atoms) -> "Structure":
        """Build from an ``ase.Atoms``; species codes follow first appearance; charges
        from the atoms' initial charges when ASE holds them."""
        numbers = atoms.get_atomic_numbers()
        _, first, inverse = np.unique(numbers, return_index=True, return_inverse=True)
        order = np.argsort(first)  # species codes in order of first appearance
        rank = np.empty_like(order)
        rank[order] = np.arange(len(order))
        syms = atoms.get_chemical_symbols()
        symbols = tuple(syms[i] for i in np.sort(first))
        charges = (np.array(atoms.get_initial_charges(), dtype=np.float64)
                   if atoms.has("initial_charges") else None)
        return cls(
            cell=np.array(atoms.cell[:], dtype=np.float64),
            positions=np.array(atoms.positions, dtype=np.float64),
            species=rank[inverse].astype(np.int32),
            symbols=symbols,
            charges=charges,
        )
