"""Vectorized fixed-width ASCII text for the format writers.

A block of output lines is a ``(rows, width)`` uint8 matrix whose columns are
split into fields (:class:`Row`). It is filled from whole columns of numbers
with integer arithmetic, never a Python loop over rows, and written with one
``handle.write``; writers go block by block (:func:`chunks`), so the whole text
is never held in memory.

How a block is filled (the fastest exact way measured, see
benchmarks/bench_writers.py): the line width is padded to a multiple of 8
bytes and each line is assembled as little-endian uint64 words. A field
contributes "pieces" that are shifted and OR-ed into the words they cover:
four digits per lookup in a 10,000-entry table, symbol text from a per-code
table, and the whole integer part with its sign or label prefix from one
lookup when it is short (up to 4 digits). Longer integers get their leading
zeros blanked and their prefix placed by XOR-ing a mask chosen by digit
count. Each word column is then stored once, instead of writing the matrix one
byte column at a time (a strided pass over the whole block each).

Numbers match Python's ``'%.<d>f' % x`` exactly (correct rounding of the
binary value, ties to even), except that a value which rounds to zero is
written without a minus sign (no ``-0.0000000000``). Numeric fields are
right-aligned with the minus sign directly before the first digit.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from functools import lru_cache
from typing import Callable, Iterator, Sequence, Union

import numpy as np

from ._rounding import fixed_point

SPACE, MINUS, DOT, NEWLINE, ZERO = (ord(c) for c in " -.\n0")

#: Rows per block: big enough that per-block Python overhead is negligible,
#: small enough that the column temporaries (8 bytes x rows each) stay in cache.
CHUNK_ROWS = 1 << 15

_WORD = 8  # bytes per uint64 word


def _digit_tables() -> tuple[np.ndarray, ...]:
    """Table ``L`` (L = 1..4) maps 0 .. 10**L - 1 to its L zero-padded ASCII
    digits packed little-endian in a uint64 (first character in the low byte)."""
    tables = [np.zeros(1, dtype=np.uint64)]  # index 0 unused
    for length in range(1, 5):
        n = np.arange(10 ** length, dtype=np.uint64)
        packed = np.zeros_like(n)
        for pos in range(length):  # pos 0 = leading digit = lowest byte
            digit = n // np.uint64(10 ** (length - 1 - pos)) % np.uint64(10)
            packed |= (digit + np.uint64(ZERO)) << np.uint64(8 * pos)
        packed.flags.writeable = False  # shared constant
        tables.append(packed)
    return tuple(tables)


_DIGITS = _digit_tables()


def chunks(n: int, size: int | None = None) -> Iterator[slice]:
    """Consecutive row slices covering ``range(n)``, ``size`` (default
    :data:`CHUNK_ROWS`) rows each."""
    size = size or CHUNK_ROWS
    for start in range(0, n, size):
        yield slice(start, min(start + size, n))


# --------------------------------------------------------------------------
# Row layout
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class Fixed:
    """A float column as ``'%.<decimals>f'``, right-aligned in a field of
    ``int_digits`` integer digits, after a sign slot if ``signed`` (an unsigned
    field rejects values that print negative)."""

    int_digits: int
    decimals: int
    signed: bool = True

    def __post_init__(self) -> None:
        if self.int_digits < 1 or self.decimals < 1:
            raise ValueError("Fixed fields need at least one integer digit and one decimal")

    @property
    def prefixes(self) -> tuple[str, ...]:
        return ("", "-") if self.signed else ("",)

    @property
    def width(self) -> int:
        return self.signed + self.int_digits + 1 + self.decimals


@dataclass(frozen=True)
class Int:
    """A non-negative integer column right-aligned in ``digits`` columns,
    optionally right after a text chosen per row from ``prefixes``: the column
    is then a pair ``(numbers, prefix_codes)`` (labels such as ``Cu12``)."""

    digits: int
    prefixes: tuple[str, ...] = ("",)

    @property
    def width(self) -> int:
        return max(len(p) for p in self.prefixes) + self.digits


@dataclass(frozen=True)
class Text:
    """Text chosen per row by an integer code: ``labels[code]``, padded."""

    labels: tuple[str, ...]
    right: bool = False

    @property
    def width(self) -> int:
        return max(len(s) for s in self.labels)


@dataclass(frozen=True)
class Const:
    """The same text on every row (its column is ``None``)."""

    text: str

    @property
    def width(self) -> int:
        return len(self.text)


Field = Union[Fixed, Int, Text, Const]


class Row:
    """Layout of a block of lines: fields separated by one space, after
    ``indent`` spaces, each line ending in a newline.

    The line is padded to a multiple of 8 bytes with extra spaces before the
    first right-aligned field. :meth:`render` turns one column per field into
    the (rows, width) uint8 text matrix. ``lookup=False`` disables the integer
    part tables (used to build them; the text is the same).
    """

    def __init__(self, fields: Sequence[Field], indent: int = 0,
                 lookup: bool = True) -> None:
        self.fields = tuple(fields)
        gaps = [indent] + [1] * (len(self.fields) - 1)
        bare = sum(gaps) + sum(f.width for f in self.fields) + 1
        gaps[_pad_slot(self.fields)] += -bare % _WORD
        self.starts = tuple(int(s) for s in np.cumsum(gaps) + np.cumsum(
            [0] + [f.width for f in self.fields[:-1]]))
        self.width = bare + (-bare % _WORD)
        numbers = [(i, f, s) for i, (f, s) in enumerate(zip(self.fields, self.starts))
                   if isinstance(f, (Fixed, Int))]
        # The integer part of a number field (prefix, blanks, digits) comes
        # from one lookup when all its forms fit a small table and one word,
        # else from digit groups plus XOR masks.
        self._heads = {i: _head_table(_int_digits(f), tuple(f.prefixes))
                       for i, f, _ in numbers if lookup and _small_head(f)}
        self._masks = {i: _prefix_masks(s + _digits_at(f), _int_digits(f), tuple(f.prefixes))
                       for i, f, s in numbers if i not in self._heads}
        self._base = self._base_words()
        self._texts = {i: _text_pieces(Text(tuple(f.labels), f.right))
                       for i, f in enumerate(self.fields)
                       if isinstance(f, Text)}
        by_decimals: dict[int, list[int]] = {}
        for i, f in enumerate(self.fields):
            if isinstance(f, Fixed):
                by_decimals.setdefault(f.decimals, []).append(i)
        self._fixed_groups = tuple((d, tuple(group)) for d, group in by_decimals.items())

    def _base_words(self) -> np.ndarray:
        """The bytes common to every line (spaces, points, constants, newline)
        as words, zero where per-row pieces will be OR-ed in."""
        line = bytearray(b" " * self.width)
        line[-1] = NEWLINE
        for i, (f, s) in enumerate(zip(self.fields, self.starts)):
            if i in self._heads:  # prefix columns come from the table too
                line[s:s + f.width] = bytes(f.width)
            if isinstance(f, Const):
                line[s:s + f.width] = f.text.encode("ascii")
            elif isinstance(f, Text):
                line[s:s + f.width] = bytes(f.width)
            elif isinstance(f, (Fixed, Int)):
                first = s + _digits_at(f)
                line[first:s + f.width] = bytes(s + f.width - first)
                if isinstance(f, Fixed):
                    line[first + f.int_digits] = DOT
        return np.frombuffer(bytes(line), dtype="<u8")

    def render(self, columns: Sequence) -> np.ndarray:
        """The (rows, width) uint8 text of one block, one column per field."""
        words = _Words(self._base)
        rounded = self._rounded(columns)
        n = 0
        for i, (f, s, col) in enumerate(zip(self.fields, self.starts, columns)):
            if isinstance(f, Fixed):
                n = self._fixed(words, i, f, s, rounded[i])
            elif isinstance(f, Int):
                n = self._int(words, i, f, s, col)
            elif isinstance(f, Text):
                n = len(col)
                for offset, nbytes, table in self._texts[i]:
                    _or_piece(words, s + offset, nbytes, table[col])
        matrix = np.empty((n, len(self._base)), dtype="<u8")
        for j in range(len(self._base)):
            matrix[:, j] = words.column(j)
        return matrix.view(np.uint8).reshape(n, self.width)

    def _rounded(self, columns: Sequence) -> dict:
        """``fixed_point`` of every Fixed field's column by field index: one call
        for all the fields with the same decimals (x, y and z together), whose
        fixed cost per call is most of a small file's formatting."""
        out = {}
        for decimals, group in self._fixed_groups:
            if len(group) == 1:
                out[group[0]] = fixed_point(columns[group[0]], decimals)
                continue
            stacked = np.stack([np.asarray(columns[i], dtype=np.float64) for i in group])
            magnitude, negative = fixed_point(stacked.reshape(-1), decimals)
            out.update(zip(group, zip(magnitude.reshape(len(group), -1),
                                      negative.reshape(len(group), -1))))
        return out

    def _fixed(self, words: "_Words", i: int, f: Fixed, start: int, rounded) -> int:
        magnitude, negative = rounded
        scale = 10 ** f.decimals
        whole = magnitude // scale
        _check_fits(whole, f.int_digits)
        point = start + _digits_at(f) + f.int_digits
        _or_digits(words, point + 1, f.decimals, magnitude - whole * scale)
        if not f.signed and negative.any():
            raise ValueError("negative value in an unsigned field")
        self._head(words, i, start, whole, f.int_digits, negative if f.signed else None)
        return len(magnitude)

    def _int(self, words: "_Words", i: int, f: Int, start: int, column) -> int:
        values, codes = column if isinstance(column, tuple) else (column, None)
        values = np.asarray(values, dtype=np.int64)
        if values.size and int(values.min()) < 0:
            raise ValueError("Int fields take non-negative integers")
        _check_fits(values, f.digits)
        self._head(words, i, start, values, f.digits, codes)
        return len(values)

    def _head(self, words: "_Words", i: int, start: int, values: np.ndarray,
              digits: int, prefix_codes: np.ndarray | None) -> None:
        """Write the integer part of field ``i`` (starting at column ``start``):
        ``values`` right-aligned in ``digits`` columns, leading zeros blank,
        ``prefixes[code]`` (sign, symbol) just before the first digit."""
        if i in self._heads:
            nbytes, table = self._heads[i]
            index = values if prefix_codes is None else values + prefix_codes * 10 ** digits
            _or_piece(words, start, nbytes, table[index])
            return
        first = start + _digits_at(self.fields[i])
        _or_digits(words, first, digits, values)
        # XOR a mask chosen by digit count and prefix: zeros -> spaces, prefix in.
        index = digit_count(values, digits)
        if prefix_codes is not None:
            index += prefix_codes * (digits + 1)
        for j, table in self._masks[i]:
            words.xor(j, table[index])


