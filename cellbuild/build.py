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

from .errors import InputError
from .lattices import LATTICES, shells, site_table, touching_radius_factor
from .recipe import Recipe
from .structure import Structure

AVOGADRO = 6.02214076e23  # 1/mol, exact (SI 2019)
ANGSTROM3_TO_CM3 = 1e-24

#: Peak bytes of memory per atom for a whole `make` (arrays, neighbour counts,
#: one writer chunk); measured by benchmarks/bench_make.py, rounded up.
BYTES_PER_ATOM = 400
#: Hard limits (Angstrom): beyond them numbers no longer fit the fixed-width
#: output fields with 1e-10 Angstrom resolution; far outside any real crystal.
MIN_CONSTANT, MAX_CONSTANT, MAX_BOX = 0.01, 1000.0, 1.0e6
#: Approximate bytes per atom of each output file (one line per atom).
FILE_BYTES_PER_ATOM = {"lammps-data": 70, "cif": 60, "xyz": 60, "poscar": 48}


def standard_atomic_weight(symbol: str) -> float:
    """Standard atomic weight in g/mol, from ASE's data table (IUPAC values)."""
    from ase.data import atomic_masses, atomic_numbers

    return float(atomic_masses[atomic_numbers[symbol]])


@dataclass(frozen=True)
class Plan:
    """A resolved recipe: every number needed to build, before building.

    Lengths in Angstrom, memory and file sizes in bytes.
    """

    recipe: Recipe
    lattice_constant: float
    lattice_constant_source: str
    repeat: tuple[int, int, int]
    n_sites: int
    n_atoms: int
    box: tuple[float, float, float]
    estimated_memory: int
    estimated_files: dict[str, int]
    warnings: tuple[str, ...] = ()

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
    lat = LATTICES[crystal.lattice]
    if crystal.a is not None:
        return crystal.a, "given (crystal.a)"
    if crystal.density is not None:
        mass = lat.n_basis * standard_atomic_weight(crystal.element)  # g/mol per cell
        volume_cm3 = mass / (AVOGADRO * crystal.density)
        return (volume_cm3 / ANGSTROM3_TO_CM3) ** (1.0 / 3.0), (
            f"from density {crystal.density} g/cm^3 and the standard atomic weight")
    if crystal.radius is not None:
        return crystal.radius / touching_radius_factor(crystal.lattice), (
            f"from touching spheres of radius {crystal.radius} Angstrom")
    return _reference_constant(recipe), "reference value of ASE's data table"


def _reference_constant(recipe: Recipe) -> float:
    from ase.data import atomic_numbers, reference_states

    crystal = recipe.crystal
    state = reference_states[atomic_numbers[crystal.element]] or {}
    symmetry = state.get("symmetry")
    if symmetry != crystal.lattice or "a" not in state:
        found = f"lists {crystal.element} as {symmetry}" if symmetry else f"has no crystal structure for {crystal.element}"
        raise InputError(
            f"no lattice constant given, and ASE's reference table {found}",
            key="crystal", value={"element": crystal.element, "lattice": crystal.lattice},
            hint="give one of crystal.a, crystal.density or crystal.radius",
            file=recipe.source)
    return float(state["a"])


def choose_repeat(recipe: Recipe, a: float) -> tuple[int, int, int]:
    """Cells per axis from ``size``: as given, nearest atom count, or minimum length."""
    size = recipe.size
    if size.repeat is not None:
        return size.repeat
    z = LATTICES[recipe.crystal.lattice].n_basis
    if size.atoms is not None:
        return compact_repeat(size.atoms, z)
    assert size.min_length is not None
    reps = []
    for length in size.min_length:
        n = max(1, math.ceil(length / a - 1e-12))
        while n * a < length:  # guard the rounding of the division
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
    warnings = list(_spacing_warnings(recipe, a))
    if not 1.0 <= a <= 20.0:
        message = f"lattice constant {a:.4g} Angstrom is outside the plausible range 1 to 20"
        if strict:
            key = _constant_key(recipe)
            raise InputError(message.replace(f"lattice constant {a:.4g} Angstrom ", ""),
                             key=key, value=_constant_value(recipe, a),
                             hint="check the units (Angstrom, g/cm^3)", file=recipe.source)
        warnings.append(message)
    repeat = choose_repeat(recipe, a)
    lat = LATTICES[recipe.crystal.lattice]
    n_sites = lat.n_basis * math.prod(repeat)  # Python ints: absurd sizes must not overflow
    n_atoms = n_sites  # defects adjust this in cellbuild.defects.plan_counts
    memory = BYTES_PER_ATOM * n_sites
    files = {k: FILE_BYTES_PER_ATOM[k] * n_sites for k in recipe.outputs}
    available = _physical_memory()
    if available and memory > 0.8 * available:
        raise InputError(
            f"would need about {_human(memory)} of memory for {n_sites:,} atoms, "
            f"more than this machine's {_human(available)}",
            key=f"size.{_size_key(recipe)}", value=_size_value(recipe),
            hint="choose a smaller size", file=recipe.source)
    box = tuple(float(n * a) for n in repeat)
    if max(box) > MAX_BOX:
        raise InputError(f"gives a box of {max(box):.4g} Angstrom, longer than {MAX_BOX:g}",
                         key=f"size.{_size_key(recipe)}", value=_size_value(recipe),
                         hint="choose a smaller size", file=recipe.source)
    return Plan(recipe, a, source, repeat, n_sites, n_atoms, box, memory, files,
                tuple(warnings))


