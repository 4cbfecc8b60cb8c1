"""Check a built library against its manifest: rebuild everything and compare bytes.

:func:`verify` reads ``manifest.json`` (checked by :mod:`cellbuild.manifest`:
every path must stay in the library, or the manifest is refused before any
file it names is read), re-expands every recipe it names, rebuilds every
structure into a temporary folder and compares, per entry:

* the manifest itself: written by another cellbuild version (``other
  cellbuild version``: its outputs may differ for that reason alone);
* the recipe file with the recorded sha256 (``recipe missing``, ``recipe changed``);
* the rebuilt files with the manifest (``changed``: the same recipe no longer
  gives the same bytes, e.g. after a dependency changed);
* the files on disk with the manifest (``missing``, ``changed on disk``);
* the entries: ones the recipes no longer produce (``no longer produced``),
  new ones (``not in manifest``), a changed error (``outcome changed``);
* the output folder: output-like files the manifest does not list
  (``extra``), temporaries an interrupted write left (``leftover
  temporary``) and recipe files in the source folder it does not know
  (``new recipe``).

Everything matches only when the list of differences is empty. A rebuild that
cannot write its scratch folder (``TMPDIR`` full or unwritable) is an
:class:`InputError` naming that folder, not a difference of any recipe.
"""
from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Callable

from . import __version__
from .batch import TEMPORARY_TARGETS, discover, make_source, plan_jobs
from .errors import InputError
from .manifest import (MANIFEST_NAME, OUTPUT_SUFFIXES, LibraryPaths, library_paths,
                       listed_paths, read_manifest)
from .outcomes import Outcome, Source, sort_outcomes
from .pool import sigterm_as_interrupt

if TYPE_CHECKING:
    from .executors import Executor


@dataclass(frozen=True)
class Difference:
    """One mismatch: the entry (structure name, or a path), its kind, the file
    concerned (relative to the manifest, if any) and a short explanation."""

    entry: str
    kind: str
    file: str | None = None
    detail: str = ""

    def line(self) -> str:
        """One printable line: ``entry: kind file (detail)``."""
        text = f"{self.entry}: {self.kind}"
        if self.file:
            text += f" {self.file}"
        if self.detail:
            text += f" ({self.detail})"
        return text


@dataclass(frozen=True)
class VerifyResult:
    """The differences found and the number of manifest entries checked."""

    differences: list[Difference]
    n_entries: int

    @property
    def ok(self) -> bool:
        return not self.differences


# ----------------------------------------------------------------------------- verify


def verify(manifest_path: str | os.PathLike, *, workers: int | None = None,
           executor: "Executor | None" = None, scratch: str | os.PathLike | None = None,
           on_planned: Callable[[int], None] | None = None,
           on_done: Callable[[Outcome], None] | None = None) -> VerifyResult:
    """Rebuild every entry of the manifest in a temporary folder and compare.

    The temporary folder is made in ``scratch`` (default: ``TMPDIR`` or the
    system's temporary folder); with a Dask cluster it must be a folder every
    worker sees. ``executor`` runs the rebuild (:mod:`cellbuild.executors`;
    default: a local pool of ``workers`` processes).

    Raises :class:`InputError` for a missing, malformed or unsafe manifest and
    for a scratch folder that cannot take the rebuild (or that a worker cannot
    see); every other problem is a :class:`Difference` in the result.
    """
    if executor is None:
        from .executors import LocalPool

        executor = LocalPool(workers)
    manifest_path = Path(manifest_path)
    if manifest_path.is_dir():
        manifest_path = manifest_path / MANIFEST_NAME
    manifest = read_manifest(manifest_path)
    paths = library_paths(manifest, manifest_path)
    root = manifest_path.parent
    entries = manifest["structures"]
    diffs: list[Difference] = []
    if manifest["cellbuild"] != __version__:
        diffs.append(Difference(MANIFEST_NAME, "other cellbuild version", None,
                                f"written by cellbuild {_short(manifest['cellbuild'])}, "
                                f"this is {__version__}; outputs may differ for that alone"))
    diffs += _check_disk(root, entries)
    diffs += _check_extra(root, manifest)
    sources, recipe_diffs = _recipe_sources(root, paths, manifest)
    diffs += recipe_diffs
    scratch, key = (_scratch_root(), "TMPDIR") if scratch is None else (str(scratch), "--scratch")
    if not os.path.isdir(scratch):
        raise InputError("is not a folder", key=key, value=scratch,
                         hint="give an existing folder for the rebuild")
    _check_scratch_space(scratch, entries, key)
    try:
        tmp_dir = tempfile.TemporaryDirectory(prefix="cellbuild-verify-", dir=scratch)
    except OSError as exc:
        raise _scratch_error(scratch, exc.strerror or str(exc), key) from None
    with tmp_dir as tmp, sigterm_as_interrupt():
        # the rebuild is compared and thrown away: no flush to the disk needed
        jobs, failed = plan_jobs(sources, Path(tmp), sync=False)
        if jobs:
            executor.check_shared(Path(tmp), key)
        if on_planned:
            on_planned(len(jobs) + len(failed))
        rebuilt = failed + executor.run(jobs, on_done)
        trouble = next((o.write_problem for o in rebuilt if o.write_problem), None)
        if trouble is not None:
            raise _scratch_error(scratch, trouble, key)
        diffs += _compare(root, Path(tmp), entries, sort_outcomes(rebuilt))
    diffs.sort(key=lambda d: d.entry)  # stable: groups each entry's lines, in check order
    return VerifyResult(diffs, len(entries))


