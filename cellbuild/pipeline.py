"""The one-way pipeline: recipe -> plan -> structure -> defects -> audit -> files.

Each stage is a plain function of the previous stage's value, so a notebook can
call them one by one; :func:`make` runs them all and is what the command line
and the batch runner call.
"""
from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Callable

import numpy as np

from . import __version__
from .audit import Audit, audit
from .build import Plan, build_perfect, check_disk_space, resolve, size_key, size_value
from .defects import Placement, apply, atom_indices, place_defects
from .distortion import distort, distorted, with_distortion
from .relaxation import GROUPS_EXTENSION, groups_text
from .errors import InputError
from .fileio import StagedFiles
from .memory import REUSE_MEMORY_ATOMS, reuse_freed_memory  # noqa: F401 -- re-exported
from .formats import WriteOptions, WrittenFile, output_path, write_structure
from .neighbours import PairLimitError
from .recipe import Recipe, load_recipe
from .structure import Structure

Progress = Callable[[str], None]


@dataclass(frozen=True)
class Built:
    """A structure with everything known about how it was made."""

    plan: Plan
    structure: Structure
    placements: list[Placement]
    arrangement: dict | None = None  # the arrangement search's facts, if the recipe asks one
    configuration: dict | None = None  # facts of a distinct configuration (placement: distinct)
    ideal: Structure | None = None  # before strain and displacement (None without them)
    distortion: dict | None = None  # the strain and displacement facts
    free: np.ndarray | None = None  # (N,) bool, atoms free to relax (``relax``), file order


@dataclass(frozen=True)
class Result:
    """The outcome of :func:`make`: the report (as written) and the files."""

    built: Built
    audit: Audit
    report: dict
    outputs: dict[str, WrittenFile]
    report_path: Path
    #: the other files written, by kind (``report``, ``defects``, ``lammps_groups``)
    sidecars: dict[str, WrittenFile] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return self.audit.passed


def build(recipe: Recipe, *, strict: bool = False, progress: Progress | None = None) -> Built:
    """Resolve, build the perfect supercell and place the defects (no files)."""
    note = progress or (lambda phase: None)
    plan = resolve(recipe, strict=strict)
    note("build")
    perfect = build_perfect(plan)
    note("defects")
    # grouped by species as it is placed: one copy of the atoms, not two
    structure, placements = place_defects(plan, perfect, grouped=True)
    facts = None
    if recipe.defects.arrangement is not None:
        from .arrangement import arrange  # compiles its kernel on first use

        note("arrangement")
        # its own stream from the seed: the defects' draws stay what they were
        placements, facts = arrange(plan, perfect, placements,
                                    np.random.default_rng([recipe.seed, 1]), progress=progress)
        structure = apply(plan, perfect, placements, grouped=True)
    configuration = None
    if recipe.defects.placement == "distinct":
        from .variants import configuration_facts

        configuration = configuration_facts(plan)
    # one atom order for every format, so defect atom ids hold in each file
    structure = structure.grouped_by_species().with_charges(recipe.charge_of())
    ideal = distortion = free = None
    if distorted(recipe):
        ideal = structure
        structure, distortion = distort(recipe, ideal)
    if recipe.relax is not None:
        from .relaxation import free_atoms

        try:
            free = free_atoms(plan, ideal or structure, placements, recipe.relax.within)
        except PairLimitError as exc:
            raise InputError(f"lists too many neighbours of the defects ({exc})",
                             key="relax.within", value=recipe.relax.within,
                             hint="give a smaller distance", file=recipe.source) from None
    return Built(plan, structure, placements, facts, configuration, ideal, distortion, free)


def planned_paths(recipe: Recipe, out_dir: str | os.PathLike) -> list[Path]:
    """Every file :func:`make` would write for ``recipe`` in ``out_dir``."""
    paths = [output_path(out_dir, recipe.name, key) for key in recipe.outputs]
    paths.append(Path(out_dir) / f"{recipe.name}.report.json")
    if recipe.defects.any:
        paths.append(Path(out_dir) / f"{recipe.name}.defects.json")
    if _writes_groups(recipe):
        paths.append(Path(out_dir) / f"{recipe.name}{GROUPS_EXTENSION}")
    return paths


def _writes_groups(recipe: Recipe) -> bool:
    """Whether :func:`make` writes the LAMMPS group file (``relax`` and LAMMPS output)."""
    return recipe.relax is not None and "lammps-data" in recipe.outputs


