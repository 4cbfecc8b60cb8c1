"""Recipe values for the shape of the box: a supercell matrix, a surface slab and a
grain boundary, as frozen types that cannot hold an invalid value."""
from __future__ import annotations

from dataclasses import dataclass

from . import recipe_values as v

_set = v.store


def supercell_matrix(value) -> tuple[tuple[int, int, int], ...]:
    message = "must be three rows of three whole numbers, such as [[1, 1, 0], [-1, 1, 0], [0, 0, 2]]"
    rows = v.sequence(value, "size.matrix", message)
    if len(rows) != 3:
        v.fail("size.matrix", value, message)
    m = tuple(v.index_triple(row, f"size.matrix[{i}]") for i, row in enumerate(rows))
    det = (m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
           - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
           + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0]))
    if det <= 0:
        v.fail("size.matrix", [list(r) for r in m],
               "has determinant " + str(det) + ("" if det else " (its rows are dependent)"),
               "give rows with a positive determinant (right-handed; swap two rows if negative)")
    return m


@dataclass(frozen=True)
class Surface:
    """A slab: ``layers`` atomic planes normal to ``miller`` with ``vacuum`` Angstrom
    from the top plane to the image of the bottom one; ``termination`` names the
    sublattice of the top plane."""

    miller: tuple[int, int, int]
    layers: int
    vacuum: float
    termination: str | None = None

    def __post_init__(self) -> None:
        _set(self, "miller", v.index_triple(self.miller, "surface.miller"))
        _set(self, "layers", v.integer(self.layers, "surface.layers", minimum=1))
        _set(self, "vacuum", v.number(self.vacuum, "surface.vacuum", positive=False))
        if self.vacuum < 0:
            v.fail("surface.vacuum", self.vacuum, "must be at least 0")
        if self.termination is not None:
            v.text(self.termination, "surface.termination")


@dataclass(frozen=True)
class GrainBoundary:
    """A symmetric tilt boundary: grains mirrored about the ``plane`` (Miller
    indices) containing the tilt ``axis``; ``grains`` repeat units per grain
    (None: 20 A), ``vacuum`` Angstrom (0: two boundaries, fully periodic),
    ``min_distance`` Angstrom below which atoms across a boundary are removed."""

    axis: tuple[int, int, int]
    plane: tuple[int, int, int]
    grains: int | None = None
    vacuum: float = 0.0
    min_distance: float | None = None

    def __post_init__(self) -> None:
        _set(self, "axis", v.index_triple(self.axis, "grain_boundary.axis"))
        _set(self, "plane", v.index_triple(self.plane, "grain_boundary.plane"))
        if self.grains is not None:
            _set(self, "grains", v.integer(self.grains, "grain_boundary.grains", minimum=1))
        _set(self, "vacuum", v.number(self.vacuum, "grain_boundary.vacuum", positive=False))
        if self.vacuum < 0:
            v.fail("grain_boundary.vacuum", self.vacuum, "must be at least 0")
        if self.min_distance is not None:
            _set(self, "min_distance", v.number(self.min_distance, "grain_boundary.min_distance"))
