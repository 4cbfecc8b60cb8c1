"""Every check of the audit can fail: tamper with a built structure and the
check that guards that property must say so.

Expected counts come from geometry (common practice): an fcc atom has 12
nearest neighbours; moving one atom off its site changes its own count and
those of its neighbours.
"""
from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from cellbuild.audit import audit
from cellbuild.pipeline import build
from cellbuild.recipe import parse_recipe

from conftest import recipe_dict


def _built(**defects):
    return build(parse_recipe(recipe_dict("Cu", "fcc", 3.615, (3, 3, 3), defects=defects)))


def _failed(built, structure):
    result = audit(built.plan, structure, built.placements)
    return {c.name for c in result.checks if not c.passed}, result


def test_untouched_structure_passes():
    b = _built(vacancies={"count": 2}, substitutions=[{"element": "Ni", "count": 3}])
    assert _failed(b, b.structure)[0] == set()


def test_moved_atom_fails_coordination_and_names_the_count():
    b = _built()
    positions = b.structure.positions.copy()
    positions[10] += [0.9, 0.4, 0.0]  # off its site, towards a neighbour
    failed, result = _failed(b, dataclasses.replace(b.structure, positions=positions))
    assert "coordination" in failed
    assert result.values["coordination"]["mismatched"] >= 1


def test_atom_moved_to_another_cell_fails_atoms_per_cell():
    b = _built()
    positions = b.structure.positions.copy()
    # from the corner of cell (0, 0, 0) onto the octahedral site of cell (1, 0, 0)
    positions[0] += [1.5 * 3.615, 3.615 / 2, 3.615 / 2]
    failed, _ = _failed(b, dataclasses.replace(b.structure, positions=positions))
    assert {"atoms_per_cell", "coordination"} <= failed


def test_overlapping_atoms_fail_min_distance():
    b = _built()
    positions = b.structure.positions.copy()
    positions[5] = positions[4] + [0.3, 0.0, 0.0]
    failed, result = _failed(b, dataclasses.replace(b.structure, positions=positions))
    assert "min_distance" in failed
    assert result.values["close_pairs"]["count"] >= 1
    assert result.values["min_distance"] == pytest.approx(0.3, abs=1e-9)


def test_wrong_species_fails_composition():
    b = _built(substitutions=[{"element": "Ni", "count": 3}])
    species = b.structure.species.copy()
    species[species == b.structure.symbols.index("Ni")] = b.structure.symbols.index("Cu")
    failed, _ = _failed(b, dataclasses.replace(b.structure, species=species))
    # the Ni sites now hold Cu: the sublattice count of Cu and Ni is off too
    assert failed == {"composition", "sublattice_occupancy"}


def test_stretched_box_fails_cell_lengths():
    b = _built()
    s = b.structure
    stretched = dataclasses.replace(s, cell=s.cell * 1.01, positions=s.positions * 1.01)
    failed, _ = _failed(b, stretched)
    assert "cell_lengths" in failed


def test_missing_atom_fails_atoms_per_cell_and_composition():
    b = _built()
    s = b.structure
    keep = np.ones(s.n_atoms, dtype=bool)
    keep[7] = False  # a vacancy the recipe did not ask for
    thinned = dataclasses.replace(s, positions=s.positions[keep], species=s.species[keep],
                                  site=s.site[keep])
    failed, _ = _failed(b, thinned)
    assert {"atoms_per_cell", "composition"} <= failed


def test_every_check_is_computed_from_the_built_structure():
    """No check is a fact of the ideal crystal alone: each named check of a perfect
    structure fails on some tampering below (this test lists them)."""
    b = _built()
    names = {c.name for c in audit(b.plan, b.structure, b.placements).checks}
    assert names == {"atoms_per_cell", "composition", "cell_lengths", "coordination",
                     "min_distance", "space_group", "sublattice_occupancy"}


def test_displaced_atom_lowers_the_space_group_of_a_perfect_structure():
    # spglib (reference library): a perfect fcc supercell is Fm-3m (225, International
    # Tables); one atom pushed 0.05 A off its site breaks the cubic symmetry
    b = _built()
    assert audit(b.plan, b.structure, b.placements).values["space_group"]["number"] == 225
    positions = b.structure.positions.copy()
    positions[5] += [0.05, 0.02, 0.0]
    failed, result = _failed(b, dataclasses.replace(b.structure, positions=positions))
    assert "space_group" in failed
    assert result.values["space_group"]["number"] != 225


def test_defect_supercell_reports_its_own_space_group():
    # one substitution in a 3x3x3 fcc supercell: the site symmetry of the substituted
    # atom is m-3m, but translations are lost, so spglib finds Pm-3m (221) rather
    # than Fm-3m (225) (International Tables; a primitive cubic lattice of impurities)
    b = _built(substitutions=[{"element": "Ni", "count": 1}])
    result = audit(b.plan, b.structure, b.placements)
    assert result.values["space_group"]["number"] == 221
    assert result.values["ideal_crystal"]["space_group"]["number"] == 225
    assert "space_group" not in {c.name for c in result.checks}  # reported, not checked


def test_large_structures_say_why_the_space_group_is_missing():
    from cellbuild.audit import MAX_SPACEGROUP_ATOMS, structure_spacegroup

    b = build(parse_recipe(recipe_dict("Cu", "fcc", 3.615, (8, 8, 8))))
    assert b.structure.n_atoms > MAX_SPACEGROUP_ATOMS
    found = structure_spacegroup(b.structure)
    assert found["number"] is None and "not computed" in found["note"]


