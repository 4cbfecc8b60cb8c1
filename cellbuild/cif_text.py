"""CIF text: loops and fields parsed with regular expressions and numpy, the
partially occupied rows, and the numpy reader for plain P 1 atom tables (the
checks that refuse damaged CIF text are in :mod:`cellbuild.cif_checks`).

The scans run over the whole text in C (regular expressions, ``str.split``,
numpy), not a Python loop per atom row, so a CIF of a million atoms is read in
seconds. :mod:`cellbuild.readers` calls these from its CIF reader.
"""
from __future__ import annotations

import io
import re
import shlex
import string
from dataclasses import dataclass

import numpy as np

from .fixed_columns import loadtxt_fixed
from .structure import Structure


_CIF_COORDINATES = ("_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z",
                    "_atom_site_cartn_x", "_atom_site_cartn_y", "_atom_site_cartn_z")


def cif_partial_occupancy(loops: list[_CifLoop], plain: PlainTable | None = None
                          ) -> list[dict]:
    """Atom-site rows whose ``_atom_site_occupancy`` is below 1 (by more than
    0.001), as {"label", "symbol", "occupancy", "line"}; unknown values ('?',
    '.') count as 1. A ``plain`` table answers "none" from its parsed column."""
    table = _atom_site_loop(loops)
    if table is None or "_atom_site_occupancy" not in table.heads:
        return []
    if plain is not None and not np.any(
            plain.column("_atom_site_occupancy") < 1.0 - 1e-3):
        return []
    heads = list(table.heads)
    width, column = len(heads), heads.index("_atom_site_occupancy")
    if any(q in table.body for q in "'\"#"):
        fields = [f for row in table.rows() for f in _cif_fields(row)]
    else:
        fields = table.body.split()
    if len(fields) % width:
        return []  # a damaged table: the completeness check names it
    values = np.char.partition(np.array(fields[column::width]), "(")[:, 0]
    values[np.isin(values, ["?", "."])] = "1"
    try:
        occupancy = values.astype(np.float64)
    except ValueError:
        return []  # the general readers explain a non-number
    rows = np.flatnonzero(occupancy < 1.0 - 1e-3)
    if rows.size == 0:
        return []
    label_column = heads.index("_atom_site_label") if "_atom_site_label" in heads else 0
    symbol_column = (heads.index("_atom_site_type_symbol") if "_atom_site_type_symbol" in heads
                     else label_column)
    body_rows = [k for k, ln in enumerate(table.body.splitlines())
                 if ln.strip() and not ln.lstrip().startswith("#")]
    return [{"label": fields[k * width + label_column],
             "symbol": fields[k * width + symbol_column],
             "occupancy": float(occupancy[k]),
             "line": table.body_line + body_rows[k] if k < len(body_rows) else None}
            for k in rows.tolist()]


@dataclass(frozen=True)
class _CifLoop:
    """One ``loop_`` of a CIF: its lower-cased column tags and the text of its rows."""

    heads: tuple[str, ...]
    body: str
    body_line: int  # 1-based line where ``body`` starts
    start: int = 0  # offsets of ``body`` in the text
    stop: int = 0

    def rows(self) -> list[str]:
        """Row lines, blank and comment lines left out (error paths and small loops)."""
        return [ln for ln in self.body.splitlines()
                if ln.strip() and not ln.lstrip().startswith("#")]

    def has_rows(self) -> bool:
        """Whether :meth:`rows` is not empty; a prefix of the body answers a long
        loop (a cut line that counts as a row is a row when whole)."""
        head = self.body[:65536]
        if any(ln.strip() and not ln.lstrip().startswith("#") for ln in head.splitlines()):
            return True
        return len(head) < len(self.body) and bool(self.rows())


_LOOP_START = re.compile(r"^[ \t]*loop_[ \t]*$", re.MULTILINE)
_LOOP_HEAD = re.compile(r"\n[ \t]*(_\S+)[ \t]*(?=\n|$)")
_LOOP_END = re.compile(r"^[ \t]*(?:_|loop_|data_)", re.MULTILINE)
_SINGLE_VALUE = re.compile(r"^[ \t]*(_\S+)[ \t]+(\S[^\n]*?)[ \t]*$", re.MULTILINE)
#: What precedes the underscore of a line that ends a loop body.
_LINE_OPENING = re.compile(r"[ \t]*(?:loop|data)?")


def single_values(text: str, loops: list[_CifLoop]):
    """The ``_tag value`` lines of the text (``_SINGLE_VALUE`` matches, in order),
    the loop bodies skipped: no line inside one starts with ``_``, so none
    matches there, and a million atom rows are not scanned."""
    pos = 0
    for loop in loops:
        yield from _SINGLE_VALUE.finditer(text, pos, loop.start)
        pos = max(pos, loop.stop)
    yield from _SINGLE_VALUE.finditer(text, pos)


