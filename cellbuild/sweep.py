"""Sweeps: one recipe file, many structures.

A recipe may carry a ``sweep`` mapping from dotted recipe keys to lists of
values; it stands for the cartesian product of those lists, one structure per
combination::

    name: cu-vac
    sweep:
      seed: [1, 2, 3]
      defects.vacancies.fraction: [0.005, 0.01]

Expansion happens on the raw YAML data, before validation: each point is a deep
copy of the recipe with the values set and ``sweep`` removed, renamed to
``{name}__{label}-{value}__...`` and then validated by
:func:`cellbuild.recipe.parse_recipe` like any other recipe. A recipe without
``sweep`` expands to itself.
"""
from __future__ import annotations

import copy
import itertools
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator, Mapping

from .errors import InputError
from .recipe_sections import (BOUNDARY_KEYS, DISPLACE_KEYS, ESPRESSO_KEYS, KPOINTS_KEYS,
                              RELAX_KEYS, STRAIN_KEYS, SURFACE_KEYS)
from .variants import variants_of
from .recipe import (ANTISITE_KEYS, ARRANGEMENT_KEYS, SCHOTTKY_KEYS, CHECK_KEYS, CRYSTAL_KEYS, DEFECT_KEYS, INTERSTITIAL_KEYS, NAME_PATTERN,
                     SIZE_KEYS, SUBSTITUTION_KEYS, TOP_KEYS, VACANCY_KEYS, Recipe, load_yaml,
                     parse_recipe)

#: Largest number of structures one recipe may expand to; a typo such as a
#: 1000-value list crossed with two others should be refused, not built.
MAX_POINTS = 100_000

#: Separator between the recipe name and each ``label-value`` part of a point name.
SEPARATOR = "__"

#: Keys a sweep may not set: the point names derive from ``name``, and a sweep
#: inside a sweep has no meaning.
_NOT_SWEEPABLE = ("name", "sweep")

#: Marks an error about a key (not about its value).
_NO_VALUE = object()

_UNSAFE = re.compile(r"[^A-Za-z0-9.-]+")


@dataclass(frozen=True)
class Point:
    """One structure of a (possibly swept) recipe.

    ``data`` is the point's plain recipe data (no ``sweep``, ``name`` set to
    the point name), ``values`` the swept key -> value of this point, in the
    order of the sweep (empty without a sweep), ``recipe`` the validated recipe.
    """

    name: str
    data: dict
    values: dict
    recipe: Recipe


def expand_file(path: str | Path) -> list[Point]:
    """Load a recipe file and expand it; see :func:`expand`."""
    data, lines = load_yaml(path)
    return expand(data, lines, str(path))


def expand(data: Any, lines: Mapping[str, int] | None = None,
           file: str | None = None, folder: str | None = None) -> list[Point]:
    """Expand raw recipe ``data`` into its validated points, in sweep order.
    ``folder``: where the recipe's relative paths (``crystal.cif``) are read from
    (default: the folder of ``file``).

    Each point then becomes the structures it stands for
    (:func:`cellbuild.variants.variants_of`: the N best arrangements, or every
    distinct configuration, named ``POINT__sqs-K`` / ``POINT__config-K``).

    The last sweep key varies fastest. Raises :class:`InputError` naming the
    key for an unknown sweep key, an empty or non-list value list, more than
    :data:`MAX_POINTS` points, two points with the same name, or any point
    that is not a valid recipe.
    """
    points = _sweep_points(data, dict(lines or {}), file, folder)
    out = [Point(r.name, p.data, p.values, r) for p in points for r in variants_of(p.recipe)]
    if len(out) > MAX_POINTS:
        raise InputError(f"stands for {len(out):,} structures, more than the {MAX_POINTS:,} "
                         f"allowed", key="defects.placement" if "__config-" in out[-1].name
                         else "sweep", hint="split it over several recipes", file=file)
    return out


