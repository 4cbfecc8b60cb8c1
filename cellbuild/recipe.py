"""The recipe: YAML loading (safe, with line numbers) and validation into frozen types.

Validation happens once, here, at the boundary. Every error is an
:class:`~cellbuild.errors.InputError` naming the dotted key, the value, what
would be accepted and, where known, the YAML line.
"""
from __future__ import annotations

import difflib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

from .errors import InputError
from .lattices import LATTICES

FORMAT_KEYS = ("lammps-data", "cif", "xyz", "poscar")
NAME_PATTERN = re.compile(r"^[A-Za-z0-9_.-]{1,200}$")
DEFAULT_OUTPUTS = FORMAT_KEYS

Lines = Mapping[str, int]


# ----------------------------------------------------------------------------- model


@dataclass(frozen=True)
class Crystal:
    """What to build. At most one of ``a`` (Angstrom), ``density`` (g/cm^3),
    ``radius`` (Angstrom, touching spheres) is set; none means the reference value."""

    element: str
    lattice: str
    a: float | None = None
    density: float | None = None
    radius: float | None = None


@dataclass(frozen=True)
class Size:
    """Exactly one of: ``repeat`` (cells per axis), ``atoms`` (target count),
    ``min_length`` (Angstrom per axis)."""

    repeat: tuple[int, int, int] | None = None
    atoms: int | None = None
    min_length: tuple[float, float, float] | None = None


@dataclass(frozen=True)
class Amount:
    """A defect amount: an exact ``count`` or a ``fraction`` of the sites of ``on``."""

    count: int | None = None
    fraction: float | None = None


@dataclass(frozen=True)
class Vacancies:
    amount: Amount
    on: str


@dataclass(frozen=True)
class Substitution:
    element: str
    amount: Amount
    on: str


@dataclass(frozen=True)
class Interstitial:
    element: str
    site: str
    amount: Amount


@dataclass(frozen=True)
class Defects:
    vacancies: Vacancies | None = None
    substitutions: tuple[Substitution, ...] = ()
    interstitials: tuple[Interstitial, ...] = ()
    min_separation: float | None = None

    @property
    def any(self) -> bool:
        return bool(self.vacancies or self.substitutions or self.interstitials)


@dataclass(frozen=True)
class Checks:
    """Audit settings. ``min_distance`` in Angstrom; None: half the nearest-neighbour distance."""

    min_distance: float | None = None


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

    def elements(self) -> tuple[str, ...]:
        """Elements in LAMMPS type order: ``types`` if given, else host, substituents
        in recipe order, then interstitials."""
        if self.types:
            return self.types
        order = [self.crystal.element]
        order += [s.element for s in self.defects.substitutions]
        order += [i.element for i in self.defects.interstitials]
        return tuple(dict.fromkeys(order))


# ----------------------------------------------------------------------------- YAML


def _yaml_loader():
    """A SafeLoader subclass that refuses duplicate keys (imported lazily)."""
    import yaml

    class Loader(yaml.SafeLoader):
        pass

    return Loader


