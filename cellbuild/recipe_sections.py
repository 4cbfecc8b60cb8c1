"""The recipe's optional top-level sections, parsed into their frozen types:
``surface``, ``grain_boundary``, ``kpoints``, ``espresso``, ``displace``,
``strain`` and ``relax``. ``c`` is :mod:`cellbuild.recipe`'s checker (it locates
errors in the file); each section's keys are checked against its list here.
"""
from __future__ import annotations

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


def parse_sections(c, data: dict) -> dict[str, Any]:
    """The Recipe fields of the sections present in ``data``."""
    fields: dict[str, Any] = {}
    if "surface" in data:
        surface = c.mapping(data["surface"], "surface")
        c.known_keys(surface, SURFACE_KEYS, "surface")
        for need in ("miller", "layers", "vacuum"):
            if need not in surface:
                c.fail_missing(f"surface.{need}", "is required",
                               "for example surface: {miller: [1, 1, 1], layers: 6, vacuum: 15.0}")
        fields["surface"] = c.make(Surface, "", **surface)
    if "grain_boundary" in data:
        gb = c.mapping(data["grain_boundary"], "grain_boundary")
        c.known_keys(gb, BOUNDARY_KEYS, "grain_boundary")
        for need in ("axis", "plane"):
            if need not in gb:
                c.fail_missing(f"grain_boundary.{need}", "is required",
                               "for example grain_boundary: {axis: [0, 0, 1], plane: [3, 1, 0]}")
        fields["grain_boundary"] = c.make(GrainBoundary, "", **gb)
    if "kpoints" in data:
        k = c.mapping(data["kpoints"], "kpoints")
        c.known_keys(k, KPOINTS_KEYS, "kpoints")
        if "spacing" not in k:
            c.fail_missing("kpoints.spacing", "is required", "for example kpoints: {spacing: 0.25}")
        fields["kpoints"] = c.make(Kpoints, "kpoints", **k)
    if "espresso" in data:
        e = c.mapping(data["espresso"], "espresso")
        c.known_keys(e, ESPRESSO_KEYS, "espresso")
        if "pseudopotentials" in e:
            e = {**e, "pseudopotentials": tuple(c.mapping(e["pseudopotentials"],
                                                          "espresso.pseudopotentials").items())}
        fields["espresso"] = c.make(Espresso, "espresso", **e)
    if "displace" in data:
        d = c.mapping(data["displace"], "displace")
        c.known_keys(d, DISPLACE_KEYS, "displace")
        if isinstance(d.get("debye_temperature"), dict):
            d = {**d, "debye_temperature": tuple(d["debye_temperature"].items())}
        fields["displace"] = c.make(Displace, "displace", **d)
    if "strain" in data:
        st = c.mapping(data["strain"], "strain")
        c.known_keys(st, STRAIN_KEYS, "strain")
        fields["strain"] = c.make(Strain, "strain", **st)
    if "relax" in data:
        rx = c.mapping(data["relax"], "relax")
        c.known_keys(rx, RELAX_KEYS, "relax")
        if "within" not in rx:
            c.fail_missing("relax.within", "is required", "for example relax: {within: 6.0}")
        fields["relax"] = c.make(Relax, "relax", **rx)
    return fields
