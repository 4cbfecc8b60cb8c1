"""Recipes that stand for several structures, and the distinct configurations.

Two recipe keys make one recipe (or one sweep point) stand for several
structures, each a recipe of its own with a ``variant`` number:

* ``defects.arrangement.structures: N`` -- the N best distinct arrangements
  the search meets, ``NAME__sqs-1`` (best) to ``NAME__sqs-N``;
* ``defects.placement: distinct`` -- every symmetry-inequivalent placement of
  the requested defects in the supercell, ``NAME__config-1`` to
  ``NAME__config-M``, compact ones first: by the sum of the periodic distances
  between the defects, ties in the lexicographic order of each
  configuration's smallest grid site ids.

For ``distinct``, the symmetry operations are those spglib finds for the perfect
supercell (translations included), with every grid site of it, interstitial
sites too, typed by its sublattice label (or interstitial kind), so an
operation maps each request's sites onto themselves. A configuration's
multiplicity is the number of placements its orbit holds; they sum to the
number of placements. Enumerations are cached per recipe (names aside) within
a process, since each variant of a recipe asks for the same one.
"""
from __future__ import annotations

from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np

from .errors import InputError

#: Largest supercell (grid sites, interstitial sites included) that ``distinct``
#: enumerates on: every symmetry operation (48 x lattice points for cubic cells) is
#: held as a permutation of the sites, about 2 s and 200 MB at this size.
MAX_SITES = 640

#: Labels of the variant names.
SQS_LABEL = "sqs"
CONFIG_LABEL = "config"


@dataclass(frozen=True)
class Configurations:
    """Every distinct placement of a plan's defect requests.

    ``sites``: (configurations, k) grid site ids, each request's columns in
    plan order (``columns`` gives each request's slice); ``multiplicity``:
    placements per configuration; ``placements``: their total; ``operations``:
    the symmetry operations of the perfect supercell used."""

    sites: np.ndarray
    multiplicity: np.ndarray
    columns: tuple[tuple[int, int], ...]
    placements: int
    operations: int

    @property
    def count(self) -> int:
        return int(self.sites.shape[0])


def variants_of(recipe):
    """The recipes ``recipe`` stands for: itself, or one per variant (named
    ``NAME__sqs-K`` or ``NAME__config-K``, ``variant=K``). Resolves the plan and
    enumerates for ``placement: distinct`` (refusing too large a request)."""
    d = recipe.defects
    if d.placement == "distinct":
        from .build import resolve

        count = configurations(resolve(recipe)).count
        label = CONFIG_LABEL
    elif d.arrangement is not None and d.arrangement.structures > 1:
        count, label = d.arrangement.structures, SQS_LABEL
    else:
        return [recipe]
    return [replace(recipe, name=f"{recipe.name}__{label}-{k}", variant=k)
            for k in range(1, count + 1)]


def configurations(plan) -> Configurations:
    """The distinct configurations of ``plan``'s defect requests (cached per recipe)."""
    return _configurations(replace(plan.recipe, name="x", variant=None))


