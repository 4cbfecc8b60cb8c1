"""Checks of a built structure, computed from its coordinates.

Two independent routes meet here. The *expected* coordination of every atom
comes from topology: the lattice's neighbour offsets (geometry of the basis)
applied to the grid of occupied site ids, so a vacancy lowers its neighbours'
count by one and an interstitial raises it. The *counted* coordination comes
from the Cartesian coordinates alone, through the periodic neighbour engine.
The audit passes only when they agree atom by atom, among other checks.
"""
from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from . import neighbours
from .checks_common import MAX_CLOSE_PAIRS_LISTED, Check, histogram, spacegroup  # noqa: F401
from .build import (AVOGADRO, ANGSTROM3_TO_CM3, Plan, replicate, site_positions,
                    standard_atomic_weight)
from .crystal import Crystal
from .defects import Placement
from .short_range_order import warren_cowley
from .structure import Structure


@dataclass(frozen=True)
class Audit:
    """The checks and the measured quantities of one structure (JSON-ready ``values``)."""

    checks: tuple[Check, ...]
    values: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)


# ----------------------------------------------------------------------------- topology


def expected_coordination(structure: Structure, crystal: Crystal,
                          repeat: tuple[int, int, int]) -> np.ndarray:
    """Per-atom neighbour count implied by which grid sites are occupied.

    Uses array shifts of the occupancy grid: cost linear in the number of cells
    times the number of neighbour offsets; no per-atom Python loop. Small
    supercells gather each atom's neighbour sites from a table kept per
    (crystal, repeat) instead: the same counts without a padded grid per site.
    """
    n_grid = crystal.n_grid
    shape = (*repeat, n_grid)
    table = _neighbour_sites(crystal, tuple(repeat))
    # every atom on a grid site (a site id of -1 would index the table's padding slot)
    if table is not None and (structure.n_atoms == 0 or int(structure.site.min()) >= 0):
        occupied = np.zeros(math.prod(shape) + 1, dtype=np.uint8)  # last: the padding slot
        occupied[structure.site] = 1
        return occupied[table[structure.site]].sum(axis=1, dtype=np.int32)
    occupied = np.zeros(math.prod(shape), dtype=np.uint8)
    occupied[structure.site] = 1
    occupied = occupied.reshape(shape)
    present = occupied.reshape(-1, n_grid).any(axis=0)
    used = [(s, d, t) for s, d, t in crystal.offsets if present[s] and present[t]]
    expected = np.zeros(shape, dtype=np.int16)
    if used:
        # expected[i, j, k, s] += occupied[i + di, j + dj, k + dk, t] (periodic): each
        # sublattice grid t is padded around once, so a shift is a strided view and
        # no grid-sized array is allocated per offset (np.roll made one each)
        reach = np.abs(np.array([d for _, d, _ in used])).max(axis=0)
        n1, n2, n3 = repeat
        padded = {t: np.pad(occupied[..., t], [(r, r) for r in reach.tolist()], mode="wrap")
                  for t in dict.fromkeys(t for _, _, t in used)}
        total = np.empty(repeat, dtype=np.int16)
        for s in dict.fromkeys(s for s, _, _ in used):
            total.fill(0)
            for _, (di, dj, dk), t in (o for o in used if o[0] == s):
                a, b, c = reach[0] + di, reach[1] + dj, reach[2] + dk
                total += padded[t][a:a + n1, b:b + n2, c:c + n3]
            expected[..., s] = total
    return expected.reshape(-1)[structure.site].astype(np.int32)


#: Grid sites x offsets up to which :func:`expected_coordination` gathers from a
#: neighbour table (2 MB of int64) instead of shifting the occupancy grid.
_TABLE_ENTRIES = 1 << 18


