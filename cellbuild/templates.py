"""Commented starter recipes, one per lattice, that `make` accepts as they are."""
from __future__ import annotations

from .errors import InputError
from .lattices import LATTICES

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
  lattice: {lattice}                # one of: {lattices}
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
#   min_separation: 5.0         # Angstrom between any two defects
# checks:
#   min_distance: 1.0           # Angstrom; default: half the nearest-neighbour distance
#   physical_spacing: true      # false: build a spacing no solid has (a unit slip), on purpose
"""


def template_for(lattice: str) -> str:
    """The commented recipe text for ``lattice``."""
    if lattice not in LATTICES:
        raise InputError("is not a known lattice", key="LATTICE", value=lattice,
                         hint=f"known lattices: {', '.join(LATTICES)}")
    from ase.data import atomic_numbers, reference_states

    element = _EXAMPLE_ELEMENT[lattice]
    a = reference_states[atomic_numbers[element]]["a"]
    return _TEXT.format(title=LATTICES[lattice].title, element=element,
                        element_lower=element.lower(), lattice=lattice,
                        lattices=" | ".join(LATTICES), a=a, site=_EXAMPLE_SITE[lattice])
