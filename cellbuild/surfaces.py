"""Slabs with vacuum: a crystal cut along (h k l) into atomic planes.

:func:`slab` turns a resolved crystal into a new :class:`~cellbuild.crystal.Crystal`
whose repeat unit is one in-plane period of the slab: x and y the shortest
orthogonal in-plane lattice periods (or the recipe's ``axes``), z along the
plane normal, ``layers`` atomic planes with the top plane holding the
``termination`` sublattice, and ``vacuum`` Angstrom from the top plane to the
image of the bottom plane. Repeating it in x and y makes the slab; the cell
stays periodic in 3D with the gap in z (the usual setting of DFT slab codes),
so the audit's neighbour counts see no neighbours across a gap wider than their
cutoff, and surface atoms expect their reduced coordination from the same
topology as the bulk (fcc(111) 9, fcc(100) 8, bcc(110) 6, ...). Lengths in
Angstrom.
"""
from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np

from .crystal import Crystal
from .errors import InputError
from .orientation import MAX_UNIT_SITES, oriented, shortest_translation, unit_crystal

#: Atoms closer than this in z (Angstrom) are one plane.
PLANE_TOLERANCE = 1e-6
#: Largest index searched for in-plane directions.
_SEARCH = 6


def in_plane_axes(crystal: Crystal, miller: tuple[int, int, int]) -> tuple[tuple[int, ...], ...]:
    """(x, y, z) directions for a slab of a cubic cell: z along (h k l), x and y
    the orthogonal pair of in-plane lattice translations of smallest area, x the
    shorter (ties: the larger indices first, for a fixed choice), right-handed."""
    g = math.gcd(*[abs(v) for v in miller])
    normal = np.array(miller) // g
    candidates = [np.array(u) for u in itertools.product(range(-_SEARCH, _SEARCH + 1), repeat=3)
                  if any(u) and int(np.dot(u, normal)) == 0 and math.gcd(*map(abs, u)) == 1]

    lengths = [float(np.linalg.norm(shortest_translation(crystal, u, "surface.miller")
                                    @ crystal.cell)) for u in candidates]
    pairs = [(round(lengths[i] * lengths[j], 9), round(lengths[i], 9), tuple(-candidates[i]),
              tuple(-candidates[j]), i, j)
             for i in range(len(candidates)) for j in range(len(candidates))
             if lengths[i] <= lengths[j] and int(np.dot(candidates[i], candidates[j])) == 0]
    *_, i, j = min(pairs)
    x, y = candidates[i], candidates[j]
    if np.linalg.det(np.array([x, y, normal], dtype=float)) < 0:
        y = -y
    return tuple(tuple(int(v) for v in d) for d in (x, y, normal))


