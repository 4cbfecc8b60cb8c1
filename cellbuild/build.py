"""From recipe to perfect crystal: lattice constant, supercell size, replication.

Site numbering: a supercell of ``repeat = (n1, n2, n3)`` conventional cells has
``n1*n2*n3`` cells, numbered ``cell = (i*n2 + j)*n3 + k``. Each cell holds the
sites of :func:`cellbuild.lattices.site_table` (lattice basis first, then the
interstitial kinds), so a site id is ``cell * sites_per_cell + s``. Atoms of a
perfect crystal occupy the lattice-basis sites in site-id order.
"""
from __future__ import annotations

import math
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import numpy as np

# the constants and weights live with inspect's checks, re-exported for the build side
from .checks_common import ANGSTROM3_TO_CM3, AVOGADRO, standard_atomic_weight  # noqa: F401
from .errors import InputError
from .formats import FORMATS
from .crystal import Crystal, resolve_cif, resolve_crystal
from .defect_plan import count_defects
from .lattices import LATTICES, touching_radius_factor
from .recipe import Recipe
from .structure import Structure

#: Peak bytes of memory per atom for a whole `make` (arrays, neighbour counts,
#: one writer chunk); measured by benchmarks/bench_make.py, rounded up.
BYTES_PER_ATOM = 400
#: Hard limits (Angstrom): beyond them numbers no longer fit the fixed-width
#: output fields with 1e-10 Angstrom resolution; far outside any real crystal.
MIN_CONSTANT, MAX_CONSTANT, MAX_BOX = 0.01, 1000.0, 1.0e6


@dataclass(frozen=True)
class Plan:
    """A resolved recipe: every number needed to build, before building.

    Lengths in Angstrom, memory and file sizes in bytes.
    """

    recipe: Recipe
    crystal: Crystal
    lattice_constant_source: str
    repeat: tuple[int, int, int]
    n_sites: int
    n_atoms: int
    box: tuple[float, float, float]
    estimated_memory: int
    estimated_files: dict[str, int]
    defect_counts: tuple = ()  # (defect_plan.Request, count) pairs in placement order
    warnings: tuple[str, ...] = ()

    @property
    def lattice_constant(self) -> float:
        """The conventional cell's ``a``, Angstrom."""
        return self.crystal.a

    @property
    def size_note(self) -> str | None:
        """How far the lattice-site count is from ``size.atoms``, when that was asked
        and not met exactly."""
        target = self.recipe.size.atoms
        if target is None or target == self.n_sites:
            return None
        diff = self.n_sites - target
        return (f"size.atoms asked {target:,}; the nearest compact supercell "
                f"{'x'.join(map(str, self.repeat))} has {self.n_sites:,} sites "
                f"({diff:+,}, {100.0 * diff / target:+.1f} %)")

    @property
    def n_cells(self) -> int:
        return math.prod(self.repeat)


def lattice_constant(recipe: Recipe) -> tuple[float, str]:
    """The lattice constant in Angstrom and a phrase saying where it came from."""
    crystal = recipe.crystal
    if crystal.a is not None:
        return crystal.a, "given (crystal.a)"
    if crystal.source_crystal is not None:
        return _cif_constant(recipe)
    if crystal.density is not None:
        unit = _unit_crystal(recipe)  # g/mol per conventional cell over its volume in a^3
        mass = sum(standard_atomic_weight(e) for e in unit.elements)
        volume_cm3 = mass / (AVOGADRO * crystal.density)
        weights = "weights" if len(crystal.elements()) > 1 else "weight"
        return (volume_cm3 / ANGSTROM3_TO_CM3 / unit.volume) ** (1.0 / 3.0), (
            f"from density {crystal.density} g/cm^3 and the standard atomic {weights}")
    if crystal.radius is not None:
        factor = (touching_radius_factor(crystal.lattice) if crystal.lattice in LATTICES
                  else 0.5 * _unit_crystal(recipe).nearest)
        return crystal.radius / factor, (
            f"from touching spheres of radius {crystal.radius} Angstrom")
    return _reference_constant(recipe), "reference value of ASE's data table"


