"""Tests of cellbuild.neighbours (small cells only; the whole file runs in seconds).

Sources of the expected values:
* Coordination numbers: geometry of touching spheres (Kittel, Introduction to
  Solid State Physics, ch. 1): sc 6, bcc 8, fcc 12, diamond 4.
* Neighbour shells (distance in units of a: count): derived from the lattice
  vectors (common practice, e.g. any table of fcc/bcc shells).
* Per-atom counts and distances: ASE's ``ase.neighborlist.neighbor_list`` and
  ``Atoms.get_all_distances(mic=True)`` as a reference library.
"""
from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk
from ase.neighborlist import neighbor_list
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from cellbuild.neighbours import (
    close_pairs,
    coordination_counts,
    general_counts,
    grid_close_pairs,
    grid_counts,
    locate_grid,
    min_distance,
    pair_distances,
    perpendicular_widths,
    sampled_centre_count,
)

S2, S3 = math.sqrt(2.0), math.sqrt(3.0)

# Kittel ch. 1: nearest-neighbour counts of touching spheres.
KITTEL_COORDINATION = {"sc": 6, "bcc": 8, "fcc": 12, "diamond": 4}

# Neighbour shells, (distance / a, count), derived from the lattice vectors.
SHELLS = {
    "sc": [(1.0, 6), (S2, 12), (S3, 8)],
    "bcc": [(S3 / 2, 8), (1.0, 6), (S2, 12), (math.sqrt(11) / 2, 24)],
    "fcc": [(1 / S2, 12), (1.0, 6), (math.sqrt(1.5), 24), (S2, 12)],
    "diamond": [(S3 / 4, 4), (1 / S2, 12), (math.sqrt(11) / 4, 12)],
}
# The shell after the last one listed is at least 4% farther for all four
# (sc 2, bcc sqrt3, fcc sqrt(5/2), diamond 1, in units of a), so 2% past the
# last listed shell is a cutoff between shells.
PAST_LAST_SHELL = 1.02

A = {"sc": 2.5, "bcc": 3.0, "fcc": 3.6, "diamond": 5.43}  # Angstrom, any value works
ELEMENT = {"sc": "Po", "bcc": "Fe", "fcc": "Cu", "diamond": "Si"}


def crystal(lattice: str, repeat=(1, 1, 1)) -> Atoms:
    """Conventional cubic cell of the lattice, repeated."""
    return bulk(ELEMENT[lattice], lattice, a=A[lattice], cubic=True).repeat(repeat)


def cell_and_positions(atoms: Atoms):
    return np.array(atoms.cell[:]), np.array(atoms.positions)


def first_shell_cutoff(lattice: str) -> float:
    """Midway between the first and second shells, Angstrom."""
    (d1, _), (d2, _) = SHELLS[lattice][:2]
    return 0.5 * (d1 + d2) * A[lattice]


def shell_cutoffs(lattice: str):
    """(cutoff in A, expected cumulative count) just past each listed shell."""
    shells = SHELLS[lattice]
    total = 0
    for k, (distance, count) in enumerate(shells):
        total += count
        if k + 1 < len(shells):
            cut = 0.5 * (distance + shells[k + 1][0])
        else:
            cut = distance * PAST_LAST_SHELL
        yield cut * A[lattice], total


def ase_counts(atoms: Atoms, cutoff: float) -> np.ndarray:
    """Reference: neighbours per atom from ASE's neighbour list."""
    return np.bincount(neighbor_list("i", atoms, cutoff), minlength=len(atoms))


def shaken(atoms: Atoms, amplitude: float, seed: int) -> Atoms:
    """Copy with every atom moved by up to ``amplitude`` A along each axis."""
    out = atoms.copy()
    rng = np.random.default_rng(seed)
    out.positions += rng.uniform(-amplitude, amplitude, size=out.positions.shape)
    return out


# ---------------------------------------------------------------------------
# Coordination numbers and shells (Kittel ch. 1; shells from lattice vectors)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("lattice", sorted(KITTEL_COORDINATION))
@pytest.mark.parametrize("repeat", [(1, 1, 1), (2, 3, 2)])
def test_kittel_coordination_numbers(lattice, repeat):
    cell, positions = cell_and_positions(crystal(lattice, repeat))
    cutoff = first_shell_cutoff(lattice)
    expected = KITTEL_COORDINATION[lattice]
    for engine in (coordination_counts, general_counts, grid_counts):
        counts = engine(cell, positions, cutoff)
        assert counts is not None, engine.__name__
        assert counts.dtype == np.int32
        assert counts.tolist() == [expected] * len(positions), engine.__name__


