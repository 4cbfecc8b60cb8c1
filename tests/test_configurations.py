"""Symmetry-inequivalent defect placements (cellbuild.configurations), checked against
outside sources.

Sources, named beside each check:
- International Tables for Crystallography, Vol. A: point-group orders (m-3m: 48,
  6/mmm: 24); lattice points per conventional cell (fcc: 4).
- combinatorics: C(n, k) ways to choose k of n sites; ordered pairs n (n - 1).
- Burnside's (Cauchy-Frobenius) lemma: number of orbits = mean over the group of the
  number of placements each element fixes.
- itertools (Python standard library): independent brute-force enumeration.
- ASE ase.build.bulk (reference library): the fcc, rock-salt and hcp cells.
"""
from __future__ import annotations

import itertools
from math import comb

import numpy as np
import pytest
from ase.build import bulk

from cellbuild.configurations import (MAX_PLACEMENTS, TooManyPlacements, count_placements,
                                      distinct_placements, site_permutations)


def _perms(atoms):
    return site_permutations(atoms.cell[:], atoms.get_scaled_positions(), atoms.numbers)


@pytest.fixture(scope="module")
def fcc2():
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat(2)  # ASE reference cell, 32 sites
    return atoms, _perms(atoms)


@pytest.fixture(scope="module")
def rocksalt2():
    atoms = bulk("NaCl", "rocksalt", a=5.64, cubic=True).repeat(2)  # ASE, 64 sites
    return atoms, _perms(atoms)


def _cycles(g, hosts):
    """Cycle lengths of permutation g restricted to the host set (which g must keep)."""
    hosts = set(int(h) for h in hosts)
    assert {int(g[h]) for h in hosts} == hosts
    seen, lengths = set(), []
    for h in hosts:
        if h in seen:
            continue
        n, j = 0, h
        while j not in seen:
            seen.add(j)
            j, n = int(g[j]), n + 1
        lengths.append(n)
    return lengths


def _fixed_identical(g, hosts, k):
    """Placements of k identical items on hosts fixed by g: coefficient of x^k in
    prod over cycles of (1 + x^len) (a fixed set is a union of whole cycles)."""
    poly = np.zeros(k + 1, dtype=object)
    poly[0] = 1
    for length in _cycles(g, hosts):
        if length <= k:  # a longer cycle can only be left out
            nxt = poly.copy()
            nxt[length:] += poly[:k + 1 - length]
            poly = nxt
    return poly[k]


def _burnside_identical(perms, hosts, k):
    total = sum(_fixed_identical(g, hosts, k) for g in perms)
    assert total % len(perms) == 0
    return total // len(perms)


def _brute_placements(groups):
    """Every placement, by itertools, in lexicographic order (independent enumeration)."""
    out = []
    for parts in itertools.product(*[itertools.combinations(sorted(h), c) for h, c in groups]):
        flat = [s for p in parts for s in p]
        if len(set(flat)) == len(flat):
            out.append(tuple(flat))
    return sorted(out)


def test_fcc_operation_count_and_permutations():
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat(3)  # ASE reference cell
    perms = _perms(atoms)
    # International Tables: m-3m has order 48; 4 lattice points per conventional cell x 27
    assert perms.shape == (48 * 4 * 27, 108)
    assert perms.dtype == np.int64
    # a permutation is a bijection (definition): each sorted row is 0..n-1
    assert (np.sort(perms, axis=1) == np.arange(108)).all()
    assert (perms[0] == np.arange(108)).all()  # row 0 is the identity
    assert len(np.unique(perms, axis=0)) == len(perms)  # no duplicated rows


def test_rocksalt_permutations_keep_types(rocksalt2):
    atoms, perms = rocksalt2
    # International Tables: Fm-3m, point group order 48; 4 lattice points x 8 cells
    assert perms.shape == (48 * 32, 64)
    assert (np.sort(perms, axis=1) == np.arange(64)).all()  # bijections (definition)
    assert (atoms.numbers[perms] == atoms.numbers).all()  # Na stays Na, Cl stays Cl


