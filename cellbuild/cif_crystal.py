"""Crystals from CIF files: the conventional cell, its sites and their CIF labels.

:func:`crystal_from_cif` reads the first data block with atom sites with
pymatgen's parser (which applies the file's symmetry operations) and returns
pymatgen's conventional standard cell, every site's fractional coordinates, the
``_atom_site_label`` it came from and each label's species and occupancies.
Symmetry is found with each label as its own atom type, so every operation maps
a label onto itself and the conventional sites carry labels unambiguously.
The file is checked before the library sees it (size, text, loops, cell, rows,
occupancies, positions the operations make) and the parsed crystal after
(elements, overlaps, site count); every fault is an :class:`InputError`.
"""
from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .cif_text import CIF_CELL_TAGS, CIF_FRACTIONAL
from .errors import InputError
from .neighbours import min_distance

#: Largest CIF read, bytes (checked before reading).
MAX_BYTES = 20 * 2**20
#: Most sites accepted in the conventional cell (and in the file's own cell).
MAX_SITES = 5_000
#: Most atom rows read: several rows may share a site (mixed occupancy), but
#: not this many per site of a MAX_SITES cell.
MAX_ROWS = 4 * MAX_SITES
#: Most positions the symmetry operations may generate from the atom rows
#: before duplicates are merged; bounds the work of the expansion.
MAX_GENERATED = 1_000_000
#: Closest two sites may be, Angstrom.
MIN_SEPARATION = 0.5
#: How far the occupancies of one site may sum above 1 (rounding in the file).
OCCUPANCY_SLACK = 1e-3
#: Symmetry tolerance handed to spglib, Angstrom.
SYMPREC = 1e-3
#: Largest |fractional coordinate| and cell length accepted (Angstrom).
_MAX_FRACTION = 1e3
_MAX_LENGTH = 1e4
#: pymatgen merges positions closer than this in each fractional coordinate.
_SITE_TOLERANCE = 1e-4
#: Tags that list symmetry operations, and tags that name the space group.
_OPS_TAGS = ("_symmetry_equiv_pos_as_xyz", "_symmetry_equiv_pos_as_xyz_",
             "_space_group_symop_operation_xyz", "_space_group_symop_operation_xyz_")
_GROUP_TAGS = ("_symmetry_space_group_name_h-m", "_space_group_name_h-m_alt",
               "_symmetry_int_tables_number", "_space_group_it_number")
#: One coordinate of a symmetry operation: x, y, z and numbers or fractions.
_OP_TERMS = re.compile(r"[-+]?(?:[xyz]|(?:\d+(?:\.\d*)?|\.\d+)(?:/0*[1-9]\d*)?)"
                       r"(?:[-+](?:[xyz]|(?:\d+(?:\.\d*)?|\.\d+)(?:/0*[1-9]\d*)?))*")
#: Where a loop's values end: the next tag, loop or block.
_LOOP_END = re.compile(r"^[ \t]*(?:_|loop_|data_|save_)", re.MULTILINE | re.IGNORECASE)
#: One CIF value: a quoted string, a ;-delimited text field or a bare word.
_TOKEN = re.compile(r"""'[^'\n]*'(?=\s|$)|"[^"\n]*"(?=\s|$)|^;[^\n]*\n(?:(?!;)[^\n]*\n)*;|\S+""",
                    re.MULTILINE)


@dataclass(frozen=True, eq=False)
class CifCrystal:
    """A crystal read from a CIF, in its conventional standard cell.

    Attributes:
        cell: (3, 3) lattice vectors as rows, Angstrom.
        basis: (n, 3) fractional coordinates in [0, 1) of every site of the cell,
            sorted by label, then by coordinates rounded to 1e-8.
        sublattice: the CIF site label (``_atom_site_label``) of each site.
        occupancy: ``(label, ((element, occupancy), ...))`` per label, labels and
            elements in sorted order; occupancies as fractions of a site.
        space_group: (Hermann-Mauguin symbol, International Tables number) of the
            ideal crystal (sites of equal species and occupancies alike, as an audit
            of the built structure sees it), from spglib with a tolerance of
            ``SYMPREC`` = 1e-3 Angstrom.
        labelled_space_group: the same with each label its own atom type: the
            symmetry ``cell`` and ``sublattice`` have. Lower than ``space_group``
            when labels of one species are not symmetry-equivalent (a P 1 file
            that labels every atom has P 1).
        a: length of the first lattice vector, Angstrom.
        source: the path as given.
        notes: what the parser adjusted or assumed, one sentence each.
    """

    cell: np.ndarray
    basis: np.ndarray
    sublattice: tuple[str, ...]
    occupancy: tuple[tuple[str, tuple[tuple[str, float], ...]], ...]
    space_group: tuple[str, int]
    labelled_space_group: tuple[str, int]
    a: float
    source: str
    notes: tuple[str, ...] = ()