@lru_cache(maxsize=16)
def _neighbour_sites(crystal: Crystal, repeat: tuple[int, int, int]) -> np.ndarray | None:
    """(grid sites, K) flat ids of each site's audit neighbours (the crystal's
    offset table), padded with the id one past the last site; read-only. None
    when the table would exceed :data:`_TABLE_ENTRIES` entries. Kept per
    process: a library of one size asks again for every structure."""
    from .crystal import supercell_bonds

    n_grid, n_sites = crystal.n_grid, math.prod(repeat) * crystal.n_grid
    per_site = [[o for o in crystal.offsets if o[0] == s] for s in range(n_grid)]
    width = max((len(p) for p in per_site), default=0)
    if n_sites * width > _TABLE_ENTRIES:
        return None
    table = np.full((math.prod(repeat), n_grid, width), n_sites, dtype=np.int64)
    for s, bonds in enumerate(per_site):
        if bonds:
            table[:, s, :len(bonds)] = supercell_bonds(repeat, n_grid, bonds)[1]
    table = table.reshape(n_sites, width)
    table.flags.writeable = False
    return table


def counts_within(structure: Structure, crystal: Crystal, *, workers: int = 2,
                  sites=None, scale: float = 1.0) -> np.ndarray:
    """Neighbours of each atom closer than its grid site's audit cutoff
    (:attr:`Crystal.grid_cutoff`, Angstrom), from coordinates; (N,) int32.

    One neighbour count per distinct cutoff (one for an element, at most one per
    sublattice for a compound), each atom taking the count made with its cutoff;
    ``scale`` multiplies every cutoff (a strained cell).
    """
    values = np.unique(crystal.grid_cutoff) * scale
    counted = neighbours.coordination_counts(structure.cell, structure.positions,
                                             float(values[-1]), workers=workers, sites=sites)
    if len(values) > 1:
        which = np.searchsorted(values, crystal.grid_cutoff * scale)[structure.site % crystal.n_grid]
        for k, value in enumerate(values[:-1]):
            counts = neighbours.coordination_counts(structure.cell, structure.positions,
                                                    float(value), workers=workers, sites=sites)
            mine = which == k
            counted[mine] = counts[mine]
    return counted


# ----------------------------------------------------------------------------- the audit


def audit(plan: Plan, structure: Structure, placements: list[Placement],
          *, workers: int = 2) -> Audit:
    """Run every check on ``structure``, built from ``plan`` with ``placements``."""
    recipe, crystal = plan.recipe, plan.crystal
    cutoff = crystal.audit_cutoff
    checks: list[Check] = []
    values: dict = {}

    values["ideal_crystal"] = copy.deepcopy(_ideal_crystal(crystal))
    checks.append(_atoms_per_cell_check(plan, structure, placements))

    composition = structure.composition()
    values["composition"] = composition
    checks.append(_composition_check(plan, composition, placements))

    values["sublattices"], check = _sublattice_check(plan, structure, placements)
    checks.append(check)

    values["net_charge"] = structure.net_charge()
    if values["net_charge"] is not None:
        checks.append(_net_charge_check(values["net_charge"], recipe.checks.net_charge))

    lengths = np.linalg.norm(structure.cell, axis=1)
    values["cell_lengths"] = [float(x) for x in lengths]
    checks.append(_cell_check(plan, structure.cell))

    density = _density(structure)
    values["density"] = density
    if recipe.crystal.density is not None and not placements:
        ok = math.isclose(density, recipe.crystal.density, rel_tol=1e-9)
        checks.append(Check("density", ok,
                            f"{density:.6f} g/cm^3 from atoms and volume; asked {recipe.crystal.density}"))

    sites = neighbours.locate_grid(structure.cell, structure.positions)  # shared by two checks
    counted = counts_within(structure, crystal, workers=workers, sites=sites)
    expected = expected_coordination(structure, crystal, plan.repeat)
    mismatched = int(np.count_nonzero(counted != expected))
    values["coordination"] = _coordination_values(structure, counted, cutoff, mismatched)
    values["coordination"]["cutoff_by_sublattice"] = {
        label: c for label, c in zip(crystal.sublattice, crystal.site_cutoff)}
    within = (f"{cutoff:.4f} Angstrom" if len(set(crystal.site_cutoff)) == 1
              else "each sublattice's first-shell cutoff")
    checks.append(Check(
        "coordination", mismatched == 0,
        f"{mismatched} of {structure.n_atoms} atoms have a neighbour count (within "
        f"{within}, from coordinates) that differs from the lattice topology"))

    checks.append(_distance_check(recipe, structure, crystal.nearest, values, workers, sites))
    # a fact of the arrangement, not a check: reported for every mixed sublattice
    values["short_range_order"] = warren_cowley(structure, crystal, plan.repeat)
    vacant = [site_positions(crystal, plan.repeat, p.site_ids)
              for p in placements if p.kind == "vacancy"]
    values["space_group"] = structure_spacegroup(
        structure, np.concatenate(vacant) if vacant else None,
        supercell_of=(crystal, plan.repeat) if placements else None)
    bulk = crystal.surface is None and crystal.boundary is None  # interfaces have their own
    if not placements and values["space_group"]["number"] is not None and bulk:
        # a check only where it can fail: a perfect structure small enough for spglib
        checks.append(_space_group_check(values["space_group"], values["ideal_crystal"]))
    return Audit(tuple(checks), values)


