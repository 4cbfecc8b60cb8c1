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

from .crystal import supercell_bonds
from .errors import InputError
from .short_range_order import VACANCY, sublattice_shells


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


#: Steps per call of the compiled kernel. The random numbers of each call are
#: drawn from the recipe's generator in blocks of this size, so the stream, and
#: with it the result, is the same whether or not progress is shown.
CHUNK = 1 << 16


@njit(cache=True)
def _pair_counts(spec, neigh, n_species):
    """Pair counts (shells, species, species) of the arrangement ``spec`` (-1: not counted)."""
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
    return counts


@njit(cache=True)
def _keep(top_f, top, spec, f):
    """Offer the arrangement ``spec`` (objective ``f``) to the kept best ones:
    it replaces the worst kept unless it is no better or is kept already (an
    equal arrangement has an equal objective, so only those are compared)."""
    worst = 0
    for e in range(top_f.size):
        if top_f[e] > top_f[worst]:
            worst = e
    if f >= top_f[worst]:
        return
    for e in range(top_f.size):
        if top_f[e] == f:
            same = True
            for i in range(spec.size):
                if top[e, i] != spec[i]:
                    same = False
                    break
            if same:
                return
    top_f[worst] = f
    top[worst, :] = spec


@njit(cache=True)
def _anneal(spec, counts, neigh, weights, target, conc, occupied, first, second, uniform,
            step0, steps, t0, f, top_f, top):
    """``len(first)`` annealing steps from step ``step0`` of ``steps``: swap the
    species on sites ``occupied[first[s]]`` and ``occupied[second[s]]``, accept
    by the Metropolis rule against ``uniform[s]`` at a temperature falling
    linearly from ``t0`` to zero. ``spec`` and ``counts`` carry the current
    arrangement between calls; ``top_f``/``top`` receive the best distinct ones.
    Returns (current objective, steps taken); stops early once every kept
    arrangement meets the target exactly (objective below 1e-12)."""
    taken = 0
    for s in range(first.size):
        taken += 1
        i = occupied[first[s]]
        j = occupied[second[s]]
        a, b = spec[i], spec[j]
        if a == b:
            continue
        _move(counts, neigh, spec, i, a, b, j)
        _move(counts, neigh, spec, j, b, a, i)
        spec[i], spec[j] = b, a
        g = _objective_of(counts, weights, target, conc)
        temperature = t0 * (1.0 - (step0 + s) / steps)
        if g <= f or uniform[s] < math.exp(-(g - f) / max(temperature, 1e-300)):
            f = g
            if f < 1e-12:
                _keep(top_f, top, spec, f)
                if top_f.max() < 1e-12:
                    break
            else:
                _keep(top_f, top, spec, f)
        else:
            spec[i], spec[j] = a, b
            _move(counts, neigh, spec, i, b, a, j)
            _move(counts, neigh, spec, j, a, b, i)
    return f, taken


def search(spec, table, weights, target, conc, steps, rng, keep=1, progress=None):
    """Anneal the arrangement ``spec`` (species code per sublattice site, -1 for
    sites that take no part) towards the target; returns (the ``keep`` best
    distinct arrangements found, best first, as rows; their objectives; steps
    taken; objective of the starting arrangement). ``progress(fraction, best)``
    is told after each block of :data:`CHUNK` steps."""
    spec = spec.copy()
    n_species = len(conc)
    counts = _pair_counts(spec, table, n_species)
    f = _objective_of(counts, weights, target, conc)
    start_f = f
    top_f = np.full(keep, np.inf)
    top = np.full((keep, spec.size), -1, dtype=np.int64)
    _keep(top_f, top, spec, f)
    occupied = np.flatnonzero(spec >= 0)
    t0 = max(0.05 * f, 1e-12)
    taken = 0
    for step0 in range(0, steps, CHUNK):
        if top_f.max() < 1e-12:
            break
        m = min(CHUNK, steps - step0)
        first = rng.integers(0, occupied.size, size=m)
        second = rng.integers(0, occupied.size, size=m)
        uniform = rng.random(m)
        f, done = _anneal(spec, counts, table, weights, target, conc, occupied, first, second,
                          uniform, step0, steps, t0, f, top_f, top)
        taken += done
        if progress is not None:
            progress((step0 + m) / steps, float(top_f.min()))
    order = np.argsort(top_f, kind="stable")
    return top[order], top_f[order], taken, start_f


