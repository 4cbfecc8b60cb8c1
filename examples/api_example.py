"""Use cellbuild from Python: build a recipe stage by stage, then write it.

Run from the repository root: python examples/api_example.py
"""
from __future__ import annotations

from cellbuild.audit import audit
from cellbuild.pipeline import build, make
from cellbuild.recipe import load_recipe

recipe = load_recipe("recipes/al-mg-solutes.yaml")

# Stage by stage, no files: plan, structure and defect placements.
built = build(recipe)
print(f"{built.plan.n_sites} lattice sites, a = {built.plan.lattice_constant} Angstrom")
print("composition:", built.structure.composition())

# The checks, computed from the coordinates.
result = audit(built.plan, built.structure, built.placements)
for check in result.checks:
    print(f"  {'ok  ' if check.passed else 'FAIL'} {check.name}: {check.detail}")

# Hand the structure to ASE (or pymatgen with .to_pymatgen()).
atoms = built.structure.to_ase()
print("ASE sees", len(atoms), "atoms in a cell of volume", round(atoms.get_volume(), 3))

# Or run the whole pipeline and write the files and the report.
written = make(recipe, "out/api-example", force=True)
print("report:", written.report_path, "passed:", written.passed)
