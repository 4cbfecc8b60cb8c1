"""Build a folder of recipes (a structure library) in parallel and write its manifest.

Every ``*.yaml``/``*.yml`` file under the source folder is expanded into its
sweep points (:mod:`cellbuild.sweep`); each point is built by
:func:`cellbuild.pipeline.make` in a process pool, into an output folder that
mirrors the recipe's folder. ``OUT/manifest.json`` then records, per
structure, the recipe and its sha256, the sweep values, the outcome and the
sha256 and size of every file written, so that :mod:`cellbuild.verify` can
later rebuild and compare.

One bad recipe does not stop the others: it becomes an entry with an
``error``. The manifest is sorted by name and written with sorted keys, so the
same recipes give the same manifest (apart from ``created``) whatever the
number of workers.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Sequence

from . import __version__
from .errors import InputError

MANIFEST_NAME = "manifest.json"
RECIPE_SUFFIXES = (".yaml", ".yml")
#: Files cellbuild writes for a structure; `verify` reports others of these kinds as extra.
OUTPUT_SUFFIXES = (".lmp", ".cif", ".xyz", ".vasp", ".report.json", ".defects.json")

EXIT_OK, EXIT_FAILED_CHECK, EXIT_BAD_INPUT = 0, 1, 2

#: Largest number of structures sent to a worker at once: enough to make the
#: inter-process overhead negligible for 100-atom structures, small enough
#: that the last chunks still spread over the workers.
MAX_CHUNK = 16


# ----------------------------------------------------------------------------- types


@dataclass(frozen=True)
class Source:
    """A recipe file to build.

    ``path`` is where to read it; ``recipe`` its path relative to the manifest
    folder (POSIX, as recorded); ``display`` the path to show the user;
    ``rel_dir`` the output subfolder relative to OUT (POSIX, ``""`` for OUT).
    """

    path: Path
    recipe: str
    display: str
    rel_dir: str


@dataclass(frozen=True)
class Job:
    """One structure to build; plain, picklable data for a worker process.

    ``out_dir`` is the absolute folder its files go to.
    """

    name: str
    source: Source
    recipe_sha256: str
    sweep: dict
    recipe: object  # cellbuild.recipe.Recipe (kept untyped: no import at module load)
    out_dir: str


@dataclass(frozen=True)
class Outcome:
    """What happened to one structure (or to a recipe that could not be expanded).

    ``outputs`` maps a format key (and ``report``, ``defects``) to
    ``{"path" (relative to OUT, POSIX), "sha256", "bytes"}``. ``error`` is the
    one-line message of bad input with the recipe named as in the manifest,
    ``display_error`` the same message with the recipe named as the user gave it.
    ``seconds`` is the build time (wall clock).
    """

    name: str
    source: Source
    recipe_sha256: str | None
    sweep: dict = field(default_factory=dict)
    seed: int | None = None
    n_atoms: int | None = None
    passed: bool = False
    outputs: dict = field(default_factory=dict)
    failed_checks: tuple = ()
    error: str | None = None
    display_error: str | None = None
    seconds: float = 0.0

    @property
    def status(self) -> str:
        """``passed``, ``failed`` (a check failed) or ``error`` (could not be built)."""
        if self.error is not None:
            return "error"
        return "passed" if self.passed else "failed"

    def manifest_entry(self) -> dict:
        """The manifest record of this structure (JSON-ready)."""
        entry = {
            "name": self.name,
            "recipe": self.source.recipe,
            "recipe_sha256": self.recipe_sha256,
            "sweep": {key: _json_safe(value) for key, value in self.sweep.items()},
            "seed": self.seed,
            "n_atoms": self.n_atoms,
            "passed": self.passed,
            "outputs": self.outputs,
        }
        if self.failed_checks:
            entry["failed_checks"] = [dict(c) for c in self.failed_checks]
        if self.error is not None:
            entry["error"] = self.error
        return entry


def _json_safe(value):
    """A swept value as JSON: YAML may give dates or nan, which an invalid point
    still records in its entry."""
    if isinstance(value, float) and not math.isfinite(value):
        return str(value)
    if isinstance(value, (str, int, float, bool)) or value is None:
        return value
    if isinstance(value, list):
        return [_json_safe(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    return str(value)


@dataclass(frozen=True)
class BatchResult:
    """The outcomes (sorted by name), the manifest written and stale files removed."""

    outcomes: list[Outcome]
    manifest: dict
    manifest_path: Path
    removed: list[str]

    @property
    def exit_code(self) -> int:
        return exit_code(self.outcomes)


def exit_code(outcomes: Iterable[Outcome]) -> int:
    """2 if any structure could not be built, else 1 if any failed a check, else 0."""
    statuses = {o.status for o in outcomes}
    if "error" in statuses:
        return EXIT_BAD_INPUT
    return EXIT_FAILED_CHECK if "failed" in statuses else EXIT_OK


# ----------------------------------------------------------------------------- discovery


def discover(source_dir: Path, manifest_dir: Path, skip: Path | None = None) -> list[Source]:
    """Every recipe file under ``source_dir``, recursively, sorted by relative path.

    Hidden folders and files (``.git``, ...) and the folder ``skip`` (the
    output folder, if it lies inside) are left out; symbolic links to folders
    are not followed, so the walk is finite and the same on every machine.
    """
    root = Path(os.path.abspath(source_dir))
    skip_abs = os.path.abspath(skip) if skip is not None else None
    found = []
    for folder, dirs, files in os.walk(root):
        dirs[:] = sorted(d for d in dirs if not d.startswith(".")
                         and os.path.join(folder, d) != skip_abs)
        for name in files:
            if name.endswith(RECIPE_SUFFIXES) and not name.startswith("."):
                found.append(Path(folder) / name)
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


def plan_jobs(sources: Sequence[Source], out_root: Path) -> tuple[list[Job], list[Outcome]]:
    """Expand every recipe into jobs; recipes that cannot be expanded become error outcomes.

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
            failed.append(_error_outcome(_fallback_name(source), source, None, exc))
            continue
        for point in points:
            out_dir = out_root / source.rel_dir
            # Casefolded, because a library is shared between case-sensitive and
            # case-insensitive file systems: `Cu.lmp` and `cu.lmp` must not both exist.
            paths = [Path(os.path.relpath(p, out_root)).as_posix()
                     for p in planned_paths(point.recipe, out_dir)]
            clash = next((p for p in paths if p.casefold() in claimed), None)
            if clash is not None:
                exc = InputError(f"would write `{clash}`, which {claimed[clash.casefold()]} "
                                 "already writes", key="name", value=point.name,
                                 hint="give each structure in a folder its own name",
                                 file=source.recipe)
                failed.append(_error_outcome(point.name, source, sha, exc, point.values))
                continue
            owner = f"`{point.name}` ({source.recipe})"
            claimed.update((p.casefold(), owner) for p in paths)
            jobs.append(Job(point.name, source, sha, point.values, point.recipe, str(out_dir)))
    return jobs, failed