def _sweep_points(data: Any, lines: dict, file: str | None, folder: str | None) -> list[Point]:
    """The validated points of the sweep (one point without a sweep), before variants."""
    if not isinstance(data, dict) or "sweep" not in data:
        recipe = parse_recipe(data, lines, file, folder=folder)
        return [Point(recipe.name, data, {}, recipe)]
    base = {k: v for k, v in data.items() if k != "sweep"}
    name = _checked_name(base, lines, file)
    sweep = _sweep_table(data["sweep"], lines, file)
    labels = _labels([path for _, path, _ in sweep])
    points: list[Point] = []
    seen: dict[str, dict] = {}
    for combo in itertools.product(*(range(len(values)) for _, _, values in sweep)):
        values = {key: options[i] for (key, _, options), i in zip(sweep, combo)}
        point_name = _point_name(name, labels, values)
        if point_name in seen:
            raise InputError(
                f"gives two points the same name `{point_name}` "
                f"({_values_text(seen[point_name])} and {_values_text(values)})",
                key="sweep", hint="list each value once, with values that differ as text",
                file=file, line=lines.get("sweep"))
        if not NAME_PATTERN.match(point_name):
            raise InputError(f"gives the point name `{point_name[:60]}...`, longer than "
                             f"200 characters", key="sweep",
                             hint="shorten `name` or the swept values",
                             file=file, line=lines.get("sweep"))
        seen[point_name] = values
        points.append(_point(base, point_name, sweep, combo, lines, file, folder))
    return points


# ----------------------------------------------------------------------------- sweep table


def _schema() -> dict:
    """The recipe keys a sweep may set, as a tree: a dict is a mapping of keys,
    a one-item list a list of such mappings (indexed by number), None a leaf."""
    leaf = dict.fromkeys
    return {
        **leaf((k for k in TOP_KEYS if k not in _NOT_SWEEPABLE), None),
        "crystal": leaf(CRYSTAL_KEYS),
        "size": leaf(SIZE_KEYS),
        "checks": leaf(CHECK_KEYS),
        "kpoints": leaf(KPOINTS_KEYS),
        "displace": leaf(DISPLACE_KEYS),
        "strain": leaf(STRAIN_KEYS),
        "relax": leaf(RELAX_KEYS),
        "surface": leaf(SURFACE_KEYS),
        "grain_boundary": leaf(BOUNDARY_KEYS),
        "espresso": {**leaf(k for k in ESPRESSO_KEYS if k != "pseudopotentials"),
                     "pseudopotentials": None},
        "defects": {
            **leaf(DEFECT_KEYS),
            "vacancies": leaf(VACANCY_KEYS),
            "schottky": leaf(SCHOTTKY_KEYS),
            "arrangement": leaf(ARRANGEMENT_KEYS),
            "antisites": [leaf(ANTISITE_KEYS)],
            "substitutions": [leaf(SUBSTITUTION_KEYS)],
            "interstitials": [leaf(INTERSTITIAL_KEYS)],
        },
    }


def _sweep_table(sweep: Any, lines: Mapping[str, int],
                 file: str | None) -> list[tuple[str, tuple[str, ...], list]]:
    """Validate the ``sweep`` mapping into (key as written, key path, values), in order."""
    def fail(key: str, value: Any, message: str, hint: str | None = None):
        raise InputError(message, key=key, hint=hint, file=file,
                         line=lines.get(key, lines.get("sweep")),
                         **({} if value is _NO_VALUE else {"value": value}))

    if not isinstance(sweep, dict) or not sweep:
        fail("sweep", sweep, "must be a non-empty mapping of recipe keys to lists of values",
             "for example `seed: [1, 2, 3]`")
    table = []
    size = 1
    for key, values in sweep.items():
        where = f"sweep.{key}"
        path = _key_path(key, where, fail)
        if not isinstance(values, list) or not values:
            fail(where, values, "must be a non-empty list of values",
                 f"for example `{key}: [value1, value2]`")
        size *= len(values)
        table.append((str(key), path, values))
    if size > MAX_POINTS:
        fail("sweep", _NO_VALUE, f"expands to {size:,} structures, more than the "
             f"{MAX_POINTS:,} allowed", "split the sweep over several recipes")
    for i, (key, path, _) in enumerate(table):
        for _, other, _ in table[:i]:
            short, long_ = sorted((path, other), key=len)
            if long_[:len(short)] == short:
                fail(f"sweep.{key}", _NO_VALUE,
                     f"overlaps `{_dotted(other)}`: both set the same part of the recipe")
    return table


