"""Reading structure files written by other programs into a :class:`Structure`.

Formats: CIF, extended XYZ, LAMMPS data (atom styles ``atomic`` and ``charge``)
and POSCAR/CONTCAR, told apart by the file name and, failing that, by the first
lines. ASE's readers do the parsing (pymatgen's CIF parser is the second
opinion when ASE refuses a CIF). Large LAMMPS data and extended XYZ files go
through a numpy column reader of our own instead, because ASE parses them one
Python line at a time (measured on 1,000,188 atoms: ASE 6.1 s for a 64 MB LAMMPS
file, 6.2 s for a 56 MB XYZ file; ``numpy.loadtxt`` 1.8 s and 1.3 s); the tests
hold the fast path against ASE on the same files.
The CIF text parsing, the checks before ASE or pymatgen reads a CIF and the
P 1 table reader live in :mod:`cellbuild.cif_text`.

Every failure becomes an :class:`~cellbuild.errors.InputError` naming the file
and, where it can be found, the line; a reader's own exception never escapes.
"""
from __future__ import annotations

import io
import math
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .cif_text import (check_cif_complete, check_cif_loop_rows, check_cif_numbers,
                       check_cif_symbol_column, cif_loops, cif_partial_occupancy, fast_p1_cif,
                       refuse_large_cif_table)
from .errors import InputError
from .read_checks import check_claimed_counts, check_poscar, check_values
from .structure import Structure

#: Formats and how a user would recognise them in messages.
FORMAT_TITLES = {
    "cif": "CIF",
    "xyz": "extended XYZ",
    "lammps-data": "LAMMPS data",
    "vasp": "POSCAR",
}
#: Files at least this large (bytes) of a format with a fast path skip ASE's
#: line-by-line parser (about 30,000 atoms; below it ASE takes < 0.2 s).
FAST_READ_MIN_BYTES = 2_000_000
#: Largest difference (u) between a LAMMPS mass and a standard atomic weight
#: for the mass to name the element. Written masses carry 3-6 digits; the
#: closest distinct standard weights that are not already ambiguous differ by
#: more than 0.1 u, and pairs closer than this (Bi/Po, Bk/Cm, ...) are refused.
MASS_TOLERANCE = 0.05
#: Bytes looked at to sniff the format (and to refuse binary files).
_SNIFF_BYTES = 8192
#: LAMMPS atom styles read, with the columns of a row: id, type, [q,] x, y, z.
_LAMMPS_STYLES = {"atomic": 5, "charge": 6}
#: Section names of a LAMMPS data file (the ones that can hold atoms' lines).
_LAMMPS_SECTIONS = ("Atoms", "Velocities", "Masses", "Atom Type Labels")
#: Exceptions the libraries' readers raise on malformed text. Anything else is
#: a bug and is left to propagate.
#: (TypeError, AttributeError and AssertionError are bugs, ours or a
#: library's, and are not caught: files are validated before a library reads
#: them, so that garbage does not reach it.)
#: What the libraries' readers raise for a malformed file. RuntimeError is among them:
#: ASE's LAMMPS reader raises it for rows that do not fit the atom style, and a
#: StopIteration inside a reader's generator (a file that ends early) surfaces as one.
_READER_ERRORS = (ValueError, IndexError, KeyError, OSError, UnicodeDecodeError,
                  StopIteration, EOFError, RuntimeError)



@dataclass
class ReadResult:
    """A structure and how it was read.

    Attributes:
        structure: the atoms and cell (Angstrom).
        format: one of :data:`FORMAT_TITLES`.
        reader: ``"ase"``, ``"pymatgen"`` or ``"cellbuild"`` (the fast path).
        warnings: messages the reader raised as warnings, one line each.
    """

    structure: Structure
    format: str
    reader: str
    warnings: list[str] = field(default_factory=list)
    #: CIF only: atom-site rows with occupancy below 1, as
    #: {"label", "symbol", "occupancy", "line"}; None for other formats.
    partial_occupancy: list[dict] | None = None


