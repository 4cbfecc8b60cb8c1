"""What the audit of ``make`` and the checks of ``inspect`` share, without the build
side (recipe, crystal, defects) that ``inspect`` never needs: the ``Check`` record,
the coordination histogram, spglib's space group of a structure, the close pairs a
report lists, and the mass density's constants and atomic weights. Lengths in
Angstrom."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Pairs listed in the report when closer than the threshold (more are counted).
MAX_CLOSE_PAIRS_LISTED = 20
AVOGADRO = 6.02214076e23  # 1/mol, exact (SI 2019)
ANGSTROM3_TO_CM3 = 1e-24


@dataclass(frozen=True)
class Check:
    """One named check with its outcome and a one-line explanation."""

    name: str
    passed: bool
    detail: str

    def as_dict(self) -> dict:
        return {"name": self.name, "passed": bool(self.passed), "detail": self.detail}


def spacegroup(structure, symprec: float = 1e-5) -> tuple[str, int]:
    """International symbol and number that spglib finds from the coordinates
    (``structure``: a :class:`~cellbuild.structure.Structure`; ``symprec`` in A)."""
    import warnings

    import spglib

    with warnings.catch_warnings():
        # spglib 2.x warns about its error-handling mode on every call
        warnings.simplefilter("ignore", DeprecationWarning)
        data = spglib.get_symmetry_dataset(
            (structure.cell, structure.fractional(), structure.species), symprec=symprec)
    if data is None:
        return "unknown", 0
    return str(data.international), int(data.number)


def histogram(counts: np.ndarray) -> dict[str, int]:
    """{"12": number of atoms with 12 neighbours, ...} in ascending order."""
    if counts.size == 0:
        return {}
    tally = np.bincount(counts, minlength=int(counts.max()) + 1)
    return {str(k): int(v) for k, v in enumerate(tally) if v}


def standard_atomic_weight(symbol: str) -> float:
    """Standard atomic weight in g/mol, from ASE's data table (IUPAC values)."""
    from ase.data import atomic_masses, atomic_numbers

    return float(atomic_masses[atomic_numbers[symbol]])
