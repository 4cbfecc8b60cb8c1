"""Cell geometry shared by the neighbour engines: face widths, checked inputs,
wrapped fractional coordinates. Lengths in Angstrom; cells are (3, 3) arrays with
the lattice vectors as rows, positions (N, 3) Cartesian arrays."""
from __future__ import annotations

import math
import os

import numpy as np

def perpendicular_widths(cell) -> np.ndarray:
    """Distances between opposite faces of the cell, (3,) float64, Angstrom.

    Width k is the cell volume divided by the area of the face spanned by the
    two other lattice vectors (volume / |b x c| for k = 0, and so on).
    """
    cell = np.asarray(cell, dtype=np.float64)
    volume = abs(np.linalg.det(cell))
    face_normals = np.cross(cell[[1, 2, 0]], cell[[2, 0, 1]])
    return volume / np.linalg.norm(face_normals, axis=1)


def _checked_cell(cell) -> np.ndarray:
    """The cell as a (3, 3) float64 array; ValueError if not a finite 3D cell."""
    cell = np.asarray(cell, dtype=np.float64)
    if cell.shape != (3, 3) or not np.all(np.isfinite(cell)):
        raise ValueError(f"cell must be a finite 3x3 array, got shape {cell.shape}")
    scale = float(np.prod(np.linalg.norm(cell, axis=1)))
    # A relative volume this small means the lattice vectors are (nearly)
    # coplanar, and no periodic 3D neighbour search makes sense.
    if scale == 0.0 or abs(np.linalg.det(cell)) <= 1e-10 * scale:
        raise ValueError("cell is singular (lattice vectors are coplanar)")
    return cell


def _checked_positions(positions) -> np.ndarray:
    """The positions as an (N, 3) float64 array; ValueError if not finite."""
    positions = np.asarray(positions, dtype=np.float64)
    if positions.ndim != 2 or positions.shape[1] != 3:
        raise ValueError(f"positions must be (N, 3), got shape {positions.shape}")
    if not np.all(np.isfinite(positions)):
        raise ValueError("positions must be finite")
    return positions


def _checked_radius(r, name: str) -> float:
    """A positive finite distance in Angstrom."""
    r = float(r)
    if not (r > 0.0 and math.isfinite(r)):
        raise ValueError(f"{name} must be a positive finite distance, got {r}")
    return r


def _thread_count(workers: int) -> int:
    """Threads to use; like scipy, -1 (or any value < 1) means every CPU."""
    return int(workers) if workers >= 1 else (os.cpu_count() or 1)


def _times(points: np.ndarray, matrix: np.ndarray) -> np.ndarray:
    """points @ matrix for many 3-vectors (n, 3) @ (3, k), without BLAS.

    OpenBLAS runs a (1M, 3) @ (3, 3) product in threads that keep spinning
    after the call and then compete with our worker threads: measured 5 ms to
    400 ms depending on what ran before. einsum's own loop takes a steady
    20-50 ms.
    """
    return np.einsum("ij,jk->ik", points, matrix)


def _wrapped_fractional(cell: np.ndarray, positions: np.ndarray) -> np.ndarray:
    """Fractional coordinates wrapped into [0, 1), (N, 3)."""
    frac = _times(positions, np.linalg.inv(cell))
    frac -= np.floor(frac)
    # floor() of a tiny negative number leaves exactly 1.0 after rounding.
    frac[frac >= 1.0] = 0.0
    return frac