def _cif_constant(recipe: Recipe) -> tuple[float, str]:
    """|a1| of a CIF's conventional cell: its own, or scaled to ``density`` (the
    mass of the cell counts every occupant by its occupancy)."""
    crystal, source = recipe.crystal, recipe.crystal.source_crystal
    if crystal.density is None:
        return source.a, "the CIF's cell"
    weight = dict(source.occupancy)
    labels = np.array(source.sublattice)
    mass = sum(float(np.count_nonzero(labels == label)) * occ * standard_atomic_weight(e)
               for label, occupants in weight.items() for e, occ in occupants)
    volume = mass / (AVOGADRO * crystal.density) / ANGSTROM3_TO_CM3  # Angstrom^3
    scale = (volume / abs(float(np.linalg.det(source.cell)))) ** (1.0 / 3.0)
    return source.a * scale, (f"the CIF's cell scaled to density {crystal.density} g/cm^3 "
                              "(standard atomic weights, occupancies counted)")


def crystal_parameters(recipe: Recipe) -> tuple[tuple[str, float], ...]:
    """A prototype's internal parameters: as given (``c`` as ``c_over_a``), else,
    for hcp built at ASE's reference lattice constant, ASE's reference c/a too;
    the table's defaults (ideal c/a) for the rest."""
    crystal = recipe.crystal
    given = crystal.parameters()
    if crystal.lattice == "hcp" and not given and crystal.a is None \
            and crystal.density is None and crystal.radius is None:
        state = _reference_state(crystal.element)
        if state.get("symmetry") == "hcp" and "c/a" in state:
            return (("c_over_a", float(state["c/a"])),)
    return given


def _unit_crystal(recipe: Recipe) -> Crystal:
    """The recipe's crystal at a = 1 (cached): the basis elements, the cell volume
    in units of a^3 and the nearest distance in units of a."""
    crystal = recipe.crystal
    return resolve_crystal(crystal.lattice, 1.0, crystal.species, crystal_parameters(recipe))


def _reference_state(element: str) -> dict:
    from ase.data import atomic_numbers, reference_states

    return reference_states[atomic_numbers[element]] or {}


def _reference_constant(recipe: Recipe) -> float:
    crystal = recipe.crystal
    state = _reference_state(crystal.element)
    symmetry = state.get("symmetry")
    if symmetry != crystal.lattice or "a" not in state:
        found = f"lists {crystal.element} as {symmetry}" if symmetry else f"has no crystal structure for {crystal.element}"
        raise InputError(
            f"no lattice constant given, and ASE's reference table {found}",
            key="crystal", value={"element": crystal.element, "lattice": crystal.lattice},
            hint="give one of crystal.a, crystal.density or crystal.radius",
            file=recipe.source)
    return float(state["a"])


def _recut(recipe: Recipe, crystal: Crystal) -> Crystal:
    """The crystal in the repeat unit the recipe asks: an oriented box
    (``crystal.axes``), a supercell matrix (``size.matrix``), or its own cell."""
    from .orientation import oriented, with_matrix

    axes, matrix = recipe.crystal.axes, recipe.size.matrix
    if (recipe.surface or recipe.grain_boundary) is not None and matrix is not None:
        raise InputError("cannot be given with a surface or a grain boundary", key="size.matrix",
                         value=[list(r) for r in matrix], hint="give size.repeat [nx, ny, 1]",
                         file=recipe.source)
    if axes is not None and matrix is not None:
        raise InputError("cannot be given with crystal.axes", key="size.matrix",
                         value=[list(r) for r in matrix],
                         hint="orient with axes and repeat, or give a matrix on the cubic cell",
                         file=recipe.source)
    try:
        if recipe.grain_boundary is not None:
            from .boundaries import tilt_boundary

            g = recipe.grain_boundary
            if axes is not None:
                raise InputError("cannot be given with a grain boundary", key="crystal.axes",
                                 value={n: list(d) for n, d in zip("xyz", axes)},
                                 hint="the boundary's axis and plane set the box")
            return tilt_boundary(crystal, g.axis, g.plane, g.grains, g.vacuum, g.min_distance)
        if recipe.surface is not None:
            from .surfaces import slab

            s = recipe.surface
            return slab(crystal, s.miller, s.layers, s.vacuum, s.termination, axes,
                        recipe.charge_of())
        if axes is not None:
            return oriented(crystal, axes)
        if matrix is not None:
            return with_matrix(crystal, matrix)
    except InputError as exc:
        raise exc.located(recipe.source) from None
    return crystal


