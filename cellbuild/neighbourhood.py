"""What the neighbour searches of one structure share: its wrapped fractional
coordinates and its cell lists, built once each instead of once per query.

``inspect`` asks up to eight questions of one structure (pair distances,
closest pairs, the prototype's and the short-range order's neighbours, nearest
neighbours, ...); building the cell list of a million atoms takes 0.1-0.2 s, and
it used to be built for every one of them. A :class:`Neighbourhood` is made by
the caller for one structure and passed to the queries of
:mod:`cellbuild.neighbours` (``near=``); it lives as long as the caller keeps
it (no module state). Lengths in Angstrom.
"""
from __future__ import annotations

import numpy as np

from .cell_list import _Bins, _build_bins, _check_budget
from .cellgeom import _checked_cell, _checked_positions, _wrapped_fractional

#: A query within r may use a cell list built for up to this many times r (its
#: candidates grow with the cube of the ratio: 1.5 is at most 3.4x the
#: candidates, cheaper than a new cell list for the sampled centres of inspect).
REUSE_FACTOR = 1.5


class Neighbourhood:
    """One structure's cell lists (by radius) and wrapped fractional coordinates.

    Args:
        cell: (3, 3) lattice vectors as rows, Angstrom.
        positions: (N, 3) Cartesian positions, Angstrom (not copied: the caller
            must not change them while the neighbourhood is used).
        sites: the grid these atoms sit on (:func:`cellbuild.neighbours.locate_grid`),
            if any: the pair queries then read the occupancy grid instead of a
            cell list (:mod:`cellbuild.grid_pairs`).
    """

    def __init__(self, cell, positions, sites=None) -> None:
        self.cell = _checked_cell(cell)
        self.positions = _checked_positions(positions)
        self.sites = sites
        self._frac: np.ndarray | None = None
        self._bins: dict[float, _Bins] = {}

    @property
    def frac(self) -> np.ndarray:
        """(N, 3) fractional coordinates wrapped into [0, 1), computed once (read only)."""
        if self._frac is None:
            frac = _wrapped_fractional(self.cell, self.positions)
            frac.flags.writeable = False
            self._frac = frac
        return self._frac

    def same(self, cell, positions) -> bool:
        """Whether a query's ``cell`` and ``positions`` are this neighbourhood's."""
        return positions is self.positions or (
            np.shape(positions) == self.positions.shape
            and np.array_equal(np.asarray(cell, dtype=np.float64), self.cell)
            and np.shares_memory(np.asarray(positions), self.positions))

    def bins(self, r: float, limit: float, reuse: float = 1.0, keep: bool = True) -> _Bins:
        """A cell list for neighbours closer than ``r`` (A): one already built for a
        radius between r and ``reuse`` x r, else a new one (kept for later queries
        if ``keep``: about 100 bytes per atom).

        PairLimitError as :func:`cellbuild.cell_list._build_bins` for r and ``limit``
        (checked for every query, whichever cell list serves it).
        """
        r = float(r)
        _check_budget(self.cell, len(self.positions), r, limit)
        if r in self._bins:
            return self._bins[r]
        fits = [radius for radius in self._bins if r <= radius <= reuse * r]
        if fits:
            return self._bins[min(fits)]
        built = _build_bins(self.cell, self.positions, r, limit=limit, frac=self.frac)
        if keep:
            self._bins[r] = built
        return built
