"""Quantum ESPRESSO pw.x input: &CONTROL, &SYSTEM (ibrav = 0, nat, ntyp, ecutwfc),
&ELECTRONS, ATOMIC_SPECIES with standard atomic weights and pseudopotential file
names, CELL_PARAMETERS in Angstrom, ATOMIC_POSITIONS in Angstrom or crystal
units, K_POINTS automatic from the recipe's mesh spacing (:mod:`cellbuild.kpoints`).

Layout::

    ! <title>: ideal unrelaxed geometry written by cellbuild; check every setting
    ! K_POINTS from a spacing of 0.25 1/Angstrom, gamma
    &CONTROL
      calculation = 'scf'
      prefix = '<title>'
      pseudo_dir = './'
    /
    &SYSTEM
      ibrav = 0
      nat = N
      ntyp = T
      ecutwfc = 45.0
    /
    &ELECTRONS
    /
    ATOMIC_SPECIES
    Cu 63.546 Cu.UPF
    CELL_PARAMETERS angstrom
      ax ay az
      ...
    ATOMIC_POSITIONS angstrom
    Cu x y z
    K_POINTS automatic
    7 7 7 0 0 0

Only elements with atoms are species (pw.x wants ntyp of them). With ``relax``,
the calculation is ``'relax'`` (with an empty &IONS) and each ATOMIC_POSITIONS row
ends in pw.x's ``if_pos`` flags, ``1 1 1`` (free) or ``0 0 0`` (fixed). A metal needs
``occupations`` and smearing added by hand: the file is a starting point.
"""
from __future__ import annotations

import re

import numpy as np

from ..kpoints import mesh, shift
from ..structure import Structure
from . import _rounding, _text
#: Decimals of lengths in Angstrom and of fractional coordinates.
DECIMALS = 10


def write(structure: Structure, handle, title: str, options=None) -> None:
    """Write ``structure`` as a pw.x input to binary ``handle``; ``options`` gives
    the settings (:class:`cellbuild.formats.WriteOptions`)."""
    from ..recipe_outputs import DEFAULT_SPACING, Espresso, Kpoints

    _text.check_codes(structure.species, len(structure.symbols))
    espresso = (options.espresso if options else None) or Espresso()
    kpoints = (options.kpoints if options else None) or Kpoints(DEFAULT_SPACING)
    counts = np.bincount(structure.species, minlength=len(structure.symbols))
    present = [s for s, n in zip(structure.symbols, counts) if n]
    calculation = "relax" if options is not None and options.free is not None else "scf"
    handle.write(_header(structure, title, espresso, kpoints, present, calculation)
                 .encode("ascii"))
    crystal = espresso.positions == "crystal"
    values = structure.positions @ np.linalg.inv(structure.cell) if crystal \
        else structure.positions
    top = max(float(values.max()), -float(values.min())) if values.size else 0.0
    number = _text.Fixed(_rounding.int_digits_for(top, DECIMALS), DECIMALS)
    free = options.free if options is not None else None
    flags = [_text.Text(("0 0 0", "1 1 1"))] if free is not None else []  # pw.x's if_pos
    row = _text.row_layout([_text.Text(structure.symbols), number, number, number, *flags])

    def columns(part: slice):
        xyz = values[part]
        moves = [] if free is None else [free[part].astype(np.int64)]
        return [structure.species[part], xyz[:, 0], xyz[:, 1], xyz[:, 2], *moves]

    _text.write_rows(handle, row, structure.n_atoms, columns)
    n = mesh(structure.cell, kpoints.spacing)
    s = shift(n, kpoints.centring)
    handle.write(f"K_POINTS automatic\n{n[0]} {n[1]} {n[2]} {s[0]} {s[1]} {s[2]}\n".encode("ascii"))


def _header(structure: Structure, title: str, espresso, kpoints, present: list[str],
            calculation: str) -> str:
    from .lammps import _mass

    name = re.sub(r"[^A-Za-z0-9_.-]", "_", _text.one_line(title, "structure")) or "structure"
    cutoff = "" if espresso.ecutwfc is None else f"  ecutwfc = {espresso.ecutwfc!r}\n"
    vectors = _rounding.format_fixed(structure.cell.ravel(), DECIMALS)
    width = max(len(x) for x in vectors)
    cell = "".join("  " + " ".join(x.rjust(width) for x in vectors[i:i + 3]) + "\n"
                   for i in (0, 3, 6))
    species = "".join(f"{e} {_mass(e)!r} {espresso.pseudopotential(e)}\n" for e in present)
    return (f"! {name}: ideal unrelaxed geometry written by cellbuild; check every setting\n"
            f"! K_POINTS from a spacing of {kpoints.spacing} 1/Angstrom, {kpoints.centring}\n"
            f"&CONTROL\n  calculation = '{calculation}'\n  prefix = '{name}'\n"
            f"  pseudo_dir = './'\n/\n"
            f"&SYSTEM\n  ibrav = 0\n  nat = {structure.n_atoms}\n  ntyp = {len(present)}\n"
            f"{cutoff}/\n&ELECTRONS\n/\n" + ("&IONS\n/\n" if calculation == "relax" else "")
            + f"ATOMIC_SPECIES\n{species}"
            f"CELL_PARAMETERS angstrom\n{cell}ATOMIC_POSITIONS {espresso.positions}\n")


# ----------------------------------------------------------------------------- registry entry
# What the format registry (:mod:`cellbuild.formats`) knows of this format.

#: Recipe ``outputs`` key, and the format name ``inspect`` reports.
KEY = "espresso-in"
#: Extension of the files written.
EXTENSION = ".pwi"
#: The format's name in messages.
TITLE = "pw.x input"
DESCRIPTION = "Quantum ESPRESSO pw.x input, ibrav = 0, K_POINTS automatic"
#: File-size estimate (bytes per atom) for ``plan`` and the disk-space check.
BYTES_PER_ATOM = 50
#: ASE's name for the format (its reader reads what this module writes).
ASE_FORMAT = "espresso-in"
#: How files of this format are named, for messages.
NAME_HINT = "*.pwi"
#: Place among the formats when one is told from a file's first lines.
SNIFF_ORDER = 5
#: Written unless a recipe lists its outputs: no (a calculation input, asked for).
DEFAULT = False


def named(name: str, suffix: str) -> bool:
    """Whether a file called ``name`` (lower case; ``suffix`` its extension) is in this format."""
    return suffix in (".pwi", ".in") and not name.startswith("kpoints")


def sniff(lines: list[str]) -> bool:
    """Whether the first lines of a file (stripped) look like this format."""
    return any(s.upper().startswith(("&CONTROL", "&SYSTEM")) for s in lines)


def read(path, types, fast):
    """Read a pw.x input with ASE's reader (ibrav = 0 cells)."""
    from ..readers import ReadResult, _ase_read

    return ReadResult(Structure.from_ase(_ase_read(path, ASE_FORMAT)), KEY, "ase")
