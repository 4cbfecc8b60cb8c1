"""The recipe: frozen types that cannot hold an invalid value, and the parser that
turns loaded YAML data into them.

Every dataclass checks its fields in ``__post_init__``, so a recipe built in
Python (``Recipe(name="../x", ...)``) is refused exactly like the same recipe
in a file. :func:`parse_recipe` adds what only the file knows: unknown and
missing keys, which of two exclusive keys was written, and the YAML line of
every key. Every error is an :class:`~cellbuild.errors.InputError` naming the
dotted key, the value and what would be accepted. Loading the YAML text lives
in :mod:`cellbuild.yamlread` (re-exported here as :func:`load_yaml` and
:func:`parse_yaml`).
"""
from __future__ import annotations

import difflib
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from . import recipe_values as v
from .errors import InputError
from .lattices import LATTICES
from .prototypes import PROTOTYPES
from .recipe_crystal import Crystal
from .recipe_geometry import Displace, GrainBoundary, Strain, Surface, supercell_matrix
from .recipe_defects import (Amount, Antisite, Arrangement, Defects, Interstitial, Schottky,
                             Substitution,
                             Vacancies)
from .recipe_lattices import interstitial_sites, sites_hint
from .formats import DEFAULT_KEYS, FORMATS
from .recipe_outputs import Espresso, Kpoints, Relax
from .recipe_sections import parse_sections
from .yamlread import load_yaml, parse_yaml


__all__ = ["Amount", "Antisite", "Checks", "Crystal", "Defects", "Interstitial", "Recipe",
           "GrainBoundary", "Schottky", "Size", "Substitution", "Surface", "Vacancies", "load_recipe", "load_yaml", "parse_recipe", "parse_yaml"]

#: Output format keys, from the format registry.
FORMAT_KEYS = tuple(FORMATS)
NAME_PATTERN = re.compile(r"^[A-Za-z0-9_.-]{1,200}$")
DEFAULT_OUTPUTS = DEFAULT_KEYS

Lines = Mapping[str, int]


_set = v.store
_exclusive = v.exclusive


