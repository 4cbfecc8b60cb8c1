"""The floor for `cellbuild make`: a plain numpy script doing the least the job needs.

Run:  python benchmarks/floor_make.py N OUT.lmp

Builds N x N x N conventional cells of fcc Cu (a = 3.615 Angstrom, 4 N^3
sites), removes 1 % of the sites at random and turns 10 % of the remaining
atoms into Ni (the fractions of benchmarks/bench_make.py's recipe, one seeded
numpy Generator), counts each atom's neighbours on a uint8 occupancy grid (one
padded copy of the grid, the 12 first-shell offsets added as shifted slices,
read at the atoms), and writes a LAMMPS data file of the same layout
(``id type x y z``, 10 decimals in Angstrom) with fsync. Start-up included: the
benchmark times the whole process. Prints the atom count and the coordination
histogram, so a run can be checked by eye.

It checks nothing else (no audit, no report), so it is a floor, not a peer:
`cellbuild make` should stay within a small factor of it.
"""
from __future__ import annotations

import os
import sys

import numpy as np

A = 3.615
#: fcc basis in half-cell grid steps (the grid has 2 steps per cell edge).
BASIS = np.array([[0, 0, 0], [0, 1, 1], [1, 0, 1], [1, 1, 0]], dtype=np.int64)
#: The 12 first-shell offsets of fcc in half-cell grid steps.
SHELL = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)
                  if abs(i) + abs(j) + abs(k) == 2], dtype=np.int64)
DECIMALS = 10
#: Rows formatted per chunk (bounded memory: the chunk's text is ~64 bytes per row).
CHUNK = 1 << 16


POWERS = 10 ** np.arange(1, 19, dtype=np.int64)


def digits(out: np.ndarray, values: np.ndarray, blank_leading: bool = True) -> None:
    """Right-aligned decimal digits of non-negative ``values`` (below 2**31,
    so int32 divisions serve) into the uint8 rows ``out`` (one row per digit
    position, one column per value: contiguous writes); leading zeros blank
    unless ``blank_leading`` is False (the last digit always stays)."""
    v = values.astype(np.int32)
    r = np.empty_like(v)
    width = out.shape[0]
    for pos in range(width - 1, -1, -1):
        np.divmod(v, 10, out=(v, r))
        np.add(r, ord("0"), out=out[pos], casting="unsafe")
    if blank_leading:
        used = np.searchsorted(POWERS, values, side="right") + 1  # digits shown
        out[np.arange(width)[:, None] < (width - used)[None, :]] = ord(" ")


def main() -> None:
    n, path = int(sys.argv[1]), sys.argv[2]
    ijk = np.indices((n, n, n)).reshape(3, -1).T
    sites = (2 * ijk[:, None, :] + BASIS[None]).reshape(-1, 3)
    rng = np.random.default_rng(1)
    keep = np.ones(len(sites), dtype=bool)
    keep[rng.choice(len(sites), size=round(0.01 * len(sites)), replace=False)] = False
    sites = sites[keep]
    n_atoms = len(sites)
    species = np.ones(n_atoms, dtype=np.int64)
    species[rng.choice(n_atoms, size=round(0.10 * n_atoms), replace=False)] = 2

    m = 2 * n
    occupancy = np.zeros((m, m, m), dtype=np.uint8)
    occupancy[sites[:, 0], sites[:, 1], sites[:, 2]] = 1
    padded = np.pad(occupancy, 1, mode="wrap")
    total = np.zeros_like(occupancy)
    for d0, d1, d2 in (SHELL + 1).tolist():
        total += padded[d0:d0 + m, d1:d1 + m, d2:d2 + m] & 1
    coordination = total[sites[:, 0], sites[:, 1], sites[:, 2]]

    step = A / 2.0
    header = (f"floor (units metal, atom_style atomic)\n\n{n_atoms} atoms\n2 atom types\n\n"
              + "".join(f"0.0000000000 {n * A:.10f} {a}lo {a}hi\n" for a in "xyz")
              + "\nMasses\n\n1 63.546  # Cu\n2 58.6934  # Ni\n\nAtoms  # atomic\n\n")
    id_width, coord_width = 13, 16  # the layout of cellbuild's LAMMPS data rows
    row = id_width + 2 + 3 * coord_width + 1
    scale = 10 ** DECIMALS
    with open(path, "wb") as handle:
        handle.write(header.encode("ascii"))
        for start in range(0, n_atoms, CHUNK):
            part = slice(start, min(start + CHUNK, n_atoms))
            rows = part.stop - part.start
            # built transposed (a row per text column), so every digit write is contiguous
            text = np.full((row, rows), ord(" "), dtype=np.uint8)
            digits(text[0:id_width], np.arange(part.start + 1, part.stop + 1))
            text[id_width + 1] = species[part] + ord("0")
            fixed = np.rint(sites[part] * (step * scale)).astype(np.int64)
            for axis in range(3):
                at = id_width + 2 + axis * coord_width
                whole, frac = np.divmod(fixed[:, axis], scale)
                digits(text[at:at + coord_width - DECIMALS - 1], whole)
                text[at + coord_width - DECIMALS - 1] = ord(".")
                high, low = np.divmod(frac, 10 ** (DECIMALS // 2))  # int32-sized halves
                tail = at + coord_width - DECIMALS
                digits(text[tail:tail + DECIMALS // 2], high, False)
                digits(text[tail + DECIMALS // 2:at + coord_width], low, False)
            text[-1] = ord("\n")
            text = np.ascontiguousarray(text.T)
            handle.write(text.tobytes())
        handle.flush()
        os.fsync(handle.fileno())
    print(n_atoms, np.bincount(coordination, minlength=13).tolist())


if __name__ == "__main__":
    main()
