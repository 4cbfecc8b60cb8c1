"""Build a folder of recipes (a structure library) in parallel and write its manifest.

Every ``*.yaml``/``*.yml`` file under the source folder is expanded into its
sweep points (:mod:`cellbuild.sweep`); each point is built by
:func:`cellbuild.pipeline.make` in a process pool (:mod:`cellbuild.pool`),
into an output folder that mirrors the recipe's folder. ``OUT/manifest.json``
(:mod:`cellbuild.manifest`) then records, per structure, the recipe and its
sha256, the sweep values, the outcome, the warnings and the sha256 and size of
every file written, so that :mod:`cellbuild.verify` can later rebuild and
compare.

One bad recipe does not stop the others: it becomes an entry with an
``error``. The manifest is sorted by name and written with sorted keys, so the
same recipes give the same manifest (apart from ``created``) whatever the
number of workers.

Nothing is written or deleted outside OUT: every path is checked with its
symbolic links resolved, and a folder in OUT that is a link leading out is
refused before anything is built.
"""
from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Sequence

from .batch_report import ProgressBar, junit_xml, outcome_line, write_junit  # noqa: F401
from .errors import InputError
from .manifest import (MANIFEST_NAME, OUTPUT_SUFFIXES, RECIPE_SUFFIXES,  # noqa: F401
                       listed_paths, make_manifest, manifest_bytes, read_json, write_manifest)
from .outcomes import (EXIT_BAD_INPUT, EXIT_FAILED_CHECK, EXIT_OK, Job,  # noqa: F401
                       Outcome, Source, error_outcome, exit_code, sort_outcomes)
from .pool import build_job, default_workers, run_jobs, sigterm_as_interrupt  # noqa: F401

if TYPE_CHECKING:
    from .executors import Executor

#: When `batch` flushes written files to the disk (``--sync``).
SYNC_CHOICES = ("file", "end")

#: Temporaries of these files in OUT are ours (``.NAME.lmp.XXXXXXXX.part`` ...).
TEMPORARY_TARGETS = OUTPUT_SUFFIXES + (MANIFEST_NAME,)


@dataclass(frozen=True)
class BatchResult:
    """The outcomes (sorted by name), the manifest written, stale files removed
    (``removed``: listed by the previous manifest; ``temporaries``: left by an
    interrupted run)."""

    outcomes: list[Outcome]
    manifest: dict
    manifest_path: Path
    removed: list[str]
    temporaries: list[str] = ()
    #: temporaries found after the build: left by workers that died mid-write
    #: (their structures were built again elsewhere)
    lost: list[str] = ()
    #: who ran the jobs (:attr:`cellbuild.executors.Executor.description`) and its kind
    executor: str = ""
    executor_kind: str = "pool"

    @property
    def exit_code(self) -> int:
        return exit_code(self.outcomes)

    def per_worker(self) -> dict[str, int]:
        """Structures built per worker (address or process), sorted by worker."""
        return worker_counts(self.outcomes)


def worker_counts(outcomes: Sequence[Outcome]) -> dict[str, int]:
    """How many of ``outcomes`` each worker built (outcomes never sent to one left out)."""
    counts: dict[str, int] = {}
    for outcome in outcomes:
        if outcome.worker:
            counts[outcome.worker] = counts.get(outcome.worker, 0) + 1
    return dict(sorted(counts.items()))


# ----------------------------------------------------------------------------- discovery


def discover(source_dir: Path, manifest_dir: Path, skip: Path | None = None) -> list[Source]:
    """Every recipe file under ``source_dir``, recursively, sorted by relative path.

    Hidden folders and files (``.git``, ...) and the folder ``skip`` (the
    output folder, if it lies inside) are left out; symbolic links to folders
    are not followed, so the walk is finite and the same on every machine, and
    a recipe that is a link to a file outside ``source_dir`` is left out too.
    """
    from .fileio import is_inside

    root = Path(os.path.abspath(source_dir))
    skip_abs = os.path.abspath(skip) if skip is not None else None
    found = []
    for folder, dirs, files in os.walk(root):
        dirs[:] = sorted(d for d in dirs if not d.startswith(".")
                         and os.path.join(folder, d) != skip_abs)
        for name in files:
            path = Path(folder) / name
            if name.endswith(RECIPE_SUFFIXES) and not name.startswith(".") \
                    and (not path.is_symlink() or is_inside(path, root)):
                found.append(path)
    found.sort(key=lambda p: p.relative_to(root).as_posix())
    return [make_source(p, root, manifest_dir, display_root=source_dir) for p in found]


def make_source(path: Path, source_root: Path, manifest_dir: Path,
                display_root: Path | None = None) -> Source:
    """A :class:`Source` for recipe ``path`` found under ``source_root``."""
    rel = Path(os.path.abspath(path)).relative_to(os.path.abspath(source_root))
    display = Path(display_root) / rel if display_root is not None else Path(path)
    return Source(
        path=Path(path),
        recipe=Path(os.path.relpath(os.path.abspath(path), os.path.abspath(manifest_dir))).as_posix(),
        display=str(display),
        rel_dir="" if rel.parent == Path(".") else rel.parent.as_posix(),
    )


