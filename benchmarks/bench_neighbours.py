"""Timings of cellbuild.neighbours on million-atom crystals (2-core machine).

Run as ``python benchmarks/bench_neighbours.py``; it prints a table of wall
times (time.perf_counter, median of 3 runs) and checks the answers:

* coordination counts of 1,000,188 fcc atoms (a = 3.615 A, 63^3 conventional
  cells, cutoff midway between the first and second shells) on their lattice
  sites (target <= 1 s) and displaced at random by up to 0.1 A (target <= 2 s);
* the general engine on the same atoms, and scipy cKDTree (periodic
  ``boxsize``, and on a copy padded with images) as the alternative engine the
  module docstring compares against;
* ASE's ``neighbor_list('i', ...)`` on 256,000 atoms (40^3 fcc cells) against
  ours (target: ours >= 10x faster). One ASE run takes about 35 s here, so it
  is timed once unless ``--full`` is given (then median of 3, about 2 minutes
  more);
* a triclinic cell: the fcc primitive cell repeated 100^3 times (1,000,000
  atoms), on lattice sites and displaced.

The crystals are built with plain numpy. Takes 40-80 s (most of it ASE).
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time

import numpy as np

from cellbuild.neighbours import coordination_counts, general_counts, perpendicular_widths

A_CU = 3.615  # Angstrom
CUTOFF = (A_CU / np.sqrt(2.0) + A_CU) / 2.0  # midway between fcc shells 1 and 2
FCC_BASIS = np.array([[0.0, 0.0, 0.0], [0.0, 0.5, 0.5], [0.5, 0.0, 0.5], [0.5, 0.5, 0.0]])


def fcc_conventional(n: int, a: float = A_CU) -> tuple[np.ndarray, np.ndarray]:
    """n x n x n conventional fcc cells: (cell (3, 3), positions (4 n^3, 3)), Angstrom."""
    idx = np.arange(n, dtype=np.float64)
    corners = np.stack(np.meshgrid(idx, idx, idx, indexing="ij"), axis=-1).reshape(-1, 1, 3)
    positions = ((corners + FCC_BASIS) * a).reshape(-1, 3)
    return np.eye(3) * a * n, positions


def fcc_primitive(n: int, a: float = A_CU) -> tuple[np.ndarray, np.ndarray]:
    """n x n x n fcc primitive (triclinic) cells, one atom each, Angstrom."""
    primitive = 0.5 * a * np.array([[0.0, 1.0, 1.0], [1.0, 0.0, 1.0], [1.0, 1.0, 0.0]])
    idx = np.arange(n, dtype=np.float64)
    frac = np.stack(np.meshgrid(idx, idx, idx, indexing="ij"), axis=-1).reshape(-1, 3)
    return primitive * n, frac @ primitive


def displaced(positions: np.ndarray, amplitude: float = 0.1, seed: int = 0) -> np.ndarray:
    """Each atom moved in a random direction by a random length up to amplitude (A)."""
    rng = np.random.default_rng(seed)
    direction = rng.normal(size=positions.shape)
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    length = rng.uniform(0.0, amplitude, size=(len(positions), 1))
    return positions + direction * length


def timed(fn, repeats: int = 3):
    """(median wall time in s, result of the last run) of fn() over ``repeats`` runs."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), result


def ckdtree_boxsize_counts(cell, positions, cutoff, workers=2):
    """Alternative engine: periodic cKDTree on an orthogonal box (cutoff < half box)."""
    from scipy.spatial import cKDTree

    box = np.diag(cell)
    # Unbalanced, non-compact trees build and query faster here (measured).
    tree = cKDTree(np.mod(positions, box), boxsize=box, balanced_tree=False,
                   compact_nodes=False)
    counts = tree.query_ball_point(tree.data, cutoff, return_length=True, workers=workers)
    return counts - 1  # the atom itself


def ckdtree_padded_counts(cell, positions, cutoff, workers=2):
    """Alternative engine: cKDTree on the atoms plus their images near the faces.

    Images are kept when they lie within ``cutoff`` of the cell, measured with
    the perpendicular widths (works for triclinic cells with cutoff < width).
    """
    from scipy.spatial import cKDTree

    frac = np.mod(np.einsum("ij,jk->ik", positions, np.linalg.inv(cell)), 1.0)
    margin = cutoff / perpendicular_widths(cell)
    padded = []
    for shift in np.stack(np.meshgrid(*[[-1, 0, 1]] * 3, indexing="ij"), -1).reshape(-1, 3):
        moved = frac + shift
        near = np.all((moved >= -margin) & (moved < 1.0 + margin), axis=1)
        padded.append(moved[near])
    tree = cKDTree(np.einsum("ij,jk->ik", np.concatenate(padded), cell),
                   balanced_tree=False, compact_nodes=False)
    counts = tree.query_ball_point(np.einsum("ij,jk->ik", frac, cell), cutoff,
                                   return_length=True, workers=workers)
    return counts - 1