def _expand(source: Source):
    """The recipe file's sha256 and its sweep points; InputError names the manifest path."""
    from .recipe import load_yaml
    from .sweep import expand

    try:
        sha = hashlib.sha256(source.path.read_bytes()).hexdigest()
    except OSError as exc:
        raise InputError(f"cannot be read ({exc.strerror or exc})", file=source.recipe) from None
    try:
        data, lines = load_yaml(source.path)
    except InputError as exc:
        exc.file = source.recipe
        raise
    return sha, expand(data, lines, source.recipe)


def _fallback_name(source: Source) -> str:
    """A name for an entry whose recipe could not be read: the file name without suffix."""
    return Path(source.recipe).stem


def _error_outcome(name: str, source: Source, sha: str | None, exc: InputError,
                   sweep: dict | None = None, seconds: float = 0.0) -> Outcome:
    return Outcome(name=name, source=source, recipe_sha256=sha, sweep=dict(sweep or {}),
                   error=_message(exc, source.recipe), display_error=_message(exc, source.display),
                   seconds=seconds)


def _message(exc: InputError, file: str) -> str:
    """The error's one-line message with the recipe file named as ``file``."""
    if exc.file is None:
        return str(exc)
    saved, exc.file = exc.file, file
    try:
        return str(exc)
    finally:
        exc.file = saved


# ----------------------------------------------------------------------------- building


