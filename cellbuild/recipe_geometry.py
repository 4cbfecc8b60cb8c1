"""Recipe values for the shape of the box: a supercell matrix, a surface slab and a
grain boundary, as frozen types that cannot hold an invalid value."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

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


@dataclass(frozen=True)
class Displace:
    """Seeded displacements of every atom: ``rattle`` (Gaussian, standard deviation
    per Cartesian component, Angstrom), or the Debye model's spread at
    ``temperature`` (K) with ``debye_temperature`` (K; one value, or element ->
    value as pairs)."""

    rattle: float | None = None
    temperature: float | None = None
    debye_temperature: object = None

    def __post_init__(self) -> None:
        which = v.exclusive(self, ("rattle", "temperature"), "", required=True)
        if which == "rattle":
            v.store(self, "rattle", v.number(self.rattle, "rattle"))
            if self.debye_temperature is not None:
                v.fail("debye_temperature", self.debye_temperature, "goes with temperature",
                       "give temperature and debye_temperature, or rattle alone")
            return
        v.store(self, "temperature", v.number(self.temperature, "temperature", positive=False))
        if self.temperature < 0:
            v.fail("temperature", self.temperature, "must be at least 0 K")
        theta = self.debye_temperature
        if theta is None:
            v.fail("debye_temperature", None, "is required with temperature",
                   "give the Debye temperature in K, one value or per element")
        if isinstance(theta, (tuple, list, dict)):
            pairs = v.mapping(theta, "debye_temperature", "must be a number or a mapping of "
                              "element to Debye temperature (K)", "for example {Cu: 343, Ni: 450}")
            v.store(self, "debye_temperature", tuple(
                (v.element(e, "debye_temperature"), v.number(t, f"debye_temperature.{e}"))
                for e, t in pairs.items()))
        else:
            v.store(self, "debye_temperature", v.number(theta, "debye_temperature"))

    def theta_of(self, element: str) -> float | None:
        """The Debye temperature (K) of ``element``, or None if the recipe gives none."""
        theta = self.debye_temperature
        return dict(theta).get(element) if isinstance(theta, tuple) else theta


@dataclass(frozen=True)
class Strain:
    """A homogeneous strain of cell and positions: ``volumetric`` (V/V0 - 1, applied
    isotropically) or ``tensor`` (the symmetric small-strain tensor eps, 3 x 3,
    deformation F = I + eps; not Voigt engineering shears)."""

    volumetric: float | None = None
    tensor: tuple | None = None

    def __post_init__(self) -> None:
        which = v.exclusive(self, ("volumetric", "tensor"), "", required=True)
        if which == "volumetric":
            v.store(self, "volumetric", v.number(self.volumetric, "volumetric", positive=False))
        else:
            rows = self.tensor
            if not isinstance(rows, (list, tuple)) or len(rows) != 3 or any(
                    not isinstance(r, (list, tuple)) or len(r) != 3 for r in rows):
                v.fail("tensor", rows, "must be a 3 x 3 list of numbers")
            v.store(self, "tensor", tuple(tuple(v.number(x, "tensor", positive=False) for x in r)
                                          for r in rows))
        from .displacements import strain_matrix

        try:
            strain_matrix(self.volumetric, None if self.tensor is None else np.array(self.tensor))
        except ValueError as exc:
            v.fail(which, self.volumetric if which == "volumetric" else [list(r) for r in self.tensor],
                   f"is not a usable strain ({exc})")

    def matrix(self) -> np.ndarray:
        """The deformation gradient F (cell rows and positions map as x @ F.T)."""
        from .displacements import strain_matrix

        return strain_matrix(self.volumetric, None if self.tensor is None else np.array(self.tensor))