def load_yaml(path: str | Path) -> tuple[Any, dict[str, int]]:
    """Read a YAML file safely; return the data and dotted key -> 1-based line.

    Duplicate keys, YAML syntax errors, object-constructing tags and unreadable
    files raise :class:`InputError`.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("file not found", file=str(path)) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a recipe file", file=str(path)) from None
    except UnicodeDecodeError:
        raise InputError("is not UTF-8 text", hint="a recipe is a YAML text file",
                         file=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot be read ({exc.strerror})", file=str(path)) from None
    return parse_yaml(text, str(path))


def parse_yaml(text: str, file: str | None = None) -> tuple[Any, dict[str, int]]:
    """Parse YAML text safely; see :func:`load_yaml`."""
    import yaml

    loader = None
    try:
        loader = _yaml_loader()(text)
        node = loader.get_single_node()
        if node is None:
            raise InputError("the recipe is empty", hint="see `cellbuild template fcc`",
                             file=file)
        lines: dict[str, int] = {}
        data = _construct(loader, node, "", lines, file)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        problem = (exc.problem or exc.context or "invalid YAML").strip()
        if "could not determine a constructor" in problem:
            problem = "YAML tags that construct objects are not accepted"
        raise InputError(f"YAML error: {problem}", file=file, line=line) from None
    except yaml.reader.ReaderError as exc:
        line = text.count("\n", 0, exc.position) + 1
        raise InputError(f"YAML error: character {chr(exc.character)!r} is not allowed"
                         if isinstance(exc.character, int) else "YAML error: unreadable characters",
                         hint="a recipe is plain YAML text", file=file, line=line) from None
    except yaml.YAMLError as exc:
        raise InputError(f"YAML error: {str(exc).splitlines()[0]}", file=file) from None
    finally:
        if loader is not None:
            loader.dispose()
    return data, lines


_PLAIN_TAGS = ("tag:yaml.org,2002:map", "tag:yaml.org,2002:seq")


def _construct(loader, node, path: str, lines: dict[str, int], file: str | None):
    """Turn a composed YAML node into plain data, recording the line of each key."""
    import yaml

    lines.setdefault(path, node.start_mark.line + 1)
    if not isinstance(node, yaml.ScalarNode) and node.tag not in _PLAIN_TAGS:
        # we build mappings and lists ourselves, so refuse their tags explicitly
        raise InputError(f"YAML tag {node.tag} is not accepted",
                         hint="YAML tags that construct objects are refused",
                         key=path or None, file=file, line=node.start_mark.line + 1)
    if isinstance(node, yaml.MappingNode):
        loader.flatten_mapping(node)
        out: dict[Any, Any] = {}
        for key_node, value_node in node.value:
            key = loader.construct_object(key_node, deep=True)
            if not isinstance(key, (str, int, float, bool)):
                raise InputError("mapping keys must be plain words", key=path or None,
                                 file=file, line=key_node.start_mark.line + 1)
            key = str(key)
            child = f"{path}.{key}" if path else key
            if key in out:
                raise InputError("duplicate key", key=child, file=file,
                                 line=key_node.start_mark.line + 1,
                                 hint="each key may appear once")
            lines[child] = key_node.start_mark.line + 1
            out[key] = _construct(loader, value_node, child, lines, file)
        return out
    if isinstance(node, yaml.SequenceNode):
        return [
            _construct(loader, item, f"{path}[{i}]", lines, file)
            for i, item in enumerate(node.value)
        ]
    return loader.construct_object(node, deep=True)


# ----------------------------------------------------------------------------- validation


class _Checker:
    """Validation helpers that know the file and the line of each key."""

    def __init__(self, lines: Lines | None, file: str | None) -> None:
        self.lines = lines or {}
        self.file = file

    def fail(self, key: str, value: Any, message: str, hint: str | None = None):
        line = self.lines.get(key)
        if line is None and "." in key:
            line = self.lines.get(key.rsplit(".", 1)[0])
        raise InputError(message, key=key, value=value, hint=hint, file=self.file, line=line)

    def fail_missing(self, key: str, message: str, hint: str | None = None):
        parent = key.rsplit(".", 1)[0] if "." in key else ""
        raise InputError(message, key=key, hint=hint, file=self.file,
                         line=self.lines.get(parent))

    def mapping(self, value: Any, key: str) -> dict:
        if not isinstance(value, dict):
            self.fail(key, value, f"must be a mapping, not {_kind(value)}")
        return value

    def known_keys(self, data: dict, allowed: tuple[str, ...], prefix: str) -> None:
        for k in data:
            if k not in allowed:
                near = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
                hint = f"did you mean `{near[0]}`? " if near else ""
                where = f"`{prefix}`" if prefix else "the top level"
                self.fail(_join(prefix, k), data[k], "unknown key",
                          f"{hint}allowed at {where}: {', '.join(allowed)}")

    def number(self, value: Any, key: str, *, positive: bool = True) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(key, value, f"must be a number, not {_kind(value)}")
        if not math.isfinite(value):
            self.fail(key, value, "must be a finite number")
        if positive and value <= 0:
            self.fail(key, value, "must be greater than zero")
        return float(value)

    def integer(self, value: Any, key: str, *, minimum: int = 0) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            if isinstance(value, float) and value.is_integer():
                value = int(value)
            else:
                self.fail(key, value, f"must be a whole number, not {_kind(value)}")
        if value < minimum:
            self.fail(key, value, f"must be at least {minimum}")
        return int(value)

    def text(self, value: Any, key: str) -> str:
        if not isinstance(value, str):
            self.fail(key, value, f"must be text, not {_kind(value)}")
        return value

    def element(self, value: Any, key: str) -> str:
        from ase.data import atomic_numbers

        symbol = self.text(value, key)
        if symbol not in atomic_numbers or symbol == "X":
            near = difflib.get_close_matches(symbol.capitalize(), _symbols(), n=1, cutoff=0.5)
            hint = f"did you mean `{near[0]}`? " if near else ""
            self.fail(key, value, "is not a chemical element symbol",
                      f"{hint}use a symbol such as Cu, Fe or Si (capitalised)")
        return symbol

    def one_of(self, data: dict, keys: tuple[str, ...], prefix: str, *, required: bool) -> str | None:
        given = [k for k in keys if k in data]
        if len(given) > 1:
            self.fail(_join(prefix, given[1]), data[given[1]],
                      f"cannot be given together with `{_join(prefix, given[0])}`",
                      f"give exactly one of {', '.join(keys)}")
        if not given:
            if required:
                self.fail_missing(prefix, f"needs one of {', '.join(keys)}")
            return None
        return given[0]


def _join(prefix: str, key: str) -> str:
    return f"{prefix}.{key}" if prefix else key


def _kind(value: Any) -> str:
    if value is None:
        return "empty"
    return {dict: "a mapping", list: "a list", str: "text", bool: "true/false"}.get(
        type(value), type(value).__name__)


def _symbols() -> list[str]:
    from ase.data import chemical_symbols

    return chemical_symbols[1:]


TOP_KEYS = ("name", "crystal", "size", "seed", "outputs", "defects", "types", "checks", "sweep")
CRYSTAL_KEYS = ("element", "lattice", "a", "density", "radius")
SIZE_KEYS = ("repeat", "atoms", "min_length")
DEFECT_KEYS = ("vacancies", "substitutions", "interstitials", "min_separation")
VACANCY_KEYS = ("count", "fraction", "on")
SUBSTITUTION_KEYS = ("element", "count", "fraction", "on")
INTERSTITIAL_KEYS = ("element", "site", "count", "fraction")
CHECK_KEYS = ("min_distance",)


def parse_recipe(data: Any, lines: Lines | None = None, file: str | None = None) -> Recipe:
    """Validate plain recipe data into a :class:`Recipe`.

    A ``sweep`` key is refused here: expand sweeps first (:mod:`cellbuild.sweep`).
    """
    c = _Checker(lines, file)
    if not isinstance(data, dict):
        raise InputError(f"a recipe must be a mapping of keys, not {_kind(data)}",
                         hint="see `cellbuild template fcc`", file=file)
    c.known_keys(data, TOP_KEYS, "")
    if "sweep" in data:
        c.fail("sweep", data["sweep"], "must be expanded into points before validation",
               "load the file with cellbuild.sweep.expand_file, as make, plan and batch do")
    for key in ("name", "crystal", "size"):
        if key not in data:
            c.fail_missing(key, "is required", "see `cellbuild template fcc`")
    name = _name(c, data["name"])
    crystal = _crystal(c, data["crystal"])
    size = _size(c, data["size"])
    seed = c.integer(data.get("seed", 0), "seed") if "seed" in data else 0
    if seed >= 2**63:
        c.fail("seed", seed, "must be below 2**63")
    outputs = _outputs(c, data.get("outputs", list(DEFAULT_OUTPUTS)))
    defects = _defects(c, data.get("defects", {}), crystal)
    types = _types(c, data["types"]) if "types" in data else None
    checks = _checks(c, data.get("checks", {}))
    recipe = Recipe(name=name, crystal=crystal, size=size, seed=seed, outputs=outputs,
                    defects=defects, types=types, checks=checks, source=file)
    if types is not None:
        needed = Recipe(name, crystal, size, defects=defects).elements()
        missing = [e for e in needed if e not in types]
        if missing:
            c.fail("types", list(types), f"does not list {', '.join(missing)}",
                   "list every element the recipe uses")
    return recipe


def load_recipe(path: str | Path) -> Recipe:
    """Load and validate a recipe file."""
    data, lines = load_yaml(path)
    return parse_recipe(data, lines, str(path))


def _name(c: _Checker, value: Any) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = str(value)
    name = c.text(value, "name")
    if not NAME_PATTERN.match(name) or set(name) == {"."} or name.startswith("."):
        c.fail("name", value, "is not a safe file stem",
               "use letters, digits, '-', '_' and '.', not starting with '.', at most 200 characters")
    return name


def _crystal(c: _Checker, value: Any) -> Crystal:
    data = c.mapping(value, "crystal")
    c.known_keys(data, CRYSTAL_KEYS, "crystal")
    for key in ("element", "lattice"):
        if key not in data:
            c.fail_missing(f"crystal.{key}", "is required")
    element = c.element(data["element"], "crystal.element")
    lattice = c.text(data["lattice"], "crystal.lattice")
    if lattice not in LATTICES:
        c.fail("crystal.lattice", lattice, "is not a known lattice",
               f"known lattices: {', '.join(LATTICES)}")
    which = c.one_of(data, ("a", "density", "radius"), "crystal", required=False)
    values = {}
    if which:
        values[which] = c.number(data[which], f"crystal.{which}")
    return Crystal(element=element, lattice=lattice, **values)


def _size(c: _Checker, value: Any) -> Size:
    data = c.mapping(value, "size")
    c.known_keys(data, SIZE_KEYS, "size")
    which = c.one_of(data, SIZE_KEYS, "size", required=True)
    raw = data[which]
    key = f"size.{which}"
    if which == "repeat":
        if isinstance(raw, int) and not isinstance(raw, bool):
            raw = [raw] * 3
        if not isinstance(raw, list) or len(raw) != 3:
            c.fail(key, raw, "must be a list of three whole numbers (or one number for all axes)")
        return Size(repeat=tuple(c.integer(v, f"{key}[{i}]", minimum=1) for i, v in enumerate(raw)))
    if which == "atoms":
        return Size(atoms=c.integer(raw, key, minimum=1))
    if isinstance(raw, (int, float)) and not isinstance(raw, bool):
        raw = [raw] * 3
    if not isinstance(raw, list) or len(raw) != 3:
        c.fail(key, raw, "must be a length in Angstrom or a list of three")
    return Size(min_length=tuple(c.number(v, f"{key}[{i}]") for i, v in enumerate(raw)))


def _outputs(c: _Checker, value: Any) -> tuple[str, ...]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value:
        c.fail("outputs", value, "must be a non-empty list of formats",
               f"known formats: {', '.join(FORMAT_KEYS)}")
    seen: list[str] = []
    for i, item in enumerate(value):
        if item not in FORMAT_KEYS:
            near = difflib.get_close_matches(str(item), FORMAT_KEYS, n=1, cutoff=0.5)
            hint = f"did you mean `{near[0]}`? " if near else ""
            c.fail(f"outputs[{i}]", item, "is not a known output format",
                   f"{hint}known formats: {', '.join(FORMAT_KEYS)}")
        if item in seen:
            c.fail(f"outputs[{i}]", item, "is listed twice")
        seen.append(item)
    return tuple(seen)


def _types(c: _Checker, value: Any) -> tuple[str, ...]:
    if not isinstance(value, list) or not value:
        c.fail("types", value, "must be a list of element symbols in LAMMPS type order")
    symbols = tuple(c.element(v, f"types[{i}]") for i, v in enumerate(value))
    if len(set(symbols)) != len(symbols):
        c.fail("types", value, "lists an element twice")
    return symbols


def _checks(c: _Checker, value: Any) -> Checks:
    data = c.mapping(value, "checks")
    c.known_keys(data, CHECK_KEYS, "checks")
    if "min_distance" in data:
        return Checks(min_distance=c.number(data["min_distance"], "checks.min_distance"))
    return Checks()


def _amount(c: _Checker, data: dict, prefix: str) -> Amount:
    which = c.one_of(data, ("count", "fraction"), prefix, required=True)
    key = f"{prefix}.{which}"
    if which == "count":
        return Amount(count=c.integer(data["count"], key))
    fraction = c.number(data["fraction"], key, positive=False)
    if not 0.0 <= fraction <= 1.0:
        c.fail(key, data["fraction"], "must lie between 0 and 1")
    return Amount(fraction=fraction)


def _defects(c: _Checker, value: Any, crystal: Crystal) -> Defects:
    data = c.mapping(value, "defects")
    c.known_keys(data, DEFECT_KEYS, "defects")
    vacancies = None
    if "vacancies" in data:
        v = c.mapping(data["vacancies"], "defects.vacancies")
        c.known_keys(v, VACANCY_KEYS, "defects.vacancies")
        on = c.element(v["on"], "defects.vacancies.on") if "on" in v else crystal.element
        vacancies = Vacancies(_amount(c, v, "defects.vacancies"), on)
    subs = []
    for i, item in enumerate(_list(c, data.get("substitutions", []), "defects.substitutions")):
        key = f"defects.substitutions[{i}]"
        s = c.mapping(item, key)
        c.known_keys(s, SUBSTITUTION_KEYS, key)
        if "element" not in s:
            c.fail_missing(f"{key}.element", "is required")
        element = c.element(s["element"], f"{key}.element")
        on = c.element(s["on"], f"{key}.on") if "on" in s else crystal.element
        if element == on:
            c.fail(f"{key}.element", element, f"substitutes `{on}` by itself")
        subs.append(Substitution(element, _amount(c, s, key), on))
    inters = []
    sites = LATTICES[crystal.lattice].interstitials
    for i, item in enumerate(_list(c, data.get("interstitials", []), "defects.interstitials")):
        key = f"defects.interstitials[{i}]"
        s = c.mapping(item, key)
        c.known_keys(s, INTERSTITIAL_KEYS, key)
        for need in ("element", "site"):
            if need not in s:
                c.fail_missing(f"{key}.{need}", "is required",
                               f"sites of {crystal.lattice}: {', '.join(sites)}")
        element = c.element(s["element"], f"{key}.element")
        site = c.text(s["site"], f"{key}.site")
        if site not in sites:
            c.fail(f"{key}.site", site, f"is not an interstitial site of {crystal.lattice}",
                   f"sites of {crystal.lattice}: {', '.join(sites)}")
        inters.append(Interstitial(element, site, _amount(c, s, key)))
    separation = None
    if "min_separation" in data:
        separation = c.number(data["min_separation"], "defects.min_separation")
    return Defects(vacancies, tuple(subs), tuple(inters), separation)


def _list(c: _Checker, value: Any, key: str) -> list:
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list):
        c.fail(key, value, "must be a list of mappings")
    return value
