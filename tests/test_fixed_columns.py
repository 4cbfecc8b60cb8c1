"""The fixed-width table parser (cellbuild.fixed_columns) against ``numpy.loadtxt``.

The reference is numpy's own ``loadtxt`` (an outside parser: C, correctly
rounded like Python's ``float``) called with the same arguments on the same
bytes. Whenever :func:`loadtxt_fixed` returns an array it must be loadtxt's,
bit for bit (dtype, shape and every byte, so -0.0 and the null padding of
short strings too); when loadtxt refuses a text, it must return None. On the
plain layouts cellbuild's writers produce (right-aligned numbers with a fixed
number of decimals, words aligned one way per column) it must not return None.
Random tables come from hypothesis; every property holds for any seed (no
deadlines, no timing).
"""
from __future__ import annotations

import io
import string

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cellbuild.fixed_columns import loadtxt_fixed

SETTINGS = settings(max_examples=250, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def _loadtxt(text: bytes, **kwargs):
    """numpy.loadtxt's array, or the exception it raises."""
    try:
        return np.loadtxt(io.BytesIO(text), **kwargs)
    except ValueError as error:
        return error


def _identical(ours: np.ndarray, reference: np.ndarray) -> bool:
    return (ours.dtype == reference.dtype and ours.shape == reference.shape
            and ours.tobytes() == reference.tobytes())


def _check(text: bytes, **kwargs) -> np.ndarray | None:
    """Our array, after holding it against loadtxt's."""
    ours = loadtxt_fixed(text, **kwargs)
    reference = _loadtxt(text, **kwargs)
    if isinstance(reference, Exception):
        assert ours is None, f"loadtxt refuses ({reference}) but the parser returned an array"
    elif ours is not None:
        assert _identical(ours, reference), (text[:300], kwargs, ours, reference)
    return ours


# ----------------------------------------------------------------------------- random tables

WORD_BYTES = string.ascii_letters + string.digits + "+-."
#: Replacements of one byte: separators, comments, exponents and other bytes
#: that loadtxt reads otherwise than a plain digit, or that move a column.
NOISE = [" ", "\t", "#", "e", "E", ",", "_", "x", "\r", "+", "-", ".", "0", "9", "\x0c", "'"]


@st.composite
def numbers(draw, rows: int, plain: bool) -> list[str]:
    """One numeric column's tokens: right-aligned later; ``plain`` keeps to
    the writers' layout (fixed decimals, '-' only, 15 significant digits)."""
    decimals = draw(st.integers(0, 12))
    places = draw(st.integers(1, max(1, min(6, 15 - decimals))))
    signs = draw(st.sampled_from(["", "-", "-+"] if not plain else ["", "-"]))
    tokens = []
    for _ in range(rows):
        whole = draw(st.integers(0, 10 ** places - 1))
        frac = draw(st.integers(0, 10 ** decimals - 1)) if draw(st.booleans()) else 0
        sign = draw(st.sampled_from(signs)) if signs else ""
        text = f"{sign}{whole}" + (f".{frac:0{decimals}d}" if decimals else "")
        if not plain:
            shape = draw(st.integers(0, 5))
            if shape == 0 and decimals and whole == 0:
                text = text.replace("0.", ".", 1)  # .5
            elif shape == 1 and decimals:
                text = text.rstrip("0")  # 1.5 beside 1.25: the point moves
            elif shape == 2 and not decimals:
                text += "."  # 5.
        tokens.append(text)
    return tokens


@st.composite
def words(draw, rows: int) -> list[str]:
    return [draw(st.text(WORD_BYTES, min_size=1, max_size=10)) for _ in range(rows)]


@st.composite
def tables(draw):
    """(text, loadtxt arguments, whether the layout is the writers' plain one)."""
    rows = draw(st.integers(1, 25))
    count = draw(st.integers(1, 6))
    structured = draw(st.booleans())
    plain = draw(st.booleans())
    kinds = [draw(st.sampled_from(["number", "word"])) if structured else "number"
             for _ in range(count)]
    columns, aligns = [], []
    for kind in kinds:
        columns.append(draw(numbers(rows, plain)) if kind == "number" else draw(words(rows)))
        # numbers right-aligned as written; words one way per column; or ragged
        choices = ["right"] if kind == "number" else ["left", "right"]
        aligns.append(draw(st.sampled_from(choices if plain else choices + ["left", "ragged"])))
    widths = [max(map(len, c)) + draw(st.integers(0, 2)) for c in columns]
    gaps = [draw(st.integers(0, 3))] + [draw(st.integers(1, 3)) for _ in range(count - 1)]
    tail = draw(st.integers(0, 2))
    lines = []
    for r in range(rows):
        line = ""
        for c in range(count):
            token, width = columns[c][r], widths[c]
            if aligns[c] == "ragged":
                left = draw(st.integers(0, width - len(token)))
                token = " " * left + token
            line += " " * gaps[c] + (token.rjust(width) if aligns[c] == "right"
                                     else token.ljust(width))
        lines.append(line + " " * tail)
    text = "\n".join(lines) + ("\n" if draw(st.booleans()) else "")
    text = "\n" * draw(st.sampled_from([0, 0, 1, 2])) + text
    if not plain and draw(st.booleans()):  # one byte replaced, dropped or added
        at = draw(st.integers(0, len(text) - 1))
        edit = draw(st.sampled_from(["replace", "drop", "add"]))
        noise = draw(st.sampled_from(NOISE))
        text = text[:at] + (noise if edit != "drop" else "") + text[at + (edit != "add"):]
    kwargs = {"ndmin": draw(st.sampled_from([0, 1, 2])),
              "comments": draw(st.sampled_from(["#", None]))}
    which = draw(st.sampled_from(["all", "subset", "one"]))
    if which == "all":
        use = list(range(count))
    elif which == "subset":
        use = draw(st.lists(st.integers(0, count - 1), min_size=1, max_size=count, unique=True))
    else:
        use = [draw(st.integers(0, count - 1))]
    if which != "all" or draw(st.booleans()):
        picked = [u - count if draw(st.booleans()) else u for u in use]  # negative too
        kwargs["usecols"] = picked[0] if which == "one" and draw(st.booleans()) else picked
    if structured:
        fields = []
        for u in use:
            size = draw(st.integers(1, 10))
            number = kinds[u] == "number" and draw(st.integers(0, 4))
            fields.append((f"f{len(fields)}", "f8" if number else f"S{size}"))
        kwargs["dtype"] = np.dtype(fields)
    else:
        kwargs["dtype"] = np.float64
    return text.encode("ascii"), kwargs, plain


@SETTINGS
@given(tables())
def test_every_array_returned_is_loadtxts_bit_for_bit(table):
    text, kwargs, plain = table
    ours = _check(text, **kwargs)
    if plain:
        assert ours is not None, (text[:300], kwargs)


@SETTINGS
@given(st.lists(st.floats(-1e4, 1e4, allow_nan=False, allow_infinity=False), min_size=1,
                max_size=40), st.integers(0, 10))
def test_written_numbers_read_back_as_loadtxt_reads_them(values, decimals):
    """Numbers as ``'%.<d>f'`` writes them (the writers' rounding of doubles),
    -0.0 and the signs of small negatives included."""
    column = [f"{v:.{decimals}f}" for v in values] + [f"{-0.0:.{decimals}f}"]
    width = max(map(len, column)) + 1
    text = "".join(f"{k + 1:>8d} {c:>{width}} {c:>{width}}\n" for k, c in enumerate(column))
    ours = _check(text.encode(), dtype=np.float64, ndmin=2)
    assert ours is not None
    assert np.signbit(ours[-1, 1])  # -0.0 stays -0.0, as in loadtxt


# ----------------------------------------------------------------------------- refused texts

GOOD = b"  1  -0.500  Cu\n 12  10.250  Ni\n"


@pytest.mark.parametrize("text, why", [
    (b"  1  -0.500\n 12  10.25\n", "rows of different lengths"),
    (b"  1  -0.5e0\n 12  10.250\n", "an exponent"),
    (b"  1  -0.500\n#2  10.250\n", "a comment"),
    (b"  1\t-0.500\n 12\t10.250\n", "a tab"),
    (b"  1  -0.500\n 12  102.50\n", "the point in a different column"),
    (b"  1  1234567.8901234567\n  2  1234567.8901234567\n", "17 significant digits"),
    (b"  1  -0.500  \n 12  10.250 3\n", "an extra field in one row"),
    (b"  1  -0.500\r\n 12  10.250\r\n", "CR line ends"),
    (b"  1  nan   \n 12  10.250\n", "a word in a number column"),
    (b"  1  -0.500\n\n 12  10.250\n", "a blank line inside"),
    (b"  1  --0.50\n 12  10.250\n", "two signs"),
    (b"  1  -0.500\n 12  10.250\n       \n", "a row of blanks"),
    (b"  1  10\n 12  1 \n", "a left-aligned integer (its blank is no zero)"),
])
def test_refuses_what_it_does_not_take(text, why):
    assert loadtxt_fixed(text, dtype=np.float64, ndmin=2) is None, why
    _check(text, dtype=np.float64, ndmin=2)


def test_refuses_dtypes_and_arguments_it_does_not_take():
    text = b"  1  -0.500\n 12  10.250\n"
    assert _check(text, dtype=np.float64, ndmin=2) is not None
    for kwargs in [dict(dtype=np.float32), dict(dtype=np.int64), dict(dtype=">f8"),
                   dict(dtype=[("a", "i8"), ("b", "f8")]), dict(usecols=(0, 2)),
                   dict(dtype=[("a", "f8")]), dict(ndmin=3), dict(comments="1"),
                   dict(dtype=np.dtype([("a", "f8"), ("b", "S3")], align=True))]:
        assert loadtxt_fixed(text, **kwargs) is None, kwargs


def test_strings_keep_loadtxts_bytes():
    """S<k> keeps the token's first k bytes, null-padded, left- or right-aligned."""
    left = b"Abcdefghij  1.5  x\nCu          2.5  y\nNi          3.5  z\n"
    right = b"Abcdefghij  1.5  x\n        Cu  2.5  y\n         N  3.5  z\n"
    for size in (1, 2, 4, 8, 9, 12):
        dtype = np.dtype([("s", f"S{size}"), ("x", "f8"), ("t", "S1")])
        assert _check(left, dtype=dtype) is not None
        assert _check(right, dtype=dtype) is not None
        # both ways in one column: no column filled in every row, loadtxt reads it
        assert _check(left.replace(b"\nNi        ", b"\n        Ni"), dtype=dtype) is None
    assert _check(GOOD, dtype=[("n", "f8"), ("x", "f8"), ("s", "S8")]) is not None


def test_blanks_after_the_last_decimal_read_as_zeros():
    """``10.25`` beside ``-0.500``: the point stays in its column, the blank is a 0."""
    ours = _check(b"  1  -0.500\n 12  10.25 \n", dtype=np.float64, ndmin=2)
    assert ours is not None and ours[1, 1] == 10.25


# ----------------------------------------------------------------------------- end to end


def _structures():
    from cellbuild.structure import Structure

    # a skewed ~40 A box, atoms inside and outside it (negative coordinates), three species
    cell = np.array([[40.0, 0, 0], [3.3, 38.1, 0], [-2.2, 1.9, 41.7]])
    rng = np.random.default_rng(5)
    frac = rng.uniform(-0.5, 1.5, (400, 3))
    plain = Structure(cell, frac @ cell, rng.integers(0, 3, 400).astype(np.int32),
                      ("Al", "Mg", "Zn"))
    charged = Structure(cell, frac @ cell, rng.integers(0, 2, 400).astype(np.int32),
                        ("Na", "Cl"), charges=rng.choice([-1.0, 1.0], 400))
    return {"plain": plain, "charged": charged}


@pytest.mark.parametrize("key, name", [("lammps-data", "plain"), ("lammps-data", "charged"),
                                       ("xyz", "plain"), ("cif", "plain")])
def test_files_the_writers_make_read_the_same_as_through_loadtxt(tmp_path, monkeypatch,
                                                                 key, name):
    """cellbuild's writers, read back with the fast readers: the fixed-width parser
    takes the rows and gives the same positions and species as loadtxt."""
    import cellbuild.cif_text
    import cellbuild.read_lammps
    from cellbuild.formats import FORMATS, write_structure
    from cellbuild.readers import read_file

    structure = _structures()[name]  # charges: LAMMPS data (atom style charge) only
    path = tmp_path / f"s{FORMATS[key].extension}"
    write_structure(structure, key, path, "fixed columns")
    taken = []

    def spy(*args, **kwargs):
        rows = loadtxt_fixed(*args, **kwargs)
        taken.append(rows is not None)
        return rows

    for module in (cellbuild.read_lammps, cellbuild.cif_text):
        monkeypatch.setattr(module, "loadtxt_fixed", spy)
    fast = read_file(path, fast=True)
    assert taken == [True], "the writer's layout went to loadtxt"
    for module in (cellbuild.read_lammps, cellbuild.cif_text):
        monkeypatch.setattr(module, "loadtxt_fixed", lambda *a, **k: None)
    slow = read_file(path, fast=True)
    assert fast.reader == slow.reader and fast.reader.startswith("cellbuild")
    for attribute in ("cell", "positions", "species"):
        ours, theirs = getattr(fast.structure, attribute), getattr(slow.structure, attribute)
        assert ours.dtype == theirs.dtype and ours.tobytes() == theirs.tobytes(), attribute
    assert fast.structure.symbols == slow.structure.symbols
    if structure.charges is not None:
        assert fast.structure.charges.tobytes() == slow.structure.charges.tobytes()
