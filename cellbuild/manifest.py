"""The library manifest (``OUT/manifest.json``): writing it, and reading one safely.

A manifest is data that may come from anyone (a colleague's tarball, a CI
artefact), so :func:`read_manifest` trusts nothing in it:

* only a regular file of at most :data:`MAX_MANIFEST_BYTES` is read (no
  devices, no FIFOs), as UTF-8 JSON without NaN, infinities, numbers of more
  than :data:`MAX_INT_DIGITS` digits or nesting deeper than Python's
  recursion limit;
* every field verify uses has its type checked; an entry (name and recipe)
  or an output path listed twice is refused;
* every path must stay in the library (:func:`library_paths`):

  - ``outputs.*.path``: relative, inside the manifest's folder M (symbolic
    links resolved), not hidden, ending like a cellbuild output;
  - ``source``: relative, resolving to M or to a folder inside M's parent P
    (P itself included). ``batch recipes --out library`` writes
    ``../recipes``; ``batch`` refuses an OUT whose parent does not hold DIR,
    so every library it writes can be verified;
  - ``recipe``: relative, inside the source folder, a ``*.yaml``/``*.yml``
    file in no hidden folder (what ``batch`` would have found there).

Anything else refuses the whole manifest with one sentence naming the entry
and the field, before any recipe or output is read, so no message can quote
a file the manifest should not have named.
"""
from __future__ import annotations

import json
import math
import os
import stat
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Sequence

from . import __version__
from .errors import InputError
from .formats import EXTENSIONS
from .relaxation import GROUPS_EXTENSION
from .outcomes import Outcome, sort_outcomes

MANIFEST_NAME = "manifest.json"
RECIPE_SUFFIXES = (".yaml", ".yml")
#: Files cellbuild writes for a structure; `verify` reports others of these kinds as extra.
OUTPUT_SUFFIXES = EXTENSIONS + (".report.json", ".defects.json", GROUPS_EXTENSION)
#: A manifest holds about 1 kB per structure: 200 MB is 200,000 structures.
MAX_MANIFEST_BYTES = 200 * 2**20
#: Seeds are below 2**64 (20 digits); nothing in a manifest needs more.
MAX_INT_DIGITS = 40
#: Longest name, path or version string accepted.
MAX_TEXT = 4096

_HINT = "rebuild it with `cellbuild batch DIR --out OUT`"


# ----------------------------------------------------------------------------- writing


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
    structures = manifest.get("structures") if isinstance(manifest, dict) else None
    for entry in structures if isinstance(structures, list) else ():
        outputs = entry.get("outputs") if isinstance(entry, dict) else None
        for info in (outputs if isinstance(outputs, dict) else {}).values():
            if isinstance(info, dict) and isinstance(info.get("path"), str):
                paths.add(info["path"])
    return paths


# ----------------------------------------------------------------------------- reading


def read_json(path: Path, limit: int = MAX_MANIFEST_BYTES):
    """The JSON value in file ``path``; :class:`InputError` (one sentence) if it is
    not a regular file, larger than ``limit`` bytes, not UTF-8 or not plain JSON."""
    try:
        # O_NONBLOCK: opening a FIFO must not wait for a writer
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except FileNotFoundError:
        raise InputError("no manifest here", file=str(path),
                         hint="build one with `cellbuild batch DIR --out OUT`") from None
    except OSError as exc:
        raise InputError(f"cannot be read ({exc.strerror or exc})", file=str(path)) from None
    with os.fdopen(fd, "rb") as handle:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise InputError("is not a regular file, so it cannot be a manifest", file=str(path))
        too_big = InputError(f"is larger than {limit // 2**20} MB, more than any manifest "
                             "cellbuild writes", file=str(path))
        if info.st_size > limit:
            raise too_big
        try:
            data = handle.read(limit + 1)
        except OSError as exc:
            raise InputError(f"cannot be read ({exc.strerror or exc})", file=str(path)) from None
    if len(data) > limit:  # grew while we looked
        raise too_big
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError("is not UTF-8 text", file=str(path)) from None
    try:
        return json.loads(text, parse_int=_bounded_int, parse_float=_finite_float,
                          parse_constant=_no_constant)
    except RecursionError:
        raise InputError("nests too deeply to be a manifest", file=str(path)) from None
    except ValueError as exc:
        raise InputError(f"is not valid JSON ({exc})", file=str(path)) from None


def _bounded_int(text: str) -> int:
    if len(text.lstrip("-")) > MAX_INT_DIGITS:
        raise ValueError(f"a number has {len(text):,} digits, more than {MAX_INT_DIGITS}")
    return int(text)


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value) or len(text) > 100:
        raise ValueError("a number is out of range")
    return value


def _no_constant(text: str):
    raise ValueError(f"{text} is not a number JSON allows")


def read_manifest(path: str | os.PathLike) -> dict:
    """Load and check a manifest (a file, or a folder holding ``manifest.json``).

    Raises :class:`InputError` in one sentence if it is missing, unreadable, too
    large, not JSON or not shaped like a cellbuild manifest (its paths are
    checked by :func:`library_paths`).
    """
    path = Path(path)
    if path.is_dir():
        path = path / MANIFEST_NAME
    manifest = read_json(path)
    problem = _shape_problem(manifest)
    if problem:
        raise InputError(f"is not a cellbuild manifest: {problem}", file=str(path), hint=_HINT)
    return manifest


