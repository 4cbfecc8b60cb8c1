"""Fixed-width text tables parsed with whole-array numpy operations, bit for bit
as ``numpy.loadtxt`` parses them (units: none; numbers come back as written).

Why: reading a million-atom file is dominated by ``numpy.loadtxt`` (0.94 s for
the 63 MB atom block of a LAMMPS data file, 0.62 s for a 55 MB extended XYZ,
0.77 s for a 63 MB CIF atom table), which converts one field at a time. The
tables cellbuild writes, and those of most programs, have fixed-width columns:
every row has the same length and each field keeps to its own band of columns,
numbers right-aligned with the decimal point in one column. For such a table
the fields are found once for all rows (the columns blank in every row
separate them), each row is checked with a few whole-block comparisons, and a
number is the integer M its digits spell (a matrix product of the digit
columns with powers of ten; exact, as every partial sum is an integer below
2**53) divided by 10**F for its F digits after the point (10**F is exact up to
F = 22). That is one correctly rounded IEEE division of exact operands: the
double nearest to the decimal, which is what loadtxt's correctly rounded
parser returns too.

:func:`loadtxt_fixed` returns exactly the array loadtxt returns (dtype, shape,
every bit, -0.0 included) or None for any text it does not take (tabs,
comments, exponents, blank lines, ragged rows, a point that moves between
rows, more than 15 significant digits, ...); the caller then calls loadtxt.
The tests hold it against loadtxt on random tables.
"""
from __future__ import annotations

import re
import string
import sys
from dataclasses import dataclass

import numpy as np

SPACE, PLUS, MINUS, DOT, ZERO, NINE, NEWLINE = (ord(c) for c in " +-.09\n")
#: Bytes of a number besides its digits. A comment may not open with one of
#: these or a blank (the bands of numbers would then hide it).
_NUMBER_BYTES = "+-. "
#: Printable ASCII: the bytes a row may hold. Any other byte (a tab, CR,
#: form feed, non-ASCII) could be a separator to loadtxt; it gets the table.
_PRINTABLE = (ord(" "), ord("~"))
#: Places of a number's digits with a weight (10**0 .. 10**15; a digit other than 0
#: further left sends the table to loadtxt), and its integer M must be below 2**53.
_MAX_PLACES = 16
#: Largest exact power of ten in float64 (5**22 < 2**53): the most digits after the point.
_MAX_DECIMALS = 22
#: Bytes per block of rows: the block's float64 digit matrix (8x) stays in the L2 cache.
_BLOCK_BYTES = 1 << 17
_LEADING_NEWLINES = re.compile(rb"\n*")
_WORD = 8  # bytes of a uint64
#: A byte repeated in the 8 bytes of a word (SWAR constants).
_BYTES_1, _BYTES_7F, _BYTES_80 = (np.uint64(int.from_bytes(bytes([b]) * 8, "little"))
                                  for b in (1, 0x7F, 0x80))


@dataclass(frozen=True)
class _Span:
    """A band of columns [start, stop) holding one field in every row."""

    start: int
    stop: int
    pivot: int  # a column that is not blank in any row (the field's token holds it)
    point: int | None  # the column holding '.' in every row, if any



@dataclass(frozen=True)
class _Table:
    """Rows of one length: the text as bytes and the byte range of every column."""

    flat: np.ndarray  # the text's bytes (uint8, a view)
    first: int  # offset of the first row
    rows: int
    width: int  # bytes per row, its newline included
    low: np.ndarray  # smallest and largest byte of each column, over all rows
    high: np.ndarray

    def block(self, lo: int, hi: int) -> np.ndarray:
        """Rows ``lo:hi``, each with its newline, after the newline that ends row
        ``lo - 1``, and then at least :data:`_WORD` more bytes (the next rows, or
        newlines): a view of the text, or a copy at its ends (no newline before
        the first row, maybe none after the last)."""
        start, stop = self.first + lo * self.width - 1, self.first + hi * self.width
        if lo > 0 and stop + _WORD <= len(self.flat):
            return self.flat[start:stop + _WORD]
        block = np.full(stop - start + _WORD, NEWLINE, dtype=np.uint8)
        block[1:stop - start - 1] = self.flat[start + 1:stop - 1]
        return block


