"""Slabs in files: a vacuum gap along one cell vector, found from the atoms.

:func:`find_vacuum` looks, along each cell vector, for the widest empty band of
the atoms' fractional coordinates (periodic); a band wider than
``MIN_VACUUM`` Angstrom (measured across the cell, perpendicular to the other two
vectors) makes the structure a slab. :func:`closed` removes the gap: the atoms
are shifted so the gap ends at the cell face and that cell vector is shortened to
the slab's thickness plus one spacing between its planes, which gives the bulk
crystal back where the layers stack in whole periods, so the lattice match of
``inspect`` sees the crystal the slab was cut from, not its surfaces as defects.
Lengths in Angstrom.
"""
from __future__ import annotations

import numpy as np

from .cellgeom import perpendicular_widths
from .structure import Structure

#: Narrowest empty band counted as vacuum, Angstrom (about twice the longest
#: nearest-neighbour distances of solids).
MIN_VACUUM = 6.0
#: Atoms within this of each other across the cell vector share a plane, Angstrom.
_PLANE = 0.05
#: Atoms looked at first (every k-th) when telling bulk from a slab.
_BULK_SAMPLE = 1 << 16


def find_vacuum(structure: Structure) -> dict | None:
    """``{"axis", "vacuum", "thickness", "plane_spacing", "start"}`` for the widest
    gap wider than MIN_VACUUM along a cell vector (axis 0, 1, 2 for a, b, c), or None.
    ``start``: fractional coordinate where the atoms begin after the gap."""
    if structure.n_atoms < 2:
        return None
    widths = perpendicular_widths(structure.cell)
    # bulk, the common case, is told without the (N, 3) matrix product (whose BLAS
    # threads stall on a busy machine) and without sorting: fractional
    # coordinates from three column products, an error of ulps far within the
    # bands' 1 % margin
    inverse, p = np.linalg.inv(structure.cell), structure.positions
    # a share of the atoms that fills every band proves it for all (bulk in a
    # 16th of the time); else all the atoms are looked at
    step = structure.n_atoms // _BULK_SAMPLE
    if any(all(_no_wide_gap(np.mod(q[:, 0] * inverse[0, k] + q[:, 1] * inverse[1, k]
                                   + q[:, 2] * inverse[2, k], 1.0), float(widths[k]))
               for k in range(3)) for q in ([p[::step]] if step > 1 else []) + [p]):
        return None
    frac = np.mod(structure.fractional(), 1.0)
    best = None
    for axis in range(3):
        if _no_wide_gap(frac[:, axis], float(widths[axis])):
            continue  # the common case, bulk, without sorting a million coordinates
        f = np.sort(frac[:, axis])
        gaps = np.diff(np.concatenate([f, [f[0] + 1.0]]))
        k = int(np.argmax(gaps))
        vacuum = float(gaps[k] * widths[axis])
        if vacuum > MIN_VACUUM and (best is None or vacuum > best["vacuum"]):
            heights = np.sort(np.mod(f - f[(k + 1) % len(f)], 1.0)) * widths[axis]
            steps = np.diff(heights)
            steps = steps[steps > _PLANE]
            spacing = float(np.median(steps)) if steps.size else 0.0
            best = {"axis": "abc"[axis], "vacuum": vacuum,
                    "thickness": float(heights[-1] - heights[0]),
                    "plane_spacing": spacing, "start": float(f[(k + 1) % len(f)])}
    return best


def _no_wide_gap(f: np.ndarray, width: float) -> bool:
    """True when every band of ``width`` / bins along the axis holds an atom, with
    bins > 2 x width / MIN_VACUUM: no two neighbouring coordinates (periodic)
    are then two bands apart, so no gap exceeds MIN_VACUUM (a 1 % margin covers
    the rounding of the band index)."""
    bins = int(np.ceil(2.02 * width / MIN_VACUUM)) + 1
    if bins > f.size:
        return False  # fewer atoms than bands: sort them
    band = np.minimum((f * bins).astype(np.int64), bins - 1)
    return bool(np.all(np.bincount(band, minlength=bins)))


def closed(structure: Structure, slab: dict, drop: int = 0) -> Structure:
    """The slab with its gap closed to one plane spacing (see the module docstring),
    after leaving out its top ``drop`` planes (so that the planes left stack in
    whole periods: a 7-plane fcc(100) slab closes into bulk with 6)."""
    axis = "abc".index(slab["axis"])
    width = float(perpendicular_widths(structure.cell)[axis])
    frac = np.mod(structure.fractional(), 1.0)
    frac[:, axis] = np.mod(frac[:, axis] - slab["start"], 1.0)
    height = frac[:, axis] * width
    keep = np.ones(structure.n_atoms, dtype=bool)
    if drop:
        levels = np.sort(height)
        tops = levels[np.concatenate([[True], np.diff(levels) > _PLANE])]  # one per plane
        if drop >= len(tops):
            return structure
        keep = height < tops[-drop] - _PLANE
    top = float(height[keep].max())
    scale = (top + slab["plane_spacing"]) / width
    cell = structure.cell.copy()
    cell[axis] *= scale
    frac[:, axis] /= scale
    return Structure(cell, frac[keep] @ cell, structure.species[keep], structure.symbols)


#: Top planes left out, at most, while looking for a whole stacking period.
MAX_DROPPED_PLANES = 2


def with_bulk_view(result: dict, bulk: dict, slab: dict) -> dict:
    """``result`` of the slab with the lattice, prototype and defects (and the
    ``expected_lattice`` check) of its closed-gap ``bulk`` view, and ``slab``."""
    for key in ("lattice", "lattice_match", "prototype", "defects"):
        result[key] = bulk.get(key)
    result.pop("prototype_note", None)
    if "prototype_note" in bulk:
        result["prototype_note"] = bulk["prototype_note"]
    views = {c["name"]: c for c in bulk["checks"]}
    result["checks"] = [views.get("expected_lattice", c) if c["name"] == "expected_lattice" else c
                        for c in result["checks"]]
    result["passed"] = all(c["passed"] for c in result["checks"])
    result["slab"] = {k: v for k, v in slab.items() if k != "start"}
    return result


def slab_text(slab: dict) -> str:
    """One line for the text summary."""
    return (f"vacuum {slab['vacuum']:.3f} A along {slab['axis']}, slab {slab['thickness']:.3f} A "
            f"thick, planes {slab['plane_spacing']:.4f} A apart (lattice and defects judged with "
            "the gap closed)")