def slab(crystal: Crystal, miller: tuple[int, int, int], layers: int, vacuum: float,
         termination: str | None, axes=None, charges: dict | None = None) -> Crystal:
    """The slab's repeat unit (see the module docstring); ``charges`` (element ->
    charge) judge whether the planes are polar."""
    value = {"miller": list(miller), "layers": layers, "vacuum": vacuum}
    cubic = np.allclose(crystal.cell, crystal.cell[0, 0] * np.eye(3))
    if axes is None:
        if not cubic:
            raise InputError(f"needs crystal.axes for the {crystal.prototype} cell", key="surface",
                             value=value, hint="give axes with z along the plane normal; hcp "
                             "(0 0 1): {x: [1, 0, 0], y: [1, 2, 0], z: [0, 0, 1]}")
        axes = in_plane_axes(crystal, miller)
    normal = np.array(miller, dtype=float) @ np.linalg.inv(crystal.cell).T  # reciprocal
    z_dir = np.array(axes[2], dtype=float) @ crystal.cell
    if np.linalg.norm(np.cross(normal, z_dir)) > 1e-9 * np.linalg.norm(normal) * np.linalg.norm(z_dir) \
            or float(normal @ z_dir) <= 0:
        raise InputError(f"has z along {list(axes[2])}, not along the normal of ({' '.join(map(str, miller))})",
                         key="crystal.axes", value={n: list(a) for n, a in zip("xyz", axes)},
                         hint="give z parallel to the plane normal")
    unit = oriented(crystal, tuple(tuple(a) for a in axes))
    period = float(unit.cell[2, 2])
    z_lattice = unit.basis[:, 2] * period
    planes = np.unique(np.round(z_lattice / PLANE_TOLERANCE).astype(np.int64)) * PLANE_TOLERANCE
    per_unit = len(planes)
    # every plane of enough stacked units, bottom first; choose the window of
    # `layers` planes whose top plane holds the termination sublattice
    stack = math.ceil(layers / per_unit) + 1
    labels = np.array(unit.sublattice)
    start = 0
    if termination is not None:
        if termination not in set(labels):
            raise InputError("is not a sublattice of the crystal", key="surface.termination",
                             value=termination, hint="sublattices: " + ", ".join(dict.fromkeys(labels)))
        on_plane = [set(labels[np.abs(z_lattice - z) < 1e-5]) for z in planes]
        tops = [k for k in range(per_unit) if termination in on_plane[(k + layers - 1) % per_unit]]
        if not tops:
            raise InputError("terminates no plane of this orientation", key="surface.termination",
                             value=termination)
        start = tops[0]
    z_all = (np.arange(stack)[:, None] * period + planes[None, :]).ravel()
    window = z_all[start:start + layers]
    bottom, top = float(window[0]), float(window[-1])
    height = top - bottom + vacuum
    if height <= 0:
        raise InputError("leaves no room for the slab", key="surface.vacuum", value=vacuum,
                         hint="give a vacuum thickness in Angstrom, at least 0")
    # every grid site of the stacked units between the bottom and top planes
    shifts = np.arange(stack, dtype=np.float64)
    frac = (unit.site_frac[None, :, :] + np.stack([np.zeros(stack), np.zeros(stack), shifts],
                                                    axis=1)[:, None, :]).reshape(-1, 3)
    local = np.tile(np.arange(unit.n_grid), stack)
    z = frac[:, 2] * period
    keep = (z > bottom - 1e-5) & (z < top + 1e-5)
    frac, local, z = frac[keep], local[keep], z[keep] - bottom
    order = np.lexsort((frac[:, 0], frac[:, 1], np.round(z, 6), local >= unit.n_basis))
    frac, local, z = frac[order], local[order], z[order]
    if len(frac) > MAX_UNIT_SITES:
        raise InputError(f"gives {len(frac):,} sites per in-plane period, more than "
                         f"{MAX_UNIT_SITES:,}", key="surface.layers", value=layers,
                         hint="fewer layers")
    cell = np.diag([unit.cell[0, 0], unit.cell[1, 1], height])
    new_frac = np.stack([frac[:, 0], frac[:, 1], z / height], axis=1)
    made = unit_crystal(unit, cell, new_frac, local, unit_rows=None)
    facts = _facts(miller, layers, vacuum, termination, cell, made.basis[:, 2] * height,
                   made.sublattice, made.elements, charges, axes)
    return dataclasses.replace(made, surface=facts)


def _facts(miller, layers, vacuum, termination, cell, z, sublattice, elements, charges,
           axes) -> dict:
    """Surface area (A^2), atoms per area of the top plane, plane spacings (A),
    the top plane's sublattices and whether the stacking is polar."""
    area = float(cell[0, 0] * cell[1, 1])
    keys = np.round(z / PLANE_TOLERANCE).astype(np.int64)
    levels, plane_of = np.unique(keys, return_inverse=True)
    heights = levels * PLANE_TOLERANCE
    spacing: list[float] = []  # distinct spacings, equal within the plane tolerance
    for d in np.sort(np.diff(heights)):
        if not spacing or d - spacing[-1] > 10 * PLANE_TOLERANCE:
            spacing.append(float(d))
    spacing = [round(d, 6) for d in spacing]
    top = plane_of == len(levels) - 1
    elements_arr = np.array(elements)
    bulk = {e: int(np.sum(elements_arr == e)) for e in dict.fromkeys(elements)}
    polar = False
    for k in range(len(levels)):  # a plane whose composition differs from the slab's is charged
        on = elements_arr[plane_of == k]
        if charges:
            polar |= abs(sum(charges.get(e, 0.0) for e in on)) > 1e-9
        else:
            mine = {e: int(np.sum(on == e)) for e in bulk}
            total = sum(bulk.values())
            polar |= any(abs(mine[e] / len(on) - bulk[e] / total) > 1e-9 for e in bulk)
    return {"miller": list(miller), "layers": int(len(levels)), "vacuum": vacuum,
            "termination": termination, "axes": {n: list(a) for n, a in zip("xyz", axes)},
            "area": area, "top_plane_atoms_per_area": float(np.sum(top)) / area,
            "top_plane_sublattices": sorted(set(np.array(sublattice)[top].tolist())),
            "interlayer_spacing": spacing, "polar": bool(polar)}
