"""Check a built library against its manifest: rebuild everything and compare bytes.

:func:`verify` reads ``manifest.json``, re-expands every recipe it names,
rebuilds every structure into a temporary folder and compares, per entry:

* the recipe file with the recorded sha256 (``recipe missing``, ``recipe changed``);
* the rebuilt files with the manifest (``changed``: the same recipe no longer
  gives the same bytes, e.g. after a dependency changed);
* the files on disk with the manifest (``missing``, ``changed on disk``);
* the entries: ones the recipes no longer produce (``no longer produced``),
  new ones (``not in manifest``), a changed error (``outcome changed``);
* the output folder: cellbuild outputs the manifest does not list (``extra``)
  and recipe files in the source folder it does not know (``new recipe``).

Everything matches only when the list of differences is empty.
"""
from __future__ import annotations

import json
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from .batch import (MANIFEST_NAME, OUTPUT_SUFFIXES, Outcome, Source, discover, listed_paths,
                    make_source, plan_jobs, run_jobs, sort_outcomes)
from .errors import InputError


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


# ----------------------------------------------------------------------------- manifest


def read_manifest(path: str | os.PathLike) -> dict:
    """Load and sanity-check a manifest; :class:`InputError` in one sentence if it
    is missing, not JSON or not shaped like a cellbuild manifest."""
    path = Path(path)
    if path.is_dir():
        path = path / MANIFEST_NAME
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("no manifest here", file=str(path),
                         hint="build one with `cellbuild batch DIR --out OUT`") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot be read ({getattr(exc, 'strerror', None) or exc})",
                         file=str(path)) from None
    try:
        manifest = json.loads(text)
    except ValueError as exc:
        raise InputError(f"is not valid JSON ({exc})", file=str(path)) from None
    problem = _shape_problem(manifest)
    if problem:
        raise InputError(f"is not a cellbuild manifest: {problem}", file=str(path),
                         hint="rebuild it with `cellbuild batch DIR --out OUT`")
    return manifest


def _shape_problem(manifest) -> str | None:
    """What is wrong with the manifest's structure, or None."""
    if not isinstance(manifest, dict):
        return "the top level is not a mapping"
    for key, kind in (("cellbuild", str), ("source", str), ("structures", list)):
        if not isinstance(manifest.get(key), kind):
            return f"`{key}` is missing or not {kind.__name__}"
    for i, entry in enumerate(manifest["structures"]):
        where = f"structures[{i}]"
        if not isinstance(entry, dict):
            return f"`{where}` is not a mapping"
        for key, kind in (("name", str), ("recipe", str), ("outputs", dict)):
            if not isinstance(entry.get(key), kind):
                return f"`{where}.{key}` is missing or not {kind.__name__}"
        for fmt, info in entry["outputs"].items():
            if not (isinstance(info, dict) and isinstance(info.get("path"), str)
                    and isinstance(info.get("sha256"), str)):
                return f"`{where}.outputs.{fmt}` lacks a path or a sha256"
            if not _is_inside(info["path"]):
                return f"`{where}.outputs.{fmt}.path` leaves the manifest's folder"
    return None


def _is_inside(rel: str) -> bool:
    parts = Path(rel).parts
    return bool(parts) and not Path(rel).is_absolute() and ".." not in parts


# ----------------------------------------------------------------------------- verify


def verify(manifest_path: str | os.PathLike, *, workers: int | None = None,
           on_planned: Callable[[int], None] | None = None,
           on_done: Callable[[Outcome], None] | None = None) -> VerifyResult:
    """Rebuild every entry of the manifest in a temporary folder and compare.

    Raises :class:`InputError` for a missing or malformed manifest; every other
    problem is a :class:`Difference` in the result.
    """
    from .batch import default_workers

    manifest_path = Path(manifest_path)
    if manifest_path.is_dir():
        manifest_path = manifest_path / MANIFEST_NAME
    manifest = read_manifest(manifest_path)
    root = manifest_path.parent
    entries = manifest["structures"]
    diffs: list[Difference] = []
    diffs += _check_disk(root, entries)
    diffs += _check_extra(root, manifest)
    sources, recipe_diffs = _recipe_sources(root, manifest)
    diffs += recipe_diffs
    with tempfile.TemporaryDirectory(prefix="cellbuild-verify-") as tmp:
        jobs, failed = plan_jobs(sources, Path(tmp))
        if on_planned:
            on_planned(len(jobs) + len(failed))
        rebuilt = failed + run_jobs(jobs, workers or default_workers(), on_done)
        diffs += _compare(root, Path(tmp), entries, sort_outcomes(rebuilt))
    diffs.sort(key=lambda d: d.entry)  # stable: groups each entry's lines, in check order
    return VerifyResult(diffs, len(entries))


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
    """cellbuild output files under the manifest's folder that it does not list."""
    listed = listed_paths(manifest)
    diffs = []
    for folder, dirs, files in os.walk(root):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(files):
            if name.endswith(OUTPUT_SUFFIXES) and not name.startswith("."):
                rel = (Path(folder) / name).relative_to(root).as_posix()
                if rel not in listed:
                    diffs.append(Difference(rel, "extra", None,
                                            "a cellbuild output the manifest does not list"))
    return diffs


def _recipe_sources(root: Path, manifest: dict) -> tuple[list[Source], list[Difference]]:
    """The recipes to rebuild (those the manifest names that still exist, in the
    batch's order) and the differences found on the recipes themselves."""
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
        if not _is_under(path, source_dir):
            diffs.append(Difference(recipe, "recipe outside the source folder", None,
                                    f"not under {manifest['source']}"))
            continue
        sources.append(make_source(path, source_dir, root, display_root=source_dir))
    if source_dir.is_dir():
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


def _is_under(path: Path, folder: Path) -> bool:
    a, b = os.path.abspath(path), os.path.abspath(folder)
    return os.path.commonpath([a, b]) == b and a != b


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
    try:
        a = json.loads(on_disk.read_text(encoding="utf-8"))
        b = json.loads(rebuilt.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    if not isinstance(a, dict) or not isinstance(b, dict):
        return []
    return sorted(k for k in a.keys() | b.keys() if a.get(k) != b.get(k))
