"""Commented starter recipes, one per lattice, that `make` accepts as they are."""
from __future__ import annotations

from .formats import DEFAULT_KEYS
from .errors import InputError
from .lattices import LATTICES
from .prototypes import PROTOTYPES
from .recipe_lattices import KNOWN_LATTICES

#: A host element per lattice whose ASE reference structure is that lattice,
#: so the template builds without a lattice constant too.
_EXAMPLE_ELEMENT = {"sc": "Po", "bcc": "Fe", "fcc": "Cu", "diamond": "Si"}
_EXAMPLE_SITE = {"sc": "cube-centre", "bcc": "octahedral", "fcc": "octahedral",
                 "diamond": "tetrahedral"}

_TEXT = """\
# cellbuild recipe: {title} {element}
name: {element_lower}-{lattice}-example   # file stem of every output: letters, digits, - _ .
crystal:
  element: {element}
  lattice: {lattice}                # one of: {lattices}; compounds: `cellbuild template rocksalt`
  # Give at most one of the three; with none, ASE's reference lattice constant is used.
  a: {a}                       # lattice constant, Angstrom
  # density: 7.0                # g/cm^3
  # radius: 1.3                 # Angstrom, touching spheres
size:
  repeat: [4, 4, 4]             # exactly one of: repeat | atoms (target count) | min_length (Angstrom)
  # atoms: 2000
  # min_length: 20.0
seed: 1                         # seeds the random placement of defects
outputs: [{outputs}]
# types: [{element}]              # LAMMPS type order; may list elements a structure lacks
# defects:
#   vacancies: {{count: 1}}      # or {{fraction: 0.01}}; optional on: {element}
#   substitutions:
#     - {{element: Ni, fraction: 0.05}}
#   interstitials:
#     - {{element: C, site: {site}, count: 1}}
#   min_separation: 3.0         # Angstrom between any two defects
# checks:
#   min_distance: 1.0           # Angstrom; default: half the nearest-neighbour distance
#   physical_spacing: true      # false: build a spacing no solid has (a unit slip), on purpose
"""


_COMPOUND_TEXT = """\
# cellbuild recipe: {title}, for example {formula}
name: {formula_lower}-example       # file stem of every output: letters, digits, - _ .
crystal:
  lattice: {lattice}
  {species_line}
  a: {a}                      # lattice constant, Angstrom ({formula} at room temperature, from memory: check it)
  # density: 5.0                # g/cm^3, instead of a
{parameters}size:
  repeat: [3, 3, 3]             # exactly one of: repeat | atoms (target count) | min_length (Angstrom)
seed: 1                         # seeds the random placement of defects
outputs: [{outputs}]
{charges}# defects:
#   vacancies: {{count: 1, on: {last_label}}}   # on: a sublattice label ({labels}) or an element
{compound_defects}#   substitutions:
#     - {{element: {dopant}, count: 2, on: {first_label}}}
{interstitial}# checks:
#   physical_spacing: true      # false: build a spacing no solid has (a unit slip), on purpose
#   net_charge: 0               # elementary charges, with charges
"""

#: Comment of each internal parameter in the starter recipe.
_PARAMETER_TEXT = {"c_over_a": "c/a; or c in Angstrom; default ideal sqrt(8/3)",
                   "u": "oxygen parameter (origin choice 2); default 0.2624, from memory"}


def _compound_template(lattice: str) -> str:
    proto = PROTOTYPES[lattice]
    elements = list(proto.example.values())
    counts: dict[str, int] = {}
    for sites_of, element in zip(proto.sites().values(), elements):
        counts[element] = counts.get(element, 0) + len(sites_of)
    unit = min(counts.values())
    formula = "".join(f"{e}{n // unit if n // unit > 1 else ''}" for e, n in counts.items())
    species = "{" + ", ".join(f"{k}: {e}" for k, e in proto.example.items()) + "}"
    dopant = next(e for e in ("Ni", "Fe", "Ca", "Zn") if e not in elements)
    labels = list(proto.sublattices)
    one = len(labels) == 1
    species_line = (f"element: {elements[0]}" if one
                    else f"species: {species}    # element on each sublattice")
    values = {**proto.parameters, **proto.example_parameters}
    parameters = "".join(f"  {k}: {round(x, 4)}                # {_PARAMETER_TEXT[k]}\n"
                         for k, x in values.items())
    compound_defects = "" if one else (
        "#   schottky: {count: 1}       # vacancies in the stoichiometric ratio, one per formula unit\n"
        f"#   antisites: {{count: 1, pair: [{labels[0]}, {labels[1]}]}}   # swapped pairs\n")
    interstitial = ""
    if proto.interstitials:
        interstitial = ("#   interstitials:\n"
                        f"#     - {{element: H, site: {next(iter(proto.interstitials))}, count: 1}}"
                        f"   # sites: {', '.join(proto.interstitials)}\n")
    charges = ""
    if proto.example_charges:  # formal charges; a dopant or interstitial needs its own
        charges = ("# charges: {" + ", ".join(f"{e}: {q}" for e, q in proto.example_charges.items())
                   + "}   # ionic charges (e): LAMMPS atom_style charge; give every element one\n")
    return _COMPOUND_TEXT.format(title=proto.title, formula=formula,
                                 formula_lower=formula.lower(), lattice=lattice,
                                 species_line=species_line, a=proto.example_a,
                                 parameters=parameters, charges=charges,
                                 first_label=labels[0], last_label=labels[-1],
                                 labels=", ".join(labels), dopant=dopant,
                                 compound_defects=compound_defects, interstitial=interstitial,
                                 outputs=_OUTPUTS)


#: The formats a recipe writes by default, from the registry.
_OUTPUTS = ", ".join(DEFAULT_KEYS)


def template_for(lattice: str) -> str:
    """The commented recipe text for ``lattice`` (a lattice or a compound prototype)."""
    if lattice not in KNOWN_LATTICES:
        raise InputError("is not a known lattice", key="LATTICE", value=lattice,
                         hint=f"known lattices: {', '.join(KNOWN_LATTICES)}")
    if lattice in PROTOTYPES:
        return _compound_template(lattice)
    from ase.data import atomic_numbers, reference_states

    element = _EXAMPLE_ELEMENT[lattice]
    a = reference_states[atomic_numbers[element]]["a"]
    return _TEXT.format(title=LATTICES[lattice].title, element=element,
                        element_lower=element.lower(), lattice=lattice,
                        lattices=" | ".join(LATTICES), a=a, site=_EXAMPLE_SITE[lattice],
                        outputs=_OUTPUTS)
