"""Seeded placement of vacancies, substitutions, antisites and interstitials.

All randomness comes from one ``numpy.random.Generator`` (PCG64) made from the
recipe's seed and consumed in a fixed order: vacancies, Schottky defects (one
draw per sublattice), substitutions, antisites (the first site of each pair,
then the second), interstitials, each in recipe order. No site is drawn twice. The same recipe and seed therefore give
the same structure (for a given numpy version: numpy keeps PCG64's stream
stable, and ``Generator.permutation`` has been stable across releases).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .build import Plan, site_positions
from .defect_plan import Request, asked, planned_counts
from .errors import InputError
from .structure import Structure


@dataclass(frozen=True)
class Placement:
    """One defect request as placed.

    Attributes:
        kind: ``vacancy``, ``substitution``, ``antisite`` or ``interstitial``.
        element: the element placed (for vacancies, the element removed).
        on: the target as written (sublattice label, element or interstitial kind).
        key: the recipe key of the request, for messages.
        asked: the request as given: {"count": n} or {"fraction": f}.
        site_ids: grid site ids used (see :mod:`cellbuild.build`), sorted.
        host: the element those sites held in the perfect crystal (None for
            interstitial sites).
    """

    kind: str
    element: str
    on: str
    key: str
    asked: dict
    site_ids: np.ndarray
    host: str | None = None

    @property
    def count(self) -> int:
        return int(self.site_ids.size)


def place_defects(plan: Plan, perfect: Structure, *, grouped: bool = False
                  ) -> tuple[Structure, list[Placement]]:
    """Apply the recipe's defects to the perfect supercell, seeded by ``recipe.seed``
    (or, for ``placement: distinct``, the sites of the recipe's configuration).

    Returns the defective structure (vacancies removed, substituted species
    changed, interstitials appended in site order; with ``grouped``, then
    reordered as :meth:`Structure.grouped_by_species` does) and the placements.
    """
    recipe = plan.recipe
    counts = planned_counts(plan)
    if not counts:
        return perfect, []
    if recipe.defects.placement == "distinct":
        from .variants import configuration_sites

        chosen = configuration_sites(plan)
    else:
        picker = _Picker(plan, np.random.default_rng(recipe.seed))
        chosen = [picker.pick(req, n) for req, n in counts]
    placements = [
        Placement(req.kind, req.element, req.on, req.key, asked(req.amount), np.sort(sites),
                  req.host)
        for (req, _), sites in zip(counts, chosen)
    ]
    return apply(plan, perfect, placements, grouped=grouped), placements


def atom_indices(structure: Structure, groups: list[np.ndarray]) -> list[np.ndarray]:
    """For each array of grid site ids in ``groups``, the indices (0-based, file
    order) of the atoms of ``structure`` on those sites (each must hold one); one
    sort of the site ids serves every group."""
    order = np.argsort(structure.site, kind="stable")
    return [order[np.searchsorted(structure.site, ids, sorter=order)] for ids in groups]


def apply(plan: Plan, perfect: Structure, placements: list[Placement], *,
          grouped: bool = False) -> Structure:
    """The structure with ``placements`` applied to the perfect crystal ``perfect``;
    with ``grouped``, equal to ``apply(...).grouped_by_species()`` (atoms
    gathered once, in the grouped order, instead of copied twice)."""
    n_grid, n_basis = plan.crystal.n_grid, plan.crystal.n_basis
    symbols = perfect.symbols
    species = perfect.species.copy()
    keep = np.ones(perfect.n_atoms, dtype=bool)
    new_sites, new_species = [], []
    for p in placements:
        if p.kind == "interstitial":
            new_sites.append(p.site_ids)
            new_species.append(np.full(p.count, symbols.index(p.element), dtype=np.int32))
            continue
        # perfect-crystal atoms are in site order, n_basis per cell
        cell, s = np.divmod(p.site_ids, n_grid)
        index = cell * n_basis + s
        if p.kind == "vacancy":
            keep[index] = False
        else:  # a substitution or one side of an antisite pair
            species[index] = symbols.index(p.element)
    if grouped and not new_sites:
        return _kept_grouped(perfect, species, keep)
    positions, site = perfect.positions[keep], perfect.site[keep]
    species = species[keep]
    if new_sites:
        extra = np.concatenate(new_sites)
        order = np.argsort(extra, kind="stable")
        extra = extra[order]
        positions = np.concatenate([positions, site_positions(plan.crystal, plan.repeat, extra)])
        species = np.concatenate([species, np.concatenate(new_species)[order]])
        site = np.concatenate([site, extra])
    result = Structure(perfect.cell, positions, species, symbols, site)
    return result.grouped_by_species() if grouped else result


#: Atoms per chunk of :func:`_kept_grouped` (its temporaries stay in cache).
_CHUNK_ATOMS = 1 << 18


def _kept_grouped(perfect: Structure, species: np.ndarray, keep: np.ndarray) -> Structure:
    """The atoms of ``perfect`` where ``keep``, with ``species``, reordered by
    species code (stable), as ``Structure.grouped_by_species`` orders them.

    A stable partition in chunks: each chunk's atoms of each species go to the
    next free rows of that species' block, so no array of atom indices as long
    as the structure is made (a 10M-atom build peaked 0.3 GB higher with one).
    """
    n_codes = len(perfect.symbols)
    per_code = np.bincount(species[keep], minlength=n_codes)
    starts = np.concatenate([[0], np.cumsum(per_code)[:-1]])
    n = int(per_code.sum())
    positions = np.empty((n, 3), dtype=perfect.positions.dtype)
    codes = np.empty(n, dtype=species.dtype)
    site = np.empty(n, dtype=perfect.site.dtype)
    for begin in range(0, perfect.n_atoms, _CHUNK_ATOMS):
        part = slice(begin, min(begin + _CHUNK_ATOMS, perfect.n_atoms))
        chunk_species = species[part]
        chunk_keep = keep[part]
        for code in np.flatnonzero(per_code).tolist():
            rows = np.flatnonzero(chunk_keep & (chunk_species == code)) + begin
            end = starts[code] + len(rows)
            positions[starts[code]:end] = perfect.positions[rows]
            codes[starts[code]:end] = code
            site[starts[code]:end] = perfect.site[rows]
            starts[code] = end
    return Structure(perfect.cell, positions, codes, perfect.symbols, site)


class _Picker:
    """Draws distinct grid sites for successive requests, optionally keeping all
    defects at least ``min_separation`` apart (periodic distance)."""

    def __init__(self, plan: Plan, rng: np.random.Generator) -> None:
        self.plan = plan
        self.rng = rng
        self.crystal = plan.crystal
        # one mask over every grid site: targets may overlap (label and element)
        self.taken = np.zeros(plan.n_cells * self.crystal.n_grid, dtype=bool)
        self.separation = plan.recipe.defects.min_separation
        self.accepted = np.empty((0, 3))

    def _pool(self, req: Request) -> np.ndarray:
        """All grid site ids of the request's target sites, cell by cell."""
        local = np.array(req.sites, dtype=np.int64)
        cells = np.arange(self.plan.n_cells, dtype=np.int64)
        return (cells[:, None] * self.crystal.n_grid + local[None, :]).ravel()

    def pick(self, req: Request, n: int) -> np.ndarray:
        """``n`` distinct free sites of ``req``'s target, drawn with the shared generator."""
        if n == 0:
            return np.empty(0, dtype=np.int64)
        local = np.array(req.sites, dtype=np.int64)
        # which pool entries (see _pool: cell by cell, the request's sites in each)
        # are taken, one byte each, without the pool's 8-byte site ids
        taken = self.taken.reshape(self.plan.n_cells, self.crystal.n_grid)[:, local].ravel()
        if self.separation is None:
            if taken.any():
                free = np.flatnonzero(~taken)  # positions in the pool
                chosen = free[self.rng.choice(free.size, size=n, replace=False)]
            else:  # every entry free: an entry's position in the pool is itself
                chosen = self.rng.choice(taken.size, size=n, replace=False)
        else:
            chosen = self._pick_separated(req, self._pool(req), np.flatnonzero(~taken), n)
        cell, k = np.divmod(chosen, len(local))
        sites = cell * self.crystal.n_grid + local[k]  # = _pool(req)[chosen]
        self.taken[sites] = True
        return sites

    def _pick_separated(self, req: Request, pool: np.ndarray, free: np.ndarray,
                        n: int) -> np.ndarray:
        """Random sequential placement with a periodic KD-tree, in batches.

        Candidates come in a seeded random order. In each batch, a candidate is
        accepted if it is far enough from every accepted defect and from every
        earlier candidate of the batch that is still eligible; candidates that
        lose only to a batch-mate are retried in the next batch, so the result
        equals one-at-a-time placement in that random order, without a Python
        loop per candidate.
        """
        from scipy.spatial import cKDTree

        r = self.separation
        box = np.array(self.plan.box)
        order = free[self.rng.permutation(free.size)]
        chosen: list[np.ndarray] = []
        placed, cursor = 0, 0
        deferred = np.empty(0, dtype=np.int64)
        while placed < n and (cursor < order.size or deferred.size):
            take = max(64, 2 * (n - placed))
            batch = np.concatenate([deferred, order[cursor:cursor + take]])
            cursor += take
            pos = site_positions(self.crystal, self.plan.repeat, pool[batch]) % box
            ok = np.ones(batch.size, dtype=bool)
            if self.accepted.size:
                d, _ = cKDTree(self.accepted, boxsize=box).query(pos, distance_upper_bound=r)
                ok = d >= r
            batch, pos = batch[ok], pos[ok]
            pairs = cKDTree(pos, boxsize=box).query_pairs(r, output_type="ndarray")
            blocked = np.zeros(batch.size, dtype=bool)
            blocked[pairs.max(axis=1)] = True  # a later candidate yields to an earlier one
            # unblocked candidates win outright; blocked ones are undecided and
            # are retried first in the next batch, against the grown accepted set
            winners = np.flatnonzero(~blocked)[: n - placed]
            deferred = batch[blocked]
            chosen.append(batch[winners])
            self.accepted = np.concatenate([self.accepted, pos[winners]])
            placed += winners.size
        if placed < n:
            raise InputError(
                f"only {placed:,} of {n:,} defects could be kept {r} Angstrom apart "
                f"from each other and from earlier defects",
                key="defects.min_separation", value=r,
                hint=f"lower it, or ask for at most {placed:,} in `{req.key}`",
                file=self.plan.recipe.source)
        return np.concatenate(chosen)