def _key_path(key: str, where: str, fail) -> tuple[str, ...]:
    """Split a sweep key (``a.b.0.c`` or ``a.b[0].c``) and check it against the schema."""
    parts = tuple(re.sub(r"\[(\d+)\]", r".\1", str(key)).split("."))
    node: Any = _schema()
    done: list[str] = []
    for part in parts:
        if isinstance(node, list):
            if not part.isdigit():
                fail(where, _NO_VALUE, f"`{part}` is not a position in the list "
                     f"`{'.'.join(done)}`", f"use a number, as in `{'.'.join(done)}.0`")
            node = node[0]
        elif isinstance(node, dict) and part in node:
            node = node[part]
        else:
            prefix = ".".join(done)
            allowed = sorted(node) if isinstance(node, dict) else []
            if not allowed:
                fail(where, _NO_VALUE, "is not a recipe key",
                     f"`{prefix}` holds a value, not further keys")
            hint = f"keys allowed {'under `' + prefix + '`' if prefix else 'at the top level'}: "
            if part in _NOT_SWEEPABLE and not prefix:
                fail(where, _NO_VALUE, "cannot be swept",
                     "the point names are made from `name`; sweep other keys")
            fail(where, _NO_VALUE, "is not a recipe key", hint + ", ".join(allowed))
        done.append(part)
    return parts


def _dotted(path: tuple[str, ...]) -> str:
    return ".".join(path)


def _recipe_key(path: tuple[str, ...]) -> str:
    """The key as :func:`parse_recipe` names it: list positions in brackets."""
    out = ""
    for part in path:
        out += f"[{part}]" if part.isdigit() else (f".{part}" if out else part)
    return out


# ----------------------------------------------------------------------------- names


def _labels(paths: list[tuple[str, ...]]) -> list[str]:
    """Short, unique labels: the last key of each path, lengthened to the left
    (keeping a list position together with its list's name) where two collide."""
    length = [1] * len(paths)

    def label(i: int) -> str:
        path, n = paths[i], length[i]
        if n < len(path) and path[-n].isdigit():
            n += 1  # `substitutions.0.fraction`, not `0.fraction`
        return ".".join(path[-n:])

    while True:
        texts = [label(i) for i in range(len(paths))]
        clashing = [i for i, t in enumerate(texts) if texts.count(t) > 1]
        if not clashing:
            return texts
        for i in clashing:
            length[i] = min(length[i] + 1, len(paths[i]))
        if all(length[i] == len(paths[i]) for i in clashing):
            return [".".join(p) for p in paths]  # cannot happen: paths are distinct


def render(value: Any) -> str:
    """A value as deterministic, filesystem-safe text for a point name.

    Numbers as Python prints them (``0.005``, ``1e-05``), true/false, text
    with runs of unsafe characters replaced by ``_``, lists joined by ``x``
    (``[4, 4, 6]`` -> ``4x4x6``), mappings as ``key-value`` joined by ``_``.
    """
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "none"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value).replace("+", "")  # 1e+20 -> 1e20: '+' is not name-safe
    if isinstance(value, list):
        return "x".join(render(v) for v in value) or "empty"
    if isinstance(value, dict):
        return "_".join(f"{render(k)}-{render(v)}" for k, v in value.items()) or "empty"
    return _UNSAFE.sub("_", str(value)).strip("_") or "_"


