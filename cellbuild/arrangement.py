"""Arrangements with a target short-range order: quasirandom or ordered alloys.

After the seeded random substitutions, :func:`arrange` searches, by Monte Carlo
swaps of two atoms of different species on the substituted sublattice (fixed
composition) with simulated annealing, for the arrangement whose Warren-Cowley
alphas over the first ``shells`` shells of that sublattice are closest to the
target: zero for ``quasirandom`` (the special quasirandom structure method: A.
Zunger, S.-H. Wei, L. G. Ferreira, J. E. Bernard, Phys. Rev. Lett. 65, 353
(1990)) or a value per shell for every unlike pair.

Objective: sum over shells k of w_k times the sum over unlike pairs (a, b) of
(alpha_k(a, b) - target_k)^2. Pair counts are updated per swap from the two
sites' neighbours only (not recounted), in a compiled kernel (numba); the
temperature falls linearly from T0 = 5 % of the starting objective to zero, the
best arrangement met is kept, and the search stops early when the objective is
zero to 1e-12. The swaps draw from numba's generator seeded from the recipe's
generator, so the same recipe and seed give the same arrangement.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from .errors import InputError
from .short_range_order import sublattice_shells


@njit(cache=True)
def _objective_of(counts, weights, target, conc):
    """sum_k w_k sum_{a<b} (alpha_k(a, b) - target_k)^2 from pair counts (k, a, b)."""
    n_shells, n_species, _ = counts.shape
    f = 0.0
    for k in range(n_shells):
        for a in range(n_species):
            around = 0
            for c in range(n_species):
                around += counts[k, a, c]
            if around == 0:
                continue
            for b in range(a + 1, n_species):
                alpha = 1.0 - (counts[k, a, b] / around) / conc[b]
                f += weights[k] * (alpha - target[k]) ** 2
    return f


@njit(cache=True)
def _move(counts, neigh, spec, i, a, b, j):
    """Pair counts as the atom on site i turns from species a to b (j, the swap
    partner, is skipped: the bond between the two keeps its pair)."""
    n_shells, _, zmax = neigh.shape
    for k in range(n_shells):
        for q in range(zmax):
            m = neigh[k, i, q]
            if m < 0 or m == j:
                continue
            c = spec[m]
            if c < 0:
                continue
            counts[k, a, c] -= 1
            counts[k, c, a] -= 1
            counts[k, b, c] += 1
            counts[k, c, b] += 1


@njit(cache=True)
def _anneal(spec, neigh, weights, target, conc, n_species, steps, seed, t_start, best):
    """The annealing loop; ``best`` receives the best arrangement. Returns (best
    objective, steps taken, objective of the starting arrangement)."""
    np.random.seed(seed)
    n_shells, n, zmax = neigh.shape
    counts = np.zeros((n_shells, n_species, n_species), dtype=np.int64)
    for k in range(n_shells):
        for i in range(n):
            if spec[i] < 0:
                continue
            for q in range(zmax):
                m = neigh[k, i, q]
                if m >= 0 and spec[m] >= 0:
                    counts[k, spec[i], spec[m]] += 1
    occupied = np.empty(n, dtype=np.int64)
    n_occ = 0
    for i in range(n):
        if spec[i] >= 0:
            occupied[n_occ] = i
            n_occ += 1
    f = _objective_of(counts, weights, target, conc)
    start_f = f
    best_f = f
    best[:] = spec
    t0 = max(t_start * f, 1e-12)
    taken = 0
    for step in range(steps):
        if best_f < 1e-12:
            break
        taken += 1
        i = occupied[np.random.randint(n_occ)]
        j = occupied[np.random.randint(n_occ)]
        a, b = spec[i], spec[j]
        if a == b:
            continue
        _move(counts, neigh, spec, i, a, b, j)
        _move(counts, neigh, spec, j, b, a, i)
        spec[i], spec[j] = b, a
        g = _objective_of(counts, weights, target, conc)
        temperature = t0 * (1.0 - step / steps)
        if g <= f or np.random.random() < math.exp(-(g - f) / max(temperature, 1e-300)):
            f = g
            if f < best_f:
                best_f = f
                best[:] = spec
        else:
            spec[i], spec[j] = a, b
            _move(counts, neigh, spec, i, b, a, j)
            _move(counts, neigh, spec, j, a, b, i)
    return best_f, taken, start_f


def neighbour_table(crystal, repeat, label: str, n_shells: int):
    """(site ids of sublattice ``label`` in the supercell, (shells, sites, z)
    neighbour indices into that list, -1 padded, shell distances in Angstrom)."""
    local = np.array([i for i, lb in enumerate(crystal.sublattice) if lb == label])
    n_cells = math.prod(repeat)
    ids = (np.arange(n_cells)[:, None] * crystal.n_grid + local[None, :]).ravel()
    index = np.full(n_cells * crystal.n_grid, -1, dtype=np.int64)
    index[ids] = np.arange(len(ids))
    distances, shells = sublattice_shells(crystal, label, n_shells)
    cells = np.arange(n_cells)
    ijk = np.stack(np.unravel_index(cells, repeat), axis=1)
    zmax = max(sum(1 for o in offsets if o[0] == local[0]) for offsets in shells)
    table = np.full((len(shells), len(ids), zmax), -1, dtype=np.int64)
    for k, offsets in enumerate(shells):
        fill = np.zeros(len(ids), dtype=np.int64)
        for s, shift, t in offsets:
            neighbour_cell = np.ravel_multi_index(((ijk + np.array(shift)) % np.array(repeat)).T,
                                                  repeat)
            rows = index[cells * crystal.n_grid + s]
            partner = index[neighbour_cell * crystal.n_grid + t]
            # a site's own image (a cell shorter than the shell) is no bond to swap across
            table[k, rows, fill[rows]] = np.where(partner == rows, -1, partner)
            fill[rows] += 1
    return ids, table, distances


def arrange(plan, structure, placements, rng: np.random.Generator):
    """The structure with the recipe's arrangement applied to its substituted
    sublattice, the placements updated to where each species ends up, and the
    search's facts for the report (None without an arrangement)."""
    spec_recipe = plan.recipe.defects.arrangement
    if spec_recipe is None:
        return structure, placements, None
    crystal = plan.crystal
    subs = [p for p in placements if p.kind == "substitution"]
    labels = {crystal.sublattice[int(s)] for p in subs for s in np.unique(p.site_ids % crystal.n_grid)}
    if len(labels) != 1:
        raise InputError("needs substitutions on one sublattice to arrange",
                         key="defects.arrangement", value=sorted(labels) or None,
                         hint="give every substitution the same `on:`", file=plan.recipe.source)
    label = labels.pop()
    ids, table, distances = neighbour_table(crystal, plan.repeat, label, spec_recipe.shells)
    where = np.full(len(ids), -1, dtype=np.int64)  # atom index on each sublattice site
    order = np.argsort(structure.site)
    found = np.searchsorted(structure.site, ids, sorter=order)
    hit = (found < structure.n_atoms) & (structure.site[order[np.minimum(found, structure.n_atoms - 1)]] == ids)
    where[hit] = order[found[hit]]
    codes = structure.species[where[hit]]
    present = np.unique(codes)
    spec = np.full(len(ids), -1, dtype=np.int64)
    spec[hit] = np.searchsorted(present, codes)
    conc = np.bincount(spec[hit], minlength=len(present)) / hit.sum()
    k = len(distances)
    weights = np.array([dict(spec_recipe.weights).get(i + 1, 1.0) for i in range(k)])
    target = np.array([spec_recipe.target_of(i + 1) for i in range(k)])
    best = spec.copy()
    seed = int(rng.integers(0, 2**31 - 1))
    best_f, taken, start_f = _anneal(spec, table, weights, target, conc, len(present),
                                     spec_recipe.steps, seed, 0.05, best)
    species = structure.species.copy()
    species[where[hit]] = present[best[hit]].astype(species.dtype)
    arranged = type(structure)(structure.cell, structure.positions, species, structure.symbols,
                               structure.site, structure.charges)
    placements = _moved(placements, arranged, crystal, label)
    facts = {"sublattice": label, "target": spec_recipe.target_text(), "shells": distances,
             "weights": weights.tolist(), "steps": int(taken), "objective": float(best_f),
             "random_objective": float(start_f)}
    return arranged, placements, facts


def _moved(placements, structure, crystal, label):
    """Substitution placements on ``label`` re-pointed at the sites that hold their
    element after the search (requests of one element share them in recipe order)."""
    from dataclasses import replace

    local = structure.site % crystal.n_grid
    on = np.isin(local, [i for i, lb in enumerate(crystal.sublattice) if lb == label])
    out, used = [], {}
    for p in placements:
        if p.kind != "substitution":
            out.append(p)
            continue
        code = structure.symbols.index(p.element)
        sites = np.sort(structure.site[on & (structure.species == code)])
        start = used.get(p.element, 0)
        out.append(replace(p, site_ids=sites[start:start + p.count]))
        used[p.element] = start + p.count
    return out