def test_vacancy_supercell_space_group_matches_spglib_without_the_marker():
    # spglib on the structure as it is (no vacancy marker) is the reference: the
    # marker used for speed must not change the answer (a vacancy in a 3x3x3 fcc
    # supercell keeps m-3m about its site: Pm-3m, 221, International Tables)
    from cellbuild.audit import spacegroup

    b = _built(vacancies={"count": 1})
    found = audit(b.plan, b.structure, b.placements).values["space_group"]
    assert found["number"] == spacegroup(b.structure, symprec=found["symprec"])[1] == 221
    b = _built(vacancies={"count": 2}, substitutions=[{"element": "Ni", "count": 1}])
    found = audit(b.plan, b.structure, b.placements).values["space_group"]
    assert found["number"] == spacegroup(b.structure, symprec=found["symprec"])[1]


def _built_compound(name, species, a, **defects):
    data = {"name": name, "crystal": {"lattice": name, "species": species, "a": a},
            "size": {"repeat": [3, 3, 3]}, "seed": 2, "defects": defects}
    return build(parse_recipe(data))


# SrTiO3, a = 3.905 A (room temperature, from memory); MgO a = 4.212 A (from memory)
PEROVSKITE = ("perovskite", {"A": "Sr", "B": "Ti", "X": "O"}, 3.905)
ROCKSALT = ("rocksalt", {"A": "Mg", "B": "O"}, 4.212)


@pytest.mark.parametrize("compound", [PEROVSKITE, ROCKSALT])
def test_compound_untouched_passes_and_a_moved_anion_fails_coordination(compound):
    b = _built_compound(*compound, vacancies={"count": 2, "on": "O"})
    assert _failed(b, b.structure)[0] == set()
    oxygen = np.flatnonzero(b.structure.species == b.structure.symbols.index("O"))
    positions = b.structure.positions.copy()
    # 0.6 A along x: off its site, so its own count and its cation neighbours' change
    positions[oxygen[4]] += [0.6, 0.0, 0.0]
    failed, result = _failed(b, dataclasses.replace(b.structure, positions=positions))
    assert "coordination" in failed
    assert result.values["coordination"]["mismatched"] >= 1


def test_compound_with_species_swapped_between_sublattices_fails_composition():
    b = _built_compound(*ROCKSALT)
    species = b.structure.species.copy()
    mg, o = b.structure.symbols.index("Mg"), b.structure.symbols.index("O")
    species[np.flatnonzero(species == o)[:3]] = mg  # three anion sites now hold Mg
    failed, _ = _failed(b, dataclasses.replace(b.structure, species=species))
    # the symmetry of the perfect crystal is broken too (spglib sees the swap)
    assert failed == {"composition", "space_group", "sublattice_occupancy"}


def test_unrequested_antisite_pair_fails_only_the_sublattice_count():
    """Swapping one Mg with one O keeps the composition and every neighbour count
    (textbook geometry: rock salt's sites all have 6 neighbours whatever they hold),
    so only the per-sublattice count (and the perfect crystal's symmetry) sees it."""
    b = _built_compound(*ROCKSALT)
    species = b.structure.species.copy()
    mg, o = b.structure.symbols.index("Mg"), b.structure.symbols.index("O")
    i, j = np.flatnonzero(species == mg)[2], np.flatnonzero(species == o)[5]
    species[i], species[j] = o, mg
    failed, _ = _failed(b, dataclasses.replace(b.structure, species=species))
    assert failed == {"sublattice_occupancy", "space_group"}


def test_atom_moved_to_another_sites_position_fails_the_sublattice_check():
    """An atom whose coordinates are another site's (its site id unchanged) is caught
    by the position part of the sublattice check."""
    b = _built_compound(*ROCKSALT)
    positions = b.structure.positions.copy()
    positions[0] = positions[0] + [0.0, 0.0, 0.05]
    failed, result = _failed(b, dataclasses.replace(b.structure, positions=positions))
    assert "sublattice_occupancy" in failed


def test_perovskite_titanium_counts_within_its_own_cutoff():
    """Each sublattice counts within its own cutoff: Ti's 6 O at a/2 and Sr's 12 O
    at a/sqrt2 cannot share one (a cutoff below a/sqrt2 gives Sr none). Textbook
    geometry (common practice): Ti 6 O, Sr 12 O, O 2 Ti."""
    b = _built_compound(*PEROVSKITE)
    result = audit(b.plan, b.structure, b.placements)
    by_species = result.values["coordination"]["by_species"]
    n_cells = 27
    assert by_species == {"Sr": {"12": n_cells}, "Ti": {"6": n_cells}, "O": {"2": 3 * n_cells}}
    cutoffs = result.values["coordination"]["cutoff_by_sublattice"]
    assert cutoffs["B"] < 3.905 * np.sqrt(2) / 2 < cutoffs["A"]


def test_a_changed_charge_fails_only_the_net_charge_check():
    """MgO with formal charges (common practice: Mg +2, O -2) is neutral; one oxygen
    whose charge is altered in the structure makes the counted net charge +2."""
    data = {"name": "mgo", "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"},
                                       "a": 4.212},
            "size": {"repeat": [2, 2, 2]}, "charges": {"Mg": 2, "O": -2}}
    b = build(parse_recipe(data))
    assert _failed(b, b.structure)[0] == set()
    charges = b.structure.charges.copy()
    charges[np.flatnonzero(b.structure.species == b.structure.symbols.index("O"))[0]] = 0.0
    failed, result = _failed(b, dataclasses.replace(b.structure, charges=charges))
    assert failed == {"net_charge"} and result.values["net_charge"] == pytest.approx(2.0)