def read_structure(path, types: list[str] | None = None) -> Structure:
    """Read ``path`` (any supported format) into a periodic :class:`Structure`.

    Args:
        path: the file.
        types: element symbol of each LAMMPS atom type (type i -> ``types[i-1]``);
            overrides the masses. Ignored for other formats.
    """
    return read_file(path, types).structure


def read_file(path, types: list[str] | None = None, *, fast: bool | None = None) -> ReadResult:
    """Read ``path`` and say how; ``fast`` forces (True) or forbids (False) the
    numpy reader, None chooses by file size."""
    path = Path(path)
    head = _head(path)
    fmt = detect_format(path, head)
    if fast is None:
        fast = path.stat().st_size >= FAST_READ_MIN_BYTES
    check_claimed_counts(path, fmt)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = _READERS[fmt](path, types, fast)
    result.warnings += [_one_line(w.message) for w in caught
                        if not issubclass(w.category, DeprecationWarning)]
    _check_periodic(result.structure, path, fmt)
    return result


# ----------------------------------------------------------------------------- format


def _head(path: Path) -> str:
    """The first bytes of the file as text; InputError if missing, empty or binary."""
    try:
        with open(path, "rb") as handle:
            raw = handle.read(_SNIFF_BYTES)
    except OSError as exc:
        raise InputError(f"cannot be read ({exc.strerror or exc})", file=str(path)) from None
    if not raw.strip():
        raise InputError("is empty", file=str(path))
    if b"\x00" in raw:
        raise InputError("is a binary file, not a structure file in text form", file=str(path))
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        if exc.start >= len(raw) - 4:  # a character cut by the sniff window
            return raw[:exc.start].decode("utf-8")
        raise InputError("is not a text file (not UTF-8)", file=str(path),
                         line=raw[:exc.start].count(b"\n") + 1) from None


def detect_format(path: Path, head: str) -> str:
    """Format key from the file name, else from the first lines ``head``."""
    name = path.name.lower()
    suffix = path.suffix.lower()
    if suffix == ".cif":
        return "cif"
    if suffix in (".xyz", ".extxyz"):
        return "xyz"
    if suffix in (".lmp", ".data", ".lammps") or "data." in name:
        return "lammps-data"
    if suffix in (".vasp", ".poscar") or name.startswith(("poscar", "contcar")):
        return "vasp"
    return _sniff(path, head)


def _sniff(path: Path, head: str) -> str:
    lines = head.splitlines()[:60]
    stripped = [ln.strip() for ln in lines]
    if any(s.startswith("data_") or s.startswith("_cell_length_a") for s in stripped):
        return "cif"
    if stripped and re.fullmatch(r"\d+", stripped[0]):
        return "xyz"
    if any(re.fullmatch(r"\d+\s+atoms", s.split("#")[0].strip()) for s in stripped):
        return "lammps-data"
    if len(stripped) > 5 and _floats(stripped[1], 1) and all(
            _floats(s, 3) for s in stripped[2:5]):
        return "vasp"
    raise InputError("is in a format cellbuild cannot tell from its name or first lines",
                     file=str(path),
                     hint="name it *.cif, *.xyz, *.lmp / *.data, or POSCAR / *.vasp")


def _floats(text: str, n: int) -> bool:
    """True if ``text`` starts with at least ``n`` numbers."""
    parts = text.split()
    if len(parts) < n:
        return False
    try:
        [float(p) for p in parts[:n]]
    except ValueError:
        return False
    return True


# ----------------------------------------------------------------------------- through ASE


def _ase_read(path: Path, fmt: str, **kwargs):
    """``ase.io.read`` of the last frame, reader exceptions turned into InputError."""
    import ase.io

    try:
        return ase.io.read(str(path), format=fmt, **kwargs)
    except (*_READER_ERRORS, ase.io.ParseError) as exc:
        raise _unreadable(path, fmt, exc) from None


