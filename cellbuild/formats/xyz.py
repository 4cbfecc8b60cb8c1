"""Extended XYZ writer.

Layout::

    N
    Lattice="ax ay az bx by bz cx cy cz" Properties=species:S:1:pos:R:3 pbc="T T T" title="..."
    Cu   0.0000000000   0.0000000000   0.0000000000

Lattice vectors and Cartesian positions in Angstrom, positions as stored in
the structure (not wrapped: extended XYZ keeps them as given). A structure with
charges gets a fifth column ``initial_charges:R:1`` (elementary charges), the
name ASE reads as the atoms' initial charges.
"""
from __future__ import annotations

import re

import numpy as np

from ..structure import Structure
from . import _rounding, _text
#: Decimals of Cartesian values in Angstrom (see lammps.DECIMALS).
DECIMALS = 10


def write(structure: Structure, handle, title: str, options=None) -> None:
    """Write ``structure`` as extended XYZ to binary ``handle``."""
    _text.check_codes(structure.species, len(structure.symbols))
    handle.write(_header(structure, title, options is not None and options.free is not None)
                 .encode("ascii"))
    positions = structure.positions
    # max |x| from max and min: no N x 3 temporary for abs()
    top = max(float(positions.max()), -float(positions.min())) if positions.size else 0.0
    coordinate = _text.Fixed(_rounding.int_digits_for(top, DECIMALS), DECIMALS)
    charges = structure.charges
    charge = []
    if charges is not None:
        top = float(np.max(np.abs(charges))) if charges.size else 0.0
        charge = [_text.Fixed(_rounding.int_digits_for(top, DECIMALS), DECIMALS)]
    free = options.free if options is not None else None
    flags = [_text.Text(("F", "T"))] if free is not None else []
    row = _text.row_layout([_text.Text(structure.symbols), coordinate, coordinate, coordinate,
                     *charge, *flags])

    def columns(part: slice):
        xyz = positions[part]
        q = [] if charges is None else [charges[part]]
        moves = [] if free is None else [free[part].astype(np.int64)]
        return [structure.species[part], xyz[:, 0], xyz[:, 1], xyz[:, 2], *q, *moves]

    _text.write_rows(handle, row, structure.n_atoms, columns)


def _header(structure: Structure, title: str, move_mask: bool = False) -> str:
    lattice = " ".join(_rounding.format_fixed(structure.cell.ravel(), DECIMALS))
    # Keep the title a plain quoted string for extended-XYZ parsers: no quotes
    # or backslashes inside.
    name = _text.one_line(title, "").replace('"', "'").replace("\\", "/")
    properties = ("species:S:1:pos:R:3"
                  + (":initial_charges:R:1" if structure.charges is not None else "")
                  + (":move_mask:L:1" if move_mask else ""))  # ASE's name: T moves
    comment = (f'Lattice="{lattice}" Properties={properties} pbc="T T T"'
               + (f' title="{name}"' if name else ""))
    return f"{structure.n_atoms}\n{comment}\n"


# ----------------------------------------------------------------------------- registry entry
# What the format registry (:mod:`cellbuild.formats`) knows of this format.

#: Recipe ``outputs`` key, and the format name ``inspect`` reports.
KEY = "xyz"
#: Extension of the files written.
EXTENSION = ".xyz"
#: The format's name in messages.
TITLE = "extended XYZ"
DESCRIPTION = "extended XYZ with Lattice and pbc"
#: File-size estimate (bytes per atom) for ``plan`` and the disk-space check.
BYTES_PER_ATOM = 60
#: ASE's name for the format (its reader reads what this module writes).
ASE_FORMAT = "extxyz"
#: How files of this format are named, for messages.
NAME_HINT = "*.xyz"
#: Place among the formats when one is told from a file's first lines.
SNIFF_ORDER = 2


def named(name: str, suffix: str) -> bool:
    """Whether a file called ``name`` (lower case; ``suffix`` its extension) is in this format."""
    return suffix in (".xyz", ".extxyz")


def sniff(lines: list[str]) -> bool:
    """Whether the first lines of a file (stripped) look like this format."""
    return bool(lines) and re.fullmatch(r"\d+", lines[0]) is not None


def read(path, types, fast):
    """Read a file of this format into a ``ReadResult`` (the readers' machinery)."""
    from ..readers import read_xyz

    return read_xyz(path, types, fast)