@lru_cache(maxsize=4)
def _configurations(recipe) -> Configurations:
    # keyed by the recipe without its name and variant: every variant of a recipe
    # (and every sweep point differing only in name) shares one enumeration
    from .build import resolve, site_positions
    from .configurations import (MAX_PLACEMENTS, count_placements, distinct_placements,
                                 site_permutations)

    plan = resolve(recipe)
    crystal = plan.crystal
    counts = list(plan.defect_counts)
    if not any(n for _, n in counts):
        raise InputError("has no defects to place", key="defects.placement", value="distinct",
                         hint="ask for vacancies, substitutions or interstitials",
                         file=recipe.source)
    # the lattice sites and the interstitial kinds asked for: the operations of the
    # lattice map each of those sets onto itself, so the others can be left out
    used = sorted(set(range(crystal.n_basis)).union(*(req.sites for req, _ in counts)))
    cells = np.arange(plan.n_cells, dtype=np.int64)[:, None]
    ids = (cells * crystal.n_grid + np.array(used)[None, :]).ravel()  # ascending
    if ids.size > MAX_SITES:
        raise InputError(f"needs a supercell of at most {MAX_SITES} sites (lattice and "
                         f"interstitial sites asked for); this one has {ids.size:,}",
                         key="defects.placement", value="distinct",
                         hint="choose a smaller size", file=recipe.source)
    frac = site_positions(crystal, plan.repeat, ids) @ np.linalg.inv(supercell(plan))
    kinds = [crystal.sublattice[s] if s < crystal.n_basis else f"interstitial {crystal.site_kind[s]}"
             for s in used]
    types = np.tile(np.unique(kinds, return_inverse=True)[1], plan.n_cells)
    groups = [(np.searchsorted(ids, (cells * crystal.n_grid + np.array(req.sites)[None, :])
                               .ravel()), n) for req, n in counts]
    total = count_placements(groups)  # refuse before finding the symmetry
    if total > MAX_PLACEMENTS:
        raise InputError(f"gives {total:,} placements, more than the {MAX_PLACEMENTS:,} "
                         f"cellbuild enumerates", key="defects.placement", value="distinct",
                         hint="use a smaller cell or fewer defects, or placement: random",
                         file=recipe.source)
    perms = site_permutations(supercell(plan), frac - np.floor(frac), types)
    found, multiplicity = distinct_placements(perms, groups)
    sites = ids[found]  # back to grid site ids (the map keeps the order)
    # compact configurations first (a divacancy's first neighbours are config-1):
    # by the sum of periodic distances between the defects, to 1e-6 A, then as found
    pos = site_positions(crystal, plan.repeat, sites.ravel()).reshape(*sites.shape, 3)
    i, j = np.triu_indices(sites.shape[1], 1)
    spread = periodic_distances(supercell(plan), pos[:, j] - pos[:, i]).sum(axis=1)
    order = np.lexsort((np.arange(len(sites)), np.round(spread, 6)))
    sites, multiplicity = sites[order], multiplicity[order]
    edges = np.cumsum([0] + [n for _, n in counts])
    return Configurations(sites, multiplicity, tuple(zip(edges[:-1].tolist(), edges[1:].tolist())),
                          int(multiplicity.sum()), int(perms.shape[0]))


def configuration_sites(plan) -> list[np.ndarray]:
    """The grid site ids of each request (plan order) in the recipe's variant."""
    found = configurations(plan)
    k = _variant(plan, found.count)
    return [found.sites[k - 1, a:b].copy() for a, b in found.columns]


def configuration_facts(plan) -> dict:
    """The report's facts about the variant's configuration: its number, how many
    there are, its multiplicity, the placements and operations behind them, and
    for two defects the periodic distance between them (Angstrom)."""
    from .build import site_positions

    found = configurations(plan)
    k = _variant(plan, found.count)
    facts = {"index": k, "configurations": found.count,
             "multiplicity": int(found.multiplicity[k - 1]), "placements": found.placements,
             "operations": found.operations, "pair_distance": None}
    if found.sites.shape[1] == 2:
        pos = site_positions(plan.crystal, plan.repeat, found.sites[k - 1])
        facts["pair_distance"] = round(float(periodic_distances(supercell(plan),
                                                                pos[1] - pos[0])), 10)
    return facts


def periodic_distances(cell: np.ndarray, delta: np.ndarray) -> np.ndarray:
    """The shortest lengths (Angstrom) of the vectors ``delta`` (..., 3) plus any
    lattice vector of ``cell`` (rows): wrapped to the nearest image, then the 27
    neighbouring images tried, which is exact for the reduced cells cellbuild builds."""
    f = delta @ np.linalg.inv(cell)
    f -= np.round(f)
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)])
    return np.linalg.norm((f[..., None, :] + shifts) @ cell, axis=-1).min(axis=-1)


def _variant(plan, count: int) -> int:
    k = plan.recipe.variant
    if k is None or k > count:
        raise InputError(f"stands for {count:,} structures; build each with its variant "
                         f"(cellbuild.variants.variants_of, or the command line)",
                         key="defects.placement", value="distinct",
                         hint="the command line and batch expand the recipe themselves",
                         file=plan.recipe.source)
    return k


def supercell(plan) -> np.ndarray:
    """The supercell's lattice vectors as rows, Angstrom."""
    return np.array(plan.repeat, dtype=float)[:, None] * plan.crystal.cell