def ase_counts(cell, positions, cutoff):
    """Reference: ASE's neighbour list, counts per atom."""
    from ase import Atoms
    from ase.neighborlist import neighbor_list

    atoms = Atoms(numbers=np.full(len(positions), 29), positions=positions, cell=cell, pbc=True)
    return np.bincount(neighbor_list("i", atoms, cutoff), minlength=len(positions))


def all_equal(counts, value) -> str:
    """'ok' if every count equals value, else a short description of the mismatch."""
    values = np.unique(counts)
    return "ok" if list(values) == [value] else f"WRONG {values[:5]}"


def bench_fcc_million(rows: list) -> None:
    """1M fcc atoms on lattice sites and displaced: ours and the cKDTree alternatives."""
    cell, lattice = fcc_conventional(63)
    shaken = displaced(lattice)
    n = len(lattice)
    runs = [
        ("fcc 63^3 lattice sites", "coordination_counts (grid)", "<= 1 s",
         lambda: coordination_counts(cell, lattice, CUTOFF)),
        ("fcc 63^3 displaced 0.1 A", "coordination_counts (cell list)", "<= 2 s",
         lambda: coordination_counts(cell, shaken, CUTOFF)),
        ("fcc 63^3 lattice sites", "general_counts (cell list)", "",
         lambda: general_counts(cell, lattice, CUTOFF)),
        ("fcc 63^3 displaced 0.1 A", "cKDTree boxsize (alternative)", "",
         lambda: ckdtree_boxsize_counts(cell, shaken, CUTOFF)),
        ("fcc 63^3 displaced 0.1 A", "cKDTree padded (alternative)", "",
         lambda: ckdtree_padded_counts(cell, shaken, CUTOFF)),
    ]
    for case, engine, target, fn in runs:
        seconds, counts = timed(fn)
        rows.append((case, n, engine, seconds, target, all_equal(counts, 12)))


def bench_against_ase(rows: list, ase_repeats: int) -> None:
    """256,000 fcc atoms: ASE's neighbour list against our two engines."""
    cell, atoms = fcc_conventional(40)
    n = len(atoms)
    case = "fcc 40^3 lattice sites"
    t_ase, reference = timed(lambda: ase_counts(cell, atoms, CUTOFF), repeats=ase_repeats)
    rows.append((case, n, f"ASE neighbor_list (x{ase_repeats})", t_ase, "",
                 all_equal(reference, 12)))
    for engine, fn in (("coordination_counts (grid)", coordination_counts),
                       ("general_counts (cell list)", general_counts)):
        seconds, counts = timed(lambda: fn(cell, atoms, CUTOFF))
        same = "ok, = ASE" if np.array_equal(counts, reference) else "DIFFERS from ASE"
        rows.append((case, n, engine, seconds, f">= 10x ASE: {t_ase / seconds:.0f}x", same))


def bench_triclinic(rows: list) -> None:
    """1M atoms in the triclinic fcc primitive cell repeated 100^3 times."""
    cell, lattice = fcc_primitive(100)
    shaken = displaced(lattice)
    runs = [
        ("triclinic fcc prim. 100^3", "coordination_counts (grid)",
         lambda: coordination_counts(cell, lattice, CUTOFF)),
        ("triclinic fcc prim. 100^3", "general_counts (cell list)",
         lambda: general_counts(cell, lattice, CUTOFF)),
        ("triclinic displaced 0.1 A", "coordination_counts (cell list)",
         lambda: coordination_counts(cell, shaken, CUTOFF)),
    ]
    for case, engine, fn in runs:
        seconds, counts = timed(fn)
        rows.append((case, len(lattice), engine, seconds, "", all_equal(counts, 12)))


def print_table(rows: list) -> None:
    print(f"cutoff {CUTOFF:.4f} A, wall time median of 3 (time.perf_counter), 2 workers\n")
    header = ("case", "atoms", "engine", "seconds", "target", "check")
    widths = [27, 9, 32, 8, 20, 16]
    print("  ".join(h.ljust(w) for h, w in zip(header, widths)))
    print("  ".join("-" * w for w in widths))
    for case, atoms, engine, seconds, target, check in rows:
        cells = (case, f"{atoms:,}", engine, f"{seconds:.3f}", target, check)
        print("  ".join(str(v).ljust(w) for v, w in zip(cells, widths)))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--full", action="store_true",
                        help="time ASE 3 times too (about 2 more minutes)")
    args = parser.parse_args(argv)
    rows = []  # (case, atoms, engine, seconds, target, check)
    bench_fcc_million(rows)
    bench_against_ase(rows, ase_repeats=3 if args.full else 1)
    bench_triclinic(rows)
    print_table(rows)
    return 0 if all(row[5].startswith("ok") for row in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
