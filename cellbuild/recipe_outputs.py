"""Recipe settings for the calculation inputs: the k-point mesh and the pw.x input.

``kpoints: {spacing: 0.25, centring: gamma}`` (1/Angstrom; ``gamma`` or
``monkhorst-pack``) gives the mesh of the ``kpoints`` output (a VASP KPOINTS
file) and of ``espresso-in``. ``espresso: {ecutwfc: 45, pseudopotentials: {Cu:
Cu.pbe.UPF}, pattern: "{element}.UPF", positions: angstrom}`` gives the pw.x
input's wavefunction cutoff (Ry, required for ``espresso-in``: it depends on the
pseudopotentials, so there is no default), the pseudopotential file of each
element (named ones, the others from ``pattern``) and the units of
ATOMIC_POSITIONS (``angstrom`` or ``crystal``).
"""
from __future__ import annotations

from dataclasses import dataclass

from . import recipe_values as v
from .kpoints import CENTRINGS

#: The pseudopotential file name of an element not named in ``pseudopotentials``.
DEFAULT_PATTERN = "{element}.UPF"
#: ATOMIC_POSITIONS units cellbuild writes.
POSITION_UNITS = ("angstrom", "crystal")
#: The mesh spacing of espresso-in without ``kpoints`` (1/Angstrom).
DEFAULT_SPACING = 0.25


@dataclass(frozen=True)
class Kpoints:
    """A mesh ``spacing`` in 1/Angstrom (2 pi included) and its ``centring``."""

    spacing: float
    centring: str = "gamma"

    def __post_init__(self) -> None:
        v.store(self, "spacing", v.number(self.spacing, "spacing"))
        if self.centring not in CENTRINGS:
            v.fail("centring", self.centring, "is not a known centring",
                   f"give {' or '.join(CENTRINGS)}")


@dataclass(frozen=True)
class Espresso:
    """Settings of the pw.x input (see the module docstring)."""

    ecutwfc: float | None = None
    pseudopotentials: tuple[tuple[str, str], ...] = ()
    pattern: str = DEFAULT_PATTERN
    positions: str = "angstrom"

    def __post_init__(self) -> None:
        if self.ecutwfc is not None:
            v.store(self, "ecutwfc", v.number(self.ecutwfc, "ecutwfc"))
        pairs = v.mapping(self.pseudopotentials, "pseudopotentials",
                          "must map elements to file names", "for example {Cu: Cu.pbe.UPF}")
        v.store(self, "pseudopotentials", tuple(
            (v.element(e, "pseudopotentials"), _file_name(f, f"pseudopotentials.{e}"))
            for e, f in pairs.items()))
        if not isinstance(self.pattern, str) or "{element}" not in self.pattern:
            v.fail("pattern", self.pattern, "must contain {element}",
                   f"for example {DEFAULT_PATTERN}")
        _file_name(self.pattern.replace("{element}", "X"), "pattern")
        if self.positions not in POSITION_UNITS:
            v.fail("positions", self.positions, "is not a known unit",
                   f"give {' or '.join(POSITION_UNITS)}")

    def pseudopotential(self, element: str) -> str:
        """The pseudopotential file name of ``element``."""
        return dict(self.pseudopotentials).get(element) or self.pattern.format(element=element)


def _file_name(value, key: str) -> str:
    """A plain file name: text without spaces, quotes or path separators."""
    name = v.text(value, key)
    if any(c.isspace() or c in "'\"/\\!," for c in name) or len(name) > 200:
        v.fail(key, value, "is not a plain file name",
               "give a name without spaces, quotes, commas or slashes")
    return name


@dataclass(frozen=True)
class Relax:
    """Which atoms a relaxation may move: those ``within`` (Angstrom, periodic
    distance) of any defect; the rest are held fixed."""

    within: float

    def __post_init__(self) -> None:
        v.store(self, "within", v.number(self.within, "within"))