@pytest.mark.parametrize("lattice", sorted(SHELLS))
@pytest.mark.parametrize("repeat", [(1, 1, 1), (2, 2, 2)])
def test_cumulative_shell_counts_from_lattice_vectors(lattice, repeat):
    cell, positions = cell_and_positions(crystal(lattice, repeat))
    for cutoff, total in shell_cutoffs(lattice):
        assert set(general_counts(cell, positions, cutoff).tolist()) == {total}, cutoff
        assert set(grid_counts(cell, positions, cutoff).tolist()) == {total}, cutoff


def test_one_atom_simple_cubic_cell_with_cutoff_beyond_half_box():
    # Brief: 1x1x1 sc cell of side a, cutoff 1.2 a -> 6 (the atom's own images).
    a = 2.0
    for engine in (coordination_counts, general_counts, grid_counts):
        assert engine(np.eye(3) * a, [[0.3, 0.1, 1.9]], 1.2 * a).tolist() == [6]


def test_one_atom_fcc_primitive_cell_has_twelve_neighbours():
    # Brief: a 1-atom fcc primitive cell gives 12 (Kittel ch. 1 coordination).
    atoms = bulk("Cu", "fcc", a=3.6)
    cell, positions = cell_and_positions(atoms)
    cutoff = first_shell_cutoff("fcc") * 3.6 / A["fcc"]
    for engine in (coordination_counts, general_counts, grid_counts):
        assert engine(cell, positions, cutoff).tolist() == [12]


# ---------------------------------------------------------------------------
# Per-atom counts against ASE's neighbour list (reference library)
# ---------------------------------------------------------------------------

