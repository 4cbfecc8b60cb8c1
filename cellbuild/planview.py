"""What `cellbuild plan` shows: a recipe resolved without building."""
from __future__ import annotations

from pathlib import Path

from .build import Plan, resolve


def describe(plan: Plan) -> dict:
    """JSON-ready description of a plan: sizes, counts and estimates (bytes)."""
    recipe = plan.recipe
    defects = [{"kind": req.kind, "element": req.element, "on": req.on, "key": req.key,
                "placed": n} for req, n in plan.defect_counts]
    n_atoms = plan.n_atoms
    scale = n_atoms / max(plan.n_sites, 1)
    return {
        "name": recipe.name,
        "lattice": recipe.crystal.lattice,
        "element": recipe.crystal.element,
        "species": dict(recipe.crystal.species),
        "parameters": dict(plan.crystal.parameters),
        "cif": recipe.crystal.cif,
        "lattice_constant": plan.lattice_constant,
        "lattice_constant_source": plan.lattice_constant_source,
        "axes": None if recipe.crystal.axes is None else {
            n: list(a) for n, a in zip("xyz", recipe.crystal.axes)},
        "matrix": [list(r) for r in recipe.size.matrix] if recipe.size.matrix else None,
        "repeat": list(plan.repeat),
        "box": list(plan.box),
        "cell": plan.crystal.supercell(plan.repeat).tolist(),
        "n_sites": plan.n_sites,
        "n_atoms": n_atoms,
        "target_atoms": recipe.size.atoms,
        "size_note": plan.size_note,
        "sublattices": _sublattices(plan),
        "defects": defects,
        "charges": recipe.charge_of(),
        "arrangement": _arrangement(recipe),
        "outputs": list(recipe.outputs),
        "estimated_memory_bytes": plan.estimated_memory,
        "estimated_file_bytes": {k: int(v * scale) for k, v in plan.estimated_files.items()},
        "warnings": list(plan.warnings),
    }


def _arrangement(recipe) -> dict | None:
    """The arrangement search asked for (target, shells, steps), or None."""
    a = recipe.defects.arrangement
    if a is None:
        return None
    return {"target": a.target_text(), "shells": a.shells, "steps": a.steps,
            "weights": {str(k): w for k, w in a.weights}}


def _sublattices(plan: Plan) -> dict:
    """Sublattice label -> its element and number of sites in the supercell."""
    crystal, out = plan.crystal, {}
    for label, element in zip(crystal.sublattice, crystal.elements):
        entry = out.setdefault(label, {"element": element, "sites": 0})
        entry["sites"] += plan.n_cells
    return out


def describe_plans(path: str | Path, *, strict: bool = False) -> list[dict]:
    """Plans for the recipe file at ``path``: one per sweep point, in sweep order.

    A sweep point's plan also holds ``sweep``, the values of that point.
    """
    from .sweep import expand_file

    plans = []
    for point in expand_file(path):
        plan = describe(resolve(point.recipe, strict=strict))
        if point.values:
            plan["sweep"] = point.values
        plans.append(plan)
    return plans