def crystal_from_cif(path: str | Path) -> CifCrystal:
    """The conventional cell, sites, labels, occupancies and space group of a CIF.

    Raises InputError (with the file, and the line where one is known) for a file
    that is missing, unreadable, larger than ``MAX_BYTES``, not a CIF, without
    cell or atom sites, with an occupancy above 1 + ``OCCUPANCY_SLACK`` on a
    site, with sites closer than ``MIN_SEPARATION`` Angstrom, or with more than
    ``MAX_SITES`` sites.
    """
    from pymatgen.io.cif import CifFile, CifParser

    where = str(path)
    text = _read_text(Path(path), where)
    _check_loops(text, where)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            every = list(CifFile.from_str(text).data.values())
        except ValueError as exc:  # pymatgen: a loop whose values do not fill its rows
            raise InputError(f"is not a readable CIF ({_sentence(exc)})", file=where) from None
        except ZeroDivisionError:
            # pymatgen's tokenizer divides by a loop's column count and by its rows:
            # a loop _check_loops cannot see line by line (``loop_ 'x'``, or a tag
            # with its value inside a loop's column list) has none
            raise InputError("has a loop_ without column names or with fewer values than "
                             "columns", file=where) from None
        blocks = [b for b in every if "_atom_site_fract_x" in b.data
                  or "_atom_site_label" in b.data]
        if not blocks:
            raise InputError("has no atom sites (no _atom_site_ loop)", file=where)
        block = blocks[0]
        frac, labels, metric = _atom_rows(block.data, text, where)
        _count_sites(frac, np.eye(3)[None], np.zeros((1, 3)), where)  # before the symmetry
        # only the chosen block reaches the parser (it would parse every block)
        parser = CifParser.from_str(text if len(every) == 1 else str(block),
                                    occupancy_tolerance=1 + OCCUPANCY_SLACK)
        ops = _symmetry(parser, block, metric, text, where)
        _count_sites(frac, ops[:, :3, :3], ops[:, :3, 3], where)
        try:
            structure = parser.parse_structures(primitive=False)[0]
        except ValueError:  # the reasons are in the warnings
            raise InputError("cannot be read as a crystal: " + ("; ".join(
                _notes(caught)) or "pymatgen's CIF parser made no structure of it"),
                file=where) from None
    notes = _notes(caught)
    if len(blocks) > 1:
        notes.append(f"The file holds {len(blocks)} structures; data_{block.header} was read.")
    return _conventional(structure, labels, where, text, notes)


def _read_text(path: Path, where: str) -> str:
    """The file as text; InputError if missing, too large, empty or binary."""
    try:
        size = path.stat().st_size
        if size > MAX_BYTES:
            raise InputError(f"is {size:,} bytes, more than the {MAX_BYTES:,} a CIF may have",
                             file=where)
        with open(path, "rb") as handle:
            data = handle.read(MAX_BYTES + 1)
    except IsADirectoryError:
        raise InputError("is a folder, not a CIF file", file=where) from None
    except OSError as exc:
        raise InputError(f"cannot be read ({exc.strerror or exc})", file=where) from None
    if len(data) > MAX_BYTES:  # it grew after stat()
        raise InputError(f"is more than the {MAX_BYTES:,} bytes a CIF may have", file=where)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InputError(f"is not a text file (byte {exc.start} is not UTF-8)",
                         file=where) from None
    if "\x00" in text:
        raise InputError("is not a text file (it holds NUL bytes)", file=where)
    if not text.strip():
        raise InputError("is empty", file=where)
    if re.search(r"^[ \t]*data_", text, re.MULTILINE | re.IGNORECASE) is None:
        raise InputError("is not a CIF: it has no data_ block", file=where)
    return text


