"""The recipe's defect requests as frozen types that cannot hold an invalid value.

Targets (``on``, an antisite ``pair``) are names as written: a sublattice
label, an element or an interstitial kind. Whether the crystal has them is
known only once the crystal is resolved (a CIF's labels come from the file),
so :mod:`cellbuild.defect_plan` resolves and checks them, once, for the plan.
Errors name the key inside the request (``count``, ``on``); the parser
prefixes the request's own key (``defects.substitutions[0]``).
"""
from __future__ import annotations

from dataclasses import dataclass, field

from . import recipe_values as v

#: Longest target name accepted (CIF site labels are short).
MAX_TARGET = 64

#: Most arrangements one search may write (``arrangement.structures``).
MAX_STRUCTURES = 100

#: How the defects' sites are chosen: a seeded random draw, or every
#: symmetry-distinct placement, one structure each.
PLACEMENTS = ("random", "distinct")


def target(value, key: str) -> str:
    """A target name: non-empty text without spaces, at most ``MAX_TARGET`` characters."""
    name = v.text(value, key)
    if len(name) > MAX_TARGET or any(c.isspace() for c in name):
        v.fail(key, value, "is not a sublattice label, element or interstitial site",
               f"give a name of at most {MAX_TARGET} characters without spaces")
    return name


@dataclass(frozen=True)
class Amount:
    """A defect amount: an exact ``count`` or a ``fraction`` (0 to 1) of the sites of ``on``.

    Errors name ``count``/``fraction``; the parser prefixes the defect's key."""

    count: int | None = None
    fraction: float | None = None

    def __post_init__(self) -> None:
        which = v.exclusive(self, ("count", "fraction"), "", required=True)
        if which == "count":
            v.store(self, "count", v.integer(self.count, "count"))
        else:
            v.store(self, "fraction", v.fraction(self.fraction, "fraction"))


def _is_amount(value, key: str) -> None:
    if not isinstance(value, Amount):
        v.fail(key, value, f"must be an Amount, not {v.kind(value)}")


@dataclass(frozen=True)
class Vacancies:
    """Vacancies on the sites of ``on`` (a sublattice label or an element)."""

    amount: Amount
    on: str

    def __post_init__(self) -> None:
        _is_amount(self.amount, "amount")
        target(self.on, "on")


@dataclass(frozen=True)
class Substitution:
    """``element`` on sites of ``on`` (a sublattice label or an element)."""

    element: str
    amount: Amount
    on: str

    def __post_init__(self) -> None:
        v.element(self.element, "element")
        _is_amount(self.amount, "amount")
        target(self.on, "on")
        if self.element == self.on:
            v.fail("element", self.element, f"substitutes `{self.on}` by itself")


@dataclass(frozen=True)
class Interstitial:
    """``element`` on interstitial sites of kind ``site`` (checked against the lattice
    by the recipe)."""

    element: str
    site: str
    amount: Amount

    def __post_init__(self) -> None:
        v.element(self.element, "element")
        v.text(self.site, "site")
        _is_amount(self.amount, "amount")


@dataclass(frozen=True)
class Antisite:
    """``count`` swaps of an atom on ``pair[0]`` with one on ``pair[1]`` (sublattice
    labels or elements holding different elements); the composition is unchanged."""

    pair: tuple[str, str]
    count: int

    def __post_init__(self) -> None:
        message = "must be a list of two sublattice labels or elements, such as [Ga, As]"
        items = v.sequence(self.pair, "pair", message)
        if len(items) != 2:
            v.fail("pair", list(items), message)
        pair = tuple(target(x, f"pair[{i}]") for i, x in enumerate(items))
        if pair[0] == pair[1]:
            v.fail("pair", list(pair), "names the same sites twice",
                   "name two sublattices or elements")
        v.store(self, "pair", pair)
        v.store(self, "count", v.integer(self.count, "count"))


@dataclass(frozen=True)
class Schottky:
    """``count`` Schottky defects: each one vacancy set in the stoichiometric
    ratio of the sublattices (MgO: one Mg and one O; SrTiO3: Sr, Ti and three O)."""

    count: int

    def __post_init__(self) -> None:
        v.store(self, "count", v.integer(self.count, "count"))


def _shell(value, key: str) -> int:
    """A shell number (1, 2, ...); YAML mapping keys may arrive as text ("1")."""
    if isinstance(value, str) and value.strip().isdigit():
        value = int(value)
    return v.integer(value, key, minimum=1)