@lru_cache(maxsize=64)
def _ideal_crystal(crystal: Crystal) -> dict:
    """Facts of the ideal crystal, measured on one perfect conventional cell built
    by the same code: atoms per cell, nearest-neighbour distance (Angstrom),
    coordination, packing fraction and space group (spglib).

    These describe the crystal asked for, not the built structure, so they are
    reported as facts, never as checks. Cached: a library of many small
    structures of one crystal measures it once per process. Callers copy the
    returned dict before changing it.
    """
    crystal = crystal.parent or crystal  # facts of the crystal, not of an oriented box
    cell = replicate(crystal, (1, 1, 1), symbols=tuple(dict.fromkeys(crystal.elements)))
    d_nn, _, _ = neighbours.min_distance(cell.cell, cell.positions, workers=1)
    counts = counts_within(cell, crystal, workers=1)
    # touching equal spheres: a fact of one-element crystals only (ions differ in size)
    packing = (cell.n_atoms * (4.0 / 3.0) * math.pi * (d_nn / 2.0) ** 3 / cell.volume
               if len(set(crystal.elements)) == 1 else None)
    symbol, number = spacegroup(cell)
    return {
        "atoms_per_cell": cell.n_atoms,
        "nearest_neighbour_distance": d_nn,
        "coordination": int(counts.max()),
        "packing_fraction": packing,
        "space_group": {"symbol": symbol, "number": number},
        "expected_space_group": {"symbol": crystal.space_group[0],
                                 "number": crystal.space_group[1]},
    }


#: spglib's cost grows about as N^2 (4,000 atoms: 0.6 s, 16,000: 9 s on the
#: development machine), so the built structure's space group is computed up to here.
MAX_SPACEGROUP_ATOMS = 2000
#: Distance tolerance (Angstrom) for spglib on the built structure: atoms sit on
#: exact lattice sites, so only rounding needs forgiving.
STRUCTURE_SYMPREC = 1e-4


