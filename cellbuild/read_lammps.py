"""Reading LAMMPS data files (atom styles ``atomic`` and ``charge``; units metal, Angstrom).

Holds the LAMMPS data header parser (counts, box bounds and tilts, masses, atom
style; the atom rows are jumped over by byte offsets, not parsed) and its
checks, the element of an atom type from its mass (:func:`element_of_mass`),
and the numpy fast row reader: :func:`skip_lines` and :func:`load_rows` (the
block of rows found by byte offsets, parsed in one call: the fixed-width parser
of :mod:`cellbuild.fixed_columns`, else ``numpy.loadtxt``), which the
extended XYZ fast path of :mod:`cellbuild.readers` shares, and
:func:`fast_lammps`, which reads the atom rows into a :class:`Structure`;
:func:`header_and_rows` runs both, the header first taking equally wide rows on
trust (no newline count over the whole block) and the rows' parse confirming it.
The file is read once, as bytes, and shared by the header parser and the rows. Every failure is an
:class:`~cellbuild.errors.InputError` naming the file and, where known, the line.
"""
from __future__ import annotations

import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError
from .fixed_columns import loadtxt_fixed
from .structure import Structure

#: Largest atom type whose presence is counted in one bincount (else np.unique).
_COUNTED_TYPES = 1 << 16
#: Largest difference (u) between a LAMMPS mass and a standard atomic weight
#: for the mass to name the element. Written masses carry 3-6 digits; the
#: closest distinct standard weights that are not already ambiguous differ by
#: more than 0.1 u, and pairs closer than this (Bi/Po, Bk/Cm, ...) are refused.
MASS_TOLERANCE = 0.05
#: LAMMPS atom styles read, with the columns of a row: id, type, [q,] x, y, z.
_LAMMPS_STYLES = {"atomic": 5, "charge": 6}
#: Section names of a LAMMPS data file (the ones that can hold atoms' lines).
_LAMMPS_SECTIONS = ("Atoms", "Velocities", "Masses", "Atom Type Labels")
#: A section keyword line (comment removed, stripped).
_SECTION = re.compile(r"[A-Z][A-Za-z ]+")
NEWLINE_BYTE = ord("\n")


# ----------------------------------------------------------------------------- header


@dataclass
class LammpsHeader:
    """What a LAMMPS data file says before (and around) its Atoms section."""

    n_atoms: int = 0
    n_types: int = 0
    bounds: dict = field(default_factory=dict)  # xlo, xhi, ..., xy, xz, yz
    masses: dict = field(default_factory=dict)  # type -> (mass, line)
    style: str = "atomic"
    atoms_line: int = 0  # 1-based line of the "Atoms" keyword
    atoms_offset: int | None = None  # byte offset of the line after it (None: CR line ends)
    general_box: bool = False
    #: (first, past the last) byte offsets of the Atoms rows when the header took
    #: them to be as wide as the first row on trust (see :func:`lammps_header`)
    trusted_rows: tuple[int, int] | None = None