@dataclass(frozen=True)
class Arrangement:
    """A searched arrangement of the substituted sublattice: ``target`` is
    ``quasirandom`` (every alpha zero) or shell -> alpha for every unlike pair;
    ``shells`` (1 to 3), Monte Carlo ``steps``, per-shell ``weights`` (default 1);
    ``structures``: how many of the best distinct arrangements become structures;
    ``vacancies``: whether vacancies on that sublattice take part as a species."""

    target: object = "quasirandom"
    shells: int = 3
    steps: int = 200_000
    weights: tuple[tuple[int, float], ...] = ()
    structures: int = 1
    vacancies: bool = False

    def __post_init__(self) -> None:
        v.store(self, "structures", v.integer(self.structures, "structures", minimum=1))
        if self.structures > MAX_STRUCTURES:
            v.fail("structures", self.structures, f"must be at most {MAX_STRUCTURES}")
        if not isinstance(self.vacancies, bool):
            v.fail("vacancies", self.vacancies, "must be true or false",
                   "true lets vacancies on the arranged sublattice take part as a species")
        if isinstance(self.target, str):
            if self.target != "quasirandom":
                v.fail("target", self.target, "is not a known target",
                       "give quasirandom, or a mapping of shell to alpha such as {1: -0.2}")
        else:
            given = v.mapping(self.target, "target", "must be quasirandom or a mapping of shell to alpha",
                              "for example target: {1: -0.2}")
            if not given:
                v.fail("target", self.target, "must be quasirandom or a mapping of shell to alpha")
            v.store(self, "target", tuple(sorted(
                (_shell(k, "target"), v.number(x, f"target.{k}", positive=False))
                for k, x in given.items())))
        v.store(self, "shells", v.integer(self.shells, "shells", minimum=1))
        if self.shells > 3:
            v.fail("shells", self.shells, "must be at most 3")
        v.store(self, "steps", v.integer(self.steps, "steps", minimum=1))
        if self.steps > 10**9:
            v.fail("steps", self.steps, "must be at most 1,000,000,000")
        w = v.mapping(self.weights, "weights",
                      "must map shells to weights, such as {1: 1.0, 2: 0.5}")
        v.store(self, "weights", tuple(sorted((_shell(k, "weights"),
                                               v.number(x, f"weights.{k}", positive=False))
                                              for k, x in w.items())))
        for shell, _ in self.weights + (self.target if isinstance(self.target, tuple) else ()):
            if shell > self.shells:
                v.fail("shells", self.shells, f"is smaller than shell {shell} named in the target "
                       "or weights")

    def target_of(self, shell: int) -> float:
        """The alpha aimed at on ``shell`` (0 for quasirandom or a shell not named)."""
        return dict(self.target).get(shell, 0.0) if isinstance(self.target, tuple) else 0.0

    def target_text(self):
        return self.target if isinstance(self.target, str) else {str(k): x for k, x in self.target}


@dataclass(frozen=True)
class Defects:
    """Defect requests; ``min_separation`` in Angstrom between any two defects.

    ``vacancies`` is one :class:`Vacancies` (key ``defects.vacancies``) or a
    list of them (keys ``defects.vacancies[i]``); it is stored as a tuple.
    """

    vacancies: tuple[Vacancies, ...] | Vacancies | None = ()
    substitutions: tuple[Substitution, ...] = ()
    interstitials: tuple[Interstitial, ...] = ()
    min_separation: float | None = None
    antisites: tuple[Antisite, ...] = ()
    schottky: Schottky | None = None
    arrangement: Arrangement | None = None
    placement: str = "random"
    vacancies_listed: bool = field(default=True, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.vacancies is None or isinstance(self.vacancies, Vacancies):
            v.store(self, "vacancies_listed", False)
            v.store(self, "vacancies", () if self.vacancies is None else (self.vacancies,))
        for name, cls in (("vacancies", Vacancies), ("substitutions", Substitution),
                          ("interstitials", Interstitial), ("antisites", Antisite)):
            items = v.sequence(getattr(self, name), f"defects.{name}", "must be a list")
            for i, item in enumerate(items):
                if not isinstance(item, cls):
                    v.fail(f"defects.{name}[{i}]", item,
                           f"must be a {cls.__name__}, not {v.kind(item)}")
            v.store(self, name, items)
        if self.schottky is not None and not isinstance(self.schottky, Schottky):
            v.fail("defects.schottky", self.schottky,
                   f"must be a Schottky, not {v.kind(self.schottky)}")
        if self.min_separation is not None:
            v.store(self, "min_separation",
                    v.number(self.min_separation, "defects.min_separation"))
        if self.placement not in PLACEMENTS:
            v.fail("defects.placement", self.placement, "is not a known placement",
                   "give random (the default) or distinct (every symmetry-distinct placement)")
        if self.placement == "distinct":
            for key in ("arrangement", "min_separation"):
                if getattr(self, key) is not None:
                    v.fail("defects.placement", self.placement, f"cannot be combined with "
                           f"defects.{key}", "distinct already gives every placement")

    def vacancy_key(self, i: int) -> str:
        """The recipe key of vacancy request ``i``."""
        return f"defects.vacancies[{i}]" if self.vacancies_listed else "defects.vacancies"

    @property
    def any(self) -> bool:
        return bool(self.vacancies or self.substitutions or self.interstitials
                    or self.antisites or self.schottky)
