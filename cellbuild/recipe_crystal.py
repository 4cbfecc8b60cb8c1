"""The recipe's crystal: a lattice or prototype with its species and constants, or
a CIF file, as a frozen type that cannot hold an invalid value (a CIF is read
here, once, at the boundary)."""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

from . import recipe_values as v
from .errors import InputError
from .lattices import LATTICES
from .prototypes import PROTOTYPES
from .recipe_lattices import KNOWN_LATTICES, checked_species

_set = v.store
_exclusive = v.exclusive


@dataclass(frozen=True)
class Crystal:
    """What to build. At most one of ``a`` (Angstrom), ``density`` (g/cm^3),
    ``radius`` (Angstrom, touching spheres) is set; none means the reference value.

    A compound prototype takes ``species`` (sublattice label -> element; stored
    as pairs in the prototype's sublattice order) instead of ``element``, which
    is then set to the element of the first sublattice (the host for defaults).
    A prototype of one sublattice (hcp) takes either. Internal parameters:
    ``c`` (Angstrom, needs ``a``) or ``c_over_a`` for hcp, ``u`` for spinel.
    ``cif``: a CIF file (read from ``cif_folder`` when relative, else from the
    current folder) whose cell and labelled sites make the crystal. ``axes``:
    integer directions (on the crystal's lattice vectors) of the x, y and z edges
    of an orthogonal box, stored as three triples.
    """

    element: str | None
    lattice: str
    a: float | None = None
    density: float | None = None
    radius: float | None = None
    species: tuple[tuple[str, str], ...] | None = None
    c: float | None = None
    c_over_a: float | None = None
    u: float | None = None
    cif: str | None = None
    axes: tuple[tuple[int, int, int], ...] | None = None
    cif_folder: str | None = field(default=None, repr=False, compare=False)
    source_crystal: Any = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.axes is not None:
            _set(self, "axes", _axes(self.axes))
        if self.cif is not None or self.lattice == "cif":
            self._from_cif()
            return
        if v.text(self.lattice, "crystal.lattice") not in KNOWN_LATTICES:
            v.fail("crystal.lattice", self.lattice, "is not a known lattice",
                   f"known lattices: {', '.join(KNOWN_LATTICES)}")
        proto = PROTOTYPES.get(self.lattice)
        if self.lattice in LATTICES:
            if self.species is not None:
                v.fail("crystal.species", dict(self.species),
                       f"is for compound prototypes; {self.lattice} holds one element",
                       "give crystal.element")
            v.element(self.element, "crystal.element")
            _set(self, "species", (("A", self.element),))
        elif proto.n_sublattices == 1 and self.species is None:
            v.element(self.element, "crystal.element")
            _set(self, "species", ((next(iter(proto.sublattices)), self.element),))
        else:
            _set(self, "species", checked_species(self.lattice, self.species, self.element))
            _set(self, "element", self.species[0][1])
        which = _exclusive(self, ("a", "density", "radius"), "crystal", required=False)
        if which:
            _set(self, which, v.number(getattr(self, which), f"crystal.{which}"))
        compound = proto is not None and proto.n_sublattices > 1
        if compound and which == "radius":
            v.fail("crystal.radius", self.radius, f"has no single meaning for {self.lattice}",
                   "give crystal.a (Angstrom) or crystal.density (g/cm^3)")
        if compound and which is None:
            raise InputError(f"is required for {self.lattice}", key="crystal.a",
                             hint="give crystal.a (Angstrom) or crystal.density (g/cm^3)")
        self._check_parameters(proto)

    def _from_cif(self) -> None:
        """A crystal read from the CIF at ``cif`` (read here, once): sublattices are
        its site labels, each holding its majority element; ``a`` or ``density``
        scale its cell."""
        if self.cif is None:
            v.fail("crystal.cif", None, "is required with lattice: cif",
                   "give the path of a CIF file")
        for key in ("element", "species", "radius", "c", "c_over_a", "u"):
            if getattr(self, key) is not None:
                v.fail(f"crystal.{key}", getattr(self, key), "cannot be given with crystal.cif",
                       "the CIF gives the species and the cell; a or density scale it")
        if self.lattice not in (None, "cif"):
            v.fail("crystal.lattice", self.lattice, "cannot be given with crystal.cif",
                   "leave lattice out: the CIF gives the structure")
        path = v.text(self.cif, "crystal.cif")
        which = _exclusive(self, ("a", "density"), "crystal", required=False)
        if which:
            _set(self, which, v.number(getattr(self, which), f"crystal.{which}"))
        if self.source_crystal is None:
            try:
                _set(self, "source_crystal", _read_cif(Path(self.cif_folder or ".") / path))
            except InputError as exc:
                where = f" ({exc.file}{f', line {exc.line}' if exc.line else ''})"
                raise InputError(exc.message + where, key="crystal.cif", value=path,
                                 hint=exc.hint) from None
        _set(self, "lattice", "cif")
        _set(self, "species", tuple((label, _majority(occupants))
                                    for label, occupants in self.source_crystal.occupancy))
        _set(self, "element", self.species[0][1])

    def _check_parameters(self, proto) -> None:
        allowed = proto.parameters if proto is not None else {}
        for key in ("c", "c_over_a", "u"):
            value = getattr(self, key)
            if value is None:
                continue
            name = "c_over_a" if key == "c" else key
            if name not in allowed:
                v.fail(f"crystal.{key}", value, f"is not a parameter of {self.lattice}",
                       "c and c_over_a are for hcp, u for spinel")
            _set(self, key, v.number(value, f"crystal.{key}"))
        _exclusive(self, ("c", "c_over_a"), "crystal", required=False)
        if self.c is not None and self.a is None:
            v.fail("crystal.c", self.c, "needs crystal.a beside it",
                   "give crystal.a, or c_over_a with density or radius")
        if self.u is not None and not 0.0 < self.u < 0.5:
            v.fail("crystal.u", self.u, "must lie between 0 and 0.5",
                   "spinel's oxygen parameter is near 0.26 (0.25 is ideal packing)")

    def parameters(self) -> tuple[tuple[str, float], ...]:
        """Internal parameters given, as (name, value): c becomes c_over_a."""
        out = []
        if self.c is not None:
            out.append(("c_over_a", self.c / self.a))
        if self.c_over_a is not None:
            out.append(("c_over_a", self.c_over_a))
        if self.u is not None:
            out.append(("u", self.u))
        return tuple(out)

    def elements(self) -> tuple[str, ...]:
        """The element of each sublattice, without repeats, in sublattice order
        (a CIF's partial occupants after each label's majority element)."""
        if self.source_crystal is not None:
            return tuple(dict.fromkeys(
                [e for _, e in self.species]
                + [e for _, occ in self.source_crystal.occupancy for e, _ in occ]))
        return tuple(dict.fromkeys(e for _, e in self.species))