def test_hcp_operation_count_and_two_vacancies():
    atoms = bulk("Mg", "hcp", a=3.2, c=5.2).repeat(2)  # ASE reference cell, 16 sites
    perms = _perms(atoms)
    # International Tables: 6/mmm has order 24; 8 lattice points in a 2x2x2 supercell
    assert perms.shape == (24 * 8, 16)
    assert (np.sort(perms, axis=1) == np.arange(16)).all()
    reps, mult = distinct_placements(perms, [(np.arange(16), 2)])
    assert mult.sum() == comb(16, 2)  # combinatorics
    assert len(reps) == _burnside_identical(perms, range(16), 2)  # Burnside's lemma


def test_one_substitution_single_orbit(fcc2):
    _, perms = fcc2
    reps, mult = distinct_placements(perms, [(np.arange(32), 1)])
    # all fcc sites are equivalent (one Wyckoff position 4a, International Tables)
    assert reps.tolist() == [[0]] and mult.tolist() == [32]


@pytest.mark.parametrize("k", [2, 3])
def test_identical_defects_fcc(fcc2, k):
    _, perms = fcc2
    hosts = np.arange(32)
    reps, mult = distinct_placements(perms, [(hosts, k)])
    assert count_placements([(hosts, k)]) == comb(32, k)  # combinatorics
    assert mult.sum() == comb(32, k)  # combinatorics
    assert len(reps) == _burnside_identical(perms, hosts, k)  # Burnside's lemma


def test_three_substitutions_fcc3():
    atoms = bulk("Cu", "fcc", a=3.6, cubic=True).repeat(3)  # ASE reference cell
    reps, mult = distinct_placements(_perms(atoms), [(np.arange(108), 3)])
    assert mult.sum() == comb(108, 3)  # combinatorics
    assert reps.shape[1] == 3 and (np.diff(reps, axis=1) > 0).all()


def test_rocksalt_vacancies_on_sodium(rocksalt2):
    atoms, perms = rocksalt2
    na = np.flatnonzero(atoms.numbers == 11)
    reps, mult = distinct_placements(perms, [(na, 2)])
    assert mult.sum() == comb(32, 2)  # combinatorics: 32 Na sites
    assert set(reps.ravel()) <= set(na)
    assert len(reps) == _burnside_identical(perms, na, 2)  # Burnside's lemma


def test_labelled_vacancy_and_substitution(rocksalt2):
    atoms, perms = rocksalt2
    na = np.flatnonzero(atoms.numbers == 11)
    groups = [(na, 1), (na, 1)]
    reps, mult = distinct_placements(perms, groups)
    assert mult.sum() == count_placements(groups) == 32 * 31  # ordered pairs
    # Burnside's lemma: g fixes the ordered pair (i, j), i != j, iff both are fixed points
    fixed = [(g[na] == na).sum() for g in perms]
    burnside = sum(f * (f - 1) for f in fixed)
    assert burnside % len(perms) == 0 and len(reps) == burnside // len(perms)


def test_partial_overlap_count_against_itertools():
    cases = [
        [(range(0, 6), 2), (range(3, 9), 2), ([0, 8, 9, 10], 1)],
        [(range(0, 5), 2), (range(0, 5), 1), (range(3, 7), 2)],
        [(range(4), 2), (range(2, 6), 2), (range(4, 8), 2), ([1, 7], 1)],
        [(range(3), 2), (range(3), 2)],  # infeasible: 4 sites wanted from 3
        [(range(5), 0), ([2, 3], 1)],
    ]
    for groups in cases:
        brute = _brute_placements(groups)  # itertools, independent enumeration
        assert count_placements(groups) == len(brute)
        # with the trivial group every placement is its own orbit: same rows, same order
        n = 11
        reps, mult = distinct_placements(np.arange(n)[None], [(np.array(h), c) for h, c in groups])
        assert [tuple(r) for r in reps.tolist()] == brute
        assert (mult == 1).all()


def test_random_overlaps_against_itertools():
    rng = np.random.default_rng(5)  # seeded: random host sets over 9 sites, 1-4 requests
    for _ in range(150):
        groups = [(rng.choice(9, size=rng.integers(0, 10), replace=False),
                   int(rng.integers(0, 4))) for _ in range(rng.integers(1, 5))]
        brute = _brute_placements(groups)  # itertools, independent enumeration
        assert count_placements(groups) == len(brute)
        if len(brute) <= 5000:
            reps, _ = distinct_placements(np.arange(9)[None], groups)
            assert [tuple(r) for r in reps.tolist()] == brute