def _digits_at(f: Fixed | Int) -> int:
    """Offset of the first integer digit column within the field."""
    return f.width - _int_digits(f) - (f.decimals + 1 if isinstance(f, Fixed) else 0)


def _int_digits(f: Fixed | Int) -> int:
    return f.int_digits if isinstance(f, Fixed) else f.digits


#: Largest integer-part lookup table (entries); 2 x 10**4 uint64 stay in L2 cache.
_HEAD_ENTRIES = 20_000


def _small_head(f: Fixed | Int) -> bool:
    """Whether the integer part of ``f`` can come from one table lookup."""
    head_width = f.width - (f.decimals + 1 if isinstance(f, Fixed) else 0)
    return head_width <= _WORD and 10 ** _int_digits(f) * len(f.prefixes) <= _HEAD_ENTRIES


#: Layout tables kept per process (keyed by immutable layout values; each is
#: read-only): a library of small files would otherwise rebuild the same
#: 10,000-entry tables for every file. Bounded: a handful of layouts exist.
_TABLE_CACHE = 256


@lru_cache(maxsize=_TABLE_CACHE)
def _head_table(k: int, prefixes: tuple[str, ...]) -> tuple[int, np.ndarray]:
    """Every integer part of a field with ``k`` digits and these prefixes, as
    packed uint64 words indexed by ``value + 10**k * prefix code``; rendered
    once through the general (mask) path. Cached, read-only."""
    head = Int(k, prefixes)
    values = np.tile(np.arange(10 ** k, dtype=np.int64), len(prefixes))
    codes = np.repeat(np.arange(len(prefixes)), 10 ** k)
    text = Row([head], lookup=False).render([(values, codes)])[:, -head.width - 1:-1]
    packed = np.zeros((len(values), _WORD), dtype=np.uint8)
    packed[:, :head.width] = text
    return head.width, _read_only(packed.view("<u8").ravel())


