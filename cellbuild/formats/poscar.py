"""POSCAR writer, VASP 5 format with a species line and direct coordinates.

Layout::

    <title>
    1.0
      ax ay az                       (lattice vectors, Angstrom)
      bx by bz
      cx cy cz
    Cu Fe                            (elements present, in type order)
    32 16
    Direct
      0.000000000000  0.000000000000  0.000000000000

Atoms are grouped by element in type order, keeping structure order within
an element. Fractional coordinates are wrapped into [0, 1). With ``relax``, a
``Selective dynamics`` line follows the counts and each row ends in ``T T T``
(free) or ``F F F`` (fixed).
"""
from __future__ import annotations

import numpy as np

from ..structure import Structure
from . import _cell3, _rounding, _text
#: Decimals of fractional coordinates (see cif.FRACTION_DECIMALS).
FRACTION_DECIMALS = 12
#: Decimals of lattice vector components in Angstrom.
CELL_DECIMALS = 12


def write(structure: Structure, handle, title: str, options=None) -> None:
    """Write ``structure`` as a VASP 5 POSCAR to binary ``handle``."""
    _text.check_codes(structure.species, len(structure.symbols))
    free = options.free if options is not None else None
    handle.write(_header(structure, title, free is not None).encode("ascii"))
    order = _grouped_order(structure.species)
    inverse = _cell3.inverse3(structure.cell)
    fraction = _text.Fixed(1, FRACTION_DECIMALS, signed=False)
    flags = [_text.Text(("F F F", "T T T"))] if free is not None else []
    row = _text.row_layout([fraction, fraction, fraction, *flags], indent=1)

    def columns(part: slice):
        rows = part if order is None else order[part]
        positions = structure.positions[rows]
        moves = [] if free is None else [free[rows].astype(np.int64)]
        return [*_rounding.wrap_unit(_cell3.linear3(positions.T, inverse), FRACTION_DECIMALS), *moves]

    _text.write_rows(handle, row, structure.n_atoms, columns)


def _grouped_order(species: np.ndarray) -> np.ndarray | None:
    """Atom order grouped by species code, stable; None if already grouped."""
    if np.all(species[1:] >= species[:-1]):
        return None
    return np.argsort(species, kind="stable")


def _header(structure: Structure, title: str, selective: bool = False) -> str:
    composition = structure.composition()
    default = "".join(f"{s}{n}" for s, n in composition.items()) or "structure"
    vectors = _rounding.format_fixed(structure.cell.ravel(), CELL_DECIMALS)
    width = max(len(v) for v in vectors)
    lattice = ["  " + " ".join(v.rjust(width) for v in vectors[i:i + 3]) for i in (0, 3, 6)]
    return "\n".join([
        _text.one_line(title, default),
        "1.0",
        *lattice,
        " ".join(composition),
        " ".join(str(n) for n in composition.values()),
        *(["Selective dynamics"] if selective else []),
        "Direct",
    ]) + "\n"


# ----------------------------------------------------------------------------- registry entry
# What the format registry (:mod:`cellbuild.formats`) knows of this format.

#: Recipe ``outputs`` key, and the format name ``inspect`` reports.
KEY = "poscar"
#: Extension of the files written.
EXTENSION = ".vasp"
#: The format's name in messages.
TITLE = "POSCAR"
DESCRIPTION = "POSCAR, VASP 5 with species line, direct coordinates"
#: File-size estimate (bytes per atom) for ``plan`` and the disk-space check.
BYTES_PER_ATOM = 48
#: ASE's name for the format (its reader reads what this module writes).
ASE_FORMAT = "vasp"
#: How files of this format are named, for messages.
NAME_HINT = "POSCAR / *.vasp"
#: Place among the formats when one is told from a file's first lines.
SNIFF_ORDER = 4


def named(name: str, suffix: str) -> bool:
    """Whether a file called ``name`` (lower case; ``suffix`` its extension) is in this format."""
    return suffix in (".vasp", ".poscar") or name.startswith(("poscar", "contcar"))


def sniff(lines: list[str]) -> bool:
    """Whether the first lines of a file (stripped) look like this format."""
    return len(lines) > 5 and _floats(lines[1], 1) and all(_floats(s, 3) for s in lines[2:5])


def read(path, types, fast):
    """Read a file of this format into a ``ReadResult`` (the readers' machinery)."""
    from ..readers import read_poscar

    return read_poscar(path, types, fast)


def _floats(text: str, n: int) -> bool:
    """True if ``text`` starts with at least ``n`` numbers."""
    parts = text.split()
    if len(parts) < n:
        return False
    try:
        [float(x) for x in parts[:n]]
    except ValueError:
        return False
    return True