def loadtxt_fixed(text: bytes, dtype=float, usecols=None, ndmin: int = 0,
                  comments="#") -> np.ndarray | None:
    """``numpy.loadtxt(io.BytesIO(text), dtype=dtype, usecols=usecols, ndmin=ndmin,
    comments=comments)`` for a fixed-width table, or None when ``text`` is not one.

    ``dtype`` is float64 or a structured dtype of float64 and ``S<k>`` fields
    (a string field keeps the first k bytes of its token); anything else gives
    None. Every field of a row is a token (as loadtxt splits the row at blanks)
    within a band of columns blank in every row outside the fields; a number
    is ``[+-]digits[.digits]`` with its point, if any, in the same column in
    every row, and a column of the band is a digit in every row.
    """
    fields = _fields(dtype, usecols, ndmin, comments)
    table = None if fields is None else _table(text)
    spans = None if table is None else _spans(table)
    if spans is None:
        return None
    out_dtype, kinds, names, usecols, opens = fields
    count = len(spans)
    columns = list(range(count)) if usecols is None else [c + count if c < 0 else c
                                                          for c in usecols]
    if names is None:
        kinds = kinds * len(columns)
    if len(kinds) != len(columns) or not all(0 <= c < count for c in columns):
        return None  # loadtxt refuses: a dtype of another width, a column past the last
    step = max(1, _BLOCK_BYTES // table.width)
    plan = _Plan.make(table, spans, columns, kinds, opens, min(step, table.rows))
    if plan is None:
        return None
    out = np.empty((table.rows,) if names else (table.rows, len(columns)), dtype=out_dtype)
    for lo in range(0, table.rows, step):
        hi = min(table.rows, lo + step)
        if not plan.read(table.block(lo, hi), out[lo:hi], names):
            return None
    return _ensure_ndmin(out, ndmin)


def _fields(dtype, usecols, ndmin, comments):
    """(output dtype, kind per field, field names or None, usecols as a list or
    None, the bytes that open a comment); a kind is 0 for float64, k for
    ``S<k>``. None when loadtxt would take the arguments otherwise than this
    parser does, or refuse them."""
    if ndmin not in (0, 1, 2):
        return None
    comments = [] if comments is None else [comments] if isinstance(comments, str) \
        else list(comments)
    if not all(isinstance(c, str) and c and c[0].isascii() and c[0].isprintable()
               and c[0] not in string.digits + _NUMBER_BYTES for c in comments):
        return None
    try:
        dtype = np.dtype(dtype)
        if usecols is not None:
            usecols = [int(c) for c in ([usecols] if np.ndim(usecols) == 0 else usecols)]
    except (TypeError, ValueError):
        return None
    if usecols == []:
        return None
    opens = sorted({ord(c[0]) for c in comments})
    if dtype.names is None:
        return (dtype, [0], None, usecols, opens) if dtype == np.float64 else None
    kinds = []
    for name in dtype.names:
        field = dtype.fields[name][0]
        if field == np.float64:
            kinds.append(0)
        elif field.kind == "S" and field.itemsize > 0 and field.shape == ():
            kinds.append(field.itemsize)
        else:
            return None
    if sum(dtype.fields[name][0].itemsize for name in dtype.names) != dtype.itemsize:
        return None  # padding: what loadtxt leaves in it is not ours to guess
    return dtype, kinds, list(dtype.names), usecols, opens


def _table(text) -> _Table | None:
    """The rows of ``text`` (bytes, or a memoryview of bytes: a block of a file
    read without copying it) when they all have one length and hold printable
    ASCII only; leading empty lines are skipped, as loadtxt skips them."""
    if not isinstance(text, (bytes, memoryview)):
        return None
    flat = np.frombuffer(text, dtype=np.uint8)
    first = _LEADING_NEWLINES.match(text).end()
    end = len(flat) - bool(len(flat) and flat[-1] == NEWLINE)
    newline = _first_newline(flat, first, end)
    width = (end if newline < 0 else newline) - first + 1
    if end <= first or (end - first + 1) % width:
        return None
    rows = (end - first + 1) // width
    whole = flat[first:first + (rows - 1) * width].reshape(rows - 1, width)
    # reduced as lines of many rows: long inner loops, one pass over the bytes
    group = max(1, 4096 // width)
    split = (rows - 1) // group * group
    parts = [p for p in (whole[:split].reshape(-1, group * width), whole[split:],
                         np.append(flat[first + (rows - 1) * width:end], NEWLINE)[None, :])
             if len(p)]
    low = np.min([p.min(axis=0).reshape(-1, width).min(axis=0) for p in parts], axis=0)
    high = np.max([p.max(axis=0).reshape(-1, width).max(axis=0) for p in parts], axis=0)
    if low[-1] != NEWLINE or high[-1] != NEWLINE:
        return None  # rows of different lengths
    if low[:-1].min() < _PRINTABLE[0] or high[:-1].max() > _PRINTABLE[1]:
        return None  # a newline inside a row (ragged rows), a tab, a byte past ASCII
    return _Table(flat, first, rows, width, low[:-1], high[:-1])


def _first_newline(flat: np.ndarray, start: int, end: int) -> int:
    """Offset of the first newline in ``flat[start:end]``, or -1; looked for in
    windows that grow fourfold (a row is short next to the text)."""
    size = 256
    while start < end:
        window = flat[start:min(end, start + size)] == NEWLINE
        if window.any():
            return start + int(np.argmax(window))
        start, size = start + size, size * 4
    return -1


def _spans(table: _Table) -> list[_Span] | None:
    """The fields' bands: runs of columns not blank in every row. Each needs a
    pivot column, blank in no row (the field's token then holds it)."""
    low, high = table.low, table.high
    used = np.concatenate([[False], high > SPACE, [False]])
    edges = np.flatnonzero(used[1:] != used[:-1]).tolist()
    spans = []
    for start, stop in zip(edges[::2], edges[1::2]):
        solid = np.flatnonzero(low[start:stop] > SPACE)
        points = np.flatnonzero((low[start:stop] == DOT) & (high[start:stop] == DOT))
        if not len(solid):
            return None
        spans.append(_Span(start, stop, start + int(solid[0]),
                           start + int(points[0]) if len(points) == 1 else None))
    return spans or None




@dataclass
class _Plan:
    """What every block of rows is checked against and read with, from the
    table's bands; with work buffers for a block, reused (fresh ones would be
    page-faulted in again for every block)."""

    width: int
    spans: int
    numeric: list[int]  # bands read as numbers
    weights: np.ndarray  # (width, numbers): 10**place of each digit column, else 0
    scale: np.ndarray  # 10**F per number: F digits after its point
    points: int  # numeric bands with a point
    inside: np.ndarray | None  # numeric bands' columns, tiled over a block; None: all
    opens: list[int]  # bytes that open a comment, to look for outside numeric bands
    columns: list[tuple[int, int]]  # per output column: kind, band or number index
    direct: bool  # the numbers are the output columns, in order: written in place
    filled: np.ndarray  # work buffers, one block long
    starts: np.ndarray
    marks: np.ndarray
    digits: np.ndarray
    floats: np.ndarray
    values: np.ndarray

    @classmethod
    def make(cls, table: _Table, spans: list[_Span], columns, kinds, opens, rows
             ) -> _Plan | None:
        low, high = table.low, table.high
        numeric = sorted({c for c, k in zip(columns, kinds) if k == 0})
        weights = np.zeros((table.width, len(numeric)))
        scale = np.ones(len(numeric))
        inside = np.zeros(table.width, dtype=bool)
        for j, c in enumerate(numeric):
            span = spans[c]
            band = slice(span.start, span.stop)
            inside[band] = True
            # letters (nan, inf, 1e5) go to loadtxt; a column that is a digit in
            # every row gives every token a digit
            if high[band].max() > NINE or not (low[band] >= ZERO).any():
                return None
            # blanks after a token are zeros right of a point only: without one,
            # every token must end in the band's last column (right-aligned)
            if span.point is None and low[span.stop - 1] <= SPACE:
                return None
            if span.point is not None:
                decimals = span.stop - 1 - span.point
                if decimals > _MAX_DECIMALS:
                    return None
                scale[j] = 10.0 ** decimals
            places = [k for k in range(span.start, span.stop) if k != span.point][::-1]
            for place, k in enumerate(places):
                if place < _MAX_PLACES:
                    weights[k, j] = 10.0 ** place
                elif high[k] > ZERO:
                    return None  # a digit other than 0 too far left for 2**53
        size = rows * table.width
        everywhere = all(inside[s.start:s.stop].all() for s in spans)
        picks = [(k, numeric.index(c) if k == 0 else c) for c, k in zip(columns, kinds)]
        return cls(table.width, len(spans), numeric, weights, scale,
                   sum(spans[c].point is not None for c in numeric),
                   None if everywhere else np.tile(inside, rows), [] if everywhere else opens,
                   picks, picks == [(0, j) for j in range(len(numeric))],
                   np.empty(size + 1, dtype=bool), np.empty(size, dtype=bool),
                   np.empty(size, dtype=bool), np.empty(size, dtype=np.uint8),
                   np.empty((rows, table.width)), np.empty((rows, len(numeric))))

    def read(self, block: np.ndarray, out: np.ndarray, names) -> bool:
        """Check the rows of ``block`` (see :meth:`_Table.block`) and write their
        fields to ``out``; False when a row is not as the plan has it."""
        rows = len(out)
        size = rows * self.width
        body = block[1:size + 1]
        filled = np.greater(block[:size + 1], SPACE, out=self.filled[:size + 1])
        # a token starts where a filled byte follows a blank (or a newline). Each
        # band's token holds its pivot, so a band has at least one start in every
        # row: as many starts as bands x rows leaves room for no other
        starts = np.greater(filled[1:], filled[:-1], out=self.starts[:size])
        if np.count_nonzero(starts) != rows * self.spans:
            return False
        if any(np.count_nonzero(body == c) for c in self.opens):
            return False  # a comment opens in a text field
        starts = np.flatnonzero(starts).reshape(rows, self.spans)
        if self.numeric:
            first = starts[:, self.numeric]
            lead = body[first]
            signed = (lead == PLUS) | (lead == MINUS)
            # bytes 33 ('!') to 47 ('/') in a numeric band: only its points and
            # leading signs ('+', '-' and '.' are among them)
            marks = np.less(np.subtract(body, np.uint8(33), out=self.digits[:size]), 15,
                            out=self.marks[:size])
            if self.inside is not None:
                marks &= self.inside[:size]
            if np.count_nonzero(marks) != rows * self.points + np.count_nonzero(signed):
                return False
            # digits by their low four bits: a blank is 0, a point has no weight,
            # the signs are set to 0 where they are
            digits = np.bitwise_and(body, np.uint8(15), out=self.digits[:size])
            digits[first[signed]] = 0
            floats = self.floats[:rows]
            np.copyto(floats, digits.reshape(rows, self.width))
            values = np.matmul(floats, self.weights, out=out if self.direct and not names
                               else self.values[:rows])
            if not values.max(initial=0.0) < 2.0 ** 53:
                return False  # every partial sum is exact below 2**53 only
            # one correctly rounded division; a minus gives -0.0 for 0, as loadtxt
            values /= np.where(lead == MINUS, -self.scale, self.scale)
            if self.direct and not names:
                return True
        for index, (kind, k) in enumerate(self.columns):
            field = values[:, k] if kind == 0 else _strings(block, starts[:, k], kind)
            if names:
                out[names[index]] = field
            else:
                out[:, index] = field
        return True


def _strings(block: np.ndarray, starts: np.ndarray, size: int) -> np.ndarray:
    """The first ``size`` bytes of each token starting at offsets ``starts`` of
    ``block[1:]``, null-padded as numpy's ``S<size>`` holds a shorter one."""
    if size == 1:
        return block[1:][starts].view("S1")
    if size > _WORD or sys.byteorder != "little":
        chars = block[1:][np.minimum(starts[:, None] + np.arange(size), len(block) - 2)]
        alive = np.ones(len(chars), dtype=bool)
        for k in range(1, size):  # the token ends at the first blank or newline
            alive &= chars[:, k] > SPACE
            chars[:, k] *= alive
        return chars.view(f"S{size}").ravel()
    # the 8 bytes from each start as one word (an unaligned view: the block has
    # 8 bytes to spare after its rows), bytes from the first blank on set to 0
    words = np.ndarray((len(block) - _WORD,), np.uint64, buffer=block, offset=1,
                       strides=(1,))[starts]
    chars = words.view(np.uint8).reshape(-1, _WORD)
    blank = (chars <= SPACE).view(np.uint64).ravel()
    # byte k of the product counts the blanks among bytes 0..k (at most 8: no carry)
    seen = (blank * _BYTES_1 + _BYTES_7F) & _BYTES_80
    words &= ~((seen >> np.uint64(7)) * np.uint64(255))
    return np.ascontiguousarray(chars[:, :size]).view(f"S{size}").ravel()


def _ensure_ndmin(a: np.ndarray, ndmin: int) -> np.ndarray:
    """loadtxt's shape rule: squeeze, then add dimensions up to ``ndmin``."""
    if a.ndim > ndmin:
        a = np.squeeze(a)
    if a.ndim < ndmin:
        a = np.atleast_1d(a) if ndmin == 1 else np.atleast_2d(a).T
    return a