def _triple(value, key: str, check, message: str) -> tuple:
    """One value for all three axes, or three values, each passed through ``check``."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) \
            or type(value).__module__ == "numpy" and getattr(value, "ndim", 1) == 0:
        value = (value,) * 3
    items = v.sequence(value, key, message)
    if len(items) != 3:
        v.fail(key, value, message)
    return tuple(check(item, f"{key}[{i}]") for i, item in enumerate(items))


# ----------------------------------------------------------------------------- model


@dataclass(frozen=True)
class Size:
    """Exactly one of: ``repeat`` (cells per axis), ``atoms`` (target count),
    ``min_length`` (Angstrom per axis), ``matrix`` (integer rows over the
    conventional cell's vectors, positive determinant). One number for ``repeat``
    or ``min_length`` means the same on all three axes."""

    repeat: tuple[int, int, int] | None = None
    atoms: int | None = None
    min_length: tuple[float, float, float] | None = None
    matrix: tuple[tuple[int, int, int], ...] | None = None

    def __post_init__(self) -> None:
        which = _exclusive(self, ("repeat", "atoms", "min_length", "matrix"), "size",
                           required=True)
        raw = getattr(self, which)
        if which == "matrix":
            _set(self, which, supercell_matrix(raw))
        elif which == "repeat":
            _set(self, which, _triple(raw, "size.repeat", lambda x, k: v.integer(x, k, minimum=1),
                                      "must be a list of three whole numbers "
                                      "(or one number for all axes)"))
        elif which == "atoms":
            _set(self, which, v.integer(raw, "size.atoms", minimum=1))
        else:
            _set(self, which, _triple(raw, "size.min_length", v.number,
                                      "must be a length in Angstrom or a list of three"))


@dataclass(frozen=True)
class Checks:
    """Audit settings. ``min_distance`` in Angstrom; None: half the nearest-neighbour
    distance. ``physical_spacing``: refuse a nearest-neighbour distance outside the
    physically possible band (:mod:`cellbuild.spacing`); false builds it on purpose.
    ``net_charge``: the cell's net charge (elementary charges) expected when the
    recipe gives ``charges``; 0 unless the cell is charged on purpose."""

    min_distance: float | None = None
    physical_spacing: bool = True
    net_charge: float = 0.0

    def __post_init__(self) -> None:
        if self.min_distance is not None:
            _set(self, "min_distance", v.number(self.min_distance, "checks.min_distance"))
        v.boolean(self.physical_spacing, "checks.physical_spacing")
        _set(self, "net_charge", v.number(self.net_charge, "checks.net_charge", positive=False))


@dataclass(frozen=True)
class Recipe:
    """A validated recipe. ``source`` is the file it came from, if any."""

    name: str
    crystal: Crystal
    size: Size
    seed: int = 0
    outputs: tuple[str, ...] = DEFAULT_OUTPUTS
    defects: Defects = field(default_factory=Defects)
    types: tuple[str, ...] | None = None
    checks: Checks = field(default_factory=Checks)
    source: str | None = None
    charges: tuple[tuple[str, float], ...] | None = None
    surface: Surface | None = None
    grain_boundary: GrainBoundary | None = None
    #: which of the structures the recipe stands for (1-based): the rank of an
    #: arrangement (``arrangement.structures``) or a distinct configuration
    #: (``placement: distinct``); set by :mod:`cellbuild.variants`, not a YAML key
    variant: int | None = None
    kpoints: Kpoints | None = None
    espresso: Espresso | None = None
    displace: Displace | None = None
    strain: Strain | None = None
    relax: Relax | None = None

    def __post_init__(self) -> None:
        if self.variant is not None:
            _set(self, "variant", v.integer(self.variant, "variant", minimum=1))
        name = v.text(self.name, "name")
        if not NAME_PATTERN.match(name) or name.startswith("."):
            v.fail("name", self.name, "is not a safe file stem",
                   "use letters, digits, '-', '_' and '.', not starting with '.', "
                   "at most 200 characters")
        for key, cls in (("crystal", Crystal), ("size", Size), ("defects", Defects),
                         ("checks", Checks)):
            if not isinstance(getattr(self, key), cls):
                v.fail(key, getattr(self, key),
                       f"must be a cellbuild.recipe.{cls.__name__}, not {v.kind(getattr(self, key))}")
        _set(self, "seed", v.integer(self.seed, "seed"))
        _set(self, "outputs", _outputs(self.outputs))
        if self.types is not None:
            _set(self, "types", _types(self.types))
        sites = interstitial_sites(self.crystal.lattice)
        for i, item in enumerate(self.defects.interstitials):
            if item.site not in sites:
                v.fail(f"defects.interstitials[{i}].site", item.site,
                       f"is not an interstitial site of {self.crystal.lattice}",
                       sites_hint(self.crystal.lattice, sites))
        if self.surface is not None and self.grain_boundary is not None:
            v.fail("grain_boundary", "...", "cannot be given with surface",
                   "a boundary with free surfaces: grain_boundary.vacuum")
        for key, cls in (("surface", Surface), ("grain_boundary", GrainBoundary)):
            item = getattr(self, key)
            if item is not None and not isinstance(item, cls):
                v.fail(key, item, f"must be a {cls.__name__}, not {v.kind(item)}")
        if self.surface is not None or self.grain_boundary is not None:
            if self.size.repeat is None or self.size.repeat[2] != 1:
                v.fail("size", {k: x for k, x in vars(self.size).items() if x is not None},
                       "must be a repeat with 1 along z for a surface or a grain boundary",
                       "size: {repeat: [4, 4, 1]} (in-plane repeats; the layers or grains set the height)")
        needed = self._used_elements()
        if self.types is not None:
            missing = [e for e in needed if e not in self.types]
            if missing:
                v.fail("types", list(self.types), f"does not list {', '.join(missing)}",
                       "list every element the recipe uses")
        if self.charges is not None:
            _set(self, "charges", _charges(self.charges, needed))
        for key, cls in (("kpoints", Kpoints), ("espresso", Espresso), ("displace", Displace),
                         ("strain", Strain), ("relax", Relax)):
            item = getattr(self, key)
            if item is not None and not isinstance(item, cls):
                v.fail(key, item, f"must be a {cls.__name__}, not {v.kind(item)}")
        if self.displace is not None and isinstance(self.displace.debye_temperature, tuple):
            missing = [e for e in needed if self.displace.theta_of(e) is None]
            if missing:
                v.fail("displace.debye_temperature", dict(self.displace.debye_temperature),
                       f"gives none for {', '.join(missing)}", "give every element a value")
        if self.relax is not None and not self.defects.any:
            v.fail("relax", {"within": self.relax.within}, "has no defects to relax around",
                   "give defects, or leave relax out")
        if "kpoints" in self.outputs and self.kpoints is None:
            v.fail("outputs", list(self.outputs), "lists kpoints without a mesh spacing",
                   "give kpoints: {spacing: 0.25} (1/Angstrom)")
        if "espresso-in" in self.outputs and (self.espresso is None or self.espresso.ecutwfc is None):
            v.fail("espresso.ecutwfc", None, "is required for the espresso-in output",
                   "give the wavefunction cutoff (Ry) your pseudopotentials recommend")

    def _used_elements(self) -> tuple[str, ...]:
        """Host elements, substituents in recipe order, then interstitials."""
        order = [*self.crystal.elements()]
        order += [s.element for s in self.defects.substitutions]
        order += [i.element for i in self.defects.interstitials]
        return tuple(dict.fromkeys(order))

    def elements(self) -> tuple[str, ...]:
        """Elements in LAMMPS type order: ``types`` if given, else host, substituents
        in recipe order, then interstitials."""
        return self.types if self.types else self._used_elements()

    def charge_of(self) -> dict[str, float] | None:
        """Element -> ionic charge (elementary charges), or None without ``charges``."""
        return dict(self.charges) if self.charges is not None else None


def _charges(value, needed: tuple[str, ...]) -> tuple[tuple[str, float], ...]:
    """``charges`` as (element, charge) pairs in the order given; every element
    the recipe uses needs one (an element left out would silently get 0)."""
    given = dict(value) if isinstance(value, (tuple, list)) else value
    if not isinstance(given, dict) or not given:
        v.fail("charges", value, "must map each element to its charge",
               "for example charges: {Mg: 2, O: -2}")
    pairs = tuple((v.element(e, "charges"), v.number(q, f"charges.{e}", positive=False))
                  for e, q in given.items())
    missing = [e for e in needed if e not in given]
    if missing:
        v.fail("charges", {e: q for e, q in pairs}, f"gives no charge for {', '.join(missing)}",
               "give every element the recipe uses a charge (0 for a neutral atom)")
    return pairs


def _outputs(value) -> tuple[str, ...]:
    if isinstance(value, str):
        value = [value]
    items = v.sequence(value, "outputs", "must be a non-empty list of formats")
    if not items:
        v.fail("outputs", list(items), "must be a non-empty list of formats",
               f"known formats: {', '.join(FORMAT_KEYS)}")
    seen: list[str] = []
    for i, item in enumerate(items):
        if not isinstance(item, str) or item not in FORMAT_KEYS:
            near = difflib.get_close_matches(str(item)[:20], FORMAT_KEYS, n=1, cutoff=0.5)
            hint = f"did you mean `{near[0]}`? " if near else ""
            v.fail(f"outputs[{i}]", item, "is not a known output format",
                   f"{hint}known formats: {', '.join(FORMAT_KEYS)}")
        if item in seen:
            v.fail(f"outputs[{i}]", item, "is listed twice")
        seen.append(item)
    return tuple(seen)


def _types(value) -> tuple[str, ...]:
    message = "must be a list of element symbols in LAMMPS type order"
    items = v.sequence(value, "types", message)
    if not items:
        v.fail("types", list(items), message)
    symbols = tuple(v.element(item, f"types[{i}]") for i, item in enumerate(items))
    if len(set(symbols)) != len(symbols):
        v.fail("types", list(value), "lists an element twice")
    return symbols


# ----------------------------------------------------------------------------- parsing


class _Checker:
    """Structure checks (mappings, known and missing keys) that know the file and
    the line of each key, and construction of the dataclasses with their errors
    located at the recipe key."""

    def __init__(self, lines: Lines | None, file: str | None) -> None:
        self.lines = lines if lines is not None else {}
        self.file = file

    def line_of(self, key: str) -> int | None:
        """The line of ``key``, else of its nearest ancestor that has one."""
        while key:
            if key in self.lines:
                return self.lines[key]
            key = re.sub(r"(\.[^.\[\]]*|\[\d+\])$", "", key) if re.search(
                r"(\.[^.\[\]]*|\[\d+\])$", key) else ""
        return None

    def fail(self, key: str, value: Any, message: str, hint: str | None = None):
        raise InputError(message, key=key, value=value, hint=hint, file=self.file,
                         line=self.line_of(key))

    def fail_missing(self, key: str, message: str, hint: str | None = None):
        parent = key.rsplit(".", 1)[0] if "." in key else ""
        raise InputError(message, key=key, hint=hint, file=self.file,
                         line=self.lines.get(parent))

    def make(self, cls, prefix: str, *args, **fields):
        """``cls(*args, **fields)``; its error's key is prefixed with ``prefix``
        and located in the file."""
        try:
            return cls(*args, **fields)
        except InputError as exc:
            key = v.join(prefix, exc.key)
            raise InputError(exc.message, key=key or None, hint=exc.hint, file=self.file,
                             line=self.line_of(key) if key else None,
                             **({"value": exc.value} if exc.has_value else {})) from None

    def mapping(self, value: Any, key: str) -> dict:
        if not isinstance(value, dict):
            self.fail(key, value, f"must be a mapping, not {v.kind(value)}")
        return value

    def known_keys(self, data: dict, allowed: tuple[str, ...], prefix: str) -> None:
        for k in data:
            if k not in allowed:
                near = difflib.get_close_matches(str(k)[:40], allowed, n=1, cutoff=0.6)
                hint = f"did you mean `{near[0]}`? " if near else ""
                where = f"`{prefix}`" if prefix else "the top level"
                self.fail(v.join(prefix, str(k)), data[k], "unknown key",
                          f"{hint}allowed at {where}: {', '.join(allowed)}")

    def one_of(self, data: dict, keys: tuple[str, ...], prefix: str, *, required: bool) -> str | None:
        given = [k for k in keys if k in data]
        if len(given) > 1:
            self.fail(v.join(prefix, given[1]), data[given[1]],
                      f"cannot be given together with `{v.join(prefix, given[0])}`",
                      f"give exactly one of {', '.join(keys)}")
        if not given:
            if required:
                self.fail_missing(prefix, f"needs one of {', '.join(keys)}")
            return None
        return given[0]

    def list_of_mappings(self, value: Any, key: str) -> list:
        if isinstance(value, dict):
            value = [value]
        if not isinstance(value, list):
            self.fail(key, value, "must be a list of mappings")
        return value


TOP_KEYS = ("name", "crystal", "size", "seed", "outputs", "defects", "types", "checks",
            "charges", "surface", "grain_boundary", "sweep", "kpoints", "espresso",
            "displace", "strain", "relax")
CRYSTAL_KEYS = ("element", "lattice", "a", "density", "radius", "species", "c", "c_over_a", "u",
                "cif", "axes")
SIZE_KEYS = ("repeat", "atoms", "min_length", "matrix")
DEFECT_KEYS = ("vacancies", "schottky", "substitutions", "antisites", "interstitials",
               "min_separation", "arrangement", "placement")
ARRANGEMENT_KEYS = ("target", "shells", "steps", "weights", "structures", "vacancies")
VACANCY_KEYS = ("count", "fraction", "on")
SUBSTITUTION_KEYS = ("element", "count", "fraction", "on")
INTERSTITIAL_KEYS = ("element", "site", "count", "fraction")
ANTISITE_KEYS = ("pair", "count")
SCHOTTKY_KEYS = ("count",)
CHECK_KEYS = ("min_distance", "physical_spacing", "net_charge")


def parse_recipe(data: Any, lines: Lines | None = None, file: str | None = None, *,
                 folder: str | None = None) -> Recipe:
    """Validate plain recipe data into a :class:`Recipe`.

    Relative paths in the recipe (``crystal.cif``) are read from ``folder``,
    by default the folder of ``file`` (the current folder without a file).

    A ``sweep`` key is refused here: expand sweeps first (:mod:`cellbuild.sweep`).
    """
    c = _Checker(lines, file)
    if not isinstance(data, dict):
        raise InputError(f"a recipe must be a mapping of keys, not {v.kind(data)}",
                         hint="see `cellbuild template fcc`", file=file)
    c.known_keys(data, TOP_KEYS, "")
    if "sweep" in data:
        c.fail("sweep", data["sweep"], "must be expanded into points before validation",
               "load the file with cellbuild.sweep.expand_file, as make, plan and batch do")
    for key in ("name", "crystal", "size"):
        if key not in data:
            c.fail_missing(key, "is required", "see `cellbuild template fcc`")
    name = data["name"]
    if isinstance(name, (int, float)) and not isinstance(name, bool):
        name = str(name)  # data built in Python; a file's name is always read as text
    if folder is None and file is not None:
        folder = str(Path(file).parent)
    crystal = _crystal(c, data["crystal"], folder)
    size = _size(c, data["size"])
    defects = _defects(c, data.get("defects", {}), crystal)
    checks = _checks(c, data.get("checks", {}))
    fields = {k: data[k] for k in ("seed", "outputs", "types") if k in data}
    if "charges" in data:
        fields["charges"] = tuple(c.mapping(data["charges"], "charges").items())
    fields.update(parse_sections(c, data))
    return c.make(Recipe, "", name=name, crystal=crystal, size=size, defects=defects,
                  checks=checks, source=file, **fields)


def load_recipe(path: str | Path) -> Recipe:
    """Load and validate a recipe file."""
    data, lines = load_yaml(path)
    return parse_recipe(data, lines, str(path))


def _crystal(c: _Checker, value: Any, folder: str | None = None) -> Crystal:
    data = c.mapping(value, "crystal")
    c.known_keys(data, CRYSTAL_KEYS, "crystal")
    if "cif" in data:
        # a relative path is read from the recipe's folder, wherever make runs;
        # the report keeps the path as written
        fields = {"element": None, "lattice": None, **data, "cif_folder": folder}
        return c.make(Crystal, "", **fields)
    if "lattice" not in data:
        c.fail_missing("crystal.lattice", "is required")
    one_species = not isinstance(data["lattice"], str) or data["lattice"] in LATTICES or (
        data["lattice"] in PROTOTYPES and PROTOTYPES[data["lattice"]].n_sublattices == 1)
    if "element" not in data and "species" not in data and one_species:
        c.fail_missing("crystal.element", "is required")
    fields = dict(data)
    fields.setdefault("element", None)
    if "species" in fields:
        c.mapping(fields["species"], "crystal.species")
    return c.make(Crystal, "", **fields)


def _size(c: _Checker, value: Any) -> Size:
    data = c.mapping(value, "size")
    c.known_keys(data, SIZE_KEYS, "size")
    c.one_of(data, SIZE_KEYS, "size", required=True)
    return c.make(Size, "", **data)


def _checks(c: _Checker, value: Any) -> Checks:
    data = c.mapping(value, "checks")
    c.known_keys(data, CHECK_KEYS, "checks")
    return c.make(Checks, "", **data)


def _amount(c: _Checker, data: dict, prefix: str) -> Amount:
    which = c.one_of(data, ("count", "fraction"), prefix, required=True)
    return c.make(Amount, prefix, **{which: data[which]})


def _defects(c: _Checker, value: Any, crystal: Crystal) -> Defects:
    data = c.mapping(value, "defects")
    c.known_keys(data, DEFECT_KEYS, "defects")
    vacancies = _vacancies(c, data["vacancies"], crystal) if "vacancies" in data else None
    schottky = None
    if "schottky" in data:
        s = c.mapping(data["schottky"], "defects.schottky")
        c.known_keys(s, SCHOTTKY_KEYS, "defects.schottky")
        if "count" not in s:
            c.fail_missing("defects.schottky.count", "is required",
                           "give the number of Schottky defects")
        schottky = c.make(Schottky, "defects.schottky", s["count"])
    subs = [c.make(Substitution, key, s["element"], _amount(c, s, key),
                   s.get("on", crystal.element))
            for key, s in _listed(c, data, "substitutions", SUBSTITUTION_KEYS, ("element",))]
    hint = sites_hint(crystal.lattice, interstitial_sites(crystal.lattice))
    inters = [c.make(Interstitial, key, s["element"], s["site"], _amount(c, s, key))
              for key, s in _listed(c, data, "interstitials", INTERSTITIAL_KEYS,
                                    ("element", "site"), hint)]
    antisites = [c.make(Antisite, key, s["pair"], s["count"])
                 for key, s in _listed(c, data, "antisites", ANTISITE_KEYS, ("pair", "count"),
                                       "for example antisites: {count: 4, pair: [Ga, As]}")]
    arrangement = None
    if "arrangement" in data:
        a = c.mapping(data["arrangement"], "defects.arrangement")
        c.known_keys(a, ARRANGEMENT_KEYS, "defects.arrangement")
        if "weights" in a:
            a = {**a, "weights": tuple(c.mapping(a["weights"], "defects.arrangement.weights")
                                       .items())}
        if isinstance(a.get("target"), dict):
            a = {**a, "target": tuple(a["target"].items())}
        arrangement = c.make(Arrangement, "defects.arrangement", **a)
        if not subs:
            c.fail("defects.arrangement", data["arrangement"], "has no substitutions to arrange",
                   "give defects.substitutions with the species to arrange")
    defects = c.make(Defects, "", vacancies, tuple(subs), tuple(inters),
                     data.get("min_separation"), tuple(antisites), schottky, arrangement,
                     data.get("placement", "random"))
    return defects


def _listed(c: _Checker, data: dict, name: str, allowed: tuple[str, ...],
            required: tuple[str, ...], hint: str | None = None):
    """(key, mapping) of each item of ``defects.NAME`` (a list, or one mapping),
    with its keys checked and the required ones present."""
    for i, item in enumerate(c.list_of_mappings(data.get(name, []), f"defects.{name}")):
        key = f"defects.{name}[{i}]"
        s = c.mapping(item, key)
        c.known_keys(s, allowed, key)
        for need in required:
            if need not in s:
                c.fail_missing(f"{key}.{need}", "is required", hint)
        yield key, s


def _vacancies(c: _Checker, value: Any, crystal: Crystal):
    """One mapping (a :class:`Vacancies`) or a list of them (a tuple)."""
    def one(item, key):
        s = c.mapping(item, key)
        c.known_keys(s, VACANCY_KEYS, key)
        return c.make(Vacancies, key, _amount(c, s, key), s.get("on", crystal.element))

    if isinstance(value, list):
        return tuple(one(item, f"defects.vacancies[{i}]") for i, item in enumerate(value))
    return one(value, "defects.vacancies")