def check_outputs_free(recipes: list[Recipe], out_dir: str | os.PathLike, force: bool) -> None:
    """Refuse existing outputs (unless ``force``) and unusable folders; writes nothing."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError("exists and is not a folder", key="--out", value=str(out))
    if out.is_dir() and not os.access(out, os.W_OK | os.X_OK):
        raise InputError("is not writable", key="--out", value=str(out))
    if not force:
        existing = [p for r in recipes for p in planned_paths(r, out) if p.exists()]
        if existing:
            raise InputError(
                f"{len(existing)} output file(s) already exist, first {existing[0]}",
                key="--out", value=str(out), hint="pass --force to replace them")


def ensure_output_dir(out_dir: str | os.PathLike) -> None:
    """Create the output folder (and parents) or refuse with an InputError."""
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot be created ({exc.strerror})", key="--out",
                         value=str(out)) from None
    if not os.access(out, os.W_OK | os.X_OK):
        raise InputError("is not writable", key="--out", value=str(out))


def make(recipe: Recipe, out_dir: str | os.PathLike, *, force: bool = False,
         strict: bool = False, recipe_sha256: str | None = None,
         progress: Progress | None = None, workers: int = 2, sync: bool = True) -> Result:
    """Build, audit and write one recipe; returns the result (report written too).

    ``sync``: flush each file to the disk before it takes its name (the
    default); ``False`` leaves that to the caller (:func:`cellbuild.fileio.sync_files`
    once over many structures' files, as ``batch --sync end`` does).

    Raises :class:`InputError` before writing anything if the recipe cannot be
    built or the outputs cannot be written.
    """
    note = progress or (lambda phase: None)
    check_outputs_free([recipe], out_dir, force)
    built = build(recipe, strict=strict, progress=note)
    check_disk_space(built.plan, out_dir)
    ensure_output_dir(out_dir)
    report_path = Path(out_dir) / f"{recipe.name}.report.json"
    # all files appear together or none do; without force, every name is claimed
    # exclusively, so a second run racing for the same names refuses instead of replacing
    options = WriteOptions(recipe.kpoints, recipe.espresso, built.free)
    with StagedFiles(replace=force, root=out_dir, sync=sync) as staged:
        # The structure files do not depend on the audit: a large structure's are
        # formatted and written in a second thread while the audit runs (numpy
        # releases the GIL in both). A failed audit leaves the with-block after
        # the writer has finished, so the rollback removes everything it staged.
        sidecars: dict[str, WrittenFile] = {}
        writer = _Background(_write_files, built, out_dir, staged, options, note, sidecars,
                             run_here=built.structure.n_atoms < _BACKGROUND_WRITE_ATOMS)
        with writer:
            note("audit")
            result_audit = _audited(built, workers)
            outputs = writer.result()
        report = make_report(built, result_audit, outputs, out_dir,
                             recipe_sha256 or recipe_hash(recipe))
        sidecars["report"] = _stage_bytes(staged, report_path, _json_bytes(report))
        staged.commit()
    return Result(built, result_audit, report, outputs, report_path, sidecars)


def _stage_bytes(staged: StagedFiles, path: Path, data: bytes) -> WrittenFile:
    """Stage ``data`` as ``path``; its hash and size, from the bytes in hand."""
    staged.write_bytes(path, data)
    return WrittenFile(path, hashlib.sha256(data).hexdigest(), len(data))


#: Atoms from which :func:`make` writes the structure files in a second thread
#: while the audit runs; below it a thread's start-up and switching outweigh the
#: overlap (a small structure is audited and written in milliseconds).
_BACKGROUND_WRITE_ATOMS = 20_000


def _audited(built: Built, workers: int) -> Audit:
    """The audit of a built structure (with the distortion's checks, if any).

    A size limit of the neighbour search becomes an :class:`InputError`, raised
    before any file is committed."""
    try:
        result = audit(built.plan, built.ideal or built.structure, built.placements,
                       workers=workers)
        if built.ideal is not None:
            result = with_distortion(result, built.plan, built.ideal, built.structure, workers)
        return result
    except PairLimitError as exc:
        recipe = built.plan.recipe
        raise InputError(f"gives {built.structure.n_atoms:,} atoms, too many for the audit's "
                         f"neighbour search ({exc})", key=f"size.{size_key(recipe)}",
                         value=size_value(recipe), hint="choose a smaller size",
                         file=recipe.source) from None


def _write_files(built: Built, out_dir, staged: StagedFiles, options: WriteOptions,
                 note: Progress, sidecars: dict[str, WrittenFile]) -> dict[str, WrittenFile]:
    """Stage every file of ``built`` that does not depend on the audit: the
    structure files (returned by format key), the LAMMPS groups and
    ``NAME.defects.json`` (added to ``sidecars``)."""
    recipe = built.plan.recipe
    outputs = {}
    for key in recipe.outputs:
        note(key)
        outputs[key] = write_structure(built.structure, key,
                                       output_path(out_dir, recipe.name, key),
                                       title=recipe.name, staged=staged, options=options)
    if _writes_groups(recipe):
        sidecars["lammps_groups"] = _stage_bytes(
            staged, Path(out_dir) / f"{recipe.name}{GROUPS_EXTENSION}",
            groups_text(built.free).encode("ascii"))
    if built.placements:
        sidecars["defects"] = _stage_bytes(
            staged, Path(out_dir) / f"{recipe.name}.defects.json",
            _json_bytes(defect_sites(built), indent=None))
    return outputs


class _Background:
    """``function(*args)`` in a thread started on entering the with-block (or,
    with ``run_here``, called in this thread at :meth:`result`); leaving the
    block always waits for the thread, so nothing it does outlives the block.
    :meth:`result` returns the value or raises the thread's exception."""

    def __init__(self, function, *args, run_here: bool = False):
        self._call = (function, args)
        self._run_here = run_here
        self._thread = None
        self._value = self._error = None

    def _run(self) -> None:
        function, args = self._call
        try:
            self._value = function(*args)
        except BaseException as exc:  # handed to the caller by result()
            self._error = exc

    def __enter__(self) -> "_Background":
        if not self._run_here:
            import threading

            self._thread = threading.Thread(target=self._run, name="cellbuild-writer")
            self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        if self._thread is not None:
            self._thread.join()

    def result(self):
        if self._thread is None:
            self._run()
        else:
            self._thread.join()
        if self._error is not None:
            raise self._error
        return self._value


def make_file(path: str | os.PathLike, out_dir: str | os.PathLike, **kwargs) -> Result:
    """:func:`make` for a recipe file."""
    return make(load_recipe(path), out_dir, **kwargs)


def recipe_hash(recipe: Recipe) -> str:
    """sha256 of the recipe file's bytes, or of the validated recipe when it has no file."""
    if recipe.source and Path(recipe.source).is_file():
        return hashlib.sha256(Path(recipe.source).read_bytes()).hexdigest()
    return hashlib.sha256(repr(recipe).encode()).hexdigest()


def make_report(built: Built, result: Audit, outputs: dict[str, WrittenFile],
                out_dir: str | os.PathLike, recipe_sha256: str) -> dict:
    """The report dictionary (JSON-ready); see the README for the fields."""
    plan, structure, recipe = built.plan, built.structure, built.plan.recipe
    v = result.values
    report = {
        "name": recipe.name,
        "seed": recipe.seed,
        "lattice": recipe.crystal.lattice,
        "element": recipe.crystal.element,
        "species": dict(recipe.crystal.species),
        "parameters": dict(plan.crystal.parameters),
        "cif": recipe.crystal.cif,
        "lattice_constant": plan.lattice_constant,
        "lattice_constant_source": plan.lattice_constant_source,
        "axes": _axes(recipe),
        "matrix": [list(r) for r in recipe.size.matrix] if recipe.size.matrix else None,
        "repeat": list(plan.repeat),
        "cell": structure.cell.tolist(),
        "surface": _surface(plan),
        "grain_boundary": _boundary(plan),
        "size_note": plan.size_note,
        "n_atoms": structure.n_atoms,
        "composition": v["composition"],
        "sublattices": v["sublattices"],
        "types": list(structure.symbols),
        "cell_lengths": v["cell_lengths"],
        "volume": structure.volume,
        "density": v["density"],
        "charges": recipe.charge_of(),
        "net_charge": v["net_charge"],
        "ideal_crystal": v["ideal_crystal"],
        "coordination": v["coordination"],
        "min_distance": v["min_distance"],
        "min_distance_pair": v["min_distance_pair"],
        "close_pairs": v["close_pairs"],
        "space_group": v["space_group"],
        "short_range_order": v["short_range_order"],
        "arrangement": built.arrangement,
        "configuration": built.configuration,
        "strain": (built.distortion or {}).get("strain"),
        "displacement": (built.distortion or {}).get("displacement"),
        "relax": None if built.free is None else {
            "within": recipe.relax.within, "free": int(built.free.sum()),
            "fixed": int(built.free.size - built.free.sum()),
            "lammps_groups": f"{recipe.name}{GROUPS_EXTENSION}" if _writes_groups(recipe) else None},
        "defects": [
            {"kind": p.kind, "element": p.element, "on": p.on, "key": p.key,
             "asked": p.asked, "placed": p.count}
            for p in built.placements
        ],
        "defect_sites": f"{recipe.name}.defects.json" if built.placements else None,
        "warnings": list(plan.warnings),
        "checks": [c.as_dict() for c in result.checks],
        "passed": result.passed,
        "outputs": {
            key: {"path": os.path.relpath(w.path, out_dir), "sha256": w.sha256, "bytes": w.bytes}
            for key, w in outputs.items()
        },
        "versions": versions(),
        "recipe_sha256": recipe_sha256,
    }
    return report


def _surface(plan: Plan) -> dict | None:
    """The slab's facts for the whole box (area in Angstrom^2), or None for bulk."""
    facts = plan.crystal.surface
    if facts is None:
        return None
    nx, ny, _ = plan.repeat
    return {**facts, "area": facts["area"] * nx * ny}


def _boundary(plan: Plan) -> dict | None:
    """The bicrystal's facts for the whole box (area in Angstrom^2, atoms removed)."""
    facts = plan.crystal.boundary
    if facts is None:
        return None
    per = plan.repeat[0] * plan.repeat[1]
    return {**facts, "area": facts["area"] * per, "removed": facts["removed_per_period"] * per}


def _axes(recipe: Recipe) -> dict | None:
    """The box's edge directions as given, or None for the crystal's own cell."""
    axes = recipe.crystal.axes
    return None if axes is None else {n: list(a) for n, a in zip("xyz", axes)}


def defect_sites(built: Built) -> dict:
    """Where each defect went: grid site ids, atom ids (1-based, in the atom order
    that every output file shares) and,
    for vacancies and interstitials, Cartesian positions in Angstrom."""
    from .build import site_positions

    plan, structure = built.plan, built.structure
    # the sites move with a strained cell
    strain = plan.recipe.strain.matrix().T if plan.recipe.strain is not None else np.eye(3)
    atoms = atom_indices(structure, [p.site_ids for p in built.placements if p.kind != "vacancy"])
    entries = []
    for p in built.placements:
        entry = {"kind": p.kind, "element": p.element, "on": p.on, "key": p.key,
                 "site_ids": p.site_ids.tolist()}
        if p.kind != "vacancy":
            entry["atom_ids"] = (atoms.pop(0) + 1).tolist()
        if p.kind in ("vacancy", "interstitial"):
            pos = site_positions(plan.crystal, plan.repeat, p.site_ids) @ strain
            entry["positions"] = np.round(pos, 10).tolist()
        entries.append(entry)
    return {"name": plan.recipe.name, "seed": plan.recipe.seed,
            "site_numbering": "cell * sites_per_cell + site; cell = (i*n2 + j)*n3 + k",
            "defects": entries}


def versions() -> dict[str, str]:
    """Versions of cellbuild and of the libraries that shape the outputs."""
    return dict(_versions())


@lru_cache(maxsize=1)
def _versions() -> tuple[tuple[str, str], ...]:
    # reading package metadata costs milliseconds; versions do not change in a process
    from importlib.metadata import PackageNotFoundError, version

    out = [("cellbuild", __version__)]
    for package in ("numpy", "scipy", "ase", "spglib"):
        try:
            out.append((package, version(package)))
        except PackageNotFoundError:
            out.append((package, "missing"))
    return tuple(out)


def _json_bytes(data: dict, indent: int | None = 2) -> bytes:
    """JSON text; compact (``indent=None``) for long id lists, which pretty-printing slows."""
    separators = None if indent else (",", ":")
    return (json.dumps(data, indent=indent, separators=separators, allow_nan=False) + "\n").encode()