def build_job(job: Job) -> Outcome:
    """Build, audit and write one structure (runs in a worker process)."""
    from .fileio import sha256_file
    from .pipeline import make

    start = time.perf_counter()
    try:
        # workers=1: the pool already uses every core; a second level of
        # threads in the neighbour search would only oversubscribe them.
        result = make(job.recipe, job.out_dir, force=True, recipe_sha256=job.recipe_sha256,
                      workers=1)
    except InputError as exc:
        return _error_outcome(job.name, job.source, job.recipe_sha256, exc, job.sweep,
                              time.perf_counter() - start)
    except OSError as exc:
        error = InputError(f"cannot write ({exc.strerror or exc})", key="--out",
                           value=str(exc.filename or job.out_dir), file=job.source.recipe)
        return _error_outcome(job.name, job.source, job.recipe_sha256, error, job.sweep,
                              time.perf_counter() - start)
    except Exception as exc:  # noqa: BLE001 -- a bug met by one structure must not stop the library
        return _crashed(job, exc)
    report = result.report
    prefix = f"{job.source.rel_dir}/" if job.source.rel_dir else ""
    outputs = {key: {"path": prefix + Path(info["path"]).as_posix(), "sha256": info["sha256"],
                     "bytes": info["bytes"]}
               for key, info in report["outputs"].items()}
    extra = {"report": result.report_path}
    if report.get("defect_sites"):
        extra["defects"] = Path(job.out_dir) / report["defect_sites"]
    for key, path in extra.items():
        outputs[key] = {"path": prefix + path.name, "sha256": sha256_file(path),
                        "bytes": path.stat().st_size}
    failed = tuple({"name": c["name"], "detail": c["detail"]}
                   for c in report["checks"] if not c["passed"])
    return Outcome(name=job.name, source=job.source, recipe_sha256=job.recipe_sha256,
                   sweep=job.sweep, seed=report["seed"], n_atoms=report["n_atoms"],
                   passed=bool(report["passed"]), outputs=outputs, failed_checks=failed,
                   seconds=time.perf_counter() - start)


def build_chunk(jobs: list[Job]) -> list[Outcome]:
    """Build several structures in one worker call (fewer round trips between processes)."""
    return [build_job(job) for job in jobs]


#: Native thread pools (OpenBLAS, OpenMP, MKL, ...) limited to one thread per worker.
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                     "BLIS_NUM_THREADS", "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


def _start_worker() -> None:
    """First thing in each (freshly spawned) worker: one native thread, then the imports.

    The pool already puts one process on every core; numpy's BLAS threads in
    each worker would spin-wait for cores the other workers need (measured:
    the audit of a 100-atom cell took 3x longer with two workers). The limits
    must be set before numpy is imported, hence spawned workers, not forked
    ones that inherit the parent's thread pools. A value the user has set wins.
    """
    for variable in _THREAD_VARIABLES:
        os.environ.setdefault(variable, "1")
    import cellbuild.pipeline  # noqa: F401 -- import once per worker, not per job


def run_jobs(jobs: Sequence[Job], workers: int,
             on_done: Callable[[Outcome], None] | None = None) -> list[Outcome]:
    """Build every job, ``workers`` processes at a time; call ``on_done`` as each finishes.

    With one worker (or one job) the jobs run in this process, without a pool.
    A worker process that dies takes its chunk down with it: those structures
    are recorded as errors and the others go on.
    """
    note = on_done or (lambda outcome: None)
    if workers <= 1 or len(jobs) <= 1:
        outcomes = []
        for job in jobs:
            outcomes.append(build_job(job))
            note(outcomes[-1])
        return outcomes
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    size = max(1, min(MAX_CHUNK, math.ceil(len(jobs) / (4 * workers))))
    chunks = [list(jobs[i:i + size]) for i in range(0, len(jobs), size)]
    outcomes = []
    with ProcessPoolExecutor(max_workers=min(workers, len(chunks)),
                             mp_context=multiprocessing.get_context("spawn"),
                             initializer=_start_worker) as pool:
        futures = {pool.submit(build_chunk, chunk): chunk for chunk in chunks}
        for future in as_completed(futures):
            try:
                done = future.result()
            except Exception as exc:  # noqa: BLE001 -- a dead worker must not stop the rest
                # (BrokenProcessPool after a crash, or a result that cannot be pickled)
                done = [_crashed(job, exc) for job in futures[future]]
            for outcome in done:
                outcomes.append(outcome)
                note(outcome)
    return outcomes


def _crashed(job: Job, exc: BaseException) -> Outcome:
    """An error outcome for a structure whose build failed unexpectedly (a bug or a
    dead worker process), so the rest of the library still gets built."""
    error = InputError(f"could not be built because of an internal error "
                       f"({type(exc).__name__}: {exc})", key="name", value=job.name,
                       hint="`cellbuild --debug make` on this recipe shows the traceback",
                       file=job.source.recipe)
    return _error_outcome(job.name, job.source, job.recipe_sha256, error, job.sweep)