def _unreadable(path: Path, fmt: str, exc: BaseException, line: int | None = None) -> InputError:
    what = _one_line(exc) or type(exc).__name__
    key = "xyz" if fmt == "extxyz" else fmt
    title = FORMAT_TITLES.get(key, fmt)
    if line is None:
        line = _locate_problem(path, key)
    if line is not None:
        return InputError(f"cannot be read as {title}: the atom rows break off at this line, "
                          f"so the file looks truncated or damaged (reader: {what})",
                          file=str(path), line=line)
    return InputError(f"cannot be read as {title} ({what})", file=str(path))


def _one_line(message) -> str:
    return " ".join(str(message).split())[:200]


def _read_cif(path: Path, types, fast) -> ReadResult:
    """A numpy reader for plain P 1 files (ASE's CIF reader checks every new
    site against all earlier ones, which takes minutes at 60,000 atoms); ASE's
    reader for everything else; pymatgen's parser when ASE refuses the file."""
    text = path.read_text(errors="replace")
    first = re.search(r"^[ \t]*([^#\s].*)$", text, re.MULTILINE)
    if first is None or not first.group(1).lower().startswith("data_"):
        # ASE's parser asserts this rather than raising
        raise InputError("does not start with a data_ block, so it is no CIF",
                         file=str(path),
                         line=None if first is None else text.count("\n", 0, first.start()) + 1)
    loops = cif_loops(text)
    # pymatgen's parser divides by the column count and by the rows: refuse a
    # loop without either (the CIF syntax requires both) before it sees one
    empty = next((lp for lp in loops if not lp.heads or not lp.rows()), None)
    if empty is not None:
        what = "column names" if not empty.heads else "values"
        raise InputError(f"has a loop_ without {what}; the file looks damaged",
                         file=str(path), line=empty.body_line)
    for loop in loops:  # ASE's parser raises RuntimeError on a broken last row
        check_cif_loop_rows(path, loop)
    check_cif_numbers(path, text, loops)
    partial = cif_partial_occupancy(loops)
    # a disordered table lists several atoms on one site: ASE's reader keeps one
    structure = None if partial else fast_p1_cif(text, loops)
    if structure is not None:
        check_cif_complete(path, structure, text, loops)
        return ReadResult(structure, "cif", "cellbuild (P 1 table)", partial_occupancy=partial)
    refuse_large_cif_table(path, loops)
    check_cif_symbol_column(path, loops)
    try:
        atoms = _ase_read(path, "cif")
        structure, reader = Structure.from_ase(atoms), "ase"
    except InputError as ase_error:
        structure = _pymatgen_cif(path, ase_error)
        reader = "pymatgen"
    if not partial:
        check_cif_complete(path, structure, text, loops)
    return ReadResult(structure, "cif", reader, partial_occupancy=partial)


def _pymatgen_cif(path: Path, ase_error: InputError) -> Structure:
    from pymatgen.io.ase import AseAtomsAdaptor
    from pymatgen.io.cif import CifParser

    try:
        parsed = CifParser(str(path)).parse_structures(primitive=False)
        if not parsed:
            raise ase_error
        return Structure.from_ase(AseAtomsAdaptor.get_atoms(parsed[-1]))
    except _READER_ERRORS:
        raise ase_error from None


def _read_xyz(path: Path, types, fast) -> ReadResult:
    if fast:
        structure = _fast_xyz(path)
        if structure is not None:
            return ReadResult(structure, "xyz", "cellbuild")
    _refuse_word_properties(path)
    atoms = _ase_read(path, "extxyz")
    _warn_pbc(atoms.pbc)
    return ReadResult(Structure.from_ase(atoms), "xyz", "ase")


