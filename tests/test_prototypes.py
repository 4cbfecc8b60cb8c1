"""The compound prototype table against outside sources.

Space groups: spglib from the coordinates, against the International Tables
numbers written in the table (and beside each case here). Coordination per
sublattice: textbook geometry of each structure type (common practice).
Positions: ASE's ``ase.build.bulk`` for the prototypes it builds.
Densities: handbook values, from memory, to 1 %.
"""
from __future__ import annotations

import numpy as np
import pytest
import spglib

from cellbuild.prototypes import PROTOTYPES, basis, density, first_shells

# International Tables for Crystallography, Vol. A: space-group numbers of the
# structure types (common practice; from memory).
SPACE_GROUPS = {
    "rocksalt": 225, "cesium-chloride": 221, "zincblende": 216, "fluorite": 225,
    "perovskite": 221, "l1_2": 221, "a15": 223, "c15": 227, "heusler": 225,
    "half-heusler": 216, "spinel": 227, "hcp": 194,
}


def _spglib_number(name: str, **params) -> int:
    proto = PROTOTYPES[name]
    frac, labels = basis(proto, **params)
    codes = [sorted(set(labels)).index(x) + 1 for x in labels]
    data = spglib.get_symmetry_dataset((np.array(proto.cell), frac, codes), symprec=1e-5)
    return int(data.number)


@pytest.mark.parametrize("name", sorted(SPACE_GROUPS))
def test_space_group_by_spglib_matches_international_tables(name):
    assert _spglib_number(name) == SPACE_GROUPS[name]
    assert PROTOTYPES[name].space_group[1] == SPACE_GROUPS[name]


# Textbook first-shell coordination, sublattice -> {neighbour sublattice: count}
# (common practice: rock salt 6-6, B2 8-8, zinc blende 4-4, fluorite cation 8 /
# anion 4, perovskite B-X 6 and A-X 12, L1_2 12, A15 A 12 with B chains of 2,
# C15 A 16 (Frank-Kasper) and B 6 B (corner-sharing tetrahedra), L2_1 and C1_b
# cubic 8 and tetrahedral 4, spinel A 4 and B 6 to oxygen, ideal hcp 12).
COORDINATION = {
    "rocksalt": {"A": {"B": 6}, "B": {"A": 6}},
    "cesium-chloride": {"A": {"B": 8}, "B": {"A": 8}},
    "zincblende": {"A": {"B": 4}, "B": {"A": 4}},
    "fluorite": {"A": {"X": 8}, "X": {"A": 4}},
    "perovskite": {"A": {"X": 12}, "B": {"X": 6}, "X": {"B": 2}},
    "l1_2": {"A": {"B": 12}, "B": {"A": 4, "B": 8}},
    "a15": {"A": {"B": 12}, "B": {"B": 2}},
    "c15": {"A": {"A": 4, "B": 12}, "B": {"B": 6}},
    "heusler": {"X": {"Y": 4, "Z": 4}, "Y": {"X": 8}, "Z": {"X": 8}},
    "half-heusler": {"X": {"Y": 4, "Z": 4}, "Y": {"X": 4}, "Z": {"X": 4}},
    "spinel": {"A": {"X": 4}, "B": {"X": 6}, "X": {"A": 1, "B": 3}},
    "hcp": {"A": {"A": 12}},
}

# Nearest distances in units of a, textbook geometry (common practice).
NEAREST = {
    ("rocksalt", "A"): 0.5, ("cesium-chloride", "A"): np.sqrt(3) / 2,
    ("zincblende", "A"): np.sqrt(3) / 4, ("fluorite", "A"): np.sqrt(3) / 4,
    ("perovskite", "B"): 0.5, ("perovskite", "A"): np.sqrt(2) / 2,
    ("l1_2", "A"): np.sqrt(2) / 2, ("a15", "B"): 0.5, ("a15", "A"): np.sqrt(5) / 4,
    ("c15", "B"): np.sqrt(2) / 4, ("hcp", "A"): 1.0,
}


@pytest.mark.parametrize("name", sorted(COORDINATION))
def test_first_shell_coordination_per_sublattice_is_textbook(name):
    proto = PROTOTYPES[name]
    frac, labels = basis(proto)
    shells = first_shells(proto.cell, frac, labels)
    assert {k: v.counts for k, v in shells.items()} == COORDINATION[name]
    for (key, label), distance in NEAREST.items():
        if key == name:
            assert shells[label].distance == pytest.approx(distance, rel=1e-12)
    # the shell is separated from the next distance, so a cutoff between them is safe
    assert all(s.next_distance > 1.1 * s.outer for s in shells.values())


