"""Commented starter recipes, one per lattice, that `make` accepts as they are."""
from __future__ import annotations

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
outputs: [lammps-data, cif, xyz, poscar]
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
  species: {species}    # element on each sublattice
  a: {a}                      # lattice constant, Angstrom ({formula} at room temperature, from memory: check it)
  # density: 5.0                # g/cm^3, instead of a
size:
  repeat: [3, 3, 3]             # exactly one of: repeat | atoms (target count) | min_length (Angstrom)
seed: 1                         # seeds the random placement of defects
outputs: [lammps-data, cif, xyz, poscar]
# defects:
#   vacancies: {{count: 1, on: {last}}}   # on: an element of the crystal
#   substitutions:
#     - {{element: {dopant}, count: 2, on: {first}}}
# checks:
#   physical_spacing: true      # false: build a spacing no solid has (a unit slip), on purpose
"""


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
    return _COMPOUND_TEXT.format(title=proto.title, formula=formula,
                                 formula_lower=formula.lower(), lattice=lattice,
                                 species=species, a=proto.example_a, first=elements[0],
                                 last=elements[-1], dopant=dopant)


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
                        lattices=" | ".join(LATTICES), a=a, site=_EXAMPLE_SITE[lattice])