def _check_loops(text: str, where: str) -> None:
    """InputError for a ``loop_`` without column names, with fewer values than
    columns (pymatgen's parser divides by both), or an atom table of more than
    MAX_ROWS rows. Python work per loop header line, not per row."""
    for match in re.finditer(r"^[ \t]*loop_[ \t]*$", text, re.MULTILINE | re.IGNORECASE):
        heads, start, pos = [], None, match.end() + 1
        while pos < len(text):
            end = text.find("\n", pos)
            end = len(text) if end < 0 else end
            line = text[pos:end].strip()
            if line.startswith("_"):
                heads.append(line.split()[0].lower())
            elif line and not line.startswith("#"):
                start = None if re.match(r"(?i)(loop_|data_|save_)", line) else pos
                break
            pos = end + 1
        line = _line_at(text, match.start())
        if not heads:
            raise InputError("has a loop_ without column names", file=where, line=line)
        stop = _LOOP_END.search(text, start) if start is not None else None
        body = "" if start is None else text[start:stop.start() if stop else len(text)]
        # plain tables split on white space; quoted or ;-delimited fields need a tokenizer
        values = (len(_TOKEN.findall(body)) if re.search(r"['\"]|^;", body, re.MULTILINE)
                  else len(body.split()))
        if values < len(heads):
            raise InputError(f"has a loop_ of {len(heads)} columns with {values} value(s)",
                             file=where, line=line)
        if "_atom_site_fract_x" in heads and values // len(heads) > MAX_ROWS:
            raise InputError(f"has {values // len(heads):,} atom rows, more than the "
                             f"{MAX_ROWS:,} read", file=where, line=line)


def _column(data: dict, tag: str) -> list[str]:
    """A CIF value as a list of strings (a single value, or a loop column)."""
    value = data[tag]
    return [value] if isinstance(value, str) else list(value)


def _numbers(values: list[str], default: float | None = None) -> np.ndarray:
    """CIF numbers (uncertainties in brackets dropped; '?' and '.' as
    ``default``) as floats; ValueError names the first that is not a number."""
    raw = np.char.partition(np.char.strip(np.array(values, dtype=str), "'\""), "(")[:, 0]
    if default is not None:
        raw = np.where(np.isin(raw, ["?", "."]), str(default), raw)
    try:
        out = raw.astype(np.float64)
    except ValueError:
        bad = next(v for v in raw.tolist() if not _is_number(v))
        raise ValueError(bad) from None
    if not np.all(np.isfinite(out)):
        raise ValueError(raw[~np.isfinite(out)][0])
    return out


def _is_number(value: str) -> bool:
    try:
        return math.isfinite(float(value))
    except ValueError:
        return False