def test_spinel_oxygen_parameter_moves_oxygen_and_keeps_the_group():
    ideal, _ = basis(PROTOTYPES["spinel"], u=0.25)
    default, labels = basis(PROTOTYPES["spinel"])
    assert _spglib_number("spinel", u=0.25) == 227 and _spglib_number("spinel", u=0.27) == 227
    oxygen = np.array(labels) == "X"
    assert oxygen.sum() == 32 and not np.allclose(ideal[oxygen], default[oxygen])
    # u = 1/4 in origin choice 2 is the ideal cubic close packing of oxygen: every
    # O-O nearest distance is a / (2 sqrt 2) (textbook geometry)
    sub = ideal[oxygen]
    d = sub[:, None, :] - sub[None, :, :]
    d = np.linalg.norm(d - np.round(d), axis=2)
    np.fill_diagonal(d, np.inf)
    assert d.min(axis=1) == pytest.approx(np.full(32, np.sqrt(2) / 4), abs=1e-12)


def test_composition_ratios():
    # formula units AB, AB, AB, AX2, ABX3, AB3, A3B (Cr3Si: Si on A), AB2, X2YZ, XYZ, AB2X4
    expect = {"rocksalt": {"A": 4, "B": 4}, "cesium-chloride": {"A": 1, "B": 1},
              "zincblende": {"A": 4, "B": 4}, "fluorite": {"A": 4, "X": 8},
              "perovskite": {"A": 1, "B": 1, "X": 3}, "l1_2": {"A": 1, "B": 3},
              "a15": {"A": 2, "B": 6}, "c15": {"A": 8, "B": 16},
              "heusler": {"X": 8, "Y": 4, "Z": 4}, "half-heusler": {"X": 4, "Y": 4, "Z": 4},
              "spinel": {"A": 8, "B": 16, "X": 32}, "hcp": {"A": 2}}
    for name, counts in expect.items():
        _, labels = basis(PROTOTYPES[name])
        assert {k: labels.count(k) for k in set(labels)} == counts, name


@pytest.mark.parametrize("name, ase_name, formula, a", [
    ("rocksalt", "rocksalt", "MgO", 4.212),
    ("cesium-chloride", "cesiumchloride", "CsCl", 4.12),
    ("zincblende", "zincblende", "GaAs", 5.653),
    ("fluorite", "fluorite", "CaF2", 5.463),
])
def test_positions_match_ase_bulk(name, ase_name, formula, a):
    """ASE's conventional cells of the same structure types hold the same sites
    per species (reference library: ase.build.bulk)."""
    from ase.build import bulk

    ref = bulk(formula, ase_name, a=a, cubic=True)
    proto = PROTOTYPES[name]
    frac, labels = basis(proto)
    order = list(dict.fromkeys(labels))
    elements = list(dict.fromkeys(ref.get_chemical_symbols()))
    ref_frac = ref.get_scaled_positions(wrap=True)
    for label, element in zip(order, elements):
        ours = frac[np.array(labels) == label]
        theirs = ref_frac[np.array(ref.get_chemical_symbols()) == element]
        key = lambda p: tuple(np.round(p % 1.0, 9) % 1.0)  # noqa: E731
        assert sorted(map(key, ours)) == sorted(map(key, theirs)), (name, label)
    assert np.allclose(ref.cell.array, np.asarray(proto.cell) * a)


@pytest.mark.parametrize("name, species, a, handbook", [
    # handbook densities at room temperature, g/cm^3, from memory
    ("rocksalt", {"A": "Mg", "B": "O"}, 4.212, 3.58),
    ("zincblende", {"A": "Ga", "B": "As"}, 5.653, 5.32),
    ("perovskite", {"A": "Sr", "B": "Ti", "X": "O"}, 3.905, 5.12),
    ("fluorite", {"A": "U", "X": "O"}, 5.470, 10.97),
    ("spinel", {"A": "Mg", "B": "Al", "X": "O"}, 8.08, 3.58),
])
def test_density_against_handbook(name, species, a, handbook):
    assert density(PROTOTYPES[name], a, species) == pytest.approx(handbook, rel=0.01)


def test_unknown_parameter_is_refused():
    with pytest.raises(KeyError, match="'v'"):
        PROTOTYPES["spinel"].sites(v=0.3)


