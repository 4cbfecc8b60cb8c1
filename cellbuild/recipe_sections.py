"""The recipe's optional top-level sections, parsed into their frozen types:
``surface``, ``grain_boundary``, ``kpoints``, ``espresso``, ``displace``,
``strain`` and ``relax``. ``c`` is :mod:`cellbuild.recipe`'s checker (it locates
errors in the file); each section's keys are checked against its list here.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .recipe_geometry import Displace, GrainBoundary, Strain, Surface
from .recipe_outputs import Espresso, Kpoints, Relax

SURFACE_KEYS = ("miller", "layers", "vacuum", "termination")
BOUNDARY_KEYS = ("axis", "plane", "grains", "vacuum", "min_distance")
KPOINTS_KEYS = ("spacing", "centring")
ESPRESSO_KEYS = ("ecutwfc", "pseudopotentials", "pattern", "positions")
DISPLACE_KEYS = ("rattle", "temperature", "debye_temperature")
STRAIN_KEYS = ("volumetric", "tensor")
RELAX_KEYS = ("within",)


@dataclass(frozen=True)
class _Section:
    """One section: its type, its keys, the keys it needs (with an example), the
    prefix its type's own error keys get, and the keys whose YAML mapping it takes
    as (key, value) pairs."""

    cls: type
    keys: tuple[str, ...]
    required: tuple[str, ...]
    example: str
    prefix: str
    pairs: tuple[str, ...] = ()


#: Every optional section, by its top-level key.
SECTIONS = {
    "surface": _Section(Surface, SURFACE_KEYS, ("miller", "layers", "vacuum"),
                        "surface: {miller: [1, 1, 1], layers: 6, vacuum: 15.0}", ""),
    "grain_boundary": _Section(GrainBoundary, BOUNDARY_KEYS, ("axis", "plane"),
                               "grain_boundary: {axis: [0, 0, 1], plane: [3, 1, 0]}", ""),
    "kpoints": _Section(Kpoints, KPOINTS_KEYS, ("spacing",), "kpoints: {spacing: 0.25}",
                        "kpoints"),
    "espresso": _Section(Espresso, ESPRESSO_KEYS, (), "", "espresso", ("pseudopotentials",)),
    "displace": _Section(Displace, DISPLACE_KEYS, (), "", "displace", ("debye_temperature",)),
    "strain": _Section(Strain, STRAIN_KEYS, (), "", "strain"),
    "relax": _Section(Relax, RELAX_KEYS, ("within",), "relax: {within: 6.0}", "relax"),
}


def parse_sections(c, data: dict) -> dict[str, Any]:
    """The Recipe fields of the sections present in ``data``."""
    fields: dict[str, Any] = {}
    for name, section in SECTIONS.items():
        if name not in data:
            continue
        given = c.mapping(data[name], name)
        c.known_keys(given, section.keys, name)
        for need in section.required:
            if need not in given:
                c.fail_missing(f"{name}.{need}", "is required", f"for example {section.example}")
        given = {k: tuple(x.items()) if k in section.pairs and isinstance(x, dict) else x
                 for k, x in given.items()}
        fields[name] = c.make(section.cls, section.prefix, **given)
    return fields