def _atom_rows(data: dict, text: str, where: str):
    """(fractional coordinates (n, 3), labels (n,), cell metric tensor (3, 3) in
    Angstrom^2) of the atom rows, after checking the cell, the coordinates and
    the occupancies."""
    for tag in CIF_CELL_TAGS:
        if not isinstance(data.get(tag), str):
            raise InputError(f"has no cell: {tag} is " + ("missing" if tag not in data else
                             "a loop, not one value"), file=where)
    try:
        cell = _numbers([data[t] for t in CIF_CELL_TAGS])
    except ValueError as exc:
        raise InputError(f"has a cell parameter {str(exc)!r} that is not a number", file=where,
                         line=_line_of(text, re.escape(str(exc)))) from None
    lengths, angles = cell[:3], np.radians(cell[3:])
    c = np.cos(angles)
    if (np.any(lengths <= 0) or np.any(lengths > _MAX_LENGTH) or np.any(cell[3:] <= 0)
            or np.any(cell[3:] >= 180) or 1 - c @ c + 2 * np.prod(c) <= 1e-6):
        raise InputError(f"has cell parameters {cell.tolist()} that make no cell (lengths "
                         f"above 0 and at most {_MAX_LENGTH:g} Angstrom, angles between 0 and "
                         "180 degrees that span a volume)", file=where,
                         line=_line_of(text, "_cell_length_a"))
    if any(t not in data for t in CIF_FRACTIONAL):
        raise InputError("has no fractional atom coordinates (_atom_site_fract_x/y/z)",
                         file=where)
    if "_atom_site_label" not in data:  # a required column, and pymatgen needs it
        raise InputError("has atom sites without the _atom_site_label column", file=where)
    labels = np.array(_column(data, "_atom_site_label"), dtype=str)
    if labels.size != len(_column(data, CIF_FRACTIONAL[0])):
        raise InputError("gives _atom_site_label and _atom_site_fract_x in different loops",
                         file=where)
    try:
        frac = np.stack([_numbers(_column(data, t)) for t in CIF_FRACTIONAL], axis=1)
        occupancy = (_numbers(_column(data, "_atom_site_occupancy"), 1.0)
                     if "_atom_site_occupancy" in data else np.ones(labels.size))
    except ValueError as exc:
        raise InputError(f"has an atom coordinate or occupancy {str(exc)!r} that is not a "
                         "number", file=where, line=_line_of(text, re.escape(str(exc)))) from None
    bad = np.flatnonzero(np.any(np.abs(frac) > _MAX_FRACTION, axis=1)
                         | (occupancy <= 0) | (occupancy > 1 + OCCUPANCY_SLACK))
    if bad.size:
        k = int(bad[0])
        raise InputError(f"has atom site {labels[k]} at {frac[k].tolist()} with occupancy "
                         f"{occupancy[k]:g}; fractional coordinates must be at most "
                         f"{_MAX_FRACTION:g} in size and occupancies above 0 and at most 1",
                         file=where, line=_row_line(text, labels[k]))
    # the rows of one label at one position are one site: their occupancies add up
    keys = np.column_stack([np.unique(labels, return_inverse=True)[1],
                            np.round(np.mod(frac, 1.0) / _SITE_TOLERANCE).astype(np.int64)])
    _, site = np.unique(keys, axis=0, return_inverse=True)
    site = site.reshape(-1)
    total = np.bincount(site, weights=occupancy, minlength=int(site.max()) + 1)
    over = np.flatnonzero(total[site] > 1 + OCCUPANCY_SLACK)
    if over.size:
        k = int(over[0])
        raise InputError(f"gives label {labels[k]} occupancies that sum to {total[site[k]]:g} "
                         f"at {frac[k].tolist()}, more than 1", file=where,
                         line=_row_line(text, labels[k]))
    lengths = lengths[:, None] * lengths[None, :]
    metric = lengths * np.array([[1, c[2], c[1]], [c[2], 1, c[0]], [c[1], c[0], 1]])
    return frac, labels, metric


def _symmetry(parser, block, metric: np.ndarray, text: str, where: str) -> np.ndarray:
    """pymatgen's symmetry operations of ``block`` as (m, 4, 4) affine matrices.

    InputError for a listed operation that is not three x, y, z terms and
    fractions, and for any operation that is not an integer matrix W of
    determinant +-1 keeping the cell metric G (W^T G W = G to 1e-3): pymatgen
    reads ``x,y,q`` or ``2x`` silently as a singular matrix, fails on ``x/0``,
    and applies a named group's operations to any cell. InputError too for a
    space group name pymatgen does not know when no operations are listed (it
    would read the file as P 1)."""
    listed = [(k, [v] if isinstance(v, str) else list(v))
              for k in _OPS_TAGS if (v := block.data.get(k))]
    for key, strings in listed:
        bad = next((op for op in strings if op.count(",") != 2 or not all(
            _OP_TERMS.fullmatch(t) for t in op.replace(" ", "").lower().split(","))), None)
        if bad is not None:
            _refuse_op(bad, key, text, where)
    ops = np.array([op.affine_matrix for op in parser.get_symops(block)])
    rot = ops[:, :3, :3]
    kept = np.einsum("oji,jk,okl->oil", rot, metric, rot) - metric
    wrong = (np.any(np.abs(rot - np.round(rot)) > 1e-9, axis=(1, 2))
             | (np.abs(np.abs(np.linalg.det(rot)) - 1) > 1e-9)
             | np.any(np.abs(kept) > 1e-3 * metric.max(), axis=(1, 2)))
    if listed and np.any(wrong):
        _refuse_op(listed[0][1][int(np.argmax(wrong))], listed[0][0], text, where)
    tags = {k.lower(): (k, v) for k, v in block.data.items()}
    if np.any(wrong):  # operations pymatgen made from the space group's name
        key, value = next((tags[t] for t in _GROUP_TAGS if t in tags), ("", "?"))
        raise InputError(f"names the space group {value!r} ({key}), whose symmetry the cell "
                         "parameters do not have", file=where,
                         line=_line_of(text, re.escape(key)) if key else None)
    for key, value in (tags[t] for t in _GROUP_TAGS if t in tags and not listed):
        if len(ops) == 1 and str(value).strip("'\" ").replace(" ", "").lower() not in (
                "?", ".", "", "p1", "1"):
            raise InputError(f"names the space group {value!r} ({key}), which pymatgen "
                             "does not recognise, and lists no symmetry operations",
                             file=where, line=_line_of(text, re.escape(key)))
    return ops


