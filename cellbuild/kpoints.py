"""k-point meshes from a spacing in reciprocal space.

The rule (the one VASP documents for its KSPACING tag): along each reciprocal
lattice vector b_i (with the 2 pi, in 1/Angstrom), N_i = max(1, ceil(|b_i| / spacing)),
so neighbouring k-points are at most ``spacing`` apart along each b_i. The mesh is
Gamma-centred or Monkhorst-Pack (shifted by half a step along each axis of even N_i,
H. J. Monkhorst and J. D. Pack, Phys. Rev. B 13, 5188 (1976)).
"""
from __future__ import annotations

import math

import numpy as np

#: Centrings a mesh may have.
CENTRINGS = ("gamma", "monkhorst-pack")


def reciprocal_lengths(cell: np.ndarray) -> np.ndarray:
    """|b_i| in 1/Angstrom (2 pi included) for the cell rows a_i in Angstrom."""
    b = 2.0 * math.pi * np.linalg.inv(np.asarray(cell, dtype=float)).T
    return np.linalg.norm(b, axis=1)


def mesh(cell: np.ndarray, spacing: float) -> tuple[int, int, int]:
    """The number of k-points along each reciprocal vector for ``spacing`` (1/Angstrom)."""
    lengths = reciprocal_lengths(cell)
    # 1e-9 relative: a length that is a whole multiple of the spacing by construction
    # must not gain a point from rounding
    return tuple(max(1, math.ceil(x / spacing - 1e-9)) for x in lengths)


def shift(n: tuple[int, int, int], centring: str) -> tuple[int, int, int]:
    """pw.x's offsets (0 or 1, half a step) of a mesh: none for Gamma-centred; for
    Monkhorst-Pack, a half step along each axis with an even number of points."""
    if centring == "gamma":
        return (0, 0, 0)
    return tuple(1 if k % 2 == 0 else 0 for k in n)