def lammps_header(path: Path, data: bytes | None = None, *,
                  trust_rows: bool = False) -> LammpsHeader:
    """Counts, box, masses and atom style; the atom rows are skipped, not parsed.

    ``data`` is the file's bytes when the caller has read them already. Lines
    are split as Python's text mode does (``\\r\\n`` and a lone ``\\r`` end a
    line too); the rows of the Atoms and Velocities sections are jumped over
    by byte offsets (:func:`skip_lines`), not read one Python line at a time.

    ``trust_rows``: where every Atoms row looks as wide as the first (each row's
    last byte a newline, as cellbuild writes them), skip them without counting
    the newlines in between (a pass over the whole block) and record the rows'
    span in ``trusted_rows``. The caller must then confirm that span by parsing
    the rows (:func:`fast_lammps` does) and otherwise parse the header again
    without trust: an unequal row could hide among them.
    """
    if data is None:
        data = path.read_bytes()
    crlf = b"\r" in data
    text = data.replace(b"\r\n", b"\n").replace(b"\r", b"\n") if crlf else data
    head = LammpsHeader()
    style_comment, first_row, section = None, None, None
    pos, number, size = 0, 0, len(text)
    while pos < size:
        end = text.find(b"\n", pos)
        stop = size if end < 0 else end + 1
        raw = text[pos:stop].decode("utf-8", "replace")
        row_bytes, pos = stop - pos, stop
        number += 1
        if number == 1:
            continue  # the first line is a title
        text_part, _, comment = raw.partition("#")
        line = text_part.strip()
        if not line:
            continue
        if section in ("after Atoms", "after Velocities") and not _SECTION.fullmatch(line):
            what = section.split()[1]
            raise InputError(f"has more {what} rows than the {head.n_atoms:,} atoms its "
                             f"header declares (LAMMPS refuses such a file)",
                             file=str(path), line=number)
        if line in _LAMMPS_SECTIONS or _SECTION.fullmatch(line):
            section = line
            if section == "Atoms":
                head.atoms_line = number
                # where the line after "Atoms" starts in the file's own bytes
                head.atoms_offset = None if crlf else pos
                style_comment = comment.strip() or None
            continue
        if section is None:
            _header_line(head, line, path, number)
        elif section == "Masses":
            _mass_line(head, path, line, number)
        elif section in ("Atoms", "Velocities"):
            # one row per atom: keep the first, jump over the rest without parsing
            if section == "Atoms" and first_row is None:
                first_row = line.split()
            skip = max(head.n_atoms - 1, 0)
            after = None
            if trust_rows and section == "Atoms" and not crlf:
                after = _rows_end_on_trust(text, pos, skip, row_bytes)
                if after is not None:
                    head.trusted_rows = (pos - row_bytes, after)
            if after is None:
                after = skip_lines(text, pos, skip, row_bytes)
            number += skip  # exact whenever a line follows the jump
            pos = size if after is None else after
            section = "after " + section
    if head.atoms_line == 0 or head.n_atoms == 0:
        raise InputError("has no Atoms section (or no 'N atoms' line)", file=str(path))
    head.style = _lammps_style(path, head, style_comment, first_row)
    return head


def _rows_end_on_trust(data: bytes, start: int, k: int, width: int) -> int | None:
    """Offset past ``k`` rows of ``width`` bytes from ``start`` when each of them
    ends in a newline (their last bytes alone are read), else None."""
    stop = start + k * width
    if k <= 0 or stop > len(data):
        return None
    ends = np.frombuffer(data, dtype=np.uint8, count=k * width, offset=start)[width - 1::width]
    return stop if bool(np.all(ends == NEWLINE_BYTE)) else None


def _mass_line(head: LammpsHeader, path: Path, text: str, number: int) -> None:
    parts = text.split()
    try:
        head.masses[int(parts[0])] = (float(parts[1]), number)
    except (ValueError, IndexError):
        raise InputError(f"has a Masses line that is not 'type mass': {text!r}",
                         file=str(path), line=number) from None


def _header_line(head: LammpsHeader, text: str, path: Path, number: int) -> None:
    parts = text.split()
    if len(parts) == 4 and parts[2][1:] == "lo" and parts[3][1:] == "hi":
        try:
            low, high = float(parts[0]), float(parts[1])
        except ValueError:
            raise InputError(f"has box bounds that are not numbers: {text!r}",
                             file=str(path), line=number) from None
        if not (math.isfinite(low) and math.isfinite(high) and low < high):
            raise InputError(f"has box bounds {parts[2]} = {parts[0]} and {parts[3]} = "
                             f"{parts[1]}; LAMMPS needs finite bounds with lo < hi",
                             file=str(path), line=number)
    if parts[-2:] == ["atom", "types"] and len(parts) == 3 and parts[0].isdigit() and (
            len(parts[0]) > 6):
        raise InputError(f"declares {parts[0]} atom types, more than cellbuild reads (999,999)",
                         file=str(path), line=number)
    try:
        if parts[-1] == "atoms" and len(parts) == 2:
            head.n_atoms = int(parts[0])
        elif parts[-2:] == ["atom", "types"]:
            head.n_types = int(parts[0])
        elif len(parts) == 4 and parts[2][1:] == "lo" and parts[3][1:] == "hi":
            head.bounds[parts[2]] = float(parts[0])
            head.bounds[parts[3]] = float(parts[1])
        elif parts[-3:] == ["xy", "xz", "yz"]:
            head.bounds.update(xy=float(parts[0]), xz=float(parts[1]), yz=float(parts[2]))
        elif parts[-1] in ("avec", "bvec", "cvec", "origin"):
            head.general_box = True
    except (ValueError, IndexError):
        pass  # other header keywords (bonds, ellipsoids, ...) do not concern us