SPECIES = {
    "rocksalt": (("A", "Mg"), ("B", "O")),
    "perovskite": (("A", "Sr"), ("B", "Ti"), ("X", "O")),
    "spinel": (("A", "Mg"), ("B", "Al"), ("X", "O")),
    "c15": (("A", "Mg"), ("B", "Cu")),
    "fluorite": (("A", "U"), ("X", "O")),
}


@pytest.mark.parametrize("name", sorted(SPECIES))
def test_resolved_compound_counts_textbook_neighbours_per_site(name):
    """The resolved crystal's per-site audit cutoffs, applied by ASE's neighbour
    list to a replicated 2x2x2 supercell, count each atom's textbook first shell;
    the audit's offset table holds the same counts."""
    from collections import Counter

    from ase import Atoms
    from ase.neighborlist import neighbor_list

    from cellbuild.build import replicate
    from cellbuild.crystal import resolve_crystal

    # room-temperature lattice constants, Angstrom, from memory
    a = {"rocksalt": 4.212, "perovskite": 3.905, "spinel": 8.08, "c15": 7.05,
         "fluorite": 5.47}[name]
    crystal = resolve_crystal(name, a, SPECIES[name])
    symbols = tuple(dict.fromkeys(e for _, e in SPECIES[name]))
    structure = replicate(crystal, (2, 2, 2), symbols)
    atoms = Atoms([symbols[c] for c in structure.species], positions=structure.positions,
                  cell=structure.cell, pbc=True)
    basis_site = structure.site % crystal.n_grid
    cutoffs = np.array(crystal.site_cutoff)[basis_site]
    i, j, d = neighbor_list("ijd", atoms, float(cutoffs.max()))
    keep = d < cutoffs[i]
    labels = np.array(crystal.sublattice)[basis_site]
    expected = COORDINATION[name]
    for label, counts in expected.items():
        atoms_on = np.flatnonzero(labels == label)
        for atom in atoms_on[:5]:
            got = Counter(labels[j[keep & (i == atom)]].tolist())
            assert dict(got) == counts, (name, label, atom)
    per_site = Counter(s for s, _, t in crystal.offsets if t < crystal.n_basis)  # lattice only
    for s, label in enumerate(crystal.sublattice):
        assert per_site[s] == sum(expected[label].values())
    assert crystal.nearest == pytest.approx(min(sh.distance for sh in crystal.first_shells.values()))


def test_a_compound_needs_an_element_on_every_sublattice():
    from cellbuild.crystal import resolve_crystal

    with pytest.raises(KeyError, match="sublattice B"):
        resolve_crystal("rocksalt", 4.2, (("A", "Mg"),))


@pytest.mark.parametrize("name, removed, neighbour_counts", [
    # an anion vacancy in rock salt leaves its 6 cation neighbours 5 each; in
    # perovskite an X vacancy leaves its 2 B neighbours 5 X and its 4 A
    # neighbours 11 X (textbook geometry: the removed X sits at a/2 from 2 B and
    # at a/sqrt2 from 4 A)
    ("rocksalt", "B", {5: 6}),
    ("perovskite", "X", {5: 2, 11: 4}),
])
def test_audit_counts_per_sublattice_agree_with_topology_around_a_vacancy(
        name, removed, neighbour_counts):
    """The audit's two routes for a compound: neighbours counted from coordinates
    with each site's own cutoff, and expected from the occupancy grid, agree atom
    by atom; both see the vacancy's neighbours lose one."""
    from collections import Counter

    from cellbuild.audit import counts_within, expected_coordination
    from cellbuild.build import replicate
    from cellbuild.crystal import resolve_crystal
    from cellbuild.structure import Structure

    # room-temperature lattice constants, Angstrom, from memory
    a = {"rocksalt": 4.212, "perovskite": 3.905}[name]
    crystal = resolve_crystal(name, a, SPECIES[name])
    symbols = tuple(dict.fromkeys(e for _, e in SPECIES[name]))
    perfect = replicate(crystal, (3, 3, 3), symbols)
    labels = np.array(crystal.sublattice)[perfect.site % crystal.n_grid]
    gone = np.flatnonzero(labels == removed)[7]
    keep = np.arange(perfect.n_atoms) != gone
    damaged = Structure(perfect.cell, perfect.positions[keep], perfect.species[keep],
                        symbols, perfect.site[keep])
    counted = counts_within(damaged, crystal, workers=1)
    expected = expected_coordination(damaged, crystal, (3, 3, 3))
    assert np.array_equal(counted, expected)
    ideal = np.array([sum(COORDINATION[name][lb].values()) for lb in labels[keep]])
    lowered = Counter(counted[counted != ideal].tolist())
    assert dict(lowered) == neighbour_counts