def choose_repeat(recipe: Recipe, crystal: Crystal) -> tuple[int, int, int]:
    """Cells per axis from ``size``: as given, nearest atom count, or minimum length
    (per axis, the smallest n whose n cell-vector lengths reach it)."""
    size = recipe.size
    if size.repeat is not None:
        return size.repeat
    if size.matrix is not None:  # the matrix is the whole supercell
        return (1, 1, 1)
    if size.atoms is not None:
        return compact_repeat(size.atoms, crystal.n_basis)
    assert size.min_length is not None
    reps = []
    for length, edge in zip(size.min_length, np.linalg.norm(crystal.cell, axis=1)):
        edge = float(edge)
        n = max(1, math.ceil(length / edge - 1e-12))
        while n * edge < length:  # guard the rounding of the division
            n += 1
        reps.append(n)
    return tuple(reps)  # type: ignore[return-value]


def compact_repeat(target: int, per_cell: int) -> tuple[int, int, int]:
    """Cells per axis whose atom count is nearest ``target``, over compact repeats.

    Compact: n1 <= n2 <= n3 <= 2 * n1, so no edge is more than twice another.
    Ties go to the more nearly cubic repeat, then to the larger supercell.
    Vectorised over (n1, n2); n3 is the floor or ceiling of the cells still needed.
    """
    import numpy as np

    cells = target / per_cell
    edge = cells ** (1.0 / 3.0)
    if edge > 1000:  # beyond any machine's memory: the nearest cube, refused later
        n = int(round(edge))
        return n, n, n
    # n1 <= edge <= n3 <= 2 n1 bounds n1 to [edge / 2, edge]: about edge^2 / 2 pairs
    n1 = np.arange(max(1, int(edge / 2)), int(edge) + 2, dtype=np.int64)
    n2 = n1[:, None] + np.arange(0, int(n1[-1]) + 1, dtype=np.int64)[None, :]
    n1 = np.broadcast_to(n1[:, None], n2.shape)
    keep = n2 <= 2 * n1
    n1, n2 = n1[keep], n2[keep]
    base = np.floor(cells / (n1 * n2)).astype(np.int64)
    n1, n2 = np.concatenate([n1, n1]), np.concatenate([n2, n2])
    n3 = np.clip(np.concatenate([base, base + 1]), n2, 2 * n1)
    count = n1 * n2 * n3 * per_cell
    # nearest count, then most nearly cubic (n3/n1), then larger, then lexicographic
    best = np.lexsort((n3, n2, n1, -count, n3 / n1, np.abs(count - target)))[0]
    return int(n1[best]), int(n2[best]), int(n3[best])