def _refuse_word_properties(path: Path) -> None:
    """ASE reads ``Properties=T`` as a boolean and then fails inside its parser
    (AttributeError): refuse a Properties or Lattice value that is a bare T/F word."""
    import re

    with open(path, "rb") as handle:
        handle.readline()
        comment = handle.readline(1 << 20).decode("utf-8", "replace")
    hint = "extended XYZ needs Lattice=\"...\" and Properties=species:S:1:pos:R:3"
    found = re.search(r"(?i)\b(Properties|Lattice)=(T|F|True|False)(?=\s|$)", comment)
    if found:
        raise InputError(f"`{found.group(1)}` is the word {found.group(2)!r}, not a value",
                         hint=hint, file=str(path), line=2)
    # A bare key (no `=`) is read by ASE as the flag True, which its parser then fails
    # on; quoted values are blanked first so a word inside them does not count.
    unquoted = re.sub(r'"(?:[^"\\]|\\.)*"?', '""', comment)
    found = re.search(r"(?i)(?<![\w=])(Properties|Lattice)(?![\w=])(?!\s*=)", unquoted)
    if found:
        raise InputError(f"`{found.group(1)}` has no value", hint=hint, file=str(path), line=2)
    # ASE splits the Properties value on ':' into name:type:count triples and fails
    # inside itself (AttributeError, IndexError) on anything else.
    found = re.search(r"(?i)(?<![\w])Properties\s*=\s*(\S*)", comment)
    if found and not re.fullmatch(r"(?:[A-Za-z_][\w-]*:[SRILsril]:[1-9]\d*)"
                                  r"(?::[A-Za-z_][\w-]*:[SRILsril]:[1-9]\d*)*",
                                  found.group(1).strip('"')):
        raise InputError(f"`Properties={found.group(1)}` is not a list of name:type:count",
                         hint=hint, file=str(path), line=2)


def _warn_pbc(pbc) -> None:
    """Say so when a file declares a direction non-periodic: inspect treats all three
    as periodic (a slab's vacuum then shows as a wide empty gap)."""
    pbc = np.asarray(pbc, dtype=bool).reshape(-1)
    if pbc.size == 3 and not pbc.all():
        flags = " ".join("T" if p else "F" for p in pbc)
        warnings.warn(f"the file declares pbc = {flags}; inspected as periodic along all "
                      "three cell vectors", UserWarning, stacklevel=2)


def _read_vasp(path: Path, types, fast) -> ReadResult:
    check_poscar(path)
    return ReadResult(Structure.from_ase(_ase_read(path, "vasp")), "vasp", "ase")


def _read_lammps(path: Path, types, fast) -> ReadResult:
    header = _lammps_header(path)
    # the numpy reader validates every atom row, so that ASE is not handed a
    # malformed one (it raises RuntimeError or TypeError on those)
    structure = _fast_lammps(path, header, types)
    if structure is None and not header.general_box:
        raise _unreadable(path, "lammps-data", ValueError("an atom row is not numbers"))
    if fast and structure is not None:
        return ReadResult(structure, "lammps-data", "cellbuild")
    # Unmapped types read as element 0 ('X') and are refused below, once the
    # types that atoms actually carry are known.
    z_of_type = {t: 0 for t in range(1, header.n_types + 1)}
    atoms = _ase_read(path, "lammps-data", atom_style=header.style, units="metal",
                      Z_of_type=z_of_type)
    used = np.unique(atoms.arrays["type"])
    symbols = _type_symbols(path, header, types, used)
    from ase.data import atomic_numbers

    atoms.numbers = np.array([atomic_numbers[symbols[t]] for t in atoms.arrays["type"]])
    return ReadResult(Structure.from_ase(atoms), "lammps-data", "ase")


_READERS = {"cif": _read_cif, "xyz": _read_xyz, "lammps-data": _read_lammps, "vasp": _read_vasp}


# ----------------------------------------------------------------------------- LAMMPS header