# ----------------------------------------------------------------------------- planning


def plan_jobs(sources: Sequence[Source], out_root: Path,
              sync: bool = True) -> tuple[list[Job], list[Outcome]]:
    """Expand every recipe into jobs; recipes that cannot be expanded become error outcomes.

    ``sync`` goes to every job (see :attr:`cellbuild.outcomes.Job.sync`).

    A structure whose files would land on a path already claimed by an earlier
    structure (in recipe-path, then sweep order) becomes an error outcome too.
    """
    from .pipeline import planned_paths

    jobs: list[Job] = []
    failed: list[Outcome] = []
    claimed: dict[str, str] = {}  # casefolded output path -> who writes it
    for source in sources:
        try:
            sha, points = _expand(source)
        except InputError as exc:
            failed.append(error_outcome(_fallback_name(source), source, None, exc))
            continue
        for point in points:
            out_dir = out_root / source.rel_dir
            # Casefolded, because a library is shared between case-sensitive and
            # case-insensitive file systems: `Cu.lmp` and `cu.lmp` must not both exist.
            folder = os.path.relpath(out_dir, out_root)  # once, not per file: relpath is slow
            paths = [p.as_posix() for p in planned_paths(point.recipe, folder)]
            clash = next((p for p in paths if p.casefold() in claimed), None)
            if clash is not None:
                exc = InputError(f"would write `{clash}`, which {claimed[clash.casefold()]} "
                                 "already writes", key="name", value=point.name,
                                 hint="give each structure in a folder its own name",
                                 file=source.recipe)
                failed.append(error_outcome(point.name, source, sha, exc, point.values))
                continue
            owner = f"`{point.name}` ({source.recipe})"
            claimed.update((p.casefold(), owner) for p in paths)
            jobs.append(Job(point.name, source, sha, point.values, point.recipe, str(out_dir),
                            sync))
    return jobs, failed


def _expand(source: Source):
    """The recipe file's sha256 and its sweep points; InputError names the manifest path.

    The file is read once (with the recipe size cap, so a recipe named for
    /dev/zero or a huge file cannot hang the batch): the hash is that of the
    bytes parsed."""
    from .sweep import expand
    from .yamlread import decode_text, parse_yaml, read_capped

    try:
        raw = read_capped(source.path)
        data, lines = parse_yaml(decode_text(raw, source.path), str(source.path))
    except InputError as exc:
        exc.file = source.recipe
        raise
    sha = hashlib.sha256(raw).hexdigest()
    return sha, expand(data, lines, source.recipe, folder=str(Path(source.path).parent))


def _fallback_name(source: Source) -> str:
    """A name for an entry whose recipe could not be read: the file name without suffix."""
    return Path(source.recipe).stem


# ----------------------------------------------------------------------------- the library


def build_library(source_dir: str | os.PathLike, out: str | os.PathLike, *,
                  workers: int | None = None, executor: "Executor | None" = None,
                  sync: str = "file",
                  on_done: Callable[[Outcome], None] | None = None,
                  on_planned: Callable[[int], None] | None = None) -> BatchResult:
    """Build every recipe under ``source_dir`` into ``out`` and write ``out/manifest.json``.

    Existing files in ``out`` that a structure writes are replaced; files that
    the previous manifest in ``out`` lists but this build no longer writes are
    removed, and so are temporaries an interrupted run left (other files are
    left alone). ``on_planned`` receives the number of structures once the
    recipes are expanded, ``on_done`` each outcome. SIGTERM stops the build
    like Ctrl-C (``KeyboardInterrupt``), leaving no temporaries.

    ``executor`` runs the jobs (:mod:`cellbuild.executors`; default: a local
    pool of ``workers`` processes, every core if None). It is asked first
    whether all its workers can see ``out``.

    ``sync`` says when the files are flushed to the disk (:data:`SYNC_CHOICES`):
    ``"file"`` each file before it takes its name; ``"end"`` all of them once,
    after the last structure and before the manifest (which vouches for them)
    is written: with the local pool one ``syncfs`` per file system on Linux
    (:func:`cellbuild.fileio.flush_file_systems`); with Dask workers, which may
    write from other machines, one ``fsync`` per file from this process. Either way each file appears whole; they differ only after a
    power cut or a crash of the machine, where ``end`` may leave files written
    since the start empty, with no new manifest listing them.

    Raises :class:`InputError` before anything is built if ``source_dir`` is
    not a folder holding recipes, is not inside ``out``'s parent folder (the
    library could not be verified), or ``out``, its manifest or a folder in it
    cannot be used.
    """
    from .fileio import remove_temporaries
    from .pipeline import ensure_output_dir

    source_dir, out = Path(source_dir), Path(out)
    if not source_dir.is_dir():
        raise InputError("is not a folder", key="DIR", value=str(source_dir),
                         hint="give the folder that holds the recipes")
    if sync not in SYNC_CHOICES:
        raise InputError("must be one of " + ", ".join(SYNC_CHOICES), key="--sync", value=sync,
                         hint="`file` flushes each file, `end` all files once at the end")
    if executor is None:
        from .executors import LocalPool

        executor = LocalPool(workers)
    sources = discover(source_dir, out, skip=out)
    if not sources:
        raise InputError("holds no *.yaml or *.yml recipe files", key="DIR",
                         value=str(source_dir))
    if out.exists() and not out.is_dir():
        raise InputError("exists and is not a folder", key="--out", value=str(out))
    _check_source_placement(source_dir, out)
    manifest_path = out / MANIFEST_NAME
    _check_manifest_target(manifest_path, out)
    executor.check_shared(out, "--out")  # before anything is created in OUT
    ensure_output_dir(out)
    previous = previous_outputs(manifest_path)
    jobs, failed = plan_jobs(sources, out, sync=sync == "file")
    _check_job_folders(jobs, out)
    temporaries = remove_temporaries(out, TEMPORARY_TARGETS)
    if on_planned:
        on_planned(len(jobs) + len(failed))
    for outcome in failed:
        if on_done:
            on_done(outcome)
    with sigterm_as_interrupt():
        built = executor.run(jobs, on_done)
    # every job is done: a temporary still here was left by a worker that died
    # mid-write (its structure was built again by another one)
    lost = remove_temporaries(out, TEMPORARY_TARGETS)
    outcomes = sort_outcomes(failed + built)
    manifest = make_manifest(outcomes, source=_relative(source_dir, out))
    removed = remove_stale(out, previous, manifest)
    if sync == "end":  # before the manifest that vouches for them
        from .fileio import flush_file_systems, sync_files

        written = [out / path for path in sorted(listed_paths(manifest))]
        if executor.kind == "pool":  # every file went through this machine's kernel
            flush_file_systems(written)
        else:  # workers may write from other machines: flush each file (on NFS, a
            sync_files(written)  # commit on its server), which this kernel's syncfs is not
    write_manifest(manifest_path, manifest)
    return BatchResult(outcomes, manifest, manifest_path, removed, temporaries, lost,
                       executor.description, executor.kind)


