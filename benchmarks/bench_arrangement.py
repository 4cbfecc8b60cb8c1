"""Trial swaps per second of the arrangement search (one core).

Run from the repository root:  python benchmarks/bench_arrangement.py [--steps N]

A 256-atom fcc cell (4 x 4 x 4) at 50 % Au, 3 shells, aiming at an alpha that
cannot be met (-0.9 on every shell, so the search never stops early); the
kernel is compiled (or loaded from numba's cache) by a warm-up run first. Prints
the median of 3 runs.
"""
from __future__ import annotations

import argparse
import os
import platform
import statistics
import time

import numpy as np


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=2_000_000)
    args = parser.parse_args()
    from cellbuild.arrangement import search, neighbour_table
    from cellbuild.crystal import resolve_crystal

    crystal = resolve_crystal("fcc", 3.6, (("A", "Cu"),))
    ids, table, _ = neighbour_table(crystal, (4, 4, 4), "A", 3)
    rng = np.random.default_rng(0)
    start = rng.permutation(np.repeat([0, 1], len(ids) // 2)).astype(np.int64)
    args_common = (table, np.ones(3), np.full(3, -0.9), np.array([0.5, 0.5]))
    search(start, *args_common, 1000, np.random.default_rng(1))  # warm-up (compiles)
    rates = []
    for run in range(3):
        t = time.perf_counter()
        _, _, taken, _ = search(start, *args_common, args.steps, np.random.default_rng(run))
        rates.append(taken / (time.perf_counter() - t))
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    print(f"256-atom fcc, 50 %, 3 shells: {statistics.median(rates):,.0f} trial swaps per second "
          f"(median of 3 runs of {args.steps:,})")


if __name__ == "__main__":
    main()