@dataclass
class _LammpsHeader:
    """What a LAMMPS data file says before (and around) its Atoms section."""

    n_atoms: int = 0
    n_types: int = 0
    bounds: dict = field(default_factory=dict)  # xlo, xhi, ..., xy, xz, yz
    masses: dict = field(default_factory=dict)  # type -> (mass, line)
    style: str = "atomic"
    atoms_line: int = 0  # 1-based line of the "Atoms" keyword
    general_box: bool = False


def _lammps_header(path: Path) -> _LammpsHeader:
    """Counts, box, masses and atom style; the atom rows are skipped, not parsed."""
    from itertools import islice

    head = _LammpsHeader()
    style_comment, first_row, section = None, None, None
    with open(path, encoding="utf-8", errors="replace") as handle:
        lines = enumerate(handle, start=1)
        next(lines, None)  # the first line is a title
        for number, raw in lines:
            text, _, comment = raw.partition("#")
            text = text.strip()
            if not text:
                continue
            if section in ("after Atoms", "after Velocities") and not re.fullmatch(
                    r"[A-Z][A-Za-z ]+", text):
                what = section.split()[1]
                raise InputError(f"has more {what} rows than the {head.n_atoms:,} atoms its "
                                 f"header declares (LAMMPS refuses such a file)",
                                 file=str(path), line=number)
            if text in _LAMMPS_SECTIONS or re.fullmatch(r"[A-Z][A-Za-z ]+", text):
                section = text
                if section == "Atoms":
                    head.atoms_line = number
                    style_comment = comment.strip() or None
                continue
            if section is None:
                _header_line(head, text, path, number)
            elif section == "Masses":
                _mass_line(head, path, text, number)
            elif section in ("Atoms", "Velocities"):
                # one row per atom: keep the first, skip the rest without parsing
                if section == "Atoms" and first_row is None:
                    first_row = text.split()
                for _ in islice(lines, max(head.n_atoms - 1, 0)):
                    pass
                section = "after " + section
    if head.atoms_line == 0 or head.n_atoms == 0:
        raise InputError("has no Atoms section (or no 'N atoms' line)", file=str(path))
    head.style = _lammps_style(path, head, style_comment, first_row)
    return head


def _mass_line(head: _LammpsHeader, path: Path, text: str, number: int) -> None:
    parts = text.split()
    try:
        head.masses[int(parts[0])] = (float(parts[1]), number)
    except (ValueError, IndexError):
        raise InputError(f"has a Masses line that is not 'type mass': {text!r}",
                         file=str(path), line=number) from None


def _header_line(head: _LammpsHeader, text: str, path: Path, number: int) -> None:
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


def _type_symbols(path: Path, head: _LammpsHeader, types, used) -> dict[int, str]:
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


# ----------------------------------------------------------------------------- fast paths


def _line_starts(data: bytes) -> np.ndarray:
    """Byte offset of the start of every line (and one past the end)."""
    newlines = np.flatnonzero(np.frombuffer(data, dtype=np.uint8) == 10)
    return np.concatenate([[0], newlines + 1, [len(data) + 1]])


def _load_rows(path: Path, data: bytes, starts: np.ndarray, first: int, n: int,
               usecols, dtype) -> np.ndarray:
    """``n`` rows from 0-based line ``first`` parsed by ``numpy.loadtxt``.

    Raises InputError (with the line) when the file ends early or its last row
    is cut short; ValueError when a row does not parse otherwise (the caller
    then lets ASE read the file and explain).
    """
    n_lines = len(starts) - 1
    last = first + n - 1
    if last >= n_lines or not data[starts[last]:].strip():
        raise InputError(f"ends before its {n:,} atom rows are complete; the file looks "
                         "truncated", file=str(path), line=data.count(b"\n") + 1)
    width = len(data[starts[first]:starts[first + 1]].split(b"#")[0].split())
    if len(data[starts[last]:starts[last + 1]].split(b"#")[0].split()) < width:
        raise InputError("ends in the middle of an atom row; the file looks truncated",
                         file=str(path), line=last + 1)
    block = data[starts[first]:starts[first + n] - 1]
    rows = np.loadtxt(io.BytesIO(block), usecols=usecols, dtype=dtype, comments="#",
                      ndmin=1 if isinstance(usecols, int) else 2)
    if len(rows) != n:
        raise ValueError(f"{len(rows)} rows parsed, {n} expected")  # blank lines inside
    return rows


