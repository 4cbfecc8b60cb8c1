"""LAMMPS data file writer: metal units (Angstrom, g/mol), atom_style atomic,
or atom_style charge (``id type q x y z``, q in elementary charges) when the
structure has charges; the title line and the Atoms section comment name the style.

Layout::

    <title> (units metal, atom_style atomic)

    N atoms
    T atom types

    0.0000000000 <lx> xlo xhi
    0.0000000000 <ly> ylo yhi
    0.0000000000 <lz> zlo zhi
    <xy> <xz> <yz> xy xz yz        (only for a non-orthogonal box)

    Masses

    1 63.546  # Cu

    Atoms  # atomic

    <id> <type> <x> <y> <z>

``T`` counts every symbol of the structure's type map, also those no atom
carries, so that files of a series share their type numbers. Atom ids are
1..N in structure order, type = species code + 1.

A LAMMPS box has ``a`` along x and ``b`` in the xy plane (restricted
triclinic). A cell not in that form is rotated into it, positions with it; a
left-handed cell first has ``c`` negated (the same lattice, so positions are
not mirrored). Tilt factors are reduced to LAMMPS's limits (|xy|, |xz| <= lx/2,
|yz| <= ly/2) by subtracting whole lattice vectors (the same lattice), and
positions are wrapped into that box.
"""
from __future__ import annotations

import re

import math

import numpy as np

from ..structure import Structure
from . import _cell3, _rounding, _text
#: Decimals of Cartesian coordinates and box sizes in Angstrom: 1e-10 A
#: resolution at any box size (up to 1e8 A, where int64 fixed point ends).
DECIMALS = 10

#: Decimals of charges in elementary charges.
CHARGE_DECIMALS = 10

#: Fractional distance below an upper box face counted as on the lower face.
_FACE = 2.0 ** -50


def write(structure: Structure, handle, title: str, options=None) -> None:
    """Write ``structure`` as a LAMMPS data file to binary ``handle``."""
    _text.check_codes(structure.species, len(structure.symbols))
    cell = right_handed(structure.cell)
    box = lammps_box(cell)
    cell, box = reduced_tilts(cell, box)
    handle.write(_header(structure, box, title).encode("ascii"))
    # |coordinate| of a wrapped atom <= sum of |box components| along that axis
    bound = max(sum(abs(v) for v in axis) for axis in box.T.tolist())
    coordinate = _text.Fixed(_rounding.int_digits_for(bound, DECIMALS), DECIMALS)
    types = _text.Text(tuple(str(t + 1) for t in range(len(structure.symbols))), right=True)
    charges = structure.charges
    charge = []
    if charges is not None:
        top = float(np.max(np.abs(charges))) if charges.size else 0.0
        charge = [_text.Fixed(_rounding.int_digits_for(top, CHARGE_DECIMALS), CHARGE_DECIMALS)]
    row = _text.row_layout([_text.Int(len(str(structure.n_atoms))), types, *charge,
                     coordinate, coordinate, coordinate])
    inverse = _cell3.inverse3(cell)
    same_frame = np.array_equal(box, cell)

    def columns(part: slice):
        x, y, z = wrap_into_box(structure.positions[part], cell, inverse, box, same_frame)
        ids = np.arange(part.start + 1, part.stop + 1, dtype=np.int64)
        q = [] if charges is None else [charges[part]]
        return [ids, structure.species[part], *q, x, y, z]

    _text.write_rows(handle, row, structure.n_atoms, columns)


def right_handed(cell: np.ndarray) -> np.ndarray:
    """The cell, with ``c`` negated if the vectors are left-handed (same lattice)."""
    if _cell3.det3(cell) < 0:
        return cell * np.array([[1.0], [1.0], [-1.0]])
    return cell