def _short(text: str) -> str:
    return repr(text) if len(text) <= 40 else repr(text[:37] + "...")


def _scratch_root() -> str:
    """The folder the rebuild goes to (``TMPDIR`` or the system's temporary folder)."""
    try:
        return tempfile.gettempdir()
    except FileNotFoundError as exc:  # no usable temporary folder at all
        raise InputError("no usable temporary folder for the rebuild", key="TMPDIR",
                         value=os.environ.get("TMPDIR", ""),
                         hint="set TMPDIR to a writable folder with room") from exc


def _scratch_error(scratch: str, why: str, key: str = "TMPDIR") -> InputError:
    where = "set TMPDIR to" if key == "TMPDIR" else "give --scratch"
    return InputError(f"cannot take the rebuild ({why}); this is a problem of that folder, "
                      "not of the library", key=key, value=scratch,
                      hint=f"free space there or {where} a writable folder with room")


def _check_scratch_space(scratch: str, entries: list[dict], key: str = "TMPDIR") -> None:
    """Refuse before rebuilding when the scratch folder cannot hold the files again."""
    import shutil

    needed = sum(info.get("bytes") or 0 for e in entries for info in e["outputs"].values())
    try:
        free = shutil.disk_usage(scratch).free
    except OSError:
        return  # the rebuild will tell
    if needed > free:
        raise _scratch_error(scratch, f"the rebuild needs about {needed / 2**20:,.1f} MB, "
                                      f"{free / 2**20:,.1f} MB are free", key)


def _check_disk(root: Path, entries: list[dict]) -> list[Difference]:
    """Files on disk against the manifest: missing or changed by hand."""
    from .fileio import sha256_file

    diffs = []
    for entry in entries:
        for info in entry["outputs"].values():
            path = root / info["path"]
            if not path.is_file():
                diffs.append(Difference(entry["name"], "missing", info["path"]))
            elif sha256_file(path) != info["sha256"]:
                diffs.append(Difference(entry["name"], "changed on disk", info["path"],
                                        "differs from the sha256 in the manifest"))
    return diffs


def _check_extra(root: Path, manifest: dict) -> list[Difference]:
    """Output-like files under the manifest's folder that it does not list, and
    temporaries left by an interrupted write."""
    from .fileio import is_temporary

    listed = listed_paths(manifest)
    diffs = []
    for folder, dirs, files in os.walk(root):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(files):
            rel = (Path(folder) / name).relative_to(root).as_posix()
            if is_temporary(name, TEMPORARY_TARGETS):
                diffs.append(Difference(rel, "leftover temporary", None,
                                        "left by an interrupted write; the next "
                                        "`cellbuild batch` into this folder removes it"))
            elif name.endswith(OUTPUT_SUFFIXES) and not name.startswith(".") \
                    and rel not in listed:
                diffs.append(Difference(rel, "extra", None, "not listed in the manifest"))
    return diffs