def structure_spacegroup(structure: Structure, vacancies: np.ndarray | None = None,
                         supercell_of=None) -> dict:
    """Space group of the built structure (defects included), from spglib.

    ``vacancies`` (Cartesian, Angstrom) are passed to spglib as atoms of a marker
    species: an operation keeps the atoms in place exactly when it keeps the
    vacant sites in place (the defects sit on sites of the perfect lattice), and
    the marker spares spglib a search over every atom for lattice translations
    that no longer exist (1,999 bcc atoms with one vacancy: 61 s unmarked,
    0.17 s marked, on the development machine). Returns ``symbol``, ``number`` and
    ``symprec`` (Angstrom); above :data:`MAX_SPACEGROUP_ATOMS` atoms, ``symbol``
    and ``number`` are None and ``note`` says why.

    ``supercell_of``: ``(crystal, repeat)`` when ``structure`` is that supercell
    with defects; the operations then come from the crystal's
    (:func:`cellbuild.site_symmetry.defected_spacegroup`) where they provably are
    the structure's: the same answer as spglib's search, at a fraction of its cost.
    """
    if structure.n_atoms > MAX_SPACEGROUP_ATOMS:
        return {"symbol": None, "number": None, "symprec": STRUCTURE_SYMPREC,
                "note": f"not computed: {structure.n_atoms:,} atoms is more than the "
                        f"{MAX_SPACEGROUP_ATOMS:,} for which spglib takes under a second"}
    if supercell_of is not None:
        from .site_symmetry import defected_spacegroup

        known = defected_spacegroup(*supercell_of, structure,
                                    0 if vacancies is None else len(vacancies))
        if known is not None:
            return {"symbol": known[0], "number": known[1], "symprec": STRUCTURE_SYMPREC}
    marked = structure
    if vacancies is not None and len(vacancies):
        marker = np.full(len(vacancies), len(structure.symbols), dtype=structure.species.dtype)
        marked = Structure(structure.cell, np.concatenate([structure.positions, vacancies]),
                           np.concatenate([structure.species, marker]),
                           structure.symbols + ("X",))
    symbol, number = spacegroup(marked, symprec=STRUCTURE_SYMPREC)
    return {"symbol": symbol, "number": number, "symprec": STRUCTURE_SYMPREC}


def _space_group_check(found: dict, ideal: dict) -> Check:
    """A perfect supercell has the space group of its crystal (a supercell keeps
    every point operation and gains only translations)."""
    want = ideal["expected_space_group"]
    return Check("space_group", found["number"] == want["number"],
                 f"spglib finds {found['symbol']} ({found['number']}) for the built structure "
                 f"(symprec {found['symprec']} Angstrom); the crystal is {want['symbol']} "
                 f"({want['number']})")


def _atoms_per_cell_check(plan: Plan, structure: Structure, placements) -> Check:
    """Every conventional cell holds the basis count, counting vacant sites back in.

    Atoms are assigned to cells from their coordinates; interstitials (known from
    the placements) are left out.
    """
    crystal = plan.crystal
    vacant = np.concatenate([p.site_ids for p in placements if p.kind == "vacancy"] or
                            [np.empty(0, np.int64)])
    cells = np.empty(structure.n_atoms + len(vacant), dtype=np.int64)
    filled = 0
    # in chunks that stay in cache, without a copy of all the positions
    for part, on_lattice in _lattice_chunks(structure, crystal):
        found = _cell_of(crystal, plan.repeat, structure.positions[part][on_lattice])
        cells[filled:filled + len(found)] = found
        filled += len(found)
    found = _cell_of(crystal, plan.repeat, site_positions(crystal, plan.repeat, vacant))
    cells[filled:filled + len(found)] = found
    cells = cells[:filled + len(found)]
    per_cell = np.bincount(cells, minlength=plan.n_cells)
    z = crystal.n_basis
    unit = "conventional cell" if crystal.parent is None else "repeat unit"
    low, high = int(per_cell.min()), int(per_cell.max())
    return Check("atoms_per_cell", low == high == z,
                 f"{low}..{high} lattice sites per {unit} from coordinates "
                 f"(vacant sites counted); the basis has {z}")


#: Atoms handled per chunk by the audit's per-atom passes (positions of this many
#: atoms, 6 MB, stay in cache between the steps of a pass).
_CHUNK_ATOMS = 1 << 18


def _lattice_chunks(structure: Structure, crystal: Crystal):
    """(slice of atoms, bool mask of those on lattice sites, not interstitial),
    chunk by chunk over the atoms in file order."""
    for start in range(0, structure.n_atoms, _CHUNK_ATOMS):
        part = slice(start, min(start + _CHUNK_ATOMS, structure.n_atoms))
        yield part, structure.site[part] % crystal.n_grid < crystal.n_basis


