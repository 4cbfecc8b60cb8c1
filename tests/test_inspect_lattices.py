"""Lattice matching of `inspect` held against shells derived from lattice vectors
and counted by ASE's neighbour list, for hcp and the cubic lattices, perfect,
rattled and defected.

Sources:
* Shells (distance / nearest-neighbour distance d: count), derived from the
  lattice vectors (common practice): fcc 1:12, sqrt2:6, sqrt3:24, 2:12; ideal
  hcp (c/a = sqrt(8/3)) 1:12, sqrt2:6, sqrt(8/3):2, sqrt3:18, sqrt(11/3):12.
  Each is re-counted below with ``ase.neighborlist.neighbor_list``.
* Lattice constants (Kittel, from memory, +-0.5 %): Po sc 3.35, Fe bcc 2.87,
  Cu fcc 3.61, Si diamond 5.43; Mg hcp a 3.21, c 5.21; Ti hcp a 2.95, c 4.68 A.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from ase import Atom
from ase.build import bulk
from ase.neighborlist import neighbor_list

from cellbuild.inspection import EXPECT_CHOICES, inspect_structure
from cellbuild.lattice_match import PROBE_TOLERANCE, misfit, patterns
from cellbuild.structure import Structure

S2, S3 = math.sqrt(2.0), math.sqrt(3.0)
IDEAL_C = math.sqrt(8.0 / 3.0)
# derived from the lattice vectors (common practice), units of d
SHELLS = {
    "fcc": [(1.0, 12), (S2, 6), (S3, 24), (2.0, 12)],
    "hcp": [(1.0, 12), (S2, 6), (IDEAL_C, 2), (S3, 18), (math.sqrt(11.0 / 3.0), 12)],
}
CUBIC = {"sc": ("Po", 3.35, 4), "bcc": ("Fe", 2.87, 4), "fcc": ("Cu", 3.61, 3),
         "diamond": ("Si", 5.43, 2)}


def inspect_atoms(atoms, **kwargs):
    return inspect_structure(Structure.from_ase(atoms), file="test", **kwargs)


def ase_shells(atoms, d, n_shells):
    """(distance / d, neighbours per atom) of the first shells, by ASE's neighbour list."""
    dist = neighbor_list("d", atoms, d * 2.05) / d
    radii, counts = np.unique(np.round(dist, 6), return_counts=True)
    return list(zip(radii[:n_shells], counts[:n_shells] / len(atoms)))


@pytest.mark.parametrize("name", ["fcc", "hcp"])
def test_shells_from_lattice_vectors_match_ase_and_the_patterns(name):
    atoms = (bulk("Cu", "fcc", a=3.61 * S2, cubic=True) if name == "fcc"
             else bulk("Mg", "hcp", a=3.21, c=3.21 * IDEAL_C)).repeat((3, 3, 3))
    d = 3.61 if name == "fcc" else 3.21
    counted = ase_shells(atoms, d, len(SHELLS[name]))
    for (r, n), (r_ase, n_ase) in zip(SHELLS[name], counted):
        assert r_ase == pytest.approx(r, abs=1e-5) and n_ase == pytest.approx(n)
    pattern = patterns()[name]
    assert list(zip(pattern.distances, pattern.counts))[:len(SHELLS[name])] == [
        (pytest.approx(r), n) for r, n in SHELLS[name]]


def test_no_two_patterns_collide():
    # an ideal distribution of lattice B scored on lattice A's probes misfits by
    # more than twice the tolerance, so noise within the tolerance cannot swap them
    from cellbuild.pair_shells import PairDistribution

    found = patterns()
    for b, pb in found.items():
        radii = np.repeat(pb.distances, pb.counts).astype(np.float64)
        ideal = PairDistribution(radii, 1.0, 1.0, 2.3)  # reach 2.3 d, the smallest here
        for a, pa in found.items():
            score = misfit(ideal, 1.0, pa)[0]
            if a == b:
                assert score == pytest.approx(0.0, abs=1e-12)
            else:
                assert score > 2.0 * PROBE_TOLERANCE, (a, b, score)


@pytest.mark.parametrize("element, a, c", [("Mg", 3.21, 3.21 * IDEAL_C), ("Mg", 3.21, 5.21),
                                           ("Ti", 2.95, 4.68)])
def test_hcp_is_reported_as_hcp_and_fails_expect_fcc(element, a, c):
    atoms = bulk(element, "hcp", a=a, c=c).repeat((4, 4, 3))
    result = inspect_atoms(atoms, expect="fcc")
    assert result["lattice"] == "hcp"
    check = {c["name"]: c for c in result["checks"]}["expected_lattice"]
    assert not check["passed"]
    assert inspect_atoms(atoms, expect="hcp")["passed"]
    # hcp a is the in-plane nearest-neighbour distance (common practice)
    assert result["lattice_match"]["lattice_constant"] == pytest.approx(a, rel=0.02)


def test_expect_choices_name_every_lattice_including_hcp():
    from cellbuild.prototypes import PROTOTYPES

    assert set(EXPECT_CHOICES) == {"sc", "bcc", "fcc", "diamond", "hcp"} | set(PROTOTYPES)


@pytest.mark.parametrize("lattice", sorted(CUBIC))
@pytest.mark.parametrize("case", ["rattled-0.02", "rattled-0.05", "defected"])
def test_cubic_lattices_rattled_or_defected_still_match(lattice, case):
    element, a, repeat = CUBIC[lattice]
    atoms = bulk(element, lattice, a=a, cubic=True).repeat(repeat)
    if case.startswith("rattled"):
        atoms.rattle(stdev=float(case.split("-")[1]), seed=11)  # ASE's seeded Gaussian
    else:
        del atoms[5]                                  # a vacancy
        atoms.symbols[7] = "Ge" if element == "Si" else "Ni"  # a substitution
    result = inspect_atoms(atoms, expect=lattice)
    assert result["lattice"] == lattice
    assert {c["name"]: c["passed"] for c in result["checks"]}["expected_lattice"]
    if case == "defected":
        assert result["defects"]["estimated_vacancies_from_sites"] == 1


def test_diamond_interstitial_is_named_and_counted_once():
    atoms = bulk("Si", "diamond", a=5.43, cubic=True).repeat(4)
    # the empty tetrahedral site at the cube centre (common practice)
    atoms.append(Atom("Si", (0.5 * 5.43,) * 3))
    result = inspect_atoms(atoms)
    assert result["lattice"] == "diamond"
    # the lattice constant from the robust first shell: 5.43 within 0.1 %
    assert result["lattice_match"]["lattice_constant"] == pytest.approx(5.43, rel=1e-3)
    defects = result["defects"]
    assert defects["estimated_vacancies_from_sites"] == -1  # 512 sites, 513 atoms
    assert defects["interstitial_like"] == 1
    assert defects["interstitial_like_atoms"] == [len(atoms) - 1]


def test_fcc_octahedral_interstitial_and_overlapping_atom_are_one_each():
    for extra in ((1.805, 1.805, 1.805), None):  # octahedral site at a/2 (common practice)
        atoms = bulk("Cu", "fcc", a=3.61, cubic=True).repeat(3)
        atoms.append(Atom("Cu", extra if extra else atoms.positions[10] + 0.01))
        defects = inspect_atoms(atoms)["defects"]
        assert defects["interstitial_like"] == 1
        assert defects["estimated_vacancies_from_sites"] == -1
