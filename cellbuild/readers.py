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
P 1 table reader live in :mod:`cellbuild.cif_text`; the LAMMPS data header parser,
the element-from-mass lookup and the numpy row reader in :mod:`cellbuild.read_lammps`.

Every failure becomes an :class:`~cellbuild.errors.InputError` naming the file
and, where it can be found, the line; a reader's own exception never escapes.
"""
from __future__ import annotations

import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .cif_checks import (check_cif_complete, check_cif_loop_rows, check_cif_numbers,
                         check_cif_symbol_column, refuse_large_cif_table)
from .cif_text import cif_loops, cif_partial_occupancy, fast_p1_cif, plain_atom_table
from .errors import InputError
from .formats import FORMATS, format_named, format_sniffed, title_of
from .read_checks import check_claimed_counts, check_poscar, check_values
from .read_lammps import element_of_mass, header_and_rows, load_rows, type_symbols
from .structure import Structure

# element_of_mass lives in read_lammps and stays importable from here.
__all__ = ["FAST_READ_MIN_BYTES", "FORMAT_TITLES", "ReadResult", "detect_format",
           "element_of_mass", "read_file", "read_structure"]

#: Formats and how a user would recognise them in messages (from the registry).
FORMAT_TITLES = {key: f.title for key, f in FORMATS.items()}
#: Files at least this large (bytes) of a format with a fast path skip ASE's
#: line-by-line parser (about 30,000 atoms; below it ASE takes < 0.2 s).
FAST_READ_MIN_BYTES = 2_000_000
#: Bytes looked at to sniff the format (and to refuse binary files).
_SNIFF_BYTES = 8192
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
        result = FORMATS[fmt].reader()(path, types, fast)
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
    """Format key from the file name, else from the first lines ``head`` (the registry's
    ``named`` and ``sniff`` of each format)."""
    found = format_named(path) or format_sniffed([ln.strip() for ln in head.splitlines()[:60]])
    if found is None:
        raise InputError("is in a format cellbuild cannot tell from its name or first lines",
                         file=str(path),
                         hint="name it " + ", ".join(f.name_hint for f in FORMATS.values()))
    return found.key


def _ase_read(path: Path, fmt: str, **kwargs):
    """``ase.io.read`` of the last frame, reader exceptions turned into InputError."""
    import ase.io

    try:
        return ase.io.read(str(path), format=fmt, **kwargs)
    except (*_READER_ERRORS, ase.io.ParseError) as exc:
        raise _unreadable(path, fmt, exc) from None


def _unreadable(path: Path, fmt: str, exc: BaseException, line: int | None = None) -> InputError:
    what = _one_line(exc) or type(exc).__name__
    key = next((k for k, f in FORMATS.items() if f.ase_format == fmt), fmt)
    title = title_of(fmt)
    if line is None:
        line = _locate_problem(path, key)
    if line is not None:
        return InputError(f"cannot be read as {title}: the atom rows break off at this line, "
                          f"so the file looks truncated or damaged (reader: {what})",
                          file=str(path), line=line)
    return InputError(f"cannot be read as {title} ({what})", file=str(path))


def _one_line(message) -> str:
    return " ".join(str(message).split())[:200]


def read_cif(path: Path, types, fast) -> ReadResult:
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
    empty = next((lp for lp in loops if not lp.heads or not lp.has_rows()), None)
    if empty is not None:
        what = "column names" if not empty.heads else "values"
        raise InputError(f"has a loop_ without {what}; the file looks damaged",
                         file=str(path), line=empty.body_line)
    # the atom table in one numpy pass when it is plain words and numbers; the
    # checks below then read its columns instead of splitting its text
    plain = plain_atom_table(loops)
    for loop in loops:  # ASE's parser raises RuntimeError on a broken last row
        if plain is None or loop is not plain.loop:  # a plain table is whole rows
            check_cif_loop_rows(path, loop)
    check_cif_numbers(path, text, loops, plain)
    partial = cif_partial_occupancy(loops, plain)
    # a disordered table lists several atoms on one site: ASE's reader keeps one
    structure = None if partial else fast_p1_cif(text, loops, plain)
    if structure is not None:
        check_cif_complete(path, structure, text, loops, plain)
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


def read_xyz(path: Path, types, fast) -> ReadResult:
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


def read_poscar(path: Path, types, fast) -> ReadResult:
    check_poscar(path)
    return ReadResult(Structure.from_ase(_ase_read(path, "vasp")), "poscar", "ase")


def read_lammps(path: Path, types, fast) -> ReadResult:
    data = path.read_bytes()  # read once: the header parser and the rows share it
    # the numpy reader validates every atom row, so that ASE is not handed a
    # malformed one (it raises RuntimeError or TypeError on those)
    header, structure = header_and_rows(path, data, types)
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
    symbols = type_symbols(path, header, types, used)
    from ase.data import atomic_numbers

    atoms.numbers = np.array([atomic_numbers[symbols[t]] for t in atoms.arrays["type"]])
    return ReadResult(Structure.from_ase(atoms), "lammps-data", "ase")




# ----------------------------------------------------------------------------- fast paths


def _fast_xyz(path: Path) -> Structure | None:
    """A single-frame extended XYZ with numpy; None if ASE is needed."""
    data = path.read_bytes()
    second = data.find(b"\n") + 1
    third = data.find(b"\n", second) + 1
    try:
        if not second or not third:
            return None
        n = int(data[:second].strip())
        comment = data[second:third - 1].decode("utf-8")
    except (ValueError, UnicodeDecodeError):
        return None
    if n < 1:
        return None  # ASE's reader says what is wrong
    info = _simple_comment(comment)
    if info is None:  # quotes within values, brackets, escapes: ASE's parser decides
        from ase.io.extxyz import key_val_str_to_dict

        try:
            info = key_val_str_to_dict(comment)
        except (ValueError, IndexError):
            return None
        if "Lattice" in info:  # ASE's cell is the transpose of its 3x3 Lattice
            info["Lattice"] = np.asarray(info["Lattice"]).T
    columns = _xyz_columns(str(info.get("Properties", "species:S:1:pos:R:3")))
    if columns is None or "Lattice" not in info:
        return None
    species_col, pos_cols = columns
    # one pass over the rows: the species as up to 4 bytes (longer names are no
    # element, so a cut one is refused below) and the three coordinates
    dtype = np.dtype([("species", "S4"), ("x", "f8"), ("y", "f8"), ("z", "f8")])
    try:
        rows, end = load_rows(path, data, third, 2, n, (species_col, *pos_cols), dtype)
    except ValueError:
        return None
    if data[end - 1:].strip():
        return None  # more frames: ASE reads the last one
    if "pbc" in info:
        _warn_pbc(info["pbc"])
    # symbols in order of first appearance; the 4 bytes of a name as one integer
    keys = np.ascontiguousarray(rows["species"]).view(np.uint32)
    _, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    rank = np.empty(len(first), dtype=np.int32)
    rank[np.argsort(first)] = np.arange(len(first))
    from ase.data import atomic_numbers

    ordered = tuple(rows["species"][k].decode("latin-1") for k in np.sort(first))
    if not all(s in atomic_numbers for s in ordered):
        return None
    positions = np.stack([rows["x"], rows["y"], rows["z"]], axis=1)
    return Structure(cell=np.array(info["Lattice"], dtype=np.float64).reshape(3, 3),
                     positions=positions, species=rank[inverse.reshape(-1)], symbols=ordered)


#: One ``key=value`` (a bare value or one in double quotes, without escapes or
#: brackets) or a bare ``key`` of an extended XYZ comment line.
_COMMENT_ITEM = re.compile(r'\s*([^\s="\'{}\[\]\\]+)(?:=(?:"([^"\\]*)"|([^\s="\'{}\[\]\\]+)))?'
                           r'(?=\s|$)')
#: A plain decimal number (what ``float`` reads the same way everywhere).
_PLAIN_NUMBER = re.compile(r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
#: Extended XYZ's words for booleans (ASE's table).
_BOOLEANS = {"T": True, "F": False, "true": True, "false": False, "True": True,
             "False": False, "TRUE": True, "FALSE": False}


def _simple_comment(comment: str) -> dict | None:
    """``Lattice`` (3x3, rows the cell vectors), ``Properties`` and ``pbc`` of a
    plain extended XYZ comment line, as ASE's ``key_val_str_to_dict`` reads them,
    without importing ``ase.io`` (1 s); None for any line outside that plain
    form, which then goes to ASE's parser."""
    items, pos, text = {}, 0, comment.strip()
    while pos < len(text):
        found = _COMMENT_ITEM.match(text, pos)
        if found is None:
            return None
        key = found.group(1)
        value = found.group(2) if found.group(2) is not None else found.group(3)
        items[key] = "T" if value is None else value
        pos = found.end()
    info = {}
    if "Properties" in items:
        info["Properties"] = items["Properties"]
    if "Lattice" in items:
        tokens = re.findall(r"[^\s,]+", items["Lattice"])
        if len(tokens) != 9 or not all(_PLAIN_NUMBER.fullmatch(t) for t in tokens):
            return None
        info["Lattice"] = np.array([float(t) for t in tokens]).reshape(3, 3)
    if "pbc" in items:
        flags = re.findall(r"[^\s,]+", items["pbc"])
        if not flags or any(f not in _BOOLEANS for f in flags):
            return None
        info["pbc"] = [_BOOLEANS[f] for f in flags] if len(flags) > 1 else _BOOLEANS[flags[0]]
    return info


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
        if fmt == "poscar":
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