def _cell_of(crystal: Crystal, repeat: tuple[int, int, int], points: np.ndarray) -> np.ndarray:
    """Conventional cell (numbered as the sites are) of each point (Cartesian, Angstrom)."""
    idx = np.floor(crystal.to_fractional(points) + 1e-9).astype(np.int64) % np.array(repeat)
    n1, n2, n3 = repeat
    return (idx[:, 0] * n2 + idx[:, 1]) * n3 + idx[:, 2]


def _composition_check(plan: Plan, composition: dict[str, int], placements) -> Check:
    expected: dict[str, int] = {}
    for element in plan.crystal.elements:  # one entry per basis site
        expected[element] = expected.get(element, 0) + plan.n_cells
    for p in placements:
        if p.host is not None:  # the element the sites held: removed or replaced
            expected[p.host] -= p.count
        if p.kind != "vacancy":
            expected[p.element] = expected.get(p.element, 0) + p.count
    expected = {k: v for k, v in expected.items() if v}
    ok = composition == expected
    return Check("composition", ok,
                 f"counted {_formula(composition)}; the recipe asks {_formula(expected)}")


def _sublattice_check(plan: Plan, structure: Structure, placements) -> tuple[dict, Check]:
    """Atoms of each element on each sublattice, against the perfect crystal with
    the placements applied; every lattice atom must also sit, from its
    coordinates, within 1e-6 Angstrom of its grid site (so a sublattice is
    where its atoms are, not only what their site ids say)."""
    crystal = plan.crystal
    labels = tuple(dict.fromkeys(crystal.sublattice))
    label_of_site = np.array([labels.index(lb) for lb in crystal.sublattice], dtype=np.int64)
    n_sym = len(structure.symbols)
    counted = np.zeros(len(labels) * n_sym, dtype=np.int64)
    off = 0.0
    # one pass in chunks: the counts and the distance of each atom from its site
    for part, on_lattice in _lattice_chunks(structure, crystal):
        site = structure.site[part][on_lattice]
        code = label_of_site[site % crystal.n_grid] * n_sym + structure.species[part][on_lattice]
        counted += np.bincount(code, minlength=len(labels) * n_sym)
        ideal = site_positions(crystal, plan.repeat, site)
        off = max(off, _periodic_offset(structure.cell,
                                        structure.positions[part][on_lattice] - ideal))
    counted = counted.reshape(len(labels), n_sym)
    expected = np.zeros_like(counted)
    for s, element in enumerate(crystal.elements):
        expected[label_of_site[s], structure.symbols.index(element)] += plan.n_cells
    for p in placements:
        if p.host is None:
            continue
        where = np.bincount(label_of_site[p.site_ids % crystal.n_grid], minlength=len(labels))
        expected[:, structure.symbols.index(p.host)] -= where
        if p.kind != "vacancy":
            expected[:, structure.symbols.index(p.element)] += where
    found = {lb: {e: int(n) for e, n in zip(structure.symbols, row) if n}
             for lb, row in zip(labels, counted)}
    ok = bool(np.array_equal(counted, expected)) and off <= 1e-6
    wanted = {lb: {e: int(n) for e, n in zip(structure.symbols, row) if n}
              for lb, row in zip(labels, expected)}
    text = "; ".join(f"{lb}: {_formula(found[lb])}" for lb in labels)
    return found, Check("sublattice_occupancy", ok,
                        f"{text} (from site ids; atoms at most {off:.1e} Angstrom from their "
                        f"sites); expected " + "; ".join(f"{lb}: {_formula(wanted[lb])}"
                                                         for lb in labels))


def _periodic_offset(cell: np.ndarray, delta: np.ndarray) -> float:
    """Largest length (Angstrom) of ``delta`` vectors taken modulo the cell."""
    if not len(delta) or not delta.any():
        return 0.0  # every atom exactly on its site (a fresh build): no product needed
    frac = delta @ np.linalg.inv(cell)
    frac -= np.round(frac)
    return float(np.sqrt(np.max(np.einsum("ij,ij->i", frac @ cell, frac @ cell))))


