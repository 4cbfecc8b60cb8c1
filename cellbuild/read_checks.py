"""Checks of a structure file before and after a reader parses it.

Before: the atom counts a header claims must fit in the file (an atom row
takes at least ``MIN_ROW_BYTES`` bytes), so that a header claiming 10^12 atoms
is refused at once instead of a reader scanning or allocating for them; a
POSCAR must give one count per species name. After: every coordinate and
cell component must be a finite number of at most ``MAX_LENGTH`` Angstrom,
and a bad one is named with its line (found by scanning the text, on the
error path only).
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from .errors import InputError
from .structure import Structure

#: Fewest bytes one atom row can take ("H 0 0 0" and a newline is 8).
MIN_ROW_BYTES = 6
#: Largest coordinate or cell vector component accepted, Angstrom (0.1 mm):
#: beyond it double precision no longer resolves atomic distances.
MAX_LENGTH = 1e6
#: Lines of a header looked at for its counts.
_HEADER_LINES = 200
#: A number token: what float() would be handed.
_NUMBER = re.compile(r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eEdD][-+]?\d+)?|[-+]?(?:inf|nan|infinity)\b",
                     re.IGNORECASE)


def _head_lines(path: Path) -> list[str]:
    lines = []
    with open(path, encoding="utf-8", errors="replace") as handle:
        for _, line in zip(range(_HEADER_LINES), handle):
            lines.append(line)
    return lines


def check_claimed_counts(path: Path, fmt: str) -> None:
    """InputError when a header claims more atoms than the file can hold, or
    (POSCAR) gives a different number of counts than species names."""
    size = path.stat().st_size
    lines = _head_lines(path)
    claim = None
    if fmt == "xyz" and lines:
        claim = _count_at(lines, 0, r"\s*(\d+)\s*")
    elif fmt == "lammps-data":
        for k, line in enumerate(lines[1:], start=1):
            claim = _count_at(lines, k, r"\s*(\d+)\s+atoms\s*")
            if claim is not None:
                break
    elif fmt == "poscar":
        claim = _poscar_counts(path, lines)
    if claim is not None and claim[0] * MIN_ROW_BYTES > size:
        count, line = claim
        raise InputError(f"claims {count:,} atoms, but the file of {size:,} bytes has room "
                         f"for at most {size // MIN_ROW_BYTES:,} atom rows", file=str(path),
                         line=line)


def _count_at(lines: list[str], k: int, pattern: str) -> tuple[int, int] | None:
    """(count, 1-based line) if line k matches ``pattern`` with the count as group 1."""
    match = re.fullmatch(pattern, lines[k].split("#")[0].rstrip("\r\n"))
    if match is None:
        return None
    digits = match.group(1)
    if len(digits) > 18:  # int() of thousands of digits is slow, and no file is that big
        return 10 ** 18, k + 1
    return int(digits), k + 1


def _poscar_counts(path: Path, lines: list[str]) -> tuple[int, int] | None:
    """(total atoms, line of the counts) of a POSCAR; InputError when the species
    line and the counts line disagree in length."""
    if len(lines) < 7:
        return None
    names, counts_line = lines[5].split(), 6
    if names and all(re.fullmatch(r"\d+", t) for t in names):
        counts, counts_line, names = names, 6, None  # VASP 4: no species line
    else:
        counts = lines[6].split()
        counts_line = 7
    if not counts or not all(re.fullmatch(r"\d{1,18}", t) for t in counts):
        return None  # the reader explains what is wrong
    if names is not None and len(names) != len(counts):
        raise InputError(f"names {len(names)} species ({' '.join(names)}) but gives "
                         f"{len(counts)} atom count(s) ({' '.join(counts)}) on the next line",
                         file=str(path), line=counts_line)
    return sum(int(t) for t in counts), counts_line


def check_values(structure: Structure, path: Path) -> None:
    """InputError naming the line when a coordinate or cell component is not a
    finite number of at most MAX_LENGTH Angstrom."""
    values = (structure.cell, structure.positions)
    if all(bool(np.all(np.isfinite(v))) and float(np.max(np.abs(v), initial=0.0)) <= MAX_LENGTH
           for v in values):
        return
    line = first_bad_number_line(path)
    raise InputError(f"has a coordinate or cell value that is not a finite number of at most "
                     f"{MAX_LENGTH:g} Angstrom (infinite, not a number, or too large)",
                     file=str(path), line=line)


def first_bad_number_line(path: Path) -> int | None:
    """1-based line of the first number token that is inf, nan or beyond
    MAX_LENGTH in size (error path only: a Python scan of the lines)."""
    with open(path, encoding="utf-8", errors="replace") as handle:
        for number, line in enumerate(handle, start=1):
            for token in _NUMBER.findall(line.split("#")[0]):
                if re.fullmatch(r"[-+]?\d+", token):
                    if len(token) > 30:
                        return number  # a 400-digit integer
                    continue  # counts and atom ids may well exceed MAX_LENGTH
                try:
                    value = float(token.replace("d", "e").replace("D", "e"))
                except ValueError:
                    continue
                if not math.isfinite(value) or abs(value) > MAX_LENGTH:
                    return number
    return None


def check_poscar(path: Path) -> None:
    """InputError naming the line where a POSCAR departs from its layout: title,
    scale (1 or 3 numbers), three lattice vectors, optional species names,
    counts, optional "Selective dynamics", the coordinate mode, then one row
    of at least three numbers per atom. (ASE's reader raises RuntimeError or
    IndexError on such files; this keeps it from seeing them.)"""
    with open(path, encoding="utf-8", errors="replace") as handle:
        lines = handle.read().splitlines()

    def refuse(k: int, what: str):
        raise InputError(f"is not a valid POSCAR: line {k + 1} should hold {what}",
                         file=str(path), line=k + 1)

    def numbers(k: int, n: int) -> list[float]:
        fields = lines[k].split() if k < len(lines) else []
        try:
            values = [float(f) for f in fields[:n]]
        except ValueError:
            values = []
        if len(values) < n:
            refuse(k, f"{n} number(s)")
        return values

    if len(lines) < 8:
        refuse(len(lines) - 1 if lines else 0, "more: the file ends before its atom rows")
    scale = lines[1].split()
    if len(scale) not in (1, 3):
        refuse(1, "the scale factor (1 or 3 numbers)")
    numbers(1, len(scale))
    for k in (2, 3, 4):
        numbers(k, 3)
    k = 5
    if not all(re.fullmatch(r"\d+", t) for t in lines[5].split()):
        k = 6  # species names on line 6, counts on line 7
    counts = lines[k].split() if k < len(lines) else []
    if not counts or not all(re.fullmatch(r"\d{1,18}", t) for t in counts):
        refuse(k, "the atom count of each species (whole numbers)")
    k += 1
    if k < len(lines) and lines[k].strip()[:1] in "sS":
        k += 1
    if k >= len(lines) or lines[k].strip()[:1] not in "dDcCkK":
        refuse(min(k, len(lines) - 1), "the coordinate mode (Direct or Cartesian)")
    total = sum(int(t) for t in counts)
    for row in range(k + 1, k + 1 + total):
        if row >= len(lines):
            raise InputError(f"ends before its {total:,} atom rows are complete; the file "
                             "looks truncated", file=str(path), line=len(lines))
        numbers(row, 3)
