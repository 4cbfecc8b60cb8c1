"""Strained and displaced structures, and the checks that hold for them.

After the defects (and any arrangement), ``strain`` maps cell rows and positions
through the deformation gradient F (x -> x F^T), then ``displace`` adds seeded
Gaussian displacements: ``rattle`` sigma per Cartesian component, or the Debye
model's per-species spread at a temperature (:func:`cellbuild.displacements.debye_msd`,
zero-point motion included). The draws come from their own stream of the seed
(``[seed, 3]``), one standard normal per atom and component in the written atom
order, so the defects stay what they were.

The topology checks (atoms per cell, sublattices, coordination against the
lattice, space group) run on the ideal structure before these steps, which is
also what NAME.defects.json describes. On the written structure:

* ``sites_kept``: every atom is displaced (beyond the strain) by less than half
  the strained nearest-neighbour distance, so it is still nearer its own site
  than any other: the topology the coordination check verified on the ideal
  structure is the written structure's. (A neighbour count within a fixed
  cutoff is no check for thermal snapshots: at 900 K a few bonds of fcc Cu
  cross the midpoint between shells while the crystal is intact.)
* ``min_distance`` is measured on the written structure (displacements can push
  atoms together).
"""
from __future__ import annotations

import numpy as np

from .audit import Check
from .structure import Structure

# cellbuild.displacements (scipy.integrate, scipy.constants: 0.4 s to import) is
# imported where it is used, so a make without strain or displacement never pays it


def distorted(recipe) -> bool:
    """Whether the recipe strains or displaces its structure."""
    return recipe.strain is not None or recipe.displace is not None


def distort(recipe, structure: Structure) -> tuple[Structure, dict]:
    """The strained and displaced structure and the facts for the report."""
    from .displacements import rattle, recovered_strain, rms_by_species
    cell, positions = structure.cell, structure.positions
    facts: dict = {"strain": None, "displacement": None}
    if recipe.strain is not None:
        f = recipe.strain.matrix()
        cell, positions = cell @ f.T, positions @ f.T
        facts["strain"] = {"asked": ({"volumetric": recipe.strain.volumetric}
                                     if recipe.strain.volumetric is not None
                                     else {"tensor": [list(r) for r in recipe.strain.tensor]}),
                           "recovered": recovered_strain(structure.cell, cell)}
    if recipe.displace is not None:
        d = recipe.displace
        sigma, per_species = _sigma(d, structure)
        delta = rattle(structure.n_atoms, sigma, np.random.default_rng([recipe.seed, 3]))
        positions = positions + delta
        facts["displacement"] = {
            "model": "rattle" if d.rattle is not None else "debye",
            "temperature": d.temperature, "sigma": per_species,
            "rms": rms_by_species(delta, structure.species, structure.symbols)}
    out = Structure(cell, positions, structure.species, structure.symbols, structure.site,
                    structure.charges)
    return out, facts


def _sigma(d, structure: Structure):
    """(sigma per atom or one value, sigma per element present) in Angstrom."""
    from .displacements import thermal_sigma
    present = [s for s, n in zip(structure.symbols, np.bincount(
        structure.species, minlength=len(structure.symbols))) if n]
    if d.rattle is not None:
        return d.rattle, {e: d.rattle for e in present}
    from .build import standard_atomic_weight

    masses = np.array([standard_atomic_weight(e) for e in structure.symbols])
    thetas = np.array([d.theta_of(e) or 0.0 for e in structure.symbols])
    by_code = np.zeros(len(structure.symbols))
    used = [i for i, e in enumerate(structure.symbols) if e in present]
    by_code[used] = thermal_sigma(masses[used], d.temperature, thetas[used])
    return by_code[structure.species], {structure.symbols[i]: float(by_code[i]) for i in used}


def distortion_checks(plan, ideal: Structure, written: Structure, workers: int = 2) -> list[Check]:
    """The checks of the written structure that hold after strain and displacement."""
    f = np.linalg.solve(ideal.cell, written.cell).T  # written cell = ideal cell @ F.T
    moved = np.linalg.norm(written.positions - ideal.positions @ f.T, axis=1)
    scale = float(abs(np.linalg.det(f))) ** (1 / 3)
    limit = 0.5 * plan.crystal.nearest * scale
    worst = int(np.argmax(moved)) if moved.size else 0
    far = int(np.count_nonzero(moved >= limit))
    return [Check("sites_kept", far == 0,
                  f"{far} of {written.n_atoms} atoms moved at least {limit:.4f} Angstrom (half "
                  f"the strained nearest-neighbour distance) from their site; largest "
                  f"{float(moved[worst]) if moved.size else 0.0:.4f} (atom {worst})")]


def with_distortion(result, plan, ideal: Structure, written: Structure, workers: int = 2):
    """The ideal structure's audit with the written structure's distance and cell
    facts, its ``min_distance`` check measured on the written structure and the
    ``sites_kept`` check added."""
    from dataclasses import replace

    from .audit import _density, _distance_check

    values = dict(result.values)
    distance = _distance_check(plan.recipe, written, plan.crystal.nearest, values, workers, None)
    values["cell_lengths"] = [float(x) for x in np.linalg.norm(written.cell, axis=1)]
    values["density"] = _density(written)
    checks = [distance if c.name == "min_distance" else c for c in result.checks]
    checks += distortion_checks(plan, ideal, written, workers)
    return replace(result, checks=tuple(checks), values=values)
