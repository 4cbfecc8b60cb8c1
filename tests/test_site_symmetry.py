"""The space group of a defected supercell from its crystal's operations
(cellbuild.site_symmetry) against spglib's own search on the built coordinates.

Reference: spglib (the registry's package) run on the built structure with the
vacant sites marked, exactly as the audit ran it before the shortcut; the
shortcut must give the same International Tables number and short symbol for
every structure it answers, and leave to spglib every structure it cannot
prove (interstitials, displaced atoms, a species on two elements' sites,
defect patterns with a translation shorter than the supercell).
"""
from __future__ import annotations

import numpy as np
import pytest
import spglib

from cellbuild.audit import structure_spacegroup
from cellbuild.build import site_positions
from cellbuild.pipeline import build
from cellbuild.recipe import parse_recipe
from cellbuild.site_symmetry import defected_spacegroup, unit_operations
from cellbuild.structure import Structure

from conftest import recipe_dict


def _built(data: dict):
    return build(parse_recipe(data))


def _vacancies(built):
    vacant = [site_positions(built.plan.crystal, built.plan.repeat, p.site_ids)
              for p in built.placements if p.kind == "vacancy"]
    return np.concatenate(vacant) if vacant else None


def _both(built):
    """(shortcut or None, spglib's search) for a built structure."""
    vac = _vacancies(built)
    n_vac = 0 if vac is None else len(vac)
    quick = defected_spacegroup(built.plan.crystal, built.plan.repeat, built.structure, n_vac)
    full = structure_spacegroup(built.structure, vac)
    return quick, (full["symbol"], full["number"])


CASES = [
    # (crystal, repeat, defects): elements, compounds, non-cubic repeats, hcp
    ({"element": "Cu", "lattice": "fcc", "a": 3.615}, (3, 3, 3), {"vacancies": {"count": 1}}),
    ({"element": "Cu", "lattice": "fcc", "a": 3.615}, (3, 3, 3), {"vacancies": {"count": 2}}),
    ({"element": "Cu", "lattice": "fcc", "a": 3.615}, (3, 2, 2), {"vacancies": {"count": 1}}),
    ({"element": "Cu", "lattice": "fcc", "a": 3.615}, (2, 2, 2),
     {"substitutions": [{"element": "Ni", "count": 3}]}),
    ({"element": "Fe", "lattice": "bcc", "a": 2.8665}, (3, 3, 3),
     {"vacancies": {"count": 1}, "substitutions": [{"element": "Cr", "count": 2}]}),
    ({"element": "Fe", "lattice": "bcc", "a": 2.8665}, (4, 3, 2), {"vacancies": {"count": 3}}),
    ({"element": "Po", "lattice": "sc", "a": 3.35}, (4, 4, 4), {"vacancies": {"count": 2}}),
    ({"element": "Si", "lattice": "diamond", "a": 5.431}, (2, 2, 2), {"vacancies": {"count": 1}}),
    ({"element": "Si", "lattice": "diamond", "a": 5.431}, (2, 2, 2),
     {"substitutions": [{"element": "Ge", "count": 4}]}),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}, (2, 2, 2),
     {"vacancies": {"count": 1, "on": "O"}}),
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}, (2, 2, 2),
     {"schottky": {"count": 1}}),
    ({"lattice": "perovskite", "species": {"A": "Sr", "B": "Ti", "X": "O"}, "a": 3.905}, (3, 3, 3),
     {"vacancies": {"count": 2, "on": "O"}}),
    ({"lattice": "zincblende", "species": {"A": "Ga", "B": "As"}, "a": 5.653}, (2, 2, 2),
     {"antisites": {"count": 1, "pair": ["Ga", "As"]}}),
    ({"lattice": "fluorite", "species": {"A": "Ca", "X": "F"}, "a": 5.463}, (2, 2, 2),
     {"vacancies": {"count": 1, "on": "F"}}),
    ({"lattice": "spinel", "species": {"A": "Mg", "B": "Al", "X": "O"}, "a": 8.08}, (1, 1, 1),
     {"vacancies": {"count": 1, "on": "X"}}),
    ({"element": "Ti", "lattice": "hcp", "a": 2.951, "c_over_a": 1.588}, (3, 3, 2),
     {"vacancies": {"count": 1}}),
    ({"element": "Cu", "lattice": "fcc", "a": 3.615}, (2, 2, 2),
     {"interstitials": [{"element": "Cu", "count": 1, "site": "octahedral"}]}),
]


@pytest.mark.parametrize("crystal, repeat, defects", CASES)
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_the_shortcut_agrees_with_spglibs_search(crystal, repeat, defects, seed):
    data = recipe_dict(repeat=repeat, seed=seed, defects=defects)
    data["crystal"] = crystal
    built = _built(data)
    quick, full = _both(built)
    if quick is not None:
        assert quick == full


