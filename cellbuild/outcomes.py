"""The plain data of a library build: recipe sources, jobs and their outcomes.

Shared by :mod:`cellbuild.batch` (which plans and records), :mod:`cellbuild.pool`
(which builds, in worker processes: everything here pickles) and
:mod:`cellbuild.verify` (which compares). No heavy imports.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

from .errors import InputError

EXIT_OK, EXIT_FAILED_CHECK, EXIT_BAD_INPUT = 0, 1, 2


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
    #: flush each file before it takes its name (False: the caller syncs them all at the end)
    sync: bool = True


@dataclass(frozen=True)
class Outcome:
    """What happened to one structure (or to a recipe that could not be expanded).

    ``outputs`` maps a format key (and ``report``, ``defects``) to
    ``{"path" (relative to OUT, POSIX), "sha256", "bytes"}``. ``error`` is the
    one-line message of bad input with the recipe named as in the manifest,
    ``display_error`` the same message with the recipe named as the user gave it.
    ``write_problem`` is set (to the system's reason, e.g. "No space left on
    device") when the files could not be written: a problem of the output
    folder, not of the recipe. ``warnings`` are the report's warnings.
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
    warnings: tuple = ()
    error: str | None = None
    display_error: str | None = None
    write_problem: str | None = None
    seconds: float = 0.0
    #: who built it (a Dask worker's address, or ``process PID``); never in the manifest
    worker: str = field(default="", compare=False)

    @property
    def status(self) -> str:
        """``passed``, ``failed`` (a check failed) or ``error`` (could not be built)."""
        if self.error is not None:
            return "error"
        return "passed" if self.passed else "failed"

    def manifest_entry(self) -> dict:
        """The manifest record of this structure (JSON-ready).

        ``warnings`` appears only when there are some, so libraries built
        without warnings keep the manifest layout they always had.
        """
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
        if self.warnings:
            entry["warnings"] = list(self.warnings)
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


def exit_code(outcomes: Iterable[Outcome]) -> int:
    """2 if any structure could not be built, else 1 if any failed a check, else 0."""
    statuses = {o.status for o in outcomes}
    if "error" in statuses:
        return EXIT_BAD_INPUT
    return EXIT_FAILED_CHECK if "failed" in statuses else EXIT_OK


def sort_outcomes(outcomes: Iterable[Outcome]) -> list[Outcome]:
    """Manifest order: by name, then by recipe path (names may repeat across folders)."""
    return sorted(outcomes, key=lambda o: (o.name, o.source.recipe))


def error_outcome(name: str, source: Source, sha: str | None, exc: InputError,
                  sweep: dict | None = None, seconds: float = 0.0,
                  write_problem: str | None = None) -> Outcome:
    """The outcome of a structure that could not be built because of ``exc``."""
    return Outcome(name=name, source=source, recipe_sha256=sha, sweep=dict(sweep or {}),
                   error=message_naming(exc, source.recipe),
                   display_error=message_naming(exc, source.display),
                   write_problem=write_problem, seconds=seconds)


def message_naming(exc: InputError, file: str) -> str:
    """The error's one-line message with the recipe file named as ``file``."""
    if exc.file is None:
        return str(exc)
    saved, exc.file = exc.file, file
    try:
        return str(exc)
    finally:
        exc.file = saved