def _fast_lammps(path: Path, head: _LammpsHeader, types) -> Structure | None:
    """LAMMPS atom rows with numpy; None if the file needs ASE's general reader."""
    if head.general_box:
        return None
    data = path.read_bytes()
    starts = _line_starts(data)
    first = head.atoms_line  # 0-based index of the line after "Atoms" (blank)
    while first < len(starts) - 2 and not data[starts[first]:starts[first + 1]].strip():
        first += 1
    n_cols = _LAMMPS_STYLES[head.style]
    xyz_cols = (n_cols - 3, n_cols - 2, n_cols - 1)
    try:
        width = len(data[starts[first]:starts[first + 1]].split(b"#")[0].split())
        usecols = (0, 1) + xyz_cols + ((n_cols, n_cols + 1, n_cols + 2) if width == n_cols + 3 else ())
        rows = _load_rows(path, data, starts, first, head.n_atoms, usecols, np.float64)
    except ValueError:
        return None
    order = np.argsort(rows[:, 0], kind="stable")  # ASE orders atoms by id
    rows = rows[order]
    type_of = rows[:, 1].astype(np.int64)
    cell = _lammps_cell(head.bounds)
    positions = rows[:, 2:5].copy()
    if rows.shape[1] == 8:  # image flags: unwrap as ASE does
        positions += np.einsum("ij,jk->ik", rows[:, 5:8], cell)
    used = np.unique(type_of)
    if used[0] < 1:
        raise InputError(f"has atom type {used[0]}; LAMMPS types start at 1", file=str(path))
    symbols = _type_symbols(path, head, types, used)
    unique = tuple(dict.fromkeys(symbols[int(t)] for t in used))
    code_of_type = np.zeros(int(used.max()) + 1, dtype=np.int32)
    for t in used:
        code_of_type[t] = unique.index(symbols[int(t)])
    return Structure(cell=cell, positions=positions, species=code_of_type[type_of],
                     symbols=unique)


def _lammps_cell(b: dict) -> np.ndarray:
    """Cell rows from LAMMPS bounds and tilts (restricted triclinic box)."""
    return np.array([[b.get("xhi", 0.5) - b.get("xlo", -0.5), 0.0, 0.0],
                     [b.get("xy", 0.0), b.get("yhi", 0.5) - b.get("ylo", -0.5), 0.0],
                     [b.get("xz", 0.0), b.get("yz", 0.0), b.get("zhi", 0.5) - b.get("zlo", -0.5)]])


def _fast_xyz(path: Path) -> Structure | None:
    """A single-frame extended XYZ with numpy; None if ASE is needed."""
    from ase.io.extxyz import key_val_str_to_dict

    data = path.read_bytes()
    starts = _line_starts(data)
    try:
        n = int(data[:starts[1]].strip())
        info = key_val_str_to_dict(data[starts[1]:starts[2] - 1].decode("utf-8"))
    except (ValueError, UnicodeDecodeError, IndexError):
        return None
    columns = _xyz_columns(str(info.get("Properties", "species:S:1:pos:R:3")))
    if columns is None or "Lattice" not in info:
        return None
    species_col, pos_cols = columns
    try:
        names = _load_rows(path, data, starts, 2, n, species_col, "U3")
        positions = _load_rows(path, data, starts, 2, n, pos_cols, np.float64)
    except ValueError:
        return None
    if data[starts[min(2 + n, len(starts) - 1)] - 1:].strip():
        return None  # more frames: ASE reads the last one
    if "pbc" in info:
        _warn_pbc(info["pbc"])
    symbols, first, inverse = np.unique(names, return_index=True, return_inverse=True)
    rank = np.empty(len(symbols), dtype=np.int32)
    rank[np.argsort(first)] = np.arange(len(symbols))
    from ase.data import atomic_numbers

    ordered = tuple(str(s) for s in symbols[np.argsort(first)])
    if not all(s in atomic_numbers for s in ordered):
        return None
    return Structure(cell=np.array(info["Lattice"], dtype=np.float64).reshape(3, 3),
                     positions=positions, species=rank[inverse], symbols=ordered)


