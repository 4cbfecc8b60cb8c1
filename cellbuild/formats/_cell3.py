"""3 x 3 cell arithmetic with the same bits on every machine, for the writers.

BLAS/LAPACK kernels (matmul, inv, det, norm) differ between machines in
summation order and FMA use, which can move a last bit and so, rarely, a
printed digit. These use single IEEE operations in a fixed order instead.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np


def dot3(u: Sequence[float], v: Sequence[float]) -> float:
    """u . v of two 3-vectors, summed left to right."""
    return float(u[0]) * float(v[0]) + float(u[1]) * float(v[1]) + float(u[2]) * float(v[2])


def det3(m: np.ndarray) -> float:
    """Determinant of a 3x3 matrix (triple product of its rows)."""
    a, b, c = np.asarray(m, dtype=np.float64).tolist()
    return dot3(a, cross3(b, c))


def inverse3(m: np.ndarray) -> np.ndarray:
    """Inverse of a 3x3 matrix from its adjugate; ValueError if singular."""
    a, b, c = np.asarray(m, dtype=np.float64).tolist()
    adjugate_columns = [cross3(b, c), cross3(c, a), cross3(a, b)]
    det = dot3(a, adjugate_columns[0])
    if det == 0.0:
        raise ValueError("the cell is singular (zero volume)")
    return np.array(adjugate_columns).T / det


def cross3(u: Sequence[float], v: Sequence[float]) -> list[float]:
    """u x v of two 3-vectors."""
    return [u[1] * v[2] - u[2] * v[1], u[2] * v[0] - u[0] * v[2], u[0] * v[1] - u[1] * v[0]]


def linear3(columns: Sequence[np.ndarray], matrix: np.ndarray) -> np.ndarray:
    """``rows @ matrix`` for rows given as their three columns (x, y, z).

    Returns the three result columns as a (3, n) array, each column
    ``(x * m0j + y * m1j) + z * m2j`` in elementwise float64 operations.
    """
    m = np.asarray(matrix, dtype=np.float64).tolist()
    x, y, z = columns
    out = np.empty((3, len(x)))
    for j in range(3):
        np.multiply(x, m[0][j], out=out[j])
        out[j] += y * m[1][j]
        out[j] += z * m[2][j]
    return out