def cif_loops(text: str) -> list[_CifLoop]:
    """Every loop of the text: ``loop_`` lines found with ``str.find`` and the end
    of each body with :func:`_loop_end`, so that the scan runs in C, not a
    Python loop over the (possibly million) atom rows."""
    loops = []
    for pos in _loop_starts(text):
        heads = []
        while (head := _LOOP_HEAD.match(text, pos)) is not None:
            heads.append(head.group(1).lower())
            pos = head.end()
        stop = _loop_end(text, pos)
        loops.append(_CifLoop(tuple(heads), text[pos:stop], text.count("\n", 0, pos) + 1,
                              pos, stop))
    return loops


def _loop_starts(text: str):
    """End offset of each ``loop_`` line (what ``_LOOP_START.finditer`` finds)."""
    pos = 0
    while (at := text.find("loop_", pos)) >= 0:
        pos = at + 5
        line_start = text.rfind("\n", 0, at) + 1
        line_end = text.find("\n", at)
        line_end = len(text) if line_end < 0 else line_end
        if not text[line_start:at].strip(" \t") and not text[pos:line_end].strip(" \t"):
            yield line_end
            pos = line_end


#: Underscores examined one by one before the regular expression takes over
#: (labels such as Cu_1 would otherwise cost a Python step per row).
_LOOP_END_CANDIDATES = 1000


def _loop_end(text: str, pos: int) -> int:
    """Start of the first line from ``pos`` on that begins (after blanks) with
    ``_``, ``loop_`` or ``data_`` (what ``_LOOP_END.search`` finds), else len(text).
    Every such line holds an underscore, so only underscores are looked at."""
    at = pos
    for _ in range(_LOOP_END_CANDIDATES):
        at = text.find("_", at)
        if at < 0:
            return len(text)
        line_start = text.rfind("\n", 0, at) + 1
        if line_start >= pos and _LINE_OPENING.fullmatch(text, line_start, at):
            return line_start
        at += 1
    end = _LOOP_END.search(text, at)
    return end.start() if end else len(text)


def _atom_site_loop(loops: list[_CifLoop]) -> _CifLoop | None:
    """The one ``_atom_site_`` loop (anisotropic displacements aside), or None."""
    # any column may name the loop: a damaged first tag must not hide the table
    found = [lp for lp in loops if any(h.startswith("_atom_site_fract_")
                                       or h.startswith("_atom_site_cartn_") for h in lp.heads)]
    return found[0] if len(found) == 1 else None


CIF_CELL_TAGS = ("_cell_length_a", "_cell_length_b", "_cell_length_c",
                 "_cell_angle_alpha", "_cell_angle_beta", "_cell_angle_gamma")
_CIF_IDENTITY = {"x,y,z", "+x,+y,+z"}
CIF_FRACTIONAL = ("_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z")


def fast_p1_cif(text: str, loops: list[_CifLoop], plain: PlainTable | None = None
                ) -> Structure | None:
    """A single-block CIF in space group P 1 whose atom table holds plain numbers,
    read with numpy; None for anything else (symmetry to expand, uncertainties,
    quoted fields, several blocks), which goes to the general readers. With
    ``plain`` (the table parsed by :func:`plain_atom_table`) no field is a
    Python string: the result is the same, bit for bit."""
    if text.startswith("data_") + text.count("\ndata_") != 1:
        return None
    tags = {m.group(1).lower(): m.group(2).strip("'\"") for m in single_values(text, loops)}
    if not _cif_is_p1(loops, tags) or any(t not in tags for t in CIF_CELL_TAGS):
        return None
    try:
        cellpar = [float(tags[t]) for t in CIF_CELL_TAGS]
    except ValueError:
        return None  # uncertainties such as 3.61(2): the general reader knows them
    table = _atom_site_loop(loops)
    if table is None:
        return None
    columns = list(table.heads)
    symbol_tag = next((t for t in ("_atom_site_type_symbol", "_atom_site_label") if t in columns),
                      None)
    if symbol_tag is None or any(t not in columns for t in CIF_FRACTIONAL):
        return None
    if plain is not None:
        frac = np.stack([plain.column(t) for t in CIF_FRACTIONAL], axis=1)
        return _p1_structure(cellpar, frac, plain.column(symbol_tag))
    if any(c in table.body for c in "'\"()?#"):
        return None  # quoted fields, uncertainties, unknowns or comments
    fields = table.body.split()
    width = len(columns)
    if not fields or len(fields) % width:
        return None
    try:  # every width-th field from each wanted column: no per-row Python work
        frac = np.stack([np.array(fields[columns.index(t)::width], dtype=np.float64)
                         for t in CIF_FRACTIONAL], axis=1)
    except ValueError:
        return None
    return _p1_structure(cellpar, frac, np.array(fields[columns.index(symbol_tag)::width]))