def _lammps_style(path, head, comment, first_row) -> str:
    """The atom style: from the ``Atoms # style`` comment, else the column count."""
    if comment:
        style = comment.split()[0]
        if style not in _LAMMPS_STYLES:
            raise InputError(f"has atom style {style!r}, which cellbuild does not read",
                             file=str(path), line=head.atoms_line,
                             hint="use atom style atomic or charge")
        return style
    columns = len(first_row or [])
    for style, n in _LAMMPS_STYLES.items():
        if columns in (n, n + 3):  # with or without image flags
            return style
    raise InputError(f"has {columns} columns per atom, neither atomic (5 or 8) nor charge "
                     "(6 or 9)", file=str(path), line=head.atoms_line + 2)


def type_symbols(path: Path, head: LammpsHeader, types, used) -> dict[int, str]:
    """Element of each used LAMMPS type: ``--types`` first, else the Masses section."""
    symbols = {}
    for t in (int(x) for x in used):
        if types:
            if t > len(types):
                raise InputError(f"names {len(types)} element(s) but the file uses type {t}",
                                 key="--types", value=",".join(types), file=str(path))
            symbols[t] = types[t - 1]
            continue
        mass, line = head.masses.get(t, (None, None))
        symbol = element_of_mass(mass) if mass is not None else None
        if symbol is None:
            what = f"mass {mass:g}" if mass is not None else "no mass in the Masses section"
            why = ("matches no single standard atomic weight within "
                   f"{MASS_TOLERANCE} u" if mass is not None else "")
            raise InputError(f"atom type {t} has {what}{' that ' + why if why else ''}",
                             file=str(path), line=line,
                             hint="pass --types with one element per type, e.g. --types Cu,Ni")
        symbols[t] = symbol
    return symbols


def element_of_mass(mass: float) -> str | None:
    """The element whose standard atomic weight (ASE's IUPAC table) is within
    :data:`MASS_TOLERANCE` of ``mass`` (u), if exactly one is; else None."""
    from ase.data import atomic_masses, chemical_symbols

    close = np.flatnonzero(np.abs(np.asarray(atomic_masses)[1:] - mass) <= MASS_TOLERANCE) + 1
    return chemical_symbols[int(close[0])] if len(close) == 1 else None


# ----------------------------------------------------------------------------- numpy rows


def line_starts(data: bytes) -> np.ndarray:
    """Byte offset of the start of every line (and one past the end)."""
    newlines = np.flatnonzero(np.frombuffer(data, dtype=np.uint8) == 10)
    return np.concatenate([[0], newlines + 1, [len(data) + 1]])


def skip_lines(data: bytes, start: int, k: int, width: int | None = None) -> int | None:
    """Byte offset ``k`` lines (``\\n``-terminated) after offset ``start``; None
    when fewer than ``k`` newlines follow.

    With ``width`` (the bytes of one row, newline included), rows of that
    fixed width are tried first: one ``bytes.count`` instead of locating every
    newline (the layout ``make`` writes); else every newline is found with numpy.
    """
    if k <= 0:
        return start
    if width:
        stop = start + k * width
        if stop <= len(data) and data[stop - 1] == 10 and data.count(b"\n", start, stop) == k:
            return stop
    newlines = np.flatnonzero(np.frombuffer(data, dtype=np.uint8, offset=start) == 10)
    return start + int(newlines[k - 1]) + 1 if len(newlines) >= k else None