def reduced_tilts(cell: np.ndarray, box: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The same lattice with LAMMPS's tilt factors within its limits.

    LAMMPS (older versions refuse more, newer warn) wants |xy| <= lx/2,
    |xz| <= lx/2 and |yz| <= ly/2: b and c lose whole multiples of the vectors
    before them, the same integer steps applied to ``cell`` (crystal frame) and
    ``box`` (LAMMPS frame), so positions wrap into the reduced box. A box already
    within the limits (every orthogonal box) is returned unchanged.
    """
    steps = np.eye(3)
    reduced = box.copy()

    def shift(row: int, by: int, k: float) -> None:
        reduced[row] -= k * reduced[by]
        steps[row] -= k * steps[by]

    def over(value: float, limit: float) -> float:
        return float(np.floor(value / limit + 0.5)) if abs(value) > 0.5 * limit * (1 + 1e-12) else 0.0

    shift(1, 0, over(reduced[1, 0], reduced[0, 0]))  # xy against lx
    shift(2, 1, over(reduced[2, 1], reduced[1, 1]))  # yz against ly
    shift(2, 0, over(reduced[2, 0], reduced[0, 0]))  # xz against lx
    if np.array_equal(steps, np.eye(3)):
        return cell, box
    return steps @ cell, reduced


def lammps_box(cell: np.ndarray) -> np.ndarray:
    """The right-handed ``cell`` rotated to LAMMPS's lower-triangular form.

    Rows are a = (lx, 0, 0), b = (xy, ly, 0), c = (xz, yz, lz), Angstrom. A cell
    already in that form is returned unchanged (bit for bit).
    """
    if cell[0, 1] == cell[0, 2] == cell[1, 2] == 0.0 and np.all(np.diag(cell) > 0):
        return cell.copy()
    a, b, c = cell.tolist()
    dot = _cell3.dot3
    lx = math.sqrt(dot(a, a))
    xy = dot(b, a) / lx
    ly = math.sqrt(dot(b, b) - xy * xy)
    xz = dot(c, a) / lx
    yz = (dot(b, c) - xy * xz) / ly
    lz = math.sqrt(dot(c, c) - xz * xz - yz * yz)
    return np.array([[lx, 0.0, 0.0], [xy, ly, 0.0], [xz, yz, lz]])


def wrap_into_box(positions: np.ndarray, cell: np.ndarray, inverse: np.ndarray,
                  box: np.ndarray, same_frame: bool) -> np.ndarray:
    """Cartesian positions (A) wrapped into the cell, expressed in the box
    frame, as a (3, n) array of x, y and z columns.

    In the box's own frame, atoms are moved by whole lattice vectors only, so
    atoms already inside keep their exact coordinates; otherwise the wrapped
    fractional coordinates are multiplied by the box. An atom a rounding error
    below the upper face (fractional 1 - 1e-15) goes to the lower face, so no
    coordinate prints as the upper box bound.
    """
    frac = _cell3.linear3(positions.T, inverse)
    shift = np.floor(frac + _FACE)
    if same_frame:
        if not shift.any():
            return positions.T
        return positions.T - _cell3.linear3(shift, cell)
    return _cell3.linear3(frac - shift, box)


def _numbers(*values: float) -> str:
    return " ".join(_rounding.format_fixed(values, DECIMALS))


def _header(structure: Structure, box: np.ndarray, title: str) -> str:
    (lx, _, _), (xy, ly, _), (xz, yz, lz) = box
    style = "atomic" if structure.charges is None else "charge"
    lines = [
        # LAMMPS skips this line; it tells a reader the units and style assumed
        _text.one_line(f"{title} (units metal, atom_style {style})", "LAMMPS data file"),
        "",
        f"{structure.n_atoms} atoms",
        f"{len(structure.symbols)} atom types",
        "",
        f"{_numbers(0.0, lx)} xlo xhi",
        f"{_numbers(0.0, ly)} ylo yhi",
        f"{_numbers(0.0, lz)} zlo zhi",
    ]
    if xy != 0.0 or xz != 0.0 or yz != 0.0:
        lines.append(f"{_numbers(xy, xz, yz)} xy xz yz")
    lines += ["", "Masses", ""]
    lines += [f"{t + 1} {_mass(s)!r}  # {s}" for t, s in enumerate(structure.symbols)]
    if structure.n_atoms:  # LAMMPS wants no Atoms section without atoms
        lines += ["", f"Atoms  # {style}", ""]
    return "\n".join(lines) + "\n"


def _mass(symbol: str) -> float:
    """Standard atomic weight in g/mol (ASE's table)."""
    from ase.data import atomic_masses, atomic_numbers

    if symbol not in atomic_numbers:
        raise ValueError(f"{symbol!r} is not an element symbol; cannot give its mass")
    return float(atomic_masses[atomic_numbers[symbol]])


# ----------------------------------------------------------------------------- registry entry
# What the format registry (:mod:`cellbuild.formats`) knows of this format.

#: Recipe ``outputs`` key, and the format name ``inspect`` reports.
KEY = "lammps-data"
#: Extension of the files written.
EXTENSION = ".lmp"
#: The format's name in messages.
TITLE = "LAMMPS data"
DESCRIPTION = "LAMMPS data file, metal units, atom_style atomic (charge with charges)"
#: File-size estimate (bytes per atom) for ``plan`` and the disk-space check.
BYTES_PER_ATOM = 70
#: ASE's name for the format (its reader reads what this module writes).
ASE_FORMAT = "lammps-data"
#: How files of this format are named, for messages.
NAME_HINT = "*.lmp / *.data"
#: Place among the formats when one is told from a file's first lines.
SNIFF_ORDER = 3


def named(name: str, suffix: str) -> bool:
    """Whether a file called ``name`` (lower case; ``suffix`` its extension) is in this format."""
    return suffix in (".lmp", ".data", ".lammps") or "data." in name


def sniff(lines: list[str]) -> bool:
    """Whether the first lines of a file (stripped) look like this format."""
    return any(re.fullmatch(r"\d+\s+atoms", s.split("#")[0].strip()) for s in lines)


def read(path, types, fast):
    """Read a file of this format into a ``ReadResult`` (the readers' machinery)."""
    from ..readers import read_lammps

    return read_lammps(path, types, fast)