def _p1_structure(cellpar: list[float], frac: np.ndarray, labels: np.ndarray
                  ) -> Structure | None:
    """The structure ASE's ``Atoms(symbols, scaled_positions=frac, cell=cellpar)``
    gives (same cell, positions = frac . cell), without a Python string per atom;
    None when a label names no element. Species codes follow first appearance."""
    from ase.data import atomic_numbers
    from ase.geometry import cellpar_to_cell

    # the table's 8 bytes of a label as one integer: no string comparisons
    keys = np.ascontiguousarray(labels).view(np.uint64) if labels.dtype == "S8" else labels
    unique, first, inverse = np.unique(keys, return_index=True, return_inverse=True)
    elements = []
    for k in first.tolist():
        label = labels[k].decode("ascii") if labels.dtype.kind == "S" else str(labels[k])
        match = re.match(r"[A-Z][a-z]?", label)
        if match is None or match.group() not in atomic_numbers:
            return None
        elements.append(match.group())
    # elements in order of their first row, as Structure.from_ase numbers them
    order = {}
    for k in np.argsort(first, kind="stable").tolist():
        order.setdefault(elements[k], len(order))
    code = np.array([order[e] for e in elements], dtype=np.int32)
    cell = np.array(cellpar_to_cell(cellpar), dtype=np.float64)
    return Structure(cell=cell, positions=np.dot(frac, cell), species=code[inverse.reshape(-1)],
                     symbols=tuple(order))


#: Bytes of an atom table :func:`plain_atom_table` parses: letters, digits, blanks,
#: newlines and the signs and points of numbers. Quotes, comments, brackets,
#: '?', '_' (Python's float reads 1_0) and other characters go to the text path.
_PLAIN_TABLE_BYTES = (string.ascii_letters + string.digits + " \t\n.+-").encode("ascii")
#: Columns parsed as numbers; the symbol column keeps its first 8 bytes (an
#: element is its first one or two letters); other columns are not used.
_NUMBER_COLUMNS = _CIF_COORDINATES + ("_atom_site_occupancy",)


@dataclass(frozen=True)
class PlainTable:
    """The atom-site loop in one parse (``loadtxt_fixed``, else ``numpy.loadtxt``; numbers
    correctly rounded): one row per line, one field per column (loadtxt refuses the rest)."""

    loop: _CifLoop
    rows: np.ndarray  # structured, field "cK" for column K

    def column(self, tag: str) -> np.ndarray:
        return self.rows[f"c{self.loop.heads.index(tag)}"]


def plain_atom_table(loops: list[_CifLoop]) -> PlainTable | None:
    """The atom-site loop as a :class:`PlainTable`, or None when its text holds
    anything but plain rows of plain numbers and words (then the checks and
    readers take the text path, field by field)."""
    table = _atom_site_loop(loops)
    if table is None or not table.body.isascii() or not table.heads:
        return None
    raw = table.body.encode("ascii")
    if raw.translate(None, _PLAIN_TABLE_BYTES) or not raw.strip():
        return None
    symbol = "_atom_site_type_symbol" if "_atom_site_type_symbol" in table.heads \
        else "_atom_site_label"
    dtype = np.dtype([(f"c{k}", "f8" if h in _NUMBER_COLUMNS else "S8" if h == symbol else "S1")
                      for k, h in enumerate(table.heads)])
    try:  # fixed-width columns in whole-array passes (the same array), else loadtxt
        rows = loadtxt_fixed(raw, dtype=dtype, comments=None, ndmin=1)
        if rows is None:
            rows = np.loadtxt(io.BytesIO(raw), dtype=dtype, comments=None, ndmin=1)
    except ValueError:
        return None
    return PlainTable(table, rows)


def _cif_fields(row: str) -> list[str]:
    """The fields of one CIF row (quotes respected where they pair up)."""
    try:
        return shlex.split(row, comments=True)
    except ValueError:  # an unpaired quote
        return row.split()


def _cif_is_p1(loops: list[_CifLoop], tags: dict[str, str]) -> bool:
    """True when the file declares P 1 (name, number or only the identity operation)."""
    names = [tags.get(t) for t in ("_symmetry_space_group_name_h-m",
                                   "_space_group_name_h-m_alt")]
    numbers = [tags.get(t) for t in ("_symmetry_int_tables_number", "_space_group_it_number")]
    ops = _cif_symmetry_ops(loops)
    declared = [n.replace(" ", "").upper() for n in names if n] + [n for n in numbers if n]
    if ops is not None and not set(ops) <= _CIF_IDENTITY:
        return False
    return bool(declared or ops) and all(d in ("P1", "1") for d in declared)


def _cif_symmetry_ops(loops: list[_CifLoop]) -> list[str] | None:
    """The operations of the symmetry-operation loop, spaces removed, or None."""
    for loop in loops:
        column = next((c for c, h in enumerate(loop.heads)
                       if h.endswith(("equiv_pos_as_xyz", "symop_operation_xyz"))), None)
        if column is None:
            continue
        ops = []
        for row in loop.rows():
            fields = _cif_fields(row)  # an operation is quoted: 'x, y, z'
            if len(fields) != len(loop.heads):
                return ["(unparsed)"]  # leave it to the general readers
            ops.append(fields[column].replace(" ", "").lower())
        return ops
    return None