def _point_name(name: str, labels: list[str], values: dict) -> str:
    parts = [f"{label}-{render(v)}" for label, v in zip(labels, values.values())]
    return SEPARATOR.join([name, *parts])


def _values_text(values: dict) -> str:
    return ", ".join(f"{k}={v!r}" for k, v in values.items())


def _checked_name(base: dict, lines: Mapping[str, int], file: str | None) -> str:
    """The recipe's name, validated first so that point names are built from a safe stem."""
    if "name" not in base or not isinstance(base["name"], (str, int, float)) \
            or isinstance(base["name"], bool) or not NAME_PATTERN.match(str(base["name"])):
        parse_recipe(base, lines, file)  # raises the usual error about `name` (or earlier)
    return str(base["name"])


# ----------------------------------------------------------------------------- points


def _point(base: dict, name: str, sweep: list, combo: tuple[int, ...],
           lines: Mapping[str, int], file: str | None, folder: str | None = None) -> Point:
    """Set the values (``combo``: one index per sweep key) on a copy of ``base``
    and validate it as a recipe."""
    data = copy.deepcopy(base)
    data["name"] = name
    moved: dict[str, int] = {}
    values = {}
    for (key, path, options), i in zip(sweep, combo):
        values[key] = options[i]
        _set(data, path, copy.deepcopy(options[i]), f"sweep.{key}", lines, file)
        # errors about a swept key point at the line of its value in the sweep
        line = lines.get(f"sweep.{key}[{i}]", lines.get(f"sweep.{key}"))
        if line is not None:
            moved[_recipe_key(path)] = line
    point_lines = _PointLines(lines, moved) if moved else lines
    try:
        recipe = parse_recipe(data, point_lines, file, folder=folder)
    except InputError as exc:
        exc.message = f"{exc.message} (sweep point `{name}`)"
        raise
    return Point(name, data, values, recipe)


def _set(data: dict, path: tuple[str, ...], value: Any, where: str,
         lines: Mapping[str, int], file: str | None) -> None:
    """Set ``data[path] = value``, creating missing mappings on the way."""
    node: Any = data
    for i, part in enumerate(path[:-1]):
        child_is_list = path[i + 1].isdigit()
        if isinstance(node, list):
            node = node[int(part)]
            continue
        if not isinstance(node, dict):
            break  # let validation report the wrong type at its own key
        child = node.get(part)
        if child_is_list:
            if isinstance(child, dict):  # a single mapping is accepted for a list
                child = node[part] = [child]
            index = int(path[i + 1])
            if not isinstance(child, list) or index >= len(child):
                have = len(child) if isinstance(child, list) else 0
                raise InputError(
                    f"sets item {index} of `{_dotted(path[:i + 1])}`, which has {have} item(s)",
                    key=where, hint=f"items are numbered from 0; add the item to "
                    f"`{_dotted(path[:i + 1])}` first", file=file, line=lines.get(where))
        elif child is None:
            child = node[part] = {}
        node = child
    if isinstance(node, list):
        node[int(path[-1])] = value
    elif isinstance(node, dict):
        node[path[-1]] = value


class _PointLines(Mapping):
    """The recipe's key -> line table as one point sees it, without copying it
    (a copy per point would make a 100,000-point sweep quadratic): each swept
    key is at the line of its value in the sweep, and the keys below it, which
    the point's value replaced, have no line of their own."""

    def __init__(self, lines: Mapping[str, int], moved: dict[str, int]) -> None:
        self._lines = lines
        self._moved = moved

    def _hidden(self, key: str) -> bool:
        return any(key.startswith((f"{t}.", f"{t}[")) for t in self._moved)

    def __getitem__(self, key: str) -> int:
        if key in self._moved:
            return self._moved[key]
        if self._hidden(key):
            raise KeyError(key)
        return self._lines[key]

    def __iter__(self) -> Iterator[str]:
        yield from self._moved
        yield from (k for k in self._lines if k not in self._moved and not self._hidden(k))

    def __len__(self) -> int:
        return sum(1 for _ in self)
