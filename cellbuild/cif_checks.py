"""Checks that refuse damaged CIF text before ASE's or pymatgen's reader sees it:
symbols that name no element, loops whose values do not fill whole rows, cell
parameters and coordinates that are not numbers, a big table only the general
reader takes, and a table cut short (an incomplete last row, or fewer atoms than
the declared ``_chemical_formula_sum``).

The scans run over the whole text in C (regular expressions, ``str.split``,
numpy), not a Python loop per atom row; Python work per row happens only on
error paths, to name the line. Every refusal is an
:class:`~cellbuild.errors.InputError` naming the file and, where it can be
found, the line. The loops come from :mod:`cellbuild.cif_text`;
:mod:`cellbuild.readers` calls these from its CIF reader.
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from .cif_text import (_CIF_COORDINATES, CIF_CELL_TAGS, PlainTable, _atom_site_loop, _CifLoop,
                       _cif_fields, single_values)
from .errors import InputError
from .structure import Structure


def check_cif_symbol_column(path: Path, loops: list[_CifLoop]) -> None:
    """InputError when an atom-site symbol holds no capital letter: ASE's reader
    looks for one and fails inside itself (AttributeError) when there is none."""
    for loop in loops:
        tag = next((t for t in ("_atom_site_type_symbol", "_atom_site_label")
                    if t in loop.heads), None)
        if tag is None:
            continue
        column, width = loop.heads.index(tag), len(loop.heads)
        for k, row in enumerate(loop.rows()):
            fields = _cif_fields(row)
            if len(fields) != width:
                return  # rows spread over several lines: left to the readers
            value = fields[column]
            if value not in (".", "?") and not re.search(r"[A-Z]", value):
                raise InputError(f"`{tag}` value {value!r} names no element",
                                 hint="use a symbol such as Cu, Fe or Si",
                                 file=str(path), line=loop.body_line + k)


def check_cif_loop_rows(path: Path, loop: _CifLoop) -> None:
    """InputError when a loop's values do not fill whole rows of its columns
    (loops with multi-line text fields are left to the readers)."""
    if re.search(r"^;", loop.body, re.MULTILINE):
        return
    if any(q in loop.body for q in "'\"#"):
        tokens = sum(len(_cif_fields(row)) for row in loop.rows())
    else:
        tokens = len(loop.body.split())
    if tokens % len(loop.heads):
        width = len(loop.heads)
        # error path only: name the first row whose field count is off
        for offset, row in enumerate(loop.body.splitlines()):
            if row.strip() and not row.lstrip().startswith("#") and (
                    len(_cif_fields(row)) != width):
                raise InputError(f"has an atom row with {len(_cif_fields(row))} fields "
                                 f"where the table has {width} columns", file=str(path),
                                 line=loop.body_line + offset)
        body = loop.body.rstrip()
        raise InputError(f"has a loop of {len(loop.heads)} columns whose {tokens} values do "
                         "not fill whole rows; the file looks truncated or damaged",
                         file=str(path), line=loop.body_line + body.count("\n"))


def check_cif_numbers(path: Path, text: str, loops: list[_CifLoop],
                      plain: PlainTable | None = None) -> None:
    """InputError naming the line of a cell parameter or atom coordinate that is
    not a number (uncertainties such as 0.25(1) allowed): ASE's reader keeps
    such a value as text and fails on it later with a TypeError. A ``plain``
    table has had its coordinates parsed as numbers already."""
    for match in single_values(text, loops):
        if match.group(1).lower() in CIF_CELL_TAGS and not _cif_number(match.group(2)):
            raise InputError(f"has {match.group(1)} = {match.group(2)!r}, which is not a number",
                             file=str(path), line=text.count("\n", 0, match.start()) + 1)
    table = _atom_site_loop(loops)
    if table is None or plain is not None:
        return
    columns = [k for k, h in enumerate(table.heads) if h in _CIF_COORDINATES]
    if not columns:
        return
    width = len(table.heads)
    quoted = any(q in table.body for q in "'\"#")
    fields = ([f for row in table.rows() for f in _cif_fields(row)] if quoted
              else table.body.split())
    values = np.array(fields[:len(fields) - len(fields) % width], dtype=str).reshape(-1, width)
    coordinates = np.char.partition(np.char.strip(values[:, columns], "'\""), "(")[:, :, 0]
    try:
        coordinates.astype(np.float64)
        return
    except ValueError:  # error path only: find the row
        bad = next(k for k, row in enumerate(coordinates.tolist())
                   if not all(_cif_number(v) for v in row))
    body_rows = [k for k, ln in enumerate(table.body.splitlines())
                 if ln.strip() and not ln.lstrip().startswith("#")]
    raise InputError("has an atom coordinate that is not a number",
                     file=str(path), line=table.body_line + body_rows[min(bad, len(body_rows) - 1)])


def _cif_number(value: str) -> bool:
    """True for a CIF number, with or without an uncertainty in brackets."""
    try:
        float(value.strip("'\"").split("(")[0])
    except ValueError:
        return False
    return True


#: Atom rows above which a CIF the table reader cannot take is refused: ASE's
#: reader compares each new site with all earlier ones (minutes at 60,000).
CIF_GENERAL_MAX_ROWS = 20_000


def refuse_large_cif_table(path: Path, loops: list[_CifLoop]) -> None:
    """InputError for a big atom table the P 1 table reader could not take,
    naming the first row whose field count is off when there is one."""
    table = _atom_site_loop(loops)
    if table is None or table.body.count("\n") <= CIF_GENERAL_MAX_ROWS:
        return
    width = len(table.heads)
    # error path only: find the damaged row to name it
    for offset, row in enumerate(table.body.splitlines()):
        if row.strip() and not row.lstrip().startswith("#") and len(_cif_fields(row)) != width:
            raise InputError(f"has an atom row with {len(_cif_fields(row))} fields "
                             f"where the table has {width} columns",
                             file=str(path), line=table.body_line + offset)
    raise InputError(f"has {len(table.rows()):,} atom rows with symmetry operations, "
                     "uncertainties or quoted fields, which only the general CIF reader takes, "
                     "and it would take very long at this size", hint="write the structure in "
                     "P 1 with plain numbers, or as LAMMPS data or extended XYZ", file=str(path))


def check_cif_complete(path: Path, structure: Structure, text: str,
                       loops: list[_CifLoop], plain: PlainTable | None = None) -> None:
    """Refuse a CIF whose atom table was cut short.

    A CIF loop is a stream of tokens, so readers accept a table that simply
    stops. Two signs of a cut: the last row of the atom-site loop has fewer
    fields than the loop has columns, or the declared ``_chemical_formula_sum``
    is not a whole multiple of the atoms read.
    """
    # a plain table is whole rows (loadtxt took one field per column on each line)
    line = None if plain is not None and loops[-1] is plain.loop else _cif_short_row(loops)
    if line is not None:
        raise InputError("ends in the middle of the atom table (the last row is incomplete); "
                         "the file looks truncated", file=str(path), line=line)
    declared = _cif_formula_sum(text)
    if declared and not _whole_multiple(structure.composition(), declared):
        got = " ".join(f"{k}{v}" for k, v in structure.composition().items())
        want = " ".join(f"{k}{v:g}" for k, v in declared.items())
        raise InputError(f"lists {got} but declares _chemical_formula_sum {want}; "
                         "the file looks truncated", file=str(path))


def _cif_short_row(loops: list[_CifLoop]) -> int | None:
    """1-based line of an incomplete last row of the last loop, if it is an
    ``_atom_site_`` loop whose fields do not fill its columns; else None."""
    if not loops or not any(h.startswith("_atom_site_") for h in loops[-1].heads):
        return None
    table = loops[-1]
    body = table.body.rstrip()
    width = len(table.heads)
    if not body or len(body.split()) % width == 0:
        return None
    last = body.rsplit("\n", 1)[-1]
    if len(last.split()) >= width:
        return None
    return table.body_line + body.count("\n")


#: A count in a formula sum: empty (1), a whole or a decimal number.
_COUNT = re.compile(r"|[0-9]+\.?[0-9]*|\.[0-9]+")
_FORMULA_SUM = re.compile(r"_chemical_formula_sum\s+['\"]?([^'\"\n]+)")


def _cif_formula_sum(text: str) -> dict[str, float] | None:
    match, at = None, 0
    while match is None and (at := text.find("_chemical_formula_sum", at)) >= 0:
        if at == 0 or text[at - 1] == "\n":  # the first one opening a line
            match = _FORMULA_SUM.match(text, at)
        at += 1
    if not match:
        return None
    pairs = re.findall(r"([A-Z][a-z]?)\s*([0-9.]*)", match.group(1))
    if not all(_COUNT.fullmatch(n) for _, n in pairs):
        return None  # a count that is no number ('Cr.'): the sum cannot be checked
    declared = {el: float(n or 1) for el, n in pairs}
    # a zero count ('Cr0') is no formula either: nothing to be a multiple of
    return declared if declared and min(declared.values()) > 0 else None


def _whole_multiple(counts: dict[str, int], declared: dict[str, float]) -> bool:
    """True if ``counts`` is k x ``declared`` for one positive integer k."""
    if set(counts) != set(declared):
        return False
    ratios = {counts[el] / declared[el] for el in counts}
    k = ratios.pop()
    return not ratios and k >= 1 and math.isclose(k, round(k), abs_tol=1e-6)