def neighbour_table(crystal, repeat, label: str, n_shells: int):
    """(site ids of sublattice ``label`` in the supercell, (shells, sites, z)
    neighbour indices into that list, -1 padded, shell distances in Angstrom)."""
    local = np.array([i for i, lb in enumerate(crystal.sublattice) if lb == label])
    n_cells = math.prod(repeat)
    ids = (np.arange(n_cells)[:, None] * crystal.n_grid + local[None, :]).ravel()
    index = np.full(n_cells * crystal.n_grid, -1, dtype=np.int64)
    index[ids] = np.arange(len(ids))
    distances, shells = sublattice_shells(crystal, label, n_shells)
    zmax = max(sum(1 for o in offsets if o[0] == local[0]) for offsets in shells)
    table = np.full((len(shells), len(ids), zmax), -1, dtype=np.int64)
    for k, offsets in enumerate(shells):
        fill = np.zeros(len(ids), dtype=np.int64)
        centre, far = supercell_bonds(repeat, crystal.n_grid, offsets)  # (cells, offsets)
        for b in range(len(offsets)):  # a handful of offsets
            rows = index[centre[:, b]]
            partner = index[far[:, b]]
            # a site's own image (a cell shorter than the shell) is no bond to swap across
            table[k, rows, fill[rows]] = np.where(partner == rows, -1, partner)
            fill[rows] += 1
    return ids, table, list(distances)


def arrange(plan, perfect, placements, rng: np.random.Generator, progress=None):
    """The placements re-pointed at the arrangement the search reaches on the
    substituted sublattice (vacancies there too when the recipe lets them take
    part), and the search's facts for the report; unchanged placements and None
    without an arrangement. ``perfect`` is the defect-free structure (for the
    species of the sites no placement names). ``progress(text)`` hears the
    search's progress. With ``structures: N``, the recipe's ``variant`` (1 to N)
    picks which of the N best distinct arrangements is returned."""
    request = plan.recipe.defects.arrangement
    if request is None:
        return placements, None
    crystal = plan.crystal
    label = _arranged_sublattice(plan, placements)
    ids, table, distances = neighbour_table(crystal, plan.repeat, label, request.shells)
    names, spec = _species_on(plan, perfect, placements, ids, label, request.vacancies)
    conc = np.bincount(spec[spec >= 0], minlength=len(names)) / np.count_nonzero(spec >= 0)
    k = len(distances)
    weights = np.array([dict(request.weights).get(i + 1, 1.0) for i in range(k)])
    target = np.array([request.target_of(i + 1) for i in range(k)])
    rank = plan.recipe.variant or 1 if request.structures > 1 else 1
    rows, objectives, taken, start_f = search(spec, table, weights, target, conc, request.steps,
                                              rng, keep=request.structures,
                                              progress=_every_tenth(progress))
    found = int(np.isfinite(objectives).sum())
    if found < rank:
        raise InputError(f"asks for more arrangements than the {found} distinct ones the search "
                         f"met", key="defects.arrangement.structures", value=request.structures,
                         hint="ask for fewer, or give more steps", file=plan.recipe.source)
    best = rows[rank - 1]
    facts = {"sublattice": label, "target": request.target_text(), "shells": distances,
             "weights": weights.tolist(), "steps": int(taken),
             "objective": float(objectives[rank - 1]), "random_objective": float(start_f),
             "best_random_objective": best_random(spec, table, weights, target, conc,
                                                  np.random.default_rng([plan.recipe.seed, 2])),
             "random_draws": RANDOM_DRAWS, "species": names,
             "alpha": _alphas(best, table, names, conc)}
    if request.structures > 1:
        facts.update(rank=rank, of=request.structures)
    return _moved(placements, crystal, label, ids, names, best), facts