def _refuse_op(op: str, key: str, text: str, where: str):
    raise InputError(f"lists the symmetry operation {op!r} ({key}), which is no symmetry "
                     "of its cell", file=where, line=_line_of(text, re.escape(op)) if op else None)


def _count_sites(frac: np.ndarray, rotations: np.ndarray, translations: np.ndarray,
                 where: str) -> None:
    """InputError when the operations (rotations (m, 3, 3), translations (m, 3))
    make more than MAX_GENERATED positions, or more than MAX_SITES distinct ones
    (pymatgen's merging tolerance), from ``frac`` (n, 3): counted with numpy
    before pymatgen's slower expansion does the work."""
    if len(frac) * len(rotations) > MAX_GENERATED:
        raise InputError(f"has {len(frac):,} atom rows and {len(rotations)} symmetry "
                         f"operations, which make {len(frac) * len(rotations):,} positions, "
                         f"more than the {MAX_GENERATED:,} this reader expands", file=where)
    from scipy.spatial import cKDTree

    points = np.einsum("oij,nj->noi", rotations, frac) + translations
    points = np.mod(points.reshape(-1, 3), 1.0)
    # exact duplicates first (special positions), then those a grid line splits
    step = _SITE_TOLERANCE / 2
    points = np.mod(np.unique(np.round(points / step), axis=0) * step, 1.0)
    points[points >= 1.0] = 0.0  # np.mod(-1e-17, 1) is 1.0
    pairs = cKDTree(points, boxsize=1.0).query_pairs(_SITE_TOLERANCE, p=np.inf,
                                                     output_type="ndarray")
    count = len(points) - len(np.unique(pairs[:, 1]))
    if count > MAX_SITES:
        raise InputError(f"expands to about {count:,} sites in its cell, more than the "
                         f"{MAX_SITES:,} accepted", file=where)


