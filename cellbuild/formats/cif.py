"""CIF 1.1 writer: space group P 1, every atom listed with fractional coordinates.

Layout::

    data_<title>
    _chemical_formula_sum 'Cu32'
    _cell_length_a 7.230000000000          (Angstrom)
    ...
    _cell_angle_alpha 90.0000000000        (degrees)
    ...
    _symmetry_space_group_name_H-M 'P 1'
    _symmetry_Int_Tables_number 1
    ...
    loop_
    _symmetry_equiv_pos_as_xyz
    'x, y, z'

    loop_
    _atom_site_label
    ...
      Cu1 Cu 0.000000000000 0.000000000000 0.000000000000 1

Labels are the element symbol and a running number per element (Cu1, Cu2,
...), right-aligned. Only elements that atoms carry appear. Fractional
coordinates are wrapped into [0, 1).
"""
from __future__ import annotations

import math
import re

import numpy as np

from ..structure import Structure
from . import _cell3, _rounding, _text
#: Decimals of fractional coordinates: 1e-12, below 1e-8 A up to 1e4 A cells.
FRACTION_DECIMALS = 12
#: Decimals of cell lengths (A).
CELL_DECIMALS = 12
#: Decimals of cell angles (degrees): 5e-11 degrees moves an atom 2e-9 A at
#: 2000 A. Not more: the last bits of atan2 may differ between C libraries.
ANGLE_DECIMALS = 10


def write(structure: Structure, handle, title: str, options=None) -> None:
    """Write ``structure`` as a CIF 1.1 file to binary ``handle``."""
    _text.check_codes(structure.species, len(structure.symbols))
    handle.write(_header(structure, title).encode("ascii"))
    if structure.n_atoms == 0:
        return
    handle.write(b"loop_\n_atom_site_label\n_atom_site_type_symbol\n"
                 b"_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\n"
                 b"_atom_site_occupancy\n")
    counts = structure.counts()
    symbols = structure.symbols
    fraction = _text.Fixed(1, FRACTION_DECIMALS, signed=False)
    label = _text.Int(len(str(int(counts.max()))), prefixes=symbols)  # Cu1, Cu2, ...
    row = _text.row_layout([label, _text.Text(symbols), fraction, fraction, fraction,
                     _text.Const("1")])
    inverse = _cell3.inverse3(structure.cell)
    seen = np.zeros(len(symbols), dtype=np.int64)  # atoms of each species so far

    def columns(part: slice):
        species = structure.species[part]
        number = seen[species] + _rank_within(species, len(symbols)) + 1
        seen[:] += np.bincount(species, minlength=len(symbols))
        x, y, z = _rounding.wrap_unit(_cell3.linear3(structure.positions[part].T, inverse),
                                  FRACTION_DECIMALS)
        return [(number, species), species, x, y, z, None]

    _text.write_rows(handle, row, structure.n_atoms, columns)


def _rank_within(species: np.ndarray, n_species: int) -> np.ndarray:
    """For each atom, how many earlier atoms (in this block) share its species."""
    order = np.argsort(species, kind="stable")
    starts = np.concatenate([[0], np.cumsum(np.bincount(species, minlength=n_species))])
    rank = np.empty(len(species), dtype=np.int64)
    rank[order] = np.arange(len(species)) - starts[species[order]]
    return rank


def cell_parameters(cell: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Lengths a, b, c (A) and angles alpha, beta, gamma (degrees) of ``cell``.

    Angles from atan2(|u x v|, u . v), accurate at every angle (arccos is not
    near 0 and 180 degrees) and exactly 90 for orthogonal vectors.
    """
    rows = np.asarray(cell, dtype=np.float64).tolist()
    lengths = [math.sqrt(_cell3.dot3(u, u)) for u in rows]
    angles = []
    for i, j in [(1, 2), (0, 2), (0, 1)]:
        normal = _cell3.cross3(rows[i], rows[j])
        angles.append(math.degrees(math.atan2(math.sqrt(_cell3.dot3(normal, normal)),
                                              _cell3.dot3(rows[i], rows[j]))))
    return np.array(lengths), np.array(angles)


def data_name(title: str) -> str:
    """A CIF data block name from ``title``: letters, digits and ``_.-+`` only."""
    name = re.sub(r"[^A-Za-z0-9_.+-]+", "_", title).strip("_")
    return name[:75] or "structure"  # data_ + name within an 80-column line


def _header(structure: Structure, title: str) -> str:
    lengths, angles = cell_parameters(structure.cell)
    a, b, c = _rounding.format_fixed(lengths, CELL_DECIMALS)
    alpha, beta, gamma = _rounding.format_fixed(angles, ANGLE_DECIMALS)
    (volume,) = _rounding.format_fixed([abs(_cell3.det3(structure.cell))], 6)
    formula = " ".join(f"{s}{n}" for s, n in structure.composition().items())
    return "\n".join([
        "#\\#CIF_1.1",  # the version line CIF 1.1 readers look for
        f"data_{data_name(title)}",
        f"_chemical_formula_sum '{formula}'",
        f"_cell_length_a {a}",
        f"_cell_length_b {b}",
        f"_cell_length_c {c}",
        f"_cell_angle_alpha {alpha}",
        f"_cell_angle_beta {beta}",
        f"_cell_angle_gamma {gamma}",
        f"_cell_volume {volume}",
        "_symmetry_space_group_name_H-M 'P 1'",
        "_symmetry_Int_Tables_number 1",
        "_space_group_name_H-M_alt 'P 1'",
        "_space_group_IT_number 1",
        "",
        "loop_",
        "_symmetry_equiv_pos_as_xyz",
        "'x, y, z'",
        "",
    ]) + "\n"


# ----------------------------------------------------------------------------- registry entry
# What the format registry (:mod:`cellbuild.formats`) knows of this format.

#: Recipe ``outputs`` key, and the format name ``inspect`` reports.
KEY = "cif"
#: Extension of the files written.
EXTENSION = ".cif"
#: The format's name in messages.
TITLE = "CIF"
DESCRIPTION = "CIF 1.1, space group P 1, fractional coordinates"
#: File-size estimate (bytes per atom) for ``plan`` and the disk-space check.
BYTES_PER_ATOM = 60
#: ASE's name for the format (its reader reads what this module writes).
ASE_FORMAT = "cif"
#: How files of this format are named, for messages.
NAME_HINT = "*.cif"
#: Place among the formats when one is told from a file's first lines.
SNIFF_ORDER = 1


def named(name: str, suffix: str) -> bool:
    """Whether a file called ``name`` (lower case; ``suffix`` its extension) is in this format."""
    return suffix == ".cif"


def sniff(lines: list[str]) -> bool:
    """Whether the first lines of a file (stripped) look like this format."""
    return any(s.startswith("data_") or s.startswith("_cell_length_a") for s in lines)


def read(path, types, fast):
    """Read a file of this format into a ``ReadResult`` (the readers' machinery)."""
    from ..readers import read_cif

    return read_cif(path, types, fast)
