"""VASP KPOINTS file of an automatic mesh from the recipe's spacing.

Layout::

    <title>: Gamma-centred mesh from a spacing of 0.25 1/Angstrom (cellbuild)
    0
    Gamma                            (or Monkhorst-Pack)
    7 7 7
    0 0 0

The mesh rule is :func:`cellbuild.kpoints.mesh`. Not a structure: ``inspect``
does not read it.
"""
from __future__ import annotations

from ..kpoints import mesh
from ..structure import Structure
from . import _text


def write(structure: Structure, handle, title: str, options=None) -> None:
    """Write the KPOINTS file of ``structure``'s cell to binary ``handle``."""
    from ..recipe_outputs import DEFAULT_SPACING, Kpoints

    _text.check_codes(structure.species, len(structure.symbols))  # as every writer does
    kpoints = (options.kpoints if options else None) or Kpoints(DEFAULT_SPACING)
    n = mesh(structure.cell, kpoints.spacing)
    style = "Gamma" if kpoints.centring == "gamma" else "Monkhorst-Pack"
    name = _text.one_line(title, "structure")
    handle.write((f"{name}: {style} mesh from a spacing of {kpoints.spacing} 1/Angstrom "
                  f"(cellbuild)\n0\n{style}\n{n[0]} {n[1]} {n[2]}\n0 0 0\n").encode("ascii"))


# ----------------------------------------------------------------------------- registry entry

KEY = "kpoints"
EXTENSION = ".kpoints"
TITLE = "KPOINTS"
DESCRIPTION = "VASP KPOINTS, automatic mesh from a spacing in 1/Angstrom"
BYTES_PER_ATOM = 0
ASE_FORMAT = ""
NAME_HINT = ""
SNIFF_ORDER = 99
#: Written unless a recipe lists its outputs: no.
DEFAULT = False
#: A structure file (read by ``inspect``): no.
STRUCTURE = False


def named(name: str, suffix: str) -> bool:
    return False  # not a structure file: never read


def sniff(lines: list[str]) -> bool:
    return False


read = None
