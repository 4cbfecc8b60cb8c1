"""Output formats: a registry of format key -> file extension and writer.

Each format lives in its own module exposing
``write(structure, handle, title) -> None``, which streams bytes to a binary
handle (in blocks, never the whole text in memory). Adding a format is one
module, one entry in ``FORMATS`` and its round-trip test.
"""
from __future__ import annotations

import importlib
import os
from dataclasses import dataclass
from pathlib import Path

from ..fileio import HashingWriter, StagedFiles, atomic_writer
from ..structure import Structure


@dataclass(frozen=True)
class Format:
    """One output format: recipe key, file extension, writer module, description."""

    key: str
    extension: str
    module: str
    description: str

    def writer(self):
        return importlib.import_module(f"{__name__}.{self.module}").write


FORMATS: dict[str, Format] = {
    f.key: f
    for f in (
        Format("lammps-data", ".lmp", "lammps", "LAMMPS data file, atom_style atomic, metal units"),
        Format("cif", ".cif", "cif", "CIF 1.1, space group P 1, fractional coordinates"),
        Format("xyz", ".xyz", "xyz", "extended XYZ with Lattice and pbc"),
        Format("poscar", ".vasp", "poscar", "POSCAR, VASP 5 with species line, direct coordinates"),
    )
}


@dataclass(frozen=True)
class WrittenFile:
    """Where a file went and what it holds."""

    path: Path
    sha256: str
    bytes: int


def output_path(out_dir: str | os.PathLike, name: str, key: str) -> Path:
    """``OUT/NAME.EXT`` for format ``key``."""
    return Path(out_dir) / f"{name}{FORMATS[key].extension}"


def write_structure(structure: Structure, key: str, path: str | os.PathLike,
                    title: str, staged: StagedFiles | None = None) -> WrittenFile:
    """Write ``structure`` in format ``key`` to ``path`` atomically; return its hash.

    With ``staged``, the file appears only when the caller commits the group.
    """
    write = FORMATS[key].writer()
    opener = staged.writer if staged is not None else atomic_writer
    with opener(path) as handle:
        hashing = HashingWriter(handle)
        write(structure, hashing, title)
    return WrittenFile(Path(path), hashing.sha256, hashing.bytes)