def sort_outcomes(outcomes: Iterable[Outcome]) -> list[Outcome]:
    """Manifest order: by name, then by recipe path (names may repeat across folders)."""
    return sorted(outcomes, key=lambda o: (o.name, o.source.recipe))


# ----------------------------------------------------------------------------- the library


def default_workers() -> int:
    """The cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not available on macOS and Windows
        return max(1, os.cpu_count() or 1)


def build_library(source_dir: str | os.PathLike, out: str | os.PathLike, *,
                  workers: int | None = None,
                  on_done: Callable[[Outcome], None] | None = None,
                  on_planned: Callable[[int], None] | None = None) -> BatchResult:
    """Build every recipe under ``source_dir`` into ``out`` and write ``out/manifest.json``.

    Existing files in ``out`` that a structure writes are replaced; files that
    the previous manifest in ``out`` lists but this build no longer writes are
    removed (other files are left alone). ``on_planned`` receives the number
    of structures once the recipes are expanded, ``on_done`` each outcome.

    Raises :class:`InputError` if ``source_dir`` is not a folder holding
    recipes or ``out`` cannot be used (before anything is written).
    """
    from .pipeline import ensure_output_dir

    source_dir, out = Path(source_dir), Path(out)
    if not source_dir.is_dir():
        raise InputError("is not a folder", key="DIR", value=str(source_dir),
                         hint="give the folder that holds the recipes")
    if workers is not None and workers < 1:
        raise InputError("must be at least 1", key="--workers", value=workers)
    sources = discover(source_dir, out, skip=out)
    if not sources:
        raise InputError("holds no *.yaml or *.yml recipe files", key="DIR",
                         value=str(source_dir))
    if out.exists() and not out.is_dir():
        raise InputError("exists and is not a folder", key="--out", value=str(out))
    ensure_output_dir(out)
    previous = previous_outputs(out / MANIFEST_NAME)
    jobs, failed = plan_jobs(sources, out)
    if on_planned:
        on_planned(len(jobs) + len(failed))
    for outcome in failed:
        if on_done:
            on_done(outcome)
    built = run_jobs(jobs, workers or default_workers(), on_done)
    outcomes = sort_outcomes(failed + built)
    manifest = make_manifest(outcomes, source=_relative(source_dir, out))
    removed = remove_stale(out, previous, manifest)
    write_manifest(out / MANIFEST_NAME, manifest)
    return BatchResult(outcomes, manifest, out / MANIFEST_NAME, removed)


def _relative(path: Path, start: Path) -> str:
    return Path(os.path.relpath(os.path.abspath(path), os.path.abspath(start))).as_posix()


def make_manifest(outcomes: Sequence[Outcome], source: str) -> dict:
    """The manifest dictionary; ``source`` is the recipe folder relative to the manifest."""
    from datetime import datetime, timezone

    return {
        "cellbuild": __version__,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "source": source,
        "structures": [o.manifest_entry() for o in sort_outcomes(outcomes)],
    }


def manifest_bytes(manifest: dict) -> bytes:
    """Stable JSON: sorted keys, two-space indent, trailing newline."""
    return (json.dumps(manifest, indent=2, sort_keys=True, allow_nan=False) + "\n").encode()


def write_manifest(path: Path, manifest: dict) -> None:
    """Write the manifest atomically: a reader sees the old one or the new one."""
    from .fileio import write_bytes_atomic

    write_bytes_atomic(path, manifest_bytes(manifest))


def listed_paths(manifest: dict) -> set[str]:
    """Every output path (relative to the manifest's folder) the manifest lists."""
    paths = set()
    for entry in manifest.get("structures", []):
        outputs = entry.get("outputs") if isinstance(entry, dict) else None
        for info in (outputs or {}).values():
            if isinstance(info, dict) and isinstance(info.get("path"), str):
                paths.add(info["path"])
    return paths


def previous_outputs(manifest_path: Path) -> set[str]:
    """Output paths listed by an earlier manifest at ``manifest_path`` (empty if none
    or unreadable: then nothing is removed, which is the safe side)."""
    try:
        return listed_paths(json.loads(manifest_path.read_text(encoding="utf-8")))
    except (OSError, ValueError, AttributeError):
        return set()


def remove_stale(out: Path, previous: set[str], manifest: dict) -> list[str]:
    """Delete files the previous manifest listed and the new one does not.

    Only cellbuild output files inside ``out`` are touched, whatever an edited
    old manifest says.
    """
    removed = []
    root = os.path.abspath(out)
    # casefolded: on a case-insensitive file system `Cu.lmp` and `cu.lmp` are one file
    current = {p.casefold() for p in listed_paths(manifest)}
    for rel in sorted(p for p in previous if p.casefold() not in current):
        path = os.path.abspath(os.path.join(root, rel))
        inside = os.path.commonpath([root, path]) == root and path != root
        if inside and rel.endswith(OUTPUT_SUFFIXES) and os.path.isfile(path):
            os.unlink(path)
            removed.append(rel)
    return removed


# ----------------------------------------------------------------------------- reporting


def junit_xml(outcomes: Sequence[Outcome]) -> bytes:
    """A JUnit XML report: one test case per structure, ``<failure>`` for failed
    checks, ``<error>`` for structures that could not be built."""
    import xml.etree.ElementTree as ET

    failures = sum(o.status == "failed" for o in outcomes)
    errors = sum(o.status == "error" for o in outcomes)
    total = sum(o.seconds for o in outcomes)
    suite = ET.Element("testsuite", name="cellbuild", tests=str(len(outcomes)),
                       failures=str(failures), errors=str(errors), skipped="0",
                       time=f"{total:.3f}")
    for o in sort_outcomes(outcomes):
        case = ET.SubElement(suite, "testcase", classname=o.source.display, name=o.name,
                             time=f"{o.seconds:.3f}")
        if o.status == "error":
            node = ET.SubElement(case, "error", message=o.display_error or "",
                                 type="InputError")
            node.text = o.display_error
        elif o.status == "failed":
            names = ", ".join(c["name"] for c in o.failed_checks)
            node = ET.SubElement(case, "failure", message=f"failed checks: {names}",
                                 type="CheckFailed")
            node.text = "\n".join(f"{c['name']}: {c['detail']}" for c in o.failed_checks)
        else:
            ET.SubElement(case, "system-out").text = f"{o.n_atoms} atoms, all checks passed"
    ET.indent(suite)
    return ET.tostring(suite, encoding="utf-8", xml_declaration=True) + b"\n"


def write_junit(path: str | os.PathLike, outcomes: Sequence[Outcome]) -> None:
    """Write :func:`junit_xml` to ``path`` atomically (creating its folder)."""
    from .fileio import write_bytes_atomic

    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_bytes_atomic(path, junit_xml(outcomes))
    except OSError as exc:
        raise InputError(f"cannot be written ({exc.strerror or exc})", key="--junit",
                         value=str(path)) from None


def outcome_line(o: Outcome) -> str:
    """One plain line per structure: name, atoms, passed/FAILED/ERROR."""
    if o.status == "error":
        return f"{o.name}  ERROR  {o.display_error}"
    if o.status == "failed":
        names = ", ".join(c["name"] for c in o.failed_checks)
        return f"{o.name}  {o.n_atoms:,} atoms  FAILED ({names})"
    return f"{o.name}  {o.n_atoms:,} atoms  passed"


class ProgressBar:
    """A one-line text progress bar redrawn with carriage returns (for a terminal)."""

    WIDTH = 30

    def __init__(self, stream=None, label: str = "building") -> None:
        self.stream = stream or sys.stderr
        self.label = label
        self.total = 0
        self.done = 0
        self.problems = 0
        self.start = time.perf_counter()

    def planned(self, total: int) -> None:
        self.total = total
        self._draw("")

    def update(self, outcome: Outcome) -> None:
        self.done += 1
        self.problems += outcome.status != "passed"
        self._draw(outcome.name)

    def close(self) -> None:
        self.stream.write("\r\033[K")
        self.stream.flush()

    def _draw(self, name: str) -> None:
        filled = int(self.WIDTH * self.done / self.total) if self.total else 0
        rate = self.done / max(time.perf_counter() - self.start, 1e-9)
        bad = f", {self.problems} not passed" if self.problems else ""
        text = (f"\r{self.label} [{'#' * filled}{'.' * (self.WIDTH - filled)}] "
                f"{self.done}/{self.total} ({rate:.1f}/s{bad}) {name[:40]}")
        self.stream.write(text + "\033[K")
        self.stream.flush()