def test_too_many_placements():
    perms = np.arange(32)[None]
    with pytest.raises(TooManyPlacements) as err:
        distinct_placements(perms, [(np.arange(32), 2)], limit=10)
    assert err.value.count == comb(32, 2) and err.value.limit == 10  # combinatorics
    assert isinstance(err.value, ValueError)
    with pytest.raises(TooManyPlacements):
        distinct_placements(perms, [(np.arange(32), 16)])  # C(32, 16) > MAX_PLACEMENTS
    assert comb(32, 16) > MAX_PLACEMENTS


def test_representatives_are_orbit_minima(fcc2):
    _, perms = fcc2
    hosts = np.arange(32)
    groups = [(hosts, 1), (hosts, 2)]  # a vacancy and two identical substitutions
    reps, mult = distinct_placements(perms, groups)
    rows = [tuple(r) for r in reps.tolist()]
    assert rows == sorted(set(rows))  # strictly increasing
    for rep, m in zip(rows, mult.tolist()):
        # brute force over the group: images with the substitution pair sorted
        orbit = {(int(g[rep[0]]),) + tuple(sorted((int(g[rep[1]]), int(g[rep[2]]))))
                 for g in perms}
        assert min(orbit) == rep and len(orbit) == m
    assert mult.sum() == 32 * comb(31, 2)  # combinatorics
    # independent of the order of the operations
    shuffled = np.random.default_rng(0).permutation(perms)
    reps2, mult2 = distinct_placements(shuffled, groups)
    assert (reps2 == reps).all() and (mult2 == mult).all()


def test_wide_rows_use_byte_keys():
    # 64 sites and 11 defects: 64**11 > 2**63, so rows cannot be mixed-radix int64 keys.
    n, hosts = 64, np.arange(12)
    perms = np.tile(np.arange(n), (12, 1))
    for s in range(12):
        perms[s, :12] = np.roll(np.arange(12), s)
    reps, mult = distinct_placements(perms, [(hosts, 11)])
    # the cyclic group is transitive on the 12 complements of single sites: one orbit
    assert reps.tolist() == [list(range(11))] and mult.tolist() == [12]


def test_non_orthogonal_primitive_cell():
    atoms = bulk("Cu", "fcc", a=3.6).repeat(3)  # ASE primitive fcc cell (60 degree axes)
    perms = _perms(atoms)
    # International Tables: m-3m order 48; one lattice point per primitive cell x 27
    assert perms.shape == (48 * 27, 27)
    reps, mult = distinct_placements(perms, [(np.arange(27), 2)])
    assert mult.sum() == comb(27, 2)  # combinatorics
    assert len(reps) == _burnside_identical(perms, range(27), 2)  # Burnside's lemma


def test_interstitial_sites_as_own_type():
    # fcc 2x2x2 conventional cells plus their 64 tetrahedral sites ((1/4, 1/4, 1/4) and
    # the like in each cell) as type 2: the fluorite arrangement, Fm-3m (International
    # Tables: order 48, 4 lattice points per conventional cell x 8 cells)
    host = bulk("Cu", "fcc", a=3.6, cubic=True).repeat(2)
    tet = np.array(list(itertools.product([0.125, 0.375, 0.625, 0.875], repeat=3)))
    frac = np.vstack([host.get_scaled_positions(), tet])
    types = np.array([1] * 32 + [2] * 64)
    perms = site_permutations(host.cell[:], frac, types)
    assert perms.shape == (48 * 32, 96)
    assert (types[perms] == types).all()
    # one interstitial plus one vacancy: 64 x 32 placements (combinatorics)
    tets, hosts = np.arange(32, 96), np.arange(32)
    reps, mult = distinct_placements(perms, [(tets, 1), (hosts, 1)])
    assert mult.sum() == 64 * 32
    # Burnside's lemma: g fixes the pair iff it fixes both sites
    fixed = sum(int((g[tets] == tets).sum()) * int((g[hosts] == hosts).sum()) for g in perms)
    assert fixed % len(perms) == 0 and len(reps) == fixed // len(perms)
