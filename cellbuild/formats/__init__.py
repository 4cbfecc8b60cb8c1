"""The format registry: every structure file format, one module each.

A format module holds all that is known of its format: ``KEY`` (the recipe's
``outputs`` key and the name ``inspect`` reports), ``EXTENSION``, ``TITLE``,
``DESCRIPTION``, ``BYTES_PER_ATOM`` (size estimate), ``ASE_FORMAT``,
``SNIFF_ORDER``, ``NAME_HINT``, ``DEFAULT`` and ``STRUCTURE`` (optional, default true), ``write(structure, handle, title, options)`` (streams bytes to a binary
handle, in blocks), ``read(path, types, fast)`` (into a ``ReadResult``),
``named(name, suffix)`` and ``sniff(lines)`` (telling a file's format from its
name or first lines). Everything else (recipe validation, plan estimates,
batch and verify file names, ``inspect``) asks :data:`FORMATS`. Adding a
format is one module, its name in :data:`MODULES`, and its round-trip test.
"""
from __future__ import annotations

import importlib
import os
from dataclasses import dataclass
from pathlib import Path
from types import ModuleType

from ..fileio import HashingWriter, StagedFiles, atomic_writer
from ..structure import Structure

#: The format modules, in the order recipes list their outputs by default.
MODULES = ("lammps", "cif", "xyz", "poscar", "espresso", "kpoints")


@dataclass(frozen=True)
class Format:
    """One format, read from its module (see the module docstring)."""

    key: str
    extension: str
    title: str
    description: str
    bytes_per_atom: int
    ase_format: str
    sniff_order: int
    name_hint: str
    default: bool       # written when a recipe does not list its outputs
    structure: bool     # a structure file that ``inspect`` reads
    module: ModuleType

    @classmethod
    def of(cls, module: ModuleType) -> "Format":
        return cls(module.KEY, module.EXTENSION, module.TITLE, module.DESCRIPTION,
                   module.BYTES_PER_ATOM, module.ASE_FORMAT, module.SNIFF_ORDER,
                   module.NAME_HINT, getattr(module, "DEFAULT", True),
                   getattr(module, "STRUCTURE", True), module)

    def writer(self):
        return self.module.write

    def reader(self):
        return self.module.read

    def named(self, path: Path) -> bool:
        return self.module.named(path.name.lower(), path.suffix.lower())

    def sniff(self, lines: list[str]) -> bool:
        return self.module.sniff(lines)


FORMATS: dict[str, Format] = {
    f.key: f for f in (Format.of(importlib.import_module(f"{__name__}.{m}")) for m in MODULES)
}

#: The formats a recipe without ``outputs`` writes.
DEFAULT_KEYS: tuple[str, ...] = tuple(k for k, f in FORMATS.items() if f.default)

#: Extensions of every file a format writes.
EXTENSIONS: tuple[str, ...] = tuple(f.extension for f in FORMATS.values())


def format_named(path: Path) -> Format | None:
    """The format a file's name says, or None."""
    return next((f for f in FORMATS.values() if f.structure and f.named(path)), None)


def format_sniffed(lines: list[str]) -> Format | None:
    """The format a file's first lines (stripped) look like, or None."""
    return next((f for f in sorted(FORMATS.values(), key=lambda f: f.sniff_order)
                 if f.structure and f.sniff(lines)), None)


def title_of(name: str) -> str:
    """The format's name in messages, from a key or ASE's name for it."""
    found = FORMATS.get(name) or next((f for f in FORMATS.values() if f.ase_format == name), None)
    return found.title if found else name


@dataclass(frozen=True)
class WrittenFile:
    """Where a file went and what it holds."""

    path: Path
    sha256: str
    bytes: int


def output_path(out_dir: str | os.PathLike, name: str, key: str) -> Path:
    """``OUT/NAME.EXT`` for format ``key``."""
    return Path(out_dir) / f"{name}{FORMATS[key].extension}"


@dataclass(frozen=True)
class WriteOptions:
    """Settings writers may take from the recipe: the k-point mesh
    (:class:`cellbuild.recipe_outputs.Kpoints`) and the pw.x input's
    (:class:`cellbuild.recipe_outputs.Espresso`), the atoms free to relax; None
    where not given."""

    kpoints: object = None
    espresso: object = None
    free: object = None  # (N,) bool: atoms free to relax, file order (``relax``)


def write_structure(structure: Structure, key: str, path: str | os.PathLike,
                    title: str, staged: StagedFiles | None = None,
                    options: WriteOptions | None = None) -> WrittenFile:
    """Write ``structure`` in format ``key`` to ``path`` atomically; return its hash.

    With ``staged``, the file appears only when the caller commits the group.
    """
    write = FORMATS[key].writer()
    opener = staged.writer if staged is not None else atomic_writer
    with opener(path) as handle:
        hashing = HashingWriter(handle)
        write(structure, hashing, title, options)
    return WrittenFile(Path(path), hashing.sha256, hashing.bytes)