def resolve(recipe: Recipe, *, strict: bool = False) -> Plan:
    """Resolve a recipe into a :class:`Plan` without building anything.

    Refuses sizes that would not fit in this machine's memory.
    """
    a, source = lattice_constant(recipe)
    if not MIN_CONSTANT <= a <= MAX_CONSTANT:
        raise InputError(
            f"gives a lattice constant of {a:.4g} Angstrom, outside what can be written "
            f"({MIN_CONSTANT} to {MAX_CONSTANT:g})", key=_constant_key(recipe),
            value=_constant_value(recipe, a), hint="check the units (Angstrom, g/cm^3)",
            file=recipe.source)
    if recipe.crystal.source_crystal is not None:
        crystal = resolve_cif(recipe.crystal.source_crystal, a, recipe.crystal.species)
    else:
        crystal = resolve_crystal(recipe.crystal.lattice, a, recipe.crystal.species,
                                  crystal_parameters(recipe))
    crystal = _recut(recipe, crystal)
    warnings = list(_spacing_warnings(recipe, crystal))
    if crystal.surface is not None and crystal.surface["polar"]:
        warnings.append(f"the ({' '.join(map(str, recipe.surface.miller))}) planes are polar: "
                        "they differ from the slab's composition (or charge), so the slab "
                        "carries a dipole along z")
    if not 1.0 <= a <= 20.0 and recipe.crystal.source_crystal is None:  # a CIF's own cell
        message = f"lattice constant {a:.4g} Angstrom is outside the plausible range 1 to 20"
        if strict:
            key = _constant_key(recipe)
            raise InputError(message.replace(f"lattice constant {a:.4g} Angstrom ", ""),
                             key=key, value=_constant_value(recipe, a),
                             hint="check the units (Angstrom, g/cm^3)", file=recipe.source)
        warnings.append(message)
    repeat = choose_repeat(recipe, crystal)
    n_sites = crystal.n_basis * math.prod(repeat)  # Python ints: absurd sizes must not overflow
    n_atoms = n_sites  # before defects; see defect_counts
    memory = BYTES_PER_ATOM * n_sites
    files = {k: FORMATS[k].bytes_per_atom * n_sites for k in recipe.outputs}
    available = _physical_memory()
    if available and memory > 0.8 * available:
        raise InputError(
            f"would need about {_human(memory)} of memory for {n_sites:,} atoms, "
            f"more than this machine's {_human(available)}",
            key=f"size.{size_key(recipe)}", value=size_value(recipe),
            hint="choose a smaller size", file=recipe.source)
    box = tuple(float(x) for x in np.linalg.norm(crystal.supercell(repeat), axis=1))
    if max(box) > MAX_BOX:
        raise InputError(f"gives a box of {max(box):.4g} Angstrom, longer than {MAX_BOX:g}",
                         key=f"size.{size_key(recipe)}", value=size_value(recipe),
                         hint="choose a smaller size", file=recipe.source)
    counts = count_defects(recipe, crystal, math.prod(repeat))  # refuses impossible requests
    n_atoms += sum(n if req.kind == "interstitial" else -n
                   for req, n in counts if req.kind in ("vacancy", "interstitial"))
    return Plan(recipe, crystal, source, repeat, n_sites, n_atoms, box, memory, files,
                counts, tuple(warnings))


def _spacing_warnings(recipe: Recipe, crystal: Crystal) -> tuple[str, ...]:
    """Refuse a lattice constant whose nearest-neighbour distance no solid has
    (a value in nm or pm, say); with ``checks.physical_spacing: false``, warn instead.
    Each sublattice's first shell is judged with the elements of the pair."""
    from .spacing import judge

    on = dict(zip(crystal.sublattice, crystal.elements))
    verdicts = [judge(shell.distance, on[label], on[other])
                for label, shell in crystal.first_shells.items() for other in shell.counts]
    verdict = next((x for x in verdicts if not x.plausible), None)
    if verdict is None:
        return ()
    if not recipe.checks.physical_spacing:
        return (f"the lattice constant {verdict.describe()}; built anyway because "
                "checks.physical_spacing is false",)
    raise InputError(verdict.describe(), key=_constant_key(recipe),
                     value=_constant_value(recipe, crystal.a),
                     hint="give lengths in Angstrom, or set checks.physical_spacing: false "
                          "to build it on purpose", file=recipe.source)