def _xyz_columns(properties: str):
    """(species column, position columns) from a Properties=name:type:count string."""
    parts = properties.split(":")
    if len(parts) % 3:
        return None
    column, species, pos = 0, None, None
    for name, kind, count in zip(parts[::3], parts[1::3], parts[2::3]):
        width = int(count) if count.isdigit() else 0
        if name == "species" and kind == "S" and width == 1:
            species = column
        elif name == "pos" and kind == "R" and width == 3:
            pos = (column, column + 1, column + 2)
        column += width
    return None if species is None or pos is None else (species, pos)


# ----------------------------------------------------------------------------- after reading


def _check_periodic(structure: Structure, path: Path, fmt: str) -> None:
    """A periodic cell with volume and finite coordinates, or InputError."""
    check_values(structure, path)
    cell = structure.cell
    lengths = np.linalg.norm(cell, axis=1)
    if not np.all(np.isfinite(cell)) or np.any(lengths == 0) or (
            abs(np.linalg.det(cell)) <= 1e-9 * float(np.prod(lengths))):
        hint = ("an extended XYZ file needs Lattice=\"ax ay az bx by bz cx cy cz\" on its "
                "comment line" if fmt == "xyz" else "give the file a 3D cell")
        raise InputError("has no periodic 3D cell (no lattice vectors, or vectors with zero "
                         "volume)", file=str(path), hint=hint)
    if structure.n_atoms == 0:
        raise InputError("holds no atoms", file=str(path))
    if not np.all(np.isfinite(structure.positions)):
        raise InputError("has coordinates that are not finite numbers", file=str(path))


def _locate_problem(path: Path, fmt: str) -> int | None:
    """Best guess of the 1-based line where a broken file goes wrong (error path only).

    The atom table of each line-based format is a count followed by rows; the
    answer is the first row with too few fields, or the end of the file.
    """
    try:
        lines = path.read_text(errors="replace").splitlines()
    except OSError:
        return None
    table = _atom_table(lines, fmt)
    if table is None:
        return None
    first, n, width = table
    for k in range(first, first + n):
        if k >= len(lines):
            return len(lines)  # the file ends early: its last line
        if len(lines[k].split("#")[0].split()) < width:
            return k + 1
    return None


def _atom_table(lines: list[str], fmt: str):
    """(0-based first row, rows, fields per row) of the atom table, or None."""
    try:
        if fmt == "xyz":
            return 2, int(lines[0].split()[0]), 4
        if fmt == "lammps-data":
            n = next(int(ln.split()[0]) for ln in lines if re.fullmatch(
                r"\s*\d+\s+atoms\s*", ln.split("#")[0]))
            at = next(k for k, ln in enumerate(lines) if ln.split("#")[0].strip() == "Atoms")
            first = next((k for k in range(at + 1, len(lines)) if lines[k].strip()), len(lines))
            return first, n, 5
        if fmt == "vasp":
            # the coordinate-mode line (Direct / Cartesian) follows the counts line,
            # or "Selective dynamics" does and the mode line comes after it
            at = next(k for k in range(6, min(len(lines), 10)) if re.fullmatch(
                r"[\d\s]+", lines[k - 1].strip()) and lines[k].strip()[:1] in "sSdDcCkK")
            counts = lines[at - 1]
            if lines[at].strip()[:1] in "sS":
                at += 1
            return at + 1, sum(int(x) for x in counts.split()), 3
    except (ValueError, IndexError, StopIteration):
        return None
    return None