#: Random arrangements drawn to compare the search's result with.
RANDOM_DRAWS = 100


def best_random(spec, table, weights, target, conc, rng, draws: int = RANDOM_DRAWS) -> float:
    """The lowest objective of ``draws`` random arrangements of the same species
    on the same sites (the yardstick for the search: what drawing alone reaches)."""
    taking_part = np.flatnonzero(spec >= 0)
    trial = spec.copy()
    best = np.inf
    for _ in range(draws):  # a handful of draws, each one compiled count
        trial[taking_part] = rng.permutation(spec[taking_part])
        best = min(best, _objective_of(_pair_counts(trial, table, len(conc)), weights, target,
                                       conc))
    return float(best)




def _every_tenth(progress):
    """A ``search`` progress callback passing ``progress`` one line per 10 % (None: None)."""
    if progress is None:
        return None
    marks = iter(range(10, 101, 10))
    due = [next(marks)]

    def tell(fraction, best):
        while due[0] is not None and fraction * 100 >= due[0]:
            progress(f"arrangement {due[0]} % (best objective {best:.3g})")
            due[0] = next(marks, None)

    return tell


def _arranged_sublattice(plan, placements) -> str:
    """The one sublattice the substitutions are on (refused otherwise)."""
    crystal = plan.crystal
    subs = [p for p in placements if p.kind == "substitution"]
    labels = {crystal.sublattice[int(s)] for p in subs for s in np.unique(p.site_ids % crystal.n_grid)}
    if len(labels) != 1:
        raise InputError("needs substitutions on one sublattice to arrange",
                         key="defects.arrangement", value=sorted(labels) or None,
                         hint="give every substitution the same `on:`", file=plan.recipe.source)
    return labels.pop()


def _species_on(plan, perfect, placements, ids, label, vacancies: bool):
    """(names of the species taking part, in type order, species code per
    sublattice site): the perfect crystal's element, then each placement's
    element on its sites; vacant sites are -1 (no part), or the last species,
    :data:`VACANCY`, when ``vacancies``."""
    n_grid, n_basis = plan.crystal.n_grid, plan.crystal.n_basis
    cell, s = np.divmod(ids, n_grid)
    held = perfect.species[cell * n_basis + s].astype(np.int64)  # atoms are in site order
    vacant = len(perfect.symbols)
    for p in placements:
        if p.kind == "interstitial":
            continue
        at = np.searchsorted(ids, p.site_ids)
        mine = (at < ids.size) & (ids[np.minimum(at, ids.size - 1)] == p.site_ids)
        held[at[mine]] = vacant if p.kind == "vacancy" else perfect.symbols.index(p.element)
    codes = np.unique(held)
    if not vacancies:
        codes = codes[codes != vacant]
    names = [perfect.symbols[c] if c < vacant else VACANCY for c in codes]
    at = np.searchsorted(codes, held)
    taking_part = (at < codes.size) & (codes[np.minimum(at, codes.size - 1)] == held)
    return names, np.where(taking_part, at, -1).astype(np.int64)


def _alphas(spec, table, names, conc) -> dict:
    """Warren-Cowley alphas of the arrangement per unlike pair: {"A-B": [per shell]}."""
    from .short_range_order import alpha_table

    counts = _pair_counts(spec, table, len(names))
    return alpha_table(counts, names, conc)


def _moved(placements, crystal, label, ids, names, spec):
    """Placements on ``label`` re-pointed at the sites that hold their species in
    the arrangement ``spec`` (requests of one species share them in recipe order)."""
    from dataclasses import replace

    out, used = [], {}
    for p in placements:
        on_label = p.kind in ("substitution", "vacancy") and p.site_ids.size and \
            crystal.sublattice[int(p.site_ids[0] % crystal.n_grid)] == label
        name = VACANCY if p.kind == "vacancy" else p.element
        if not on_label or name not in names:
            out.append(p)
            continue
        sites = ids[spec == names.index(name)]  # ids ascend, so these do too
        start = used.get(name, 0)
        out.append(replace(p, site_ids=sites[start:start + p.count]))
        used[name] = start + p.count
    return out