def vacancy_cases():
    rng = np.random.default_rng(7)
    for lattice in ("fcc", "bcc", "diamond", "sc"):
        atoms = crystal(lattice, (3, 3, 2))
        del atoms[rng.choice(len(atoms), size=len(atoms) // 5, replace=False)]
        yield pytest.param(atoms, first_shell_cutoff(lattice), id=f"{lattice}-vacancies")


def triclinic_cases():
    atoms = bulk("Cu", "fcc", a=3.6).repeat((3, 4, 5))
    yield pytest.param(atoms, 3.6 * 0.85, id="fcc-primitive-345")
    yield pytest.param(atoms, 3.6 * 1.3, id="fcc-primitive-345-3-shells")


@pytest.mark.parametrize("atoms, cutoff", [*vacancy_cases(), *triclinic_cases()])
def test_grid_and_general_engines_match_ase_on_lattice_sites(atoms, cutoff):
    cell, positions = cell_and_positions(atoms)
    reference = ase_counts(atoms, cutoff)
    grid = grid_counts(cell, positions, cutoff)
    assert grid is not None
    np.testing.assert_array_equal(grid, reference)
    np.testing.assert_array_equal(general_counts(cell, positions, cutoff), reference)
    np.testing.assert_array_equal(coordination_counts(cell, positions, cutoff), reference)


@pytest.mark.parametrize("atoms, cutoff", [
    pytest.param(shaken(crystal("fcc", (3, 3, 3)), 0.1, 1), first_shell_cutoff("fcc"), id="fcc"),
    pytest.param(shaken(crystal("bcc", (3, 2, 3)), 0.3, 2), 1.2 * A["bcc"], id="bcc-3-shells"),
    pytest.param(shaken(bulk("Cu", "fcc", a=3.6).repeat((3, 4, 5)), 0.1, 3), 3.6 * 0.85,
                 id="triclinic-fcc-primitive"),
])
def test_displaced_atoms_match_ase(atoms, cutoff):
    cell, positions = cell_and_positions(atoms)
    reference = ase_counts(atoms, cutoff)
    assert grid_counts(cell, positions, cutoff) is None  # off the grid
    for workers in (1, 2, -1):
        np.testing.assert_array_equal(
            general_counts(cell, positions, cutoff, workers=workers), reference)
    np.testing.assert_array_equal(coordination_counts(cell, positions, cutoff), reference)


@pytest.mark.parametrize("cell, cutoff", [
    pytest.param(np.eye(3) * 2.5, 6.0, id="cubic"),
    pytest.param(np.array(bulk("Cu", "fcc", a=3.6).cell[:]), 8.0, id="fcc-primitive"),
    pytest.param(np.array([[2.0, 0, 0], [1.7, 1.5, 0], [0.4, 0.9, 2.2]]), 5.5, id="triclinic"),
])
def test_one_atom_cell_with_cutoff_larger_than_the_box_matches_ase(cell, cutoff):
    atoms = Atoms("Cu", positions=[[0.2, 0.3, 0.1]], cell=cell, pbc=True)
    assert cutoff > perpendicular_widths(cell).max()
    reference = ase_counts(atoms, cutoff)
    assert reference[0] > 12
    for engine in (coordination_counts, general_counts, grid_counts):
        np.testing.assert_array_equal(engine(cell, atoms.positions, cutoff), reference)


def test_atoms_outside_the_cell_are_wrapped_and_match_ase():
    atoms = bulk("Cu", "fcc", a=3.6).repeat((2, 3, 2))
    cell, positions = cell_and_positions(atoms)
    rng = np.random.default_rng(11)
    outside = positions + rng.integers(-3, 4, size=(len(positions), 3)) @ cell
    frac = np.linalg.solve(cell.T, outside.T).T
    assert (frac < 0).any() and (frac >= 1).any()
    reference = ase_counts(atoms, 3.6 * 0.85)
    before = outside.copy()
    for engine in (coordination_counts, general_counts, grid_counts):
        np.testing.assert_array_equal(engine(cell, outside, 3.6 * 0.85), reference)
    np.testing.assert_array_equal(outside, before)  # the caller's array is untouched
    moved = shaken(atoms, 0.05, 4)
    moved_outside = moved.positions + rng.integers(-2, 3, size=(len(moved), 3)) @ cell
    np.testing.assert_array_equal(general_counts(cell, moved_outside, 3.6 * 0.85),
                                  ase_counts(moved, 3.6 * 0.85))


# ---------------------------------------------------------------------------
# Grid fast path specifics
# ---------------------------------------------------------------------------

def test_grid_counts_explicit_grid_and_tolerance():
    atoms = crystal("fcc", (2, 2, 2))
    cell, positions = cell_and_positions(atoms)
    cutoff = first_shell_cutoff("fcc")
    assert grid_counts(cell, positions, cutoff, grid=(4, 4, 4)).tolist() == [12] * 32
    assert grid_counts(cell, positions, cutoff, grid=(8, 8, 8)).tolist() == [12] * 32
    assert grid_counts(cell, positions, cutoff, grid=(3, 3, 3)) is None  # atoms off that grid
    noisy = positions + np.random.default_rng(0).uniform(-3e-7, 3e-7, positions.shape)
    assert grid_counts(cell, noisy, cutoff).tolist() == [12] * 32  # within tol = 1e-6 A
    assert grid_counts(cell, noisy, cutoff, tol=1e-8) is None


def test_grid_counts_declines_overlapping_atoms_and_general_engine_counts_them():
    atoms = crystal("fcc", (2, 2, 2))
    cell, positions = cell_and_positions(atoms)
    doubled = np.vstack([positions, positions[:1] + cell[0]])  # same site, one cell over
    cutoff = first_shell_cutoff("fcc")
    assert grid_counts(cell, doubled, cutoff) is None
    counts = coordination_counts(cell, doubled, cutoff)
    assert counts[0] == counts[-1] == 13  # 12 + the other atom at distance 0
    # The 12 shared neighbours see both copies: 14 atoms with 13, the rest 12.
    assert np.bincount(counts, minlength=14)[12:].tolist() == [len(doubled) - 14, 14]


def test_grid_counts_with_cutoff_below_any_grid_step_is_zero():
    cell, positions = cell_and_positions(crystal("sc", (2, 2, 2)))
    assert grid_counts(cell, positions, 0.5).tolist() == [0] * 8
    assert general_counts(cell, positions, 0.5).tolist() == [0] * 8


def test_empty_structure_and_bad_input():
    cell = np.eye(3) * 3.0
    assert coordination_counts(cell, np.zeros((0, 3)), 2.0).shape == (0,)
    assert pair_distances(cell, np.zeros((0, 3)), 2.0).shape == (0,)
    with pytest.raises(ValueError):
        general_counts(np.zeros((3, 3)), [[0, 0, 0]], 1.0)  # singular cell
    with pytest.raises(ValueError):
        general_counts(cell, [[0, 0, 0]], -1.0)
    with pytest.raises(ValueError):
        general_counts(cell, [[0, 0]], 1.0)
    with pytest.raises(ValueError):
        min_distance(cell, np.zeros((0, 3)))


def test_perpendicular_widths():
    # Orthogonal box: the widths are the sides. fcc primitive cell: the face
    # spacing is a / sqrt(3) (the {111} planes of the conventional cell).
    np.testing.assert_allclose(perpendicular_widths(np.diag([2.0, 3.0, 4.0])), [2, 3, 4])
    np.testing.assert_allclose(perpendicular_widths(bulk("Cu", "fcc", a=3.6).cell[:]),
                               [3.6 / S3] * 3)


# ---------------------------------------------------------------------------
# min_distance and close_pairs against brute force with ASE
# ---------------------------------------------------------------------------

def brute_force_min_distance(atoms: Atoms) -> float:
    """Shortest distance from ASE's minimum-image distances and lattice vectors.

    get_all_distances(mic=True) covers pairs of distinct atoms; an atom and its
    own image are the lattice vectors, searched over small integer multiples.
    """
    distances = atoms.get_all_distances(mic=True)
    np.fill_diagonal(distances, np.inf)
    n = np.arange(-3, 4)
    multiples = np.stack(np.meshgrid(n, n, n, indexing="ij"), -1).reshape(-1, 3)
    multiples = multiples[np.any(multiples != 0, axis=1)]
    shortest_lattice_vector = np.linalg.norm(multiples @ atoms.cell[:], axis=1).min()
    return min(distances.min(), shortest_lattice_vector)


@pytest.mark.parametrize("atoms", [
    pytest.param(shaken(crystal("fcc", (2, 2, 2)), 0.2, 5), id="fcc-shaken"),
    pytest.param(shaken(bulk("Cu", "fcc", a=3.6).repeat((2, 3, 2)), 0.3, 6), id="triclinic"),
    pytest.param(bulk("Cu", "fcc", a=3.6), id="one-atom"),
    pytest.param(Atoms("H2", positions=[[0, 0, 0], [2.9, 0, 0]], cell=np.eye(3) * 3.0,
                       pbc=True), id="pair-across-boundary"),
])
def test_min_distance_matches_brute_force(atoms):
    cell, positions = cell_and_positions(atoms)
    distance, i, j = min_distance(cell, positions)
    assert distance == pytest.approx(brute_force_min_distance(atoms), abs=1e-9)
    assert i <= j
    if i != j:
        assert atoms.get_distance(i, j, mic=True) == pytest.approx(distance, abs=1e-9)


def test_two_atoms_0_3_angstrom_apart_are_found():
    atoms = crystal("fcc", (2, 2, 2))
    cell, positions = cell_and_positions(atoms)
    extra = positions[5] + 0.3 * np.array([1.0, 2.0, 2.0]) / 3.0
    positions = np.vstack([positions, extra])
    distance, i, j = min_distance(cell, positions)
    assert (distance, i, j) == (pytest.approx(0.3, abs=1e-12), 5, 32)
    pi, pj, pd = close_pairs(cell, positions, 1.0)
    assert pi.tolist() == [5] and pj.tolist() == [32]
    assert pd == pytest.approx([0.3], abs=1e-12)


def test_close_pairs_match_ase_sorted_and_limited():
    atoms = shaken(bulk("Cu", "fcc", a=3.6).repeat((2, 2, 3)), 0.2, 8)
    cell, positions = cell_and_positions(atoms)
    r = 3.0
    i, j, d = close_pairs(cell, positions, r)
    ai, aj, ad = neighbor_list("ijd", atoms, r)
    assert len(d) * 2 == len(ad)  # ASE lists each pair from both ends
    np.testing.assert_allclose(d, np.sort(ad)[::2], atol=1e-12)
    assert np.all(np.diff(d) >= 0) and np.all(i <= j)
    # r exceeds half the cell here, so a pair may be a longer image than the
    # minimum image, never a shorter one.
    mic = np.array([atoms.get_distance(a, b, mic=True) for a, b in zip(i, j) if a != b])
    assert np.all(mic <= d[i != j] + 1e-9)
    i5, j5, d5 = close_pairs(cell, positions, r, limit=5)
    np.testing.assert_array_equal(d5, d[:5])


def test_close_pairs_list_self_images_once_per_pair():
    # One-atom sc cell, r = 1.2 a: images at +-a along 3 axes, 3 pairs (i == j).
    i, j, d = close_pairs(np.eye(3) * 2.0, [[0.5, 0.5, 0.5]], 2.4)
    assert i.tolist() == j.tolist() == [0, 0, 0]
    np.testing.assert_allclose(d, [2.0, 2.0, 2.0])


# ---------------------------------------------------------------------------
# pair_distances: histogram reproduces the shells (counts per atom * N / 2)
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("lattice", sorted(SHELLS))
def test_pair_distance_histogram_reproduces_shells(lattice):
    atoms = crystal(lattice, (2, 2, 2))
    cell, positions = cell_and_positions(atoms)
    n = len(positions)
    a = A[lattice]
    cutoffs = [cut for cut, _ in shell_cutoffs(lattice)]
    distances = pair_distances(cell, positions, cutoffs[-1])
    edges = [0.0] + cutoffs
    histogram, _ = np.histogram(distances, bins=edges)
    expected = [count * n // 2 for _, count in SHELLS[lattice]]
    assert histogram.tolist() == expected
    for (shell, _), low, high in zip(SHELLS[lattice], edges[:-1], edges[1:]):
        in_shell = distances[(distances >= low) & (distances < high)]
        np.testing.assert_allclose(in_shell, shell * a, rtol=1e-12)


def test_pair_distances_sampled_centres_give_per_atom_shells():
    atoms = crystal("fcc", (4, 4, 4))
    cell, positions = cell_and_positions(atoms)
    r_max = 1.2 * A["fcc"]  # first two shells: 12 + 6 per atom
    m = sampled_centre_count(cell, len(positions), r_max, 500)
    assert 1 <= m < len(positions)
    distances = pair_distances(cell, positions, r_max, max_pairs=500)
    assert len(distances) == 18 * m
    first_shell = np.count_nonzero(distances < first_shell_cutoff("fcc"))
    assert first_shell / m == 12
    np.testing.assert_array_equal(distances, pair_distances(cell, positions, r_max, max_pairs=500))
    assert len(pair_distances(cell, positions, r_max, max_pairs=10**6)) == 18 * 256 // 2


# ---------------------------------------------------------------------------
# Property: random small triclinic cells, counts equal ASE's
# ---------------------------------------------------------------------------

@st.composite
def random_structures(draw):
    """A triclinic cell of reasonable shape, 1-12 atoms and a cutoff (A)."""
    lengths = draw(st.lists(st.floats(2.0, 6.0), min_size=3, max_size=3))
    skew = draw(st.lists(st.floats(-0.6, 0.6), min_size=3, max_size=3))
    cell = np.diag(lengths)
    cell[1, 0], cell[2, 0], cell[2, 1] = skew[0] * lengths[0], skew[1] * lengths[0], \
        skew[2] * lengths[1]
    n = draw(st.integers(1, 12))
    frac = np.array(draw(st.lists(st.tuples(*[st.floats(-1.0, 2.0)] * 3),
                                  min_size=n, max_size=n)))
    cutoff = draw(st.floats(0.5, 7.0))
    return cell, frac @ cell, cutoff


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(random_structures())
def test_property_random_triclinic_counts_equal_ase(structure):
    cell, positions, cutoff = structure
    atoms = Atoms(f"H{len(positions)}", positions=positions, cell=cell, pbc=True)
    near_cutoff = neighbor_list("d", atoms, cutoff * 1.001)
    # A distance within rounding of the cutoff may fall either side in either code.
    assume(not np.any(np.abs(near_cutoff - cutoff) < 1e-9 * cutoff))
    reference = ase_counts(atoms, cutoff)
    np.testing.assert_array_equal(coordination_counts(cell, positions, cutoff), reference)
    np.testing.assert_array_equal(general_counts(cell, positions, cutoff), reference)


# ----------------------------------------------------------------------------- bounds and new searches


def test_pair_searches_refuse_beyond_their_budget_before_allocating():
    import resource
    import time

    from cellbuild.neighbours import MAX_LISTED_PAIRS, PairLimitError, pair_sample

    n = 20_000
    cell, pile = np.eye(3) * 20.0, np.full((n, 3), 5.0)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    start = time.perf_counter()
    with pytest.raises(PairLimitError) as listed:
        close_pairs(cell, pile, 0.5)
    # every pair of the pile is at distance 0: n(n-1)/2 of them (counting)
    assert listed.value.pairs == pytest.approx(n * (n - 1) / 2, rel=0.05)
    with pytest.raises(PairLimitError):
        coordination_counts(cell, pile, 1.0)
    with pytest.raises(PairLimitError):  # the uniform estimate alone refuses this
        coordination_counts(np.eye(3) * 3.6, np.random.default_rng(0).random((31, 3)), 1000.0)
    sample = pair_sample(cell, pile, 3.0, max_pairs=500_000)
    assert len(sample.distances) <= 2 * 500_000 and sample.centres < n
    assert time.perf_counter() - start < 10.0
    # memory grew by far less than the 4.8 GB of listing every pair
    grown_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - before
    assert grown_kb * 1024 < 24 * MAX_LISTED_PAIRS * 4


def test_pairs_of_and_nearest_neighbours_match_ase():
    from cellbuild.neighbours import nearest_neighbours, pairs_of

    atoms = shaken(crystal("diamond", (2, 2, 2)), 0.1, seed=3)
    cell, positions = cell_and_positions(atoms)
    r = 3.0
    ai, aj, ad = neighbor_list("ijd", atoms, r)  # ASE as the reference
    centres = np.array([0, 5, 17])
    i, j, d = pairs_of(cell, positions, centres, r)
    want = sorted((a, b, round(x, 9)) for a, b, x in zip(ai, aj, ad) if a in centres)
    assert sorted((a, b, round(x, 9)) for a, b, x in zip(i, j, d)) == want
    best, partner = nearest_neighbours(cell, positions, r)
    for k in range(len(atoms)):
        mine = ad[ai == k]
        assert best[k] == pytest.approx(mine.min())
        assert partner[k] == aj[ai == k][np.argmin(mine)]


def test_neighbourhood_shares_cell_lists_without_changing_results():
    """A Neighbourhood (cell lists built once per structure) gives exactly what each
    query gives alone (the queries themselves are checked against ASE above)."""
    from cellbuild.cell_list import (_build_bins, _candidate_counts, _centres_within,
                                     _total_half_candidates)
    from cellbuild.neighbours import Neighbourhood, nearest_neighbours, pair_sample, pairs_of

    atoms = shaken(crystal("fcc", (5, 5, 5)), 0.05, seed=7)
    cell, positions = cell_and_positions(atoms)
    near = Neighbourhood(cell, positions)
    r_max, r = 6.0, 4.5
    alone = pair_sample(cell, positions, r_max, max_pairs=20_000)
    shared = pair_sample(cell, positions, r_max, max_pairs=20_000, near=near)
    assert shared.centres == alone.centres and np.array_equal(shared.distances, alone.distances)
    centres = np.arange(0, len(positions), 7)
    for got, want in zip(nearest_neighbours(cell, positions, r_max, centres=centres, near=near),
                         nearest_neighbours(cell, positions, r_max, centres=centres)):
        assert np.array_equal(got, want)
    # pairs_of may use the cell list of r_max for r: the same pairs, another order
    got = pairs_of(cell, positions, centres, r, near=near)
    want = pairs_of(cell, positions, centres, r)
    assert sorted(zip(*(a.tolist() for a in got))) == sorted(zip(*(a.tolist() for a in want)))
    for a, b in zip(close_pairs(cell, positions, 2.6, limit=5, near=near),
                    close_pairs(cell, positions, 2.6, limit=5)):
        assert np.array_equal(a, b)
    assert list(near._bins) == [r_max]  # shared; none for r, close_pairs keeps none
    bins = _build_bins(cell, positions, 3.0)
    every = np.arange(len(positions))
    assert _total_half_candidates(bins) == _candidate_counts(bins, every, True).sum()
    drawn = np.random.default_rng(1).permutation(len(positions))
    cost = np.cumsum(_candidate_counts(bins, drawn, half=False))
    for budget in (1, 5000, int(cost[-1]), int(cost[-1]) + 1):
        assert _centres_within(bins, drawn, budget) == np.searchsorted(cost, budget)


# ---------------------------------------------------------------------------
# Closest pairs from the occupancy grid against ASE's neighbour list
# ---------------------------------------------------------------------------

def ase_pair_multiset(atoms: Atoms, r: float) -> dict:
    """Reference: {(i, j, d rounded to 1e-9 A): count} of the pairs closer than r,
    i <= j, each pair once (ASE lists every pair from both ends)."""
    ai, aj, ad = neighbor_list("ijd", atoms, r)
    keys = {}
    for a, b, d in zip(np.minimum(ai, aj).tolist(), np.maximum(ai, aj).tolist(), ad.tolist()):
        key = (a, b, round(d, 9))
        keys[key] = keys.get(key, 0) + 1
    assert all(count % 2 == 0 for count in keys.values())
    return {key: count // 2 for key, count in keys.items()}


def grid_cases():
    yield pytest.param(bulk("Po", "sc", a=2.0), 4.5, id="sc-one-atom-images")
    yield pytest.param(bulk("Cu", "fcc", a=3.6).repeat((2, 1, 3)), 4.0, id="fcc-primitive")
    yield pytest.param(bulk("Si", "diamond", a=5.43, cubic=True), 4.0, id="diamond-cubic")
    atoms = crystal("bcc", (3, 2, 2))
    del atoms[[0, 5, 6]]
    yield pytest.param(atoms, 3.2, id="bcc-vacancies")


@pytest.mark.parametrize("atoms, r", grid_cases())
def test_grid_close_pairs_are_the_pairs_of_ase_neighbour_list(atoms, r):
    cell, positions = cell_and_positions(atoms)
    sites = locate_grid(cell, positions)
    assert sites is not None and not sites.shared
    reference = ase_pair_multiset(atoms, r)
    total = sum(reference.values())
    i, j, d = grid_close_pairs(sites, r, total + 10)
    found = {}
    for key in zip(i.tolist(), j.tolist(), np.round(d, 9).tolist()):
        found[key] = found.get(key, 0) + 1
    assert found == reference
    assert np.all(np.diff(d) >= 0) and np.all(i <= j)
    # the cell-list engine finds the same distances
    np.testing.assert_allclose(d, close_pairs(cell, positions, r)[2], atol=1e-9)


@pytest.mark.parametrize("atoms, r", grid_cases())
def test_grid_close_pairs_limited_keeps_the_shortest_then_lowest_indices(atoms, r):
    cell, positions = cell_and_positions(atoms)
    sites = locate_grid(cell, positions)
    i, j, d = grid_close_pairs(sites, r, 10_000)
    order = sorted(zip(np.round(d, 9).tolist(), i.tolist(), j.tolist()))
    for limit in (1, 3, 7):
        li, lj, ld = grid_close_pairs(sites, r, limit)
        assert sorted(zip(np.round(ld, 9).tolist(), li.tolist(), lj.tolist())) == order[:limit]
        # every listed distance is that of the closest pairs (cell-list engine)
        np.testing.assert_allclose(ld, close_pairs(cell, positions, r, limit=limit)[2],
                                   atol=1e-9)


def test_grid_close_pairs_declines_shared_sites_and_empty_radius():
    atoms = crystal("fcc", (2, 2, 2))
    cell, positions = cell_and_positions(atoms)
    assert grid_close_pairs(locate_grid(cell, positions), 0.5, 5) is None  # below a/sqrt2
    doubled = np.vstack([positions, positions[:1]])
    assert grid_close_pairs(locate_grid(cell, doubled), 3.0, 5) is None


def on_grid_cases():
    """Structures on a grid: exactly on the sites, and 1e-7 A off them (within
    the grid tolerance, beyond the distance at which sites stand for atoms)."""
    rng = np.random.default_rng(11)
    for lattice, repeat in (("fcc", (3, 3, 2)), ("diamond", (2, 2, 2)), ("bcc", (3, 3, 3))):
        atoms = crystal(lattice, repeat)
        del atoms[rng.choice(len(atoms), size=len(atoms) // 6, replace=False)]
        yield pytest.param(atoms, id=f"{lattice}-vacancies")
        nudged = atoms.copy()
        nudged.positions += rng.uniform(-1e-7, 1e-7, size=nudged.positions.shape) / S3
        yield pytest.param(nudged, id=f"{lattice}-vacancies-1e-7")
    yield pytest.param(bulk("Cu", "fcc", a=3.6).repeat((2, 3, 2)), id="fcc-primitive")


@pytest.mark.parametrize("atoms", on_grid_cases())
def test_grid_pair_queries_match_ase_and_the_cell_list(atoms):
    """pairs_of, nearest_neighbours and pair_sample answered from the occupancy
    grid (a Neighbourhood holding the grid) against ASE's neighbour list and the
    cell-list engine (no Neighbourhood)."""
    from cellbuild.neighbours import Neighbourhood, nearest_neighbours, pair_sample, pairs_of

    cell, positions = cell_and_positions(atoms)
    sites = locate_grid(cell, positions)
    assert sites is not None
    near = Neighbourhood(cell, positions, sites)
    r = 1.3 * {ELEMENT[k]: A[k] for k in A}[atoms.get_chemical_symbols()[0]]  # 1.3 a
    ai, aj, ad = neighbor_list("ijd", atoms, r)  # ASE as the reference
    centres = np.array([0, 3, len(atoms) - 1, 7])
    i, j, d = pairs_of(cell, positions, centres, r, near=near)
    assert [k for k, _ in itertools.groupby(i.tolist())] == centres.tolist()  # in order
    want = sorted((a, b, round(x, 9)) for a, b, x in zip(ai, aj, ad) if a in centres)
    assert sorted((a, b, round(x, 9)) for a, b, x in zip(i.tolist(), j.tolist(), d)) == want
    best, partner = nearest_neighbours(cell, positions, r, near=near)
    alone_best, _ = nearest_neighbours(cell, positions, r)
    np.testing.assert_allclose(best, alone_best, rtol=0, atol=1e-12)
    for k in range(len(atoms)):
        mine = ad[ai == k]
        assert best[k] == pytest.approx(mine.min(), abs=1e-12)
        # the partner is one of the atoms at that distance
        assert partner[k] in aj[ai == k][np.abs(mine - mine.min()) < 1e-9]
    for max_pairs in (None, 300):  # every pair once, and sampled centres
        grid = pair_sample(cell, positions, 2.0 * r, max_pairs=max_pairs, near=near)
        cells = pair_sample(cell, positions, 2.0 * r, max_pairs=max_pairs)
        assert grid.centres == cells.centres
        np.testing.assert_allclose(grid.distances, cells.distances, rtol=0, atol=1e-12)


@pytest.mark.parametrize("atoms", on_grid_cases())
def test_pair_chunks_are_the_pairs_of_ase_neighbour_list(atoms):
    """pair_chunks (one grid offset at a time, or one part from the cell list)
    give, taken together, ASE's pairs of the centres (reference: ASE's
    neighbor_list), on the sites and 1e-7 A off them."""
    from cellbuild.neighbours import Neighbourhood, pair_chunks

    cell, positions = cell_and_positions(atoms)
    near = Neighbourhood(cell, positions, locate_grid(cell, positions))
    r = 1.3 * {ELEMENT[k]: A[k] for k in A}[atoms.get_chemical_symbols()[0]]
    ai, aj, ad = neighbor_list("ijd", atoms, r)
    centres = np.array([len(atoms) - 1, 0, 5, 2])
    want = sorted((a, b, round(x, 9)) for a, b, x in zip(ai, aj, ad) if a in centres)
    for where in (near, None):  # the grid's offsets, the cell list's one part
        parts = list(pair_chunks(cell, positions, centres, r, near=where))
        assert (len(parts) > 1) == (where is not None)
        found = sorted((a, b, round(x, 9)) for i, j, d in parts
                       for a, b, x in zip(i.tolist(), j.tolist(), d.tolist()))
        assert found == want


def test_grid_pair_sample_refuses_like_the_cell_list():
    from cellbuild.neighbours import Neighbourhood, PairLimitError, pair_sample, pairs_of

    atoms = crystal("fcc", (3, 3, 3))
    cell, positions = cell_and_positions(atoms)
    near = Neighbourhood(cell, positions, locate_grid(cell, positions))
    with pytest.raises(PairLimitError):
        pairs_of(cell, positions, np.arange(len(atoms)), 8.0, max_pairs=1000, near=near)
    # a sample bounded by max_pairs keeps about that many distances
    sample = pair_sample(cell, positions, 8.0, max_pairs=2000, near=near)
    assert 0 < sample.centres < len(atoms) and len(sample.distances) <= 2 * 2000
