"""Physically possible interatomic distances, from tabulated covalent radii.

A lattice constant in the wrong unit (nm or pm for Angstrom) puts atoms ten
times too close or a hundred times too far apart; both still make a "perfect"
crystal. The band below catches that: the distance between two atoms in any
solid lies between ``LOW`` and ``HIGH`` times the sum of their covalent radii
(B. Cordero et al., Dalton Trans. 2008, 2832, as tabulated by ``ase.data``).

Why these factors: bonded and metallic nearest neighbours sit at 0.9 to 1.3
times the radius sum (Si 1.06, Cu 1.08, Cs 1.09, H2 1.19); van der Waals solids
reach 1.8 (Ar) to 2.7 (Ne). ``LOW = 0.5`` and ``HIGH = 3.2`` keep all of them
inside while a factor of ten either way falls outside.
"""
from __future__ import annotations

from dataclasses import dataclass

LOW, HIGH = 0.5, 3.2
SOURCE = "covalent radii of Cordero et al. 2008 (ase.data.covalent_radii)"


def radius_sum(a: str, b: str) -> float:
    """Sum of the covalent radii of elements ``a`` and ``b``, Angstrom."""
    from ase.data import atomic_numbers, covalent_radii

    return float(covalent_radii[atomic_numbers[a]] + covalent_radii[atomic_numbers[b]])


@dataclass(frozen=True)
class SpacingVerdict:
    """Where a nearest-neighbour distance falls against the band for its elements.

    ``ratio`` is distance / radius sum; ``unit`` names the likely mistake
    ("nm", "pm", "bohr") when scaling by it brings the distance into the band.
    """

    distance: float
    lower: float
    upper: float
    ratio: float
    unit: str | None

    @property
    def plausible(self) -> bool:
        return self.lower <= self.distance <= self.upper

    def describe(self) -> str:
        band = f"{self.lower:.3g} to {self.upper:.3g} Angstrom"
        side = "closer" if self.distance < self.lower else "farther apart"
        text = (f"puts nearest neighbours {self.distance:.4g} Angstrom apart, {side} than "
                f"any solid allows ({band}, {LOW} to {HIGH} x the sum of covalent radii)")
        if self.unit:
            text += f"; the value looks like it is in {self.unit}, not Angstrom"
        return text


#: Length units a value is commonly given in by mistake, and Angstrom per unit.
_UNITS = (("nm", 10.0), ("pm", 0.01), ("bohr", 0.529177210903))


def judge(distance: float, a: str, b: str) -> SpacingVerdict:
    """Judge a nearest-neighbour ``distance`` (Angstrom) between elements ``a`` and ``b``."""
    total = radius_sum(a, b)
    lower, upper = LOW * total, HIGH * total
    unit = None
    if not lower <= distance <= upper:
        unit = next((name for name, factor in _UNITS
                     if lower <= distance * factor <= upper), None)
    return SpacingVerdict(distance, lower, upper, distance / total, unit)