def _read_only(array: np.ndarray) -> np.ndarray:
    """``array``, made read-only (a cached table shared by every later call)."""
    array.flags.writeable = False
    return array


def row_layout(fields: Sequence[Field], indent: int = 0) -> Row:
    """The :class:`Row` of these fields, built once per process for each layout
    (a library of small files would otherwise rebuild the same row, its base
    words and its tables, for every file). A Row is never changed after it is
    built, so the cached one is shared."""
    return _cached_row(tuple(fields), indent)


@lru_cache(maxsize=_TABLE_CACHE)
def _cached_row(fields: tuple[Field, ...], indent: int) -> Row:
    return Row(fields, indent)


def _pad_slot(fields: Sequence[Field]) -> int:
    """Which gap takes the padding: before the first right-aligned field."""
    for i, f in enumerate(fields):
        if isinstance(f, (Fixed, Int)) or (isinstance(f, Text) and f.right):
            return i
    return 0


@lru_cache(maxsize=_TABLE_CACHE)
def _prefix_masks(first: int, k: int, prefixes: tuple[str, ...]
                  ) -> tuple[tuple[int, np.ndarray], ...]:
    """XOR masks for a right-aligned number whose ``k`` zero-padded digits start
    at line column ``first``: per word touched, a uint64 table indexed by
    ``digit count + (k + 1) * prefix code`` that turns the leading '0's into
    spaces and writes the prefix just before the first digit (into the digit
    columns or the space before them). Built once per layout (tiny); cached,
    read-only."""
    left = first - max(len(p) for p in prefixes)  # first column of the field
    offset = left % _WORD
    span = -(-(offset + first + k - left) // _WORD) * _WORD  # whole words
    patterns = np.zeros(((k + 1) * len(prefixes), span), dtype=np.uint8)
    for code, prefix in enumerate(prefixes):
        for count in range(1, k + 1):
            mask = patterns[count + (k + 1) * code]
            lead = first + k - count  # column of the leading digit
            for c in range(first, lead):
                mask[offset + c - left] = ZERO ^ SPACE
            for m, char in enumerate(prefix.encode("ascii")):
                c = lead - len(prefix) + m
                mask[offset + c - left] = (ZERO if c >= first else SPACE) ^ char
    words = patterns.view("<u8")  # (index, word) from the word holding `left`
    return tuple((left // _WORD + j, _read_only(np.ascontiguousarray(words[:, j])))
                 for j in range(words.shape[1]) if words[:, j].any())


@lru_cache(maxsize=_TABLE_CACHE)
def _text_pieces(f: Text) -> tuple[tuple[int, int, np.ndarray], ...]:
    """The labels as up-to-8-byte pieces: (offset, bytes, uint64 per code);
    cached, read-only."""
    width = f.width
    padded = [s.rjust(width) if f.right else s.ljust(width) for s in f.labels]
    raw = np.frombuffer("".join(padded).encode("ascii"), dtype=np.uint8)
    raw = raw.reshape(len(padded), width)
    pieces = []
    for offset in range(0, width, _WORD):
        chunk = np.zeros((len(padded), _WORD), dtype=np.uint8)
        nbytes = min(_WORD, width - offset)
        chunk[:, :nbytes] = raw[:, offset:offset + nbytes]
        pieces.append((offset, nbytes, _read_only(chunk.view("<u8").ravel())))
    return tuple(pieces)


def _check_fits(values: np.ndarray, digits: int) -> None:
    if values.size and int(values.max()) >= 10 ** digits:
        raise ValueError(f"{int(values.max())} needs more than {digits} digits")


class _Words:
    """The word columns of one block being assembled: column ``j`` starts as
    the constant base word and is materialised on its first per-row piece."""

    def __init__(self, base: np.ndarray) -> None:
        self._base = base
        self._columns: dict[int, np.ndarray] = {}

    def or_(self, j: int, value: np.ndarray) -> None:
        if j in self._columns:
            self._columns[j] |= value
        else:
            self._columns[j] = value | self._base[j]  # a new array

    def xor(self, j: int, value: np.ndarray) -> None:
        if j in self._columns:
            self._columns[j] ^= value
        else:
            self._columns[j] = value ^ self._base[j]

    def column(self, j: int):
        """Column ``j``: an array, or the base word if no piece touched it."""
        return self._columns.get(j, self._base[j])


def _or_piece(words: _Words, offset: int, nbytes: int, piece: np.ndarray) -> None:
    """OR ``nbytes`` bytes held in the low end of ``piece`` into the line at byte
    ``offset`` (splitting across two words if it straddles a boundary)."""
    j, shift = divmod(offset, _WORD)
    words.or_(j, piece << np.uint64(8 * shift) if shift else piece)
    if shift + nbytes > _WORD:
        words.or_(j + 1, piece >> np.uint64(8 * (_WORD - shift)))


def _or_digits(words: _Words, offset: int, ndigits: int, values: np.ndarray) -> None:
    """OR the ``ndigits`` zero-padded digits of non-negative ``values`` into the
    line at byte ``offset``, four digits per table lookup."""
    end = offset + ndigits
    rest = values
    while ndigits > 0:
        take = min(4, ndigits)
        if ndigits > take:
            high = rest // 10_000
            group = rest - high * 10_000
            rest = high
        else:
            group = rest
        _or_piece(words, end - take, take, _DIGITS[take][group])
        end -= take
        ndigits -= take


def digit_count(values: np.ndarray, max_digits: int) -> np.ndarray:
    """Decimal digits of non-negative ints (0 has one), up to ``max_digits``."""
    count = np.ones(values.shape, dtype=np.intp)
    for power in range(1, max_digits):
        count += values >= 10 ** power
    return count


# --------------------------------------------------------------------------
# Helpers shared by the writers
# --------------------------------------------------------------------------

def write_rows(handle, row: Row, n: int,
               columns: Callable[[slice], Sequence[np.ndarray | None]]) -> None:
    """Write ``n`` lines of ``row`` to ``handle`` block by block.

    ``columns(part)`` gives the field columns for the rows in slice ``part``.
    Memory stays at about two blocks, whatever ``n``.
    """
    if n <= CHUNK_ROWS:  # one block: a thread would only add start-up cost
        if n:
            handle.write(row.render(columns(slice(0, n))).reshape(-1))
        return
    # One writer thread: the next block is formatted while the previous one is
    # hashed and written (numpy, hashlib and file writes release the GIL).
    # Writes stay in order; at most two blocks exist at once.
    with ThreadPoolExecutor(max_workers=1) as writer:
        pending = None
        for part in chunks(n):
            block = row.render(columns(part)).reshape(-1)
            if pending is not None:
                pending.result()  # re-raises a failed write
            pending = writer.submit(handle.write, block)
        if pending is not None:
            pending.result()


def check_codes(species: np.ndarray, n_symbols: int) -> None:
    """Raise ValueError unless every species code indexes the symbol table."""
    if species.size and (int(species.min()) < 0 or int(species.max()) >= n_symbols):
        raise ValueError(
            f"species codes must lie in 0..{n_symbols - 1} (one per symbol), "
            f"got {int(species.min())}..{int(species.max())}")


def one_line(title: str, default: str) -> str:
    """``title`` as one line of printable ASCII (others become ``?``), or ``default``."""
    text = "".join(c if " " <= c <= "~" else "?" for c in " ".join(title.split()))
    return text or default