def _text_problem(value, where: str, optional: bool = False) -> str | None:
    if value is None and optional:
        return None
    if not isinstance(value, str) or not value:
        return f"`{where}` is missing or not a string"
    if len(value) > MAX_TEXT or not value.isprintable():
        return f"`{where}` is too long or holds control characters"
    return None


def _shape_problem(manifest) -> str | None:
    """What is wrong with the manifest's structure, or None."""
    if not isinstance(manifest, dict):
        return "the top level is not a mapping"
    for key in ("cellbuild", "source"):
        if problem := _text_problem(manifest.get(key), key):
            return problem
    if not isinstance(manifest.get("structures"), list):
        return "`structures` is missing or not a list"
    seen: dict[tuple[str, str], int] = {}
    outputs_seen: dict[str, int] = {}
    for i, entry in enumerate(manifest["structures"]):
        where = f"structures[{i}]"
        if not isinstance(entry, dict):
            return f"`{where}` is not a mapping"
        for key in ("name", "recipe"):
            if problem := _text_problem(entry.get(key), f"{where}.{key}"):
                return problem
        for key in ("recipe_sha256", "error"):
            if problem := _text_problem(entry.get(key), f"{where}.{key}", optional=True):
                return problem
        if not isinstance(entry.get("outputs"), dict):
            return f"`{where}.outputs` is missing or not a mapping"
        key = (entry["name"], entry["recipe"])
        if key in seen:
            return (f"`{where}` repeats the entry `{entry['name']}` of {entry['recipe']} "
                    f"(structures[{seen[key]}])")
        seen[key] = i
        for fmt, info in entry["outputs"].items():
            at = f"{where}.outputs.{fmt}"
            if not (isinstance(info, dict) and isinstance(info.get("path"), str)
                    and isinstance(info.get("sha256"), str)):
                return f"`{at}` lacks a path or a sha256"
            if problem := _text_problem(info["path"], f"{at}.path"):
                return problem
            size = info.get("bytes")
            if size is not None and (isinstance(size, bool) or not isinstance(size, int)
                                     or size < 0):
                return f"`{at}.bytes` is not a byte count"
            folded = info["path"].casefold()
            if folded in outputs_seen:
                return (f"`{at}.path` lists {info['path']} a second time "
                        f"(structures[{outputs_seen[folded]}] lists it too)")
            outputs_seen[folded] = i
    return None


# ----------------------------------------------------------------------------- paths


@dataclass(frozen=True)
class LibraryPaths:
    """Where a checked manifest's files are: its folder and the recipe folder
    (both with symbolic links resolved)."""

    root: Path
    source_dir: Path


def library_paths(manifest: dict, manifest_path: Path) -> LibraryPaths:
    """Check that every path in ``manifest`` stays in the library (see the module
    notes); :class:`InputError` naming the entry and the field otherwise."""
    root = Path(os.path.realpath(manifest_path.parent))
    parent = root.parent

    def refuse(where: str, value: str, why: str) -> InputError:
        return InputError(f"{why}, so the manifest is refused", key=where, value=value,
                          file=str(manifest_path), hint=_HINT)

    source = manifest["source"]
    if _is_absolute(source):
        raise refuse("source", source, "is not a path relative to the manifest")
    source_dir = Path(os.path.realpath(root / source))
    if not (source_dir == root or _within(source_dir, parent)) or source_dir == source_dir.parent:
        raise refuse("source", source, f"leads outside {parent}, the folder holding the library")
    for i, entry in enumerate(manifest["structures"]):
        where = f"structures[{i}]"
        recipe = entry["recipe"]
        real = os.path.realpath(root / recipe)
        if _is_absolute(recipe) or not _inside(real, source_dir):
            raise refuse(f"{where}.recipe", recipe,
                         f"is not in the recipe folder `{source}` (entry `{entry['name']}`)")
        rel = PurePosixPath(Path(real).relative_to(source_dir).as_posix())
        if not rel.name.endswith(RECIPE_SUFFIXES) or any(p.startswith(".") for p in rel.parts):
            raise refuse(f"{where}.recipe", recipe,
                         f"is not a *.yaml or *.yml recipe outside hidden folders "
                         f"(entry `{entry['name']}`)")
        for fmt, info in entry["outputs"].items():
            path = info["path"]
            parts = PurePosixPath(path).parts
            if _is_absolute(path) or ".." in parts or \
                    not _inside(os.path.realpath(root / path), root):
                raise refuse(f"{where}.outputs.{fmt}.path", path,
                             f"leaves the manifest's folder (entry `{entry['name']}`)")
            if not path.endswith(OUTPUT_SUFFIXES) or any(p.startswith(".") for p in parts):
                raise refuse(f"{where}.outputs.{fmt}.path", path,
                             f"is not a cellbuild output file name (entry `{entry['name']}`)")
    return LibraryPaths(root, source_dir)


def _is_absolute(path: str) -> bool:
    # both conventions: a manifest written on Windows must not smuggle in `C:\...`
    return os.path.isabs(path) or path.startswith(("/", "\\")) or (len(path) > 1
                                                                   and path[1] == ":")


def _inside(path, folder) -> bool:
    a, b = os.fspath(path), os.fspath(folder)
    return a != b and os.path.commonpath([a, b]) == b


def _within(path, folder) -> bool:
    return os.fspath(path) == os.fspath(folder) or _inside(path, folder)
