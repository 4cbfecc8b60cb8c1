"""Pair distribution and neighbour shells of a structure (steps 1-2 of
:mod:`cellbuild.inspection`). Lengths in Angstrom; counts are neighbours per atom."""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import neighbours
from .structure import Structure

#: Pair distances are collected up to this many mean spacings (V/N)^(1/3):
#: enough for at least three closed shells of sc, bcc, fcc and diamond
#: (fcc's fifth shell sits at 2.51 spacings).
SHELL_RANGE = 2.7
#: Above this many pairs, centre atoms are sampled (seeded) for the distribution.
MAX_SAMPLED_PAIRS = 500_000
#: Histogram bin width and smoothing width, in mean spacings.
BIN_FRACTION = 1.0 / 400.0
SMOOTH_FRACTION = 0.02
#: A shell peak must stand out by this fraction of the highest smoothed peak,
#: and two peaks closer than ``PEAK_SEPARATION`` spacings are one shell (both
#: keep sampling noise from splitting a broadened shell).
PEAK_PROMINENCE = 0.08
PEAK_SEPARATION = 0.06


@dataclass(frozen=True)
class PairDistribution:
    """Pair distances and what one of them stands for.

    Attributes:
        distances: ascending pair distances, Angstrom.
        weight: neighbours per atom that one distance represents (2/N when
            every pair is counted once, 1/m when m centre atoms were sampled).
        number_density: atoms per Angstrom^3.
        r_max: distances were collected below this, Angstrom.
    """

    distances: np.ndarray
    weight: float
    number_density: float
    r_max: float

    def per_atom_histogram(self, width: float) -> tuple[np.ndarray, np.ndarray]:
        """(bin edges, neighbours per atom in each bin) for bins ``width`` Angstrom wide."""
        n_bins = max(1, math.ceil(self.r_max / width))
        edges = np.arange(n_bins + 1) * width
        index = np.minimum((self.distances / width).astype(np.int64), n_bins - 1)
        return edges, np.bincount(index, minlength=n_bins) * self.weight

    def g(self, width: float) -> tuple[np.ndarray, np.ndarray]:
        """(bin centres, radial distribution g(r)): neighbours per atom in each
        spherical shell over the number an ideal gas of the same density holds."""
        edges, per_atom = self.per_atom_histogram(width)
        ideal = self.number_density * (4.0 / 3.0) * math.pi * np.diff(edges ** 3)
        return 0.5 * (edges[1:] + edges[:-1]), per_atom / ideal

    def neighbours_below(self, r: float) -> float:
        """Mean neighbours per atom closer than ``r`` (A), from the distances."""
        return float(np.searchsorted(self.distances, r)) * self.weight


def pair_distribution(structure: Structure, spacing: float, workers: int = 2) -> PairDistribution:
    """Pair distances up to ``SHELL_RANGE`` mean spacings (sampled centres when many)."""
    cell, n = structure.cell, structure.n_atoms
    r_max = SHELL_RANGE * spacing
    sample = neighbours.pair_sample(cell, structure.positions, r_max, workers=workers,
                                    max_pairs=MAX_SAMPLED_PAIRS)
    # every pair once (2/N per distance) or each sampled centre's neighbours (1/m)
    weight = 2.0 / n if sample.centres >= n else 1.0 / sample.centres
    return PairDistribution(sample.distances, weight, n / structure.volume, r_max)



def find_shells(distribution: PairDistribution, spacing: float) -> tuple[list[dict], list[float]]:
    """Neighbour shells and the boundaries between them (Angstrom).

    Returns shells as ``{"distance", "count", "spread"}`` (mean distance, mean
    neighbours per atom, standard deviation of the distances) and the radii
    that separate shell k from shell k + 1. Only shells closed by a minimum
    on their far side are returned; the last peak before ``r_max`` may be cut.
    """
    width = spacing * BIN_FRACTION
    _, per_atom = distribution.per_atom_histogram(width)
    smooth = _smoothed(per_atom, SMOOTH_FRACTION / BIN_FRACTION)
    if smooth.max() <= 0.0:
        return [], []
    peaks = _peaks(smooth, PEAK_PROMINENCE * smooth.max(),
                   max(1, int(PEAK_SEPARATION / BIN_FRACTION)))
    if len(peaks) < 2:
        return [], []
    d = distribution.distances
    boundaries = []
    for p, q in zip(peaks[:-1], peaks[1:]):
        low = p + int(np.argmin(smooth[p:q + 1]))
        boundaries.append(_gap_middle(d, (low + 0.5) * width, width))
    # below the first peak: as far as the first boundary lies above it, so that
    # a rare overlapping pair is not averaged into the first shell
    first_peak = (peaks[0] + 0.5) * width
    edges = [max(0.0, 2.0 * first_peak - boundaries[0])] + boundaries
    shells = []
    for lo, hi in zip(edges[:-1], edges[1:]):
        members = d[np.searchsorted(d, lo):np.searchsorted(d, hi)]
        if members.size == 0:
            continue
        shells.append({"distance": float(members.mean()),
                       "count": round(float(members.size * distribution.weight), 3),
                       "spread": float(members.std())})
    return shells, boundaries


def _smoothed(values: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian smoothing with standard deviation ``sigma`` bins, zeros beyond the ends.

    (numpy rather than scipy.signal / scipy.ndimage: importing those costs up to
    0.9 s, more than the smoothing of a million atoms' distances.)
    """
    reach = int(math.ceil(4.0 * sigma))
    kernel = np.exp(-0.5 * (np.arange(-reach, reach + 1) / sigma) ** 2)
    smooth = np.convolve(values, kernel / kernel.sum(), mode="full")
    return smooth[reach:reach + len(values)]


def _peaks(y: np.ndarray, prominence: float, separation: int) -> np.ndarray:
    """Indices of the local maxima of ``y`` at least ``separation`` bins from a higher
    one and standing at least ``prominence`` above the higher of the two lowest
    points that separate them from higher ground on either side, ascending."""
    inner = np.flatnonzero((y[1:-1] > y[:-2]) & (y[1:-1] >= y[2:])) + 1
    kept: list[int] = []
    for i in sorted(inner.tolist(), key=lambda k: -y[k]):  # highest first
        if all(abs(i - k) >= separation for k in kept) and _prominence(y, i) >= prominence:
            kept.append(i)
    return np.array(sorted(kept), dtype=np.int64)


def _prominence(y: np.ndarray, i: int) -> float:
    """Height of peak ``i`` above its higher base: on each side, the lowest value
    before the curve rises above y[i] again (or ends)."""
    higher = np.flatnonzero(y > y[i])
    left_end = higher[higher < i].max() if np.any(higher < i) else 0
    right_end = higher[higher > i].min() if np.any(higher > i) else len(y) - 1
    base = max(y[left_end:i + 1].min(), y[i:right_end + 1].min())
    return float(y[i] - base)


def _gap_middle(distances: np.ndarray, r: float, width: float) -> float:
    """``r``, or the middle of the empty stretch of distances around it if there is one
    (a perfect crystal: the cutoff falls midway between two shells)."""
    k = int(np.searchsorted(distances, r))
    if 0 < k < len(distances):
        lo, hi = float(distances[k - 1]), float(distances[k])
        if hi - lo >= 2.0 * width:
            return 0.5 * (lo + hi)
    return float(r)