def _check_source_placement(source_dir: Path, out: Path) -> None:
    """Refuse a recipe folder outside OUT's parent: verify would refuse the manifest
    (see :mod:`cellbuild.manifest`), so the library could never be checked."""
    from .fileio import is_within

    holder = os.path.dirname(os.path.realpath(out))
    if not is_within(source_dir, holder):
        raise InputError(f"is not inside {holder}, the folder that holds the library, so "
                         "`cellbuild verify` could not check it", key="DIR",
                         value=str(source_dir),
                         hint="put --out beside the recipe folder or inside it")


def _check_manifest_target(manifest_path: Path, out: Path) -> None:
    """The manifest must be writable as a file in OUT, checked before anything is built."""
    from .fileio import is_inside

    if manifest_path.is_dir() and not manifest_path.is_symlink():
        raise InputError("is a folder, so the manifest cannot be written", key="--out",
                         value=str(manifest_path), hint="move that folder away")
    if manifest_path.is_symlink() and not is_inside(manifest_path, out):
        raise InputError("is a symbolic link leading out of the library", key="--out",
                         value=str(manifest_path), hint="remove the link")


def _check_job_folders(jobs: Sequence[Job], out: Path) -> None:
    """Refuse, before building, any output folder that a symbolic link takes out of OUT."""
    from .fileio import is_within

    for folder in sorted({job.out_dir for job in jobs}):
        if not is_within(folder, out):
            raise InputError("leads outside the library through a symbolic link, and "
                             "nothing is written there", key="--out", value=folder,
                             hint="remove the link or replace it with a real folder")


def _relative(path: Path, start: Path) -> str:
    return Path(os.path.relpath(os.path.realpath(path), os.path.realpath(start))).as_posix()


def previous_outputs(manifest_path: Path) -> set[str]:
    """Output paths listed by an earlier manifest at ``manifest_path`` (empty if none
    or unreadable: then nothing is removed, which is the safe side)."""
    try:
        return listed_paths(read_json(manifest_path))
    except InputError:
        return set()


def remove_stale(out: Path, previous: set[str], manifest: dict) -> list[str]:
    """Delete files the previous manifest listed and the new one does not.

    Only cellbuild output files inside ``out`` are touched, whatever an edited
    old manifest says: each path is resolved (symbolic links included) and
    skipped unless it stays inside ``out``'s real path.
    """
    from .fileio import is_inside, is_within

    removed = []
    root = os.path.realpath(out)
    # casefolded: on a case-insensitive file system `Cu.lmp` and `cu.lmp` are one file
    current = {p.casefold() for p in listed_paths(manifest)}
    for rel in sorted(p for p in previous if p.casefold() not in current):
        if os.path.isabs(rel) or not rel.endswith(OUTPUT_SUFFIXES):
            continue
        path = os.path.join(root, rel)
        folder = os.path.realpath(os.path.dirname(path))
        # the folder and the file, links resolved, must both be in OUT; the name is
        # then removed in the resolved folder, so no link is followed out at unlink time
        if is_within(folder, root) and is_inside(path, root) and os.path.isfile(path):
            os.unlink(os.path.join(folder, os.path.basename(path)))
            removed.append(rel)
    return removed