def _spacing_warnings(recipe: Recipe, a: float) -> tuple[str, ...]:
    """Refuse a lattice constant whose nearest-neighbour distance no solid has
    (a value in nm or pm, say); with ``checks.physical_spacing: false``, warn instead."""
    from .spacing import judge

    element = recipe.crystal.element
    verdict = judge(nearest_neighbour_distance(recipe.crystal.lattice, a), element, element)
    if verdict.plausible:
        return ()
    if not getattr(recipe.checks, "physical_spacing", True):  # FIXME once Checks has it
        return (f"the lattice constant {verdict.describe()}; built anyway because "
                "checks.physical_spacing is false",)
    raise InputError(verdict.describe(), key=_constant_key(recipe),
                     value=_constant_value(recipe, a),
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
            f"{_human(free)} free", key=f"size.{_size_key(plan.recipe)}",
            value=_size_value(plan.recipe), hint="choose a smaller size or fewer outputs",
            file=plan.recipe.source)


def build_perfect(plan: Plan) -> Structure:
    """The perfect supercell: every lattice-basis site occupied by the host element."""
    symbols = plan.recipe.elements()
    return replicate(plan.recipe.crystal.lattice, plan.lattice_constant, plan.repeat,
                     symbols=symbols, code=symbols.index(plan.recipe.crystal.element))


def replicate(lattice: str, a: float, repeat: tuple[int, int, int],
              symbols: tuple[str, ...], code: int = 0) -> Structure:
    """Replicate the conventional cell of ``lattice`` (side ``a``, Angstrom) ``repeat`` times.

    Atoms come out in site-id order; all carry species ``code`` (``symbols[code]``).
    """
    n_grid = len(site_table(lattice)[0])
    basis = LATTICES[lattice].basis_array()
    n_basis = len(basis)
    n1, n2, n3 = repeat
    # Fill each coordinate column in place by broadcasting (cell index along
    # one axis + basis offset): no per-atom temporaries beyond the output.
    positions = np.empty((n1, n2, n3, n_basis, 3), dtype=np.float64)
    for axis, n in enumerate(repeat):
        shape = [1, 1, 1, 1]
        shape[axis] = n
        corner = np.arange(n, dtype=np.float64).reshape(shape)
        np.multiply(corner + basis[:, axis], a, out=positions[..., axis])
    positions = positions.reshape(-1, 3)
    n_cells = n1 * n2 * n3
    site = (np.arange(n_cells, dtype=np.int64)[:, None] * n_grid
            + np.arange(n_basis, dtype=np.int64)[None, :]).ravel()
    n = n_cells * n_basis
    return Structure(
        cell=np.diag([n1 * a, n2 * a, n3 * a]).astype(np.float64),
        positions=positions,
        species=np.full(n, code, dtype=np.int32),
        symbols=symbols,
        site=site,
    )


def site_positions(lattice: str, a: float, repeat: tuple[int, int, int],
                   site_ids: np.ndarray) -> np.ndarray:
    """Cartesian positions (Angstrom) of grid sites given by id (see module docstring)."""
    frac, _, _ = site_table(lattice)
    n_per_cell = len(frac)
    cell, s = np.divmod(np.asarray(site_ids, dtype=np.int64), n_per_cell)
    _, n2, n3 = repeat
    i, rest = np.divmod(cell, n2 * n3)
    j, k = np.divmod(rest, n3)
    return (np.stack([i, j, k], axis=1) + frac[s]) * a


def nearest_neighbour_distance(lattice: str, a: float) -> float:
    """Nearest-neighbour distance of the ideal lattice, Angstrom (geometry of the basis)."""
    return shells(lattice).nearest * a


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


def _size_key(recipe: Recipe) -> str:
    size = recipe.size
    return "repeat" if size.repeat else "atoms" if size.atoms else "min_length"


def _size_value(recipe: Recipe):
    size = recipe.size
    value = size.repeat or size.atoms or size.min_length
    return list(value) if isinstance(value, tuple) else value


def _constant_key(recipe: Recipe) -> str:
    c = recipe.crystal
    return "crystal.a" if c.a else "crystal.density" if c.density else (
        "crystal.radius" if c.radius else "crystal.element")


def _constant_value(recipe: Recipe, a: float):
    c = recipe.crystal
    return c.a or c.density or c.radius or c.element