def test_the_shortcut_answers_the_common_cases():
    """Vacancies and substitutions on one element's sites are answered (else the
    agreement above would hold vacuously); a vacancy in a 3x3x3 fcc supercell
    leaves the site symmetry m-3m with the simple cubic lattice of the supercell,
    Pm-3m (221) (International Tables vol. A; common practice)."""
    answered = 0
    for crystal, repeat, defects in CASES:
        if set(defects) - {"vacancies", "substitutions"}:
            continue
        data = recipe_dict(repeat=repeat, seed=1, defects=defects)
        data["crystal"] = crystal
        quick, full = _both(_built(data))
        answered += quick is not None
    assert answered >= 10
    data = recipe_dict(repeat=(3, 3, 3), defects={"vacancies": {"count": 1}})
    assert _both(_built(data))[0] == ("Pm-3m", 221)


def test_refused_where_it_cannot_prove_the_answer():
    """Interstitials, an antisite (an element on the other element's sites), and
    a perfect structure (its space group is a check, measured by spglib) go to
    spglib; so does a structure whose atoms were moved."""
    cu = {"element": "Cu", "lattice": "fcc", "a": 3.615}
    inter = _built({**recipe_dict(repeat=(2, 2, 2), defects={"interstitials": [
        {"element": "Cu", "count": 1, "site": "octahedral"}]}), "crystal": cu})
    anti = _built({**recipe_dict(repeat=(2, 2, 2), defects={"antisites": {
        "count": 1, "pair": ["Ga", "As"]}}), "crystal": {
            "lattice": "zincblende", "species": {"A": "Ga", "B": "As"}, "a": 5.653}})
    perfect = _built(recipe_dict(repeat=(2, 2, 2)))
    for b in (inter, anti, perfect):
        assert _both(b)[0] is None
    vac = _built(recipe_dict(repeat=(3, 3, 3), defects={"vacancies": {"count": 1}}))
    s = vac.structure
    moved = s.positions.copy()
    moved[0, 0] += 0.01
    shaken = Structure(s.cell, moved, s.species, s.symbols, site=s.site)
    assert defected_spacegroup(vac.plan.crystal, vac.plan.repeat, shaken, 1) is None


def test_a_pattern_with_a_shorter_translation_goes_to_spglib():
    """Two vacancies half a supercell apart repeat with a translation shorter than
    the supercell's: the shortcut, which searches the supercell's operations only,
    must step aside (spglib's search then finds the larger group)."""
    from cellbuild.defects import Placement  # noqa: F401 -- the site arithmetic below

    built = _built(recipe_dict(repeat=(2, 2, 2)))
    s = built.structure
    # sites are cell * n_grid + basis; cells (0,0,0) and (1,0,0) basis 0 of a 2x2x2 fcc
    n_grid = built.plan.crystal.n_grid
    drop = np.isin(s.site, [0, 4 * n_grid])
    keep = ~drop
    holed = Structure(s.cell, s.positions[keep], s.species[keep], s.symbols, site=s.site[keep])
    assert defected_spacegroup(built.plan.crystal, built.plan.repeat, holed, 2) is None
    marked = structure_spacegroup(holed, s.positions[drop])
    assert marked["number"] > 0


def test_unit_operations_permute_the_basis_like_spglib():
    """For every operation spglib finds for the fcc conventional cell, the basis
    permutation maps each site onto a site of the same element (spglib's
    operations, applied by hand)."""
    built = _built(recipe_dict(repeat=(1, 1, 1)))
    ops = unit_operations(built.plan.crystal)
    assert ops is not None
    cell = built.plan.crystal.cell
    basis = np.asarray(built.plan.crystal.basis)
    sym = spglib.get_symmetry((cell, basis, [1] * len(basis)), symprec=1e-4)
    assert len(ops.rotations) == len(sym["rotations"]) == 192  # 48 x 4 centrings, fcc
    moved = np.einsum("gij,bj->gbi", ops.rotations, basis) + ops.translations[:, None, :]
    np.testing.assert_allclose(moved, basis[ops.image] + ops.shift, atol=1e-9)


@pytest.mark.parametrize("extra", [
    {"size": {"matrix": [[1, 1, 0], [-1, 1, 0], [0, 0, 2]]}},     # a re-cut repeat unit
    {"surface": {"miller": [1, 1, 1], "layers": 6, "vacuum": 15.0},
     "size": {"repeat": [2, 2, 1]}},                               # a slab with vacuum
    {"crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615,
                 "axes": {"x": [1, 1, 0], "y": [-1, 1, 0], "z": [0, 0, 1]}},
     "size": {"repeat": [2, 2, 2]}},                               # an oriented box
])
@pytest.mark.parametrize("count", [1, 2, 3])
def test_the_shortcut_agrees_on_re_cut_cells(extra, count):
    """Supercell matrices, slabs and oriented boxes are supercells of their own
    repeat unit: the shortcut applies to them too and must agree with spglib."""
    data = recipe_dict(defects={"vacancies": {"count": count}}, seed=count)
    data.update(extra)
    built = _built(data)
    quick, full = _both(built)
    if count == 1:
        assert quick is not None  # one vacancy: only the supercell's translations remain
    if quick is not None:         # else a shorter translation or similar: spglib answers
        assert quick == full