def _net_charge_check(net: float, expected: float) -> Check:
    """The cell's net charge (from every atom's charge) against ``checks.net_charge``."""
    ok = abs(net - expected) <= 1e-6
    return Check("net_charge", ok,
                 f"net charge {net:+.6f} e from the atoms' charges; expected {expected:+g} "
                 "(checks.net_charge)")


def _formula(composition: dict[str, int]) -> str:
    return " ".join(f"{k}{v}" for k, v in composition.items()) or "nothing"


def _cell_check(plan: Plan, cell: np.ndarray) -> Check:
    expected = plan.crystal.supercell(plan.repeat)
    ok = bool(np.allclose(cell, expected, rtol=0, atol=1e-9 * plan.lattice_constant))
    lengths = ", ".join(f"{x:.6f}" for x in np.linalg.norm(cell, axis=1))
    if _is_cubic(plan.crystal.cell):  # the wording of the cubic case, kept for its reports
        return Check("cell_lengths", ok,
                     f"box {lengths} Angstrom, orthogonal: {ok}; expected repeat x a = "
                     + " x ".join(str(n) for n in plan.repeat) + f" x {plan.lattice_constant:.6f}")
    want = ", ".join(f"{x:.6f}" for x in np.linalg.norm(expected, axis=1))
    return Check("cell_lengths", ok,
                 f"box vectors of length {lengths} Angstrom; expected repeat "
                 + " x ".join(str(n) for n in plan.repeat)
                 + f" times the conventional cell ({want}), vectors equal: {ok}")


def _is_cubic(cell: np.ndarray) -> bool:
    return bool(np.all(cell == np.diag(np.diag(cell))) and np.all(np.diag(cell) == cell[0, 0]))


def _density(structure: Structure) -> float:
    """Mass density in g/cm^3 from the atoms present and the cell volume."""
    masses = np.array([standard_atomic_weight(s) for s in structure.symbols])
    mass = float(structure.counts() @ masses)  # g/mol in the cell
    return mass / (AVOGADRO * structure.volume * ANGSTROM3_TO_CM3)


def _coordination_values(structure: Structure, counted: np.ndarray, cutoff: float,
                         mismatched: int) -> dict:
    return {
        "cutoff": cutoff,
        "histogram": histogram(counted),
        "by_species": {
            sym: histogram(counted[structure.species == code])
            for code, sym in enumerate(structure.symbols)
            if np.any(structure.species == code)
        },
        "mismatched": mismatched,
    }


def _distance_check(recipe, structure: Structure, d_nn: float, values: dict,
                    workers: int, sites) -> Check:
    threshold = recipe.checks.min_distance or 0.5 * d_nn
    d, i, j = neighbours.min_distance(structure.cell, structure.positions, workers=workers,
                                      sites=sites)
    if d >= threshold:  # the closest pair is far enough: no pair can be closer
        pi = pj = np.zeros(0, np.int64)
        pd = np.zeros(0)
    else:
        pi, pj, pd = neighbours.close_pairs(structure.cell, structure.positions, threshold,
                                            workers=workers)
    values["min_distance"] = d
    values["min_distance_pair"] = [int(i), int(j)]
    values["close_pairs"] = {
        "threshold": threshold,
        "count": int(pd.size),
        "pairs": [[int(x), int(y), float(z)] for x, y, z in
                  zip(pi[:MAX_CLOSE_PAIRS_LISTED], pj[:MAX_CLOSE_PAIRS_LISTED],
                      pd[:MAX_CLOSE_PAIRS_LISTED])],
    }
    return Check("min_distance", pd.size == 0,
                 f"closest pair {d:.4f} Angstrom (atoms {i} and {j}); {pd.size} pairs closer "
                 f"than {threshold:.4f}")