def _recipe_sources(root: Path, paths: LibraryPaths,
                    manifest: dict) -> tuple[list[Source], list[Difference]]:
    """The recipes to rebuild (those the manifest names that still exist, in the
    batch's order) and the differences found on the recipes themselves.

    Every recipe path was checked by :func:`cellbuild.manifest.library_paths`:
    it lies in the source folder, which lies in the library."""
    import hashlib

    source_dir = root / manifest["source"]
    by_recipe: dict[str, list[dict]] = {}
    for entry in manifest["structures"]:
        by_recipe.setdefault(entry["recipe"], []).append(entry)
    sources, diffs = [], []
    for recipe in sorted(by_recipe, key=lambda r: _source_key(root, source_dir, r)):
        path = root / recipe
        try:
            sha = hashlib.sha256(path.read_bytes()).hexdigest()
        except OSError:
            diffs += [Difference(e["name"], "recipe missing", recipe) for e in by_recipe[recipe]]
            continue
        for entry in by_recipe[recipe]:
            if entry.get("recipe_sha256") not in (None, sha):
                diffs.append(Difference(entry["name"], "recipe changed", recipe,
                                        f"sha256 {entry['recipe_sha256'][:12]}... in the "
                                        f"manifest, {sha[:12]}... now"))
        sources.append(make_source(path, source_dir, root, display_root=source_dir))
    if paths.source_dir.is_dir():
        known = {s.recipe for s in sources} | set(by_recipe)
        for found in discover(source_dir, root, skip=root):
            if found.recipe not in known:
                diffs.append(Difference(found.recipe, "new recipe", None,
                                        "not in the manifest; rebuild with `cellbuild batch`"))
    return sources, diffs


def _source_key(root: Path, source_dir: Path, recipe: str) -> str:
    """Sort key reproducing the batch's order: path relative to the source folder."""
    return Path(os.path.relpath(os.path.abspath(root / recipe),
                                os.path.abspath(source_dir))).as_posix()


def _compare(root: Path, tmp: Path, entries: list[dict],
             rebuilt: list[Outcome]) -> list[Difference]:
    """The rebuilt outcomes against the manifest entries, matched by (name, recipe)."""
    old = {(e["name"], e["recipe"]): e for e in entries}
    new = {(o.name, o.source.recipe): o for o in rebuilt}
    missing_recipes = {e["recipe"] for e in entries if not (root / e["recipe"]).is_file()}
    diffs = []
    for key in sorted(old.keys() | new.keys()):
        name, recipe = key
        if key not in new:
            if recipe not in missing_recipes:
                diffs.append(Difference(name, "no longer produced", None,
                                        f"{recipe} does not build it any more"))
            continue
        if key not in old:
            diffs.append(Difference(name, "not in manifest", None, f"{recipe} now builds it"))
            continue
        diffs += _compare_entry(root, tmp, old[key], new[key])
    return diffs


def _compare_entry(root: Path, tmp: Path, entry: dict, outcome: Outcome) -> list[Difference]:
    """One entry: same error (or none), same files, same bytes."""
    name = entry["name"]
    if entry.get("error") != outcome.error:
        was = entry.get("error") or "built"
        now = outcome.error or "builds"
        return [Difference(name, "outcome changed", None, f"was: {was}; now: {now}")]
    diffs = []
    recorded, produced = entry["outputs"], outcome.outputs
    for fmt in sorted(recorded.keys() | produced.keys()):
        if fmt not in produced:
            diffs.append(Difference(name, "changed", recorded[fmt]["path"],
                                    "the rebuild no longer writes it"))
        elif fmt not in recorded:
            diffs.append(Difference(name, "changed", produced[fmt]["path"],
                                    "the rebuild writes it; the manifest does not list it"))
        elif produced[fmt]["sha256"] != recorded[fmt]["sha256"] \
                or produced[fmt]["path"] != recorded[fmt]["path"]:
            detail = "the rebuilt file differs from the manifest"
            if fmt == "report":
                fields = _report_fields_differing(root / recorded[fmt]["path"],
                                                  tmp / produced[fmt]["path"])
                if fields:
                    detail += f" in {', '.join(fields)}"
            diffs.append(Difference(name, "changed", recorded[fmt]["path"], detail))
    return diffs


def _report_fields_differing(on_disk: Path, rebuilt: Path) -> list[str]:
    """Top-level report fields that differ (to tell a version bump from a new
    structure); empty if the file on disk cannot be read."""
    from .manifest import read_json

    try:
        a, b = read_json(on_disk), read_json(rebuilt)
    except InputError:
        return []
    if not isinstance(a, dict) or not isinstance(b, dict):
        return []
    return sorted(str(k)[:80] for k in a.keys() | b.keys() if a.get(k) != b.get(k))