def check_disk_space(plan: Plan, out_dir: str | os.PathLike) -> None:
    """Refuse before writing when the outputs would not fit on the disk of ``out_dir``."""
    needed = sum(plan.estimated_files.values())
    existing = Path(out_dir).absolute()
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent  # the folder may not exist yet: ask its nearest ancestor
    try:
        free = shutil.disk_usage(existing).free
    except OSError:
        return
    if needed > free:
        raise InputError(
            f"the outputs need about {_human(needed)} but the disk holding {out_dir} has "
            f"{_human(free)} free", key=f"size.{size_key(plan.recipe)}",
            value=size_value(plan.recipe), hint="choose a smaller size or fewer outputs",
            file=plan.recipe.source)


def build_perfect(plan: Plan) -> Structure:
    """The perfect supercell: every lattice-basis site occupied by its sublattice's element."""
    symbols = plan.recipe.elements()
    return replicate(plan.crystal, plan.repeat, symbols=symbols)


def replicate(crystal: Crystal, repeat: tuple[int, int, int],
              symbols: tuple[str, ...]) -> Structure:
    """Replicate the conventional cell of ``crystal`` ``repeat`` times.

    Atoms come out in site-id order, each basis site carrying its element's
    species code (an index into ``symbols``).
    """
    n_basis, n_grid = crystal.n_basis, crystal.n_grid
    n1, n2, n3 = repeat
    # Fill each fractional column in place by broadcasting (cell index along one
    # axis + basis offset), then scale into Angstrom: no per-atom temporaries
    # beyond the output.
    positions = np.empty((n1, n2, n3, n_basis, 3), dtype=np.float64)
    for axis, n in enumerate(repeat):
        shape = [1, 1, 1, 1]
        shape[axis] = n
        corner = np.arange(n, dtype=np.float64).reshape(shape)
        np.add(corner, crystal.basis[:, axis], out=positions[..., axis])
    positions = positions.reshape(-1, 3)
    crystal.to_cartesian(positions, out=positions)
    n_cells = n1 * n2 * n3
    site = (np.arange(n_cells, dtype=np.int64)[:, None] * n_grid
            + np.arange(n_basis, dtype=np.int64)[None, :]).ravel()
    codes = np.array([symbols.index(e) for e in crystal.elements], dtype=np.int32)
    return Structure(
        cell=crystal.supercell(repeat),
        positions=positions,
        species=np.tile(codes, n_cells),
        symbols=symbols,
        site=site,
    )


def site_positions(crystal: Crystal, repeat: tuple[int, int, int],
                   site_ids: np.ndarray) -> np.ndarray:
    """Cartesian positions (Angstrom) of grid sites given by id (see module docstring)."""
    cell, s = np.divmod(np.asarray(site_ids, dtype=np.int64), crystal.n_grid)
    _, n2, n3 = repeat
    i, rest = np.divmod(cell, n2 * n3)
    j, k = np.divmod(rest, n3)
    return crystal.to_cartesian(np.stack([i, j, k], axis=1) + crystal.site_frac[s])


def _physical_memory() -> int | None:
    try:
        return os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return None


def _human(n: float) -> str:
    for unit in ("B", "kB", "MB", "GB", "TB", "PB"):
        if n < 1000 or unit == "PB":
            return f"{n:.3g} {unit}"
        n /= 1000
    return f"{n:.3g} PB"


def size_key(recipe: Recipe) -> str:
    size = recipe.size
    return ("repeat" if size.repeat else "atoms" if size.atoms else
            "matrix" if size.matrix else "min_length")


def size_value(recipe: Recipe):
    size = recipe.size
    value = size.repeat or size.atoms or size.min_length or size.matrix
    return list(value) if isinstance(value, tuple) else value


def _constant_key(recipe: Recipe) -> str:
    c = recipe.crystal
    return "crystal.a" if c.a else "crystal.density" if c.density else (
        "crystal.radius" if c.radius else "crystal.element")


def _constant_value(recipe: Recipe, a: float):
    c = recipe.crystal
    return c.a or c.density or c.radius or c.element