def _conventional(structure, cif_labels: np.ndarray, where: str, text: str,
                  notes: list[str]) -> CifCrystal:
    """The CifCrystal of a parsed structure, after the checks on its sites."""
    from pymatgen.core import Structure
    from pymatgen.core.periodic_table import DummySpecies, Species
    from pymatgen.symmetry.analyzer import SpacegroupAnalyzer

    if len(structure) == 0:
        raise InputError("has no atom sites", file=where)
    if len(structure) > MAX_SITES:
        raise InputError(f"has {len(structure):,} sites in its cell, more than the "
                         f"{MAX_SITES:,} accepted", file=where)
    labels = np.array(structure.labels, dtype=str)
    names, first, code = np.unique(labels, return_index=True, return_inverse=True)
    code = code.reshape(-1)
    # pymatgen's sites are Python objects: one pass to number their compositions
    comps = list(structure.species_and_occu)
    comp_code = np.unique(np.array([c.formula for c in comps]), return_inverse=True)[1].reshape(-1)
    mixed = np.flatnonzero(comp_code != comp_code[first][code])
    if mixed.size:
        k = int(mixed[0])
        raise InputError(f"uses label {labels[k]} for sites of different species "
                         f"({comps[int(first[code[k]])]} and {comps[k]})", file=where,
                         line=_row_line(text, labels[k]))
    occupancy = []
    for name, k in zip(names.tolist(), first.tolist()):
        amounts: dict[str, float] = {}
        for species, amount in comps[k].items():
            if isinstance(species, DummySpecies):
                raise InputError(f"gives label {name} the species {species.symbol!r}, which is "
                                 "no element", file=where, line=_row_line(text, name))
            amounts[species.symbol] = amounts.get(species.symbol, 0.0) + float(amount)
        occupancy.append((name, tuple(sorted(amounts.items()))))
    distance, i, j = min_distance(structure.lattice.matrix, structure.cart_coords)
    if distance < MIN_SEPARATION:
        raise InputError(f"has sites of labels {labels[i]} and {labels[j]} only "
                         f"{distance:.3f} Angstrom apart, closer than {MIN_SEPARATION:g}",
                         file=where, line=_row_line(text, labels[i]))
    # each label its own atom type (a stand-in species per label): symmetry then
    # maps labels onto themselves and the label index travels with the sites
    proxies = [Species("H", oxidation_state=c) for c in range(len(names))]
    stand_in = Structure(structure.lattice, [proxies[c] for c in code.tolist()],
                         structure.frac_coords, site_properties={"cif_label": code})
    analyzer = SpacegroupAnalyzer(stand_in, symprec=SYMPREC)
    conv = analyzer.get_conventional_standard_structure(keep_site_properties=True)
    if len(conv) > MAX_SITES:
        raise InputError(f"makes {len(conv):,} sites in the conventional cell, more than the "
                         f"{MAX_SITES:,} accepted", file=where)
    labelled = (analyzer.get_space_group_symbol(), int(analyzer.get_space_group_number()))
    ideal = SpacegroupAnalyzer(structure, symprec=SYMPREC)
    space_group = (ideal.get_space_group_symbol(), int(ideal.get_space_group_number()))
    if labelled != space_group:
        notes.append(f"The labels lower the symmetry from {space_group[0]} ({space_group[1]}) "
                     f"to {labelled[0]} ({labelled[1]}); the cell is that of the labelled "
                     "sites.")
    site_label = np.asarray(conv.site_properties["cif_label"], dtype=np.int64)
    basis = np.mod(conv.frac_coords, 1.0)
    basis[basis >= 1.0 - 1e-10] = 0.0  # 0.99999999999 and np.mod(-1e-17, 1) are 0
    rounded = np.round(basis, 8)
    order = np.lexsort((rounded[:, 2], rounded[:, 1], rounded[:, 0], site_label))
    cell = np.array(conv.lattice.matrix, dtype=np.float64)
    empty = sorted(set(cif_labels.tolist()) - set(names.tolist()))
    if empty:
        notes.append(f"CIF label(s) {', '.join(empty)} share their position with another label; "
                     "pymatgen merged them into one site under the last label.")
    return CifCrystal(cell=cell, basis=np.ascontiguousarray(basis[order]),
                      sublattice=tuple(names[site_label[order]].tolist()),
                      occupancy=tuple(occupancy), space_group=space_group,
                      labelled_space_group=labelled,
                      a=float(np.linalg.norm(cell[0])), source=where,
                      notes=tuple(dict.fromkeys(notes)))


def _notes(caught) -> list[str]:
    """pymatgen's warnings about the file, one line each (without its summary of them)."""
    return [_sentence(w.message) for w in caught if issubclass(w.category, UserWarning)
            and not str(w.message).startswith("Issues encountered while parsing CIF")]


def _sentence(message) -> str:
    return " ".join(str(message).split())[:300]


def _line_at(text: str, offset: int) -> int:
    return text.count("\n", 0, offset) + 1


def _line_of(text: str, pattern: str) -> int | None:
    """1-based line of the first match of ``pattern`` (error paths only)."""
    match = re.search(pattern, text)
    return None if match is None else _line_at(text, match.start())


def _row_line(text: str, label: str) -> int | None:
    """1-based line of the first row that starts with ``label`` (error paths only)."""
    return _line_of(text, rf"(?m)^[ \t]*['\"]?{re.escape(label)}['\"]?[ \t]")
