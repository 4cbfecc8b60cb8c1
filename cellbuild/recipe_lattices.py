"""What a recipe may name as its crystal: the lattices and compound prototypes,
their sublattice species and interstitial site kinds, checked at the boundary."""
from __future__ import annotations

from . import recipe_values as v
from .lattices import LATTICES
from .prototypes import PROTOTYPES

#: Prototypes a recipe can name: every entry of the table.
RECIPE_PROTOTYPES = tuple(PROTOTYPES)
KNOWN_LATTICES = (*LATTICES, *RECIPE_PROTOTYPES)


def checked_species(lattice: str, species, element) -> tuple[tuple[str, str], ...]:
    """``species`` checked against the sublattices of ``lattice``, as ordered pairs."""
    labels = tuple(PROTOTYPES[lattice].sublattices)
    example = PROTOTYPES[lattice].example
    hint = "for example species: {" + ", ".join(f"{k}: {e}" for k, e in example.items()) + "}"
    if element is not None:
        v.fail("crystal.element", element, f"{lattice} has sublattices {', '.join(labels)}",
               "give crystal.species instead; " + hint)
    if species is None:
        v.fail("crystal.species", None, f"is required for {lattice}", hint)
    given = dict(species) if isinstance(species, (tuple, list)) else species
    if not isinstance(given, dict):
        v.fail("crystal.species", species, "must map each sublattice label to an element", hint)
    if set(given) != set(labels):
        v.fail("crystal.species", given, f"must name exactly the sublattices "
               f"{', '.join(labels)} of {lattice}", hint)
    return tuple((label, v.element(given[label], f"crystal.species.{label}"))
                 for label in labels)


def interstitial_sites(lattice: str) -> dict:
    """Interstitial site kinds of ``lattice`` (a lattice or a prototype)."""
    if lattice in LATTICES:
        return LATTICES[lattice].interstitials
    return PROTOTYPES[lattice].interstitials if lattice in PROTOTYPES else {}


def sites_hint(lattice: str, sites) -> str:
    if not sites:
        return f"{lattice} has no interstitial sites in cellbuild's table yet"
    return f"sites of {lattice}: {', '.join(sites)}"