def _majority(occupants: tuple[tuple[str, float], ...]) -> str:
    """The element with the largest occupancy (the first in sorted order on ties)."""
    return max(occupants, key=lambda pair: pair[1])[0]


def _axes(value) -> tuple[tuple[int, int, int], ...]:
    """``{x: [..], y: [..], z: [..]}`` (or three triples) as three index triples."""
    hint = "for example axes: {x: [1, -1, 0], y: [1, 1, -2], z: [1, 1, 1]}"
    if isinstance(value, (tuple, list)) and len(value) == 3:
        value = dict(zip("xyz", value))
    if not isinstance(value, dict) or set(value) != {"x", "y", "z"}:
        v.fail("crystal.axes", value, "must map x, y and z to lattice directions", hint)
    return tuple(v.index_triple(value[n], f"crystal.axes.{n}") for n in "xyz")


def _read_cif(path: Path):
    """The CIF's crystal, read once per file version: the sweep points and batch
    jobs of one recipe share it (keyed by path, size and modification time)."""
    try:
        stat = path.stat()
        version = (stat.st_size, stat.st_mtime_ns)
    except OSError:
        version = None  # crystal_from_cif names the problem
    return _read_cif_version(str(path), version)


@lru_cache(maxsize=32)
def _read_cif_version(path: str, version):
    from .cif_crystal import crystal_from_cif

    return crystal_from_cif(path)