def _row_span(data: bytes, start: int, n: int) -> tuple[int, int] | None:
    """(offset of line n - 1 counted from the line at ``start``, offset past its
    newline or ``len(data) + 1`` when it has none); None when the file holds
    fewer lines (the text after the last newline, even empty, is a line)."""
    end = data.find(b"\n", start)
    last = start if n == 1 else skip_lines(data, start, n - 1,
                                           end + 1 - start if end >= 0 else None)
    if last is None:
        return None
    end = data.find(b"\n", last)
    return last, len(data) + 1 if end < 0 else end + 1


def load_rows(path: Path, data: bytes, start: int, first: int, n: int,
              usecols, dtype) -> tuple[np.ndarray, int]:
    """``n`` rows from byte offset ``start`` (0-based line ``first``) parsed by
    ``numpy.loadtxt`` (in C, correctly rounded like Python's ``float``; fixed-width
    rows by :func:`~cellbuild.fixed_columns.loadtxt_fixed`, which gives the same
    array), and the offset past the last row's newline (``len(data) + 1`` when
    it has none).

    Raises InputError (with the line) when the file ends early or its last row
    is cut short; ValueError when a row does not parse otherwise (the caller
    then lets ASE read the file and explain).
    """
    ndmin = 1 if isinstance(usecols, int) or np.dtype(dtype).names else 2
    # rows of the first row's width: the fixed-width parser checks every row's
    # length, so n rows parsed from n widths are the block (no newline count)
    end, tried = data.find(b"\n", start), None
    guess = start + n * (end + 1 - start)
    if end >= 0 and (guess == len(data) + 1 or guess <= len(data) and data[guess - 1] == 10):
        rows = loadtxt_fixed(memoryview(data)[start:guess - 1], usecols=usecols, dtype=dtype,
                             comments="#", ndmin=ndmin)
        if rows is not None and len(rows) == n:
            return rows, guess
        tried = guess
    span = _row_span(data, start, n)
    if span is None or not data[span[0]:].strip():
        raise InputError(f"ends before its {n:,} atom rows are complete; the file looks "
                         "truncated", file=str(path), line=data.count(b"\n") + 1)
    last, stop = span
    width = len(data[start:data.find(b"\n", start) + 1 or None].split(b"#")[0].split())
    if len(data[last:stop].split(b"#")[0].split()) < width:
        raise InputError("ends in the middle of an atom row; the file looks truncated",
                         file=str(path), line=first + n)
    block = data[start:stop - 1]
    # fixed-width columns (as cellbuild writes them) in whole-array passes, the
    # same doubles as loadtxt; anything else through loadtxt
    rows = None if stop == tried else loadtxt_fixed(block, usecols=usecols, dtype=dtype,
                                                    comments="#", ndmin=ndmin)
    if rows is None:
        rows = np.loadtxt(io.BytesIO(block), usecols=usecols, dtype=dtype, comments="#",
                          ndmin=ndmin)
    if len(rows) != n:
        raise ValueError(f"{len(rows)} rows parsed, {n} expected")  # blank lines inside
    return rows, stop


def header_and_rows(path: Path, data: bytes, types) -> tuple[LammpsHeader, Structure | None]:
    """The header (:func:`lammps_header`) and the atoms read with numpy
    (:func:`fast_lammps`; None where ASE's general reader is needed).

    The header first takes the atom rows on trust (``trust_rows``); the parse of
    the rows then confirms their span (the fixed-width parser checks every row's
    width, the other path counts the newlines). Anything else (an unequal row, a
    refusal, rows that are not numbers) is judged again by a header that counted
    every newline, so errors and fallbacks are those of the untrusting reader.
    """
    try:
        head = lammps_header(path, data, trust_rows=True)
    except InputError:
        head = None  # perhaps a trusted skip gone wrong: judged again below
    if head is not None and head.trusted_rows is None:
        return head, fast_lammps(path, head, types, data)  # nothing was taken on trust
    if head is not None:
        try:
            structure, span = _fast_rows(path, head, types, data)
        except InputError:
            structure, span = None, None
        if structure is not None and span == head.trusted_rows:
            return head, structure
    head = lammps_header(path, data)
    return head, fast_lammps(path, head, types, data)


def fast_lammps(path: Path, head: LammpsHeader, types, data: bytes | None = None
                ) -> Structure | None:
    """LAMMPS atom rows with numpy; None if the file needs ASE's general reader.

    ``data`` is the file's bytes when the caller has read them already.
    """
    return _fast_rows(path, head, types, data)[0]


def _fast_rows(path: Path, head: LammpsHeader, types, data: bytes | None = None
               ) -> tuple[Structure | None, tuple[int, int] | None]:
    """:func:`fast_lammps`, and the byte span of the rows parsed (None with no
    structure)."""
    if head.general_box:
        return None, None
    if data is None:
        data = path.read_bytes()
    first = head.atoms_line  # 0-based index of the line after "Atoms" (blank)
    start = head.atoms_offset
    if start is None:  # CR line ends: offsets of the text-mode lines differ
        starts = line_starts(data)
        start = int(starts[min(first, len(starts) - 1)])
    while True:  # blank lines up to the first row (the last line stops the search)
        end = data.find(b"\n", start)
        if end < 0 or data[start:end + 1].strip():
            break
        start, first = end + 1, first + 1
    n_cols = _LAMMPS_STYLES[head.style]
    xyz_cols = (n_cols - 3, n_cols - 2, n_cols - 1)
    try:
        width = len(data[start:end + 1 if end >= 0 else None].split(b"#")[0].split())
        images = (n_cols, n_cols + 1, n_cols + 2) if width == n_cols + 3 else ()
        charge = (2,) if head.style == "charge" else ()  # id type q x y z
        usecols = (0, 1) + xyz_cols + images + charge
        rows, stop = load_rows(path, data, start, first, head.n_atoms, usecols, np.float64)
    except ValueError:
        return None, None
    ids = rows[:, 0]
    if not bool(np.all(ids[1:] >= ids[:-1])):  # ASE orders atoms by id (stable)
        rows = rows[np.argsort(ids, kind="stable")]
    type_of = rows[:, 1].astype(np.int64)
    cell = _lammps_cell(head.bounds)
    positions = rows[:, 2:5].copy()
    if images:  # image flags: unwrap as ASE does
        positions += np.einsum("ij,jk->ik", rows[:, 5:8], cell)
    low, high = int(type_of.min()), int(type_of.max())
    if low < 1:
        raise InputError(f"has atom type {low}; LAMMPS types start at 1", file=str(path))
    # the types present, ascending (counted when few, as types are)
    used = (np.flatnonzero(np.bincount(type_of, minlength=high + 1)) if high <= _COUNTED_TYPES
            else np.unique(type_of))
    symbols = type_symbols(path, head, types, used)
    unique = tuple(dict.fromkeys(symbols[int(t)] for t in used))
    code_of_type = np.zeros(int(used.max()) + 1, dtype=np.int32)
    for t in used:
        code_of_type[t] = unique.index(symbols[int(t)])
    return Structure(cell=cell, positions=positions, species=code_of_type[type_of],
                     symbols=unique, charges=rows[:, -1].copy() if charge else None), (start, stop)


def _lammps_cell(b: dict) -> np.ndarray:
    """Cell rows from LAMMPS bounds and tilts (restricted triclinic box)."""
    return np.array([[b.get("xhi", 0.5) - b.get("xlo", -0.5), 0.0, 0.0],
                     [b.get("xy", 0.0), b.get("yhi", 0.5) - b.get("ylo", -0.5), 0.0],
                     [b.get("xz", 0.0), b.get("yz", 0.0), b.get("zhi", 0.5) - b.get("zlo", -0.5)]])
