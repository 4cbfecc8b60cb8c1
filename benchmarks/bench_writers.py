"""Benchmark the format writers (plain script: ``python benchmarks/bench_writers.py``).

Times each writer on a 1,000,188-atom fcc Cu supercell (median of 3), and the
LAMMPS writer once on 10,061,824 atoms, through ``write_structure`` into a
temporary directory (so including the sha256, the atomic rename and fsync)
and also into a null sink (formatting alone). Peak memory is the tracemalloc
peak of a separate run (numpy reports its buffers to tracemalloc), above
what the structure itself holds; the process's maximum RSS is printed last.

Then compares ways of formatting the same 1M x 3 coordinates as '%.10f' and
checks each against Python's '%' formatting (the reference for exactness).

Options: ``--quick`` (100k and 1M atoms instead of 1M and 10M).
"""
from __future__ import annotations

import argparse
import os
import resource
import statistics
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from cellbuild.formats import FORMATS, _rounding, _text, write_structure
from cellbuild.structure import Structure

FCC = np.array([[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0]])
A_CU = 3.615  # Angstrom


def fcc_supercell(reps: int) -> Structure:
    """fcc Cu, reps^3 conventional cells (4 reps^3 atoms), built with numpy."""
    grid = np.stack(np.meshgrid(*[np.arange(reps, dtype=np.float64)] * 3, indexing="ij"), -1)
    frac = ((grid.reshape(-1, 1, 3) + FCC) / reps).reshape(-1, 3)
    cell = np.eye(3) * A_CU * reps
    return Structure(cell, frac @ cell, np.zeros(len(frac), dtype=np.int32), ("Cu",))


class NullSink:
    """A binary handle that discards what it gets (formatting cost alone)."""

    def write(self, data) -> int:
        return memoryview(data).nbytes


def timed(action, repeats: int, setup=lambda: None) -> float:
    """Median wall time of ``action()`` over ``repeats`` runs (each after an
    untimed ``setup()``), seconds."""
    times = []
    for _ in range(repeats):
        setup()
        start = time.perf_counter()
        action()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def peak_mb(action) -> float:
    """tracemalloc peak of ``action()`` in MB (allocations during the call)."""
    tracemalloc.start()
    try:
        action()
        return tracemalloc.get_traced_memory()[1] / 1e6
    finally:
        tracemalloc.stop()


def bench_writer(s: Structure, key: str, out_dir: Path, repeats: int) -> dict:
    path = out_dir / f"bench{FORMATS[key].extension}"
    writer = FORMATS[key].writer()

    def to_disk():
        return write_structure(s, key, path, "benchmark")

    def remove():  # time a fresh file, not also the deletion of the previous one
        path.unlink(missing_ok=True)

    disk = timed(to_disk, repeats, setup=remove)
    size = path.stat().st_size
    sink = timed(lambda: writer(s, NullSink(), "benchmark"), repeats)
    remove()
    peak = peak_mb(to_disk)
    remove()
    return dict(key=key, atoms=s.n_atoms, repeats=repeats, disk=disk, sink=sink,
                mb=size / 1e6, peak=peak)


def print_table(rows: list[dict]) -> None:
    print(f"{'format':<12} {'atoms':>11} {'runs':>4} {'to disk s':>9} {'format s':>8} "
          f"{'s/M atoms':>9} {'file MB':>8} {'MB/s':>6} {'peak MB':>8}")
    for r in rows:
        print(f"{r['key']:<12} {r['atoms']:>11,} {r['repeats']:>4} {r['disk']:>9.3f} "
              f"{r['sink']:>8.3f} {r['disk'] / r['atoms'] * 1e6:>9.3f} {r['mb']:>8.1f} "
              f"{r['mb'] / r['disk']:>6.0f} {r['peak']:>8.1f}")


# --------------------------------------------------------------------------
# Alternatives for the number formatting
# --------------------------------------------------------------------------

def rows_words(xyz: np.ndarray, lookup: bool = True) -> bytes:
    """The chosen method: uint64 words from table lookups (cellbuild.formats._text)."""
    field = _text.Fixed(_rounding.int_digits_for(np.abs(xyz).max(), 10), 10)
    row = _text.Row([field] * 3, lookup=lookup)
    return b"".join(row.render([xyz[p, 0], xyz[p, 1], xyz[p, 2]]).tobytes()
                    for p in _text.chunks(len(xyz)))


def rows_byte_columns(xyz: np.ndarray) -> bytes:
    """Alternative: float rounding rint(|x| * 1e10), then one digit at a time by
    divmod into the byte columns of a (rows, width) matrix."""
    blocks = []
    k = _rounding.int_digits_for(np.abs(xyz).max(), 10)
    width = 1 + k + 11
    for part in _text.chunks(len(xyz)):
        block = xyz[part]
        out = np.full((len(block), 3 * (width + 1)), 32, dtype=np.uint8)
        out[:, -1] = 10
        for c in range(3):
            end = (c + 1) * (width + 1) - 1
            value = np.rint(np.abs(block[:, c]) * 1e10).astype(np.int64)
            negative = (block[:, c] < 0) & (value != 0)
            lead = np.full(len(block), end - 11, dtype=np.intp)  # column of the leading digit
            for col in range(end - 1, end - width, -1):
                if col == end - 11:
                    out[:, col] = 46
                    continue
                value, digit = np.divmod(value, 10)
                keep = (col >= end - 12) | (value > 0) | (digit > 0)
                out[:, col] = np.where(keep, digit + 48, 32)
                lead = np.where(keep & (col < end - 11), col, lead)
            out[np.flatnonzero(negative), lead[negative] - 1] = 45
        blocks.append(out.tobytes())
    return b"".join(blocks)


def rows_python_percent(xyz: np.ndarray) -> bytes:
    """Alternative: Python's '%' over a whole block (C loop, no Python loop)."""
    blocks = []
    for part in _text.chunks(len(xyz)):
        flat = xyz[part].ravel().tolist()
        blocks.append((("%.10f %.10f %.10f\n" * (len(flat) // 3)) % tuple(flat)).encode())
    return b"".join(blocks)


def rows_savetxt(xyz: np.ndarray) -> bytes:
    """Alternative: np.savetxt (a Python loop per row inside numpy)."""
    import io

    handle = io.BytesIO()
    np.savetxt(handle, xyz, fmt="%.10f")
    return handle.getvalue()


def compare_alternatives(n: int) -> None:
    rng = np.random.default_rng(0)
    xyz = rng.uniform(-230.0, 230.0, (n, 3))
    # Reference: Python's own formatting, minus sign dropped on zeros like ours.
    reference = [" ".join(("%.10f" % v).replace("-0.0000000000", "0.0000000000") for v in r)
                 for r in xyz[:20000].tolist()]
    methods = [
        ("uint64 words + lookup tables (chosen)", rows_words, n),
        ("uint64 words, digit groups + masks only", lambda x: rows_words(x, lookup=False), n),
        ("byte columns, digit by digit, float rint", rows_byte_columns, n),
        ("Python '%' on whole blocks", rows_python_percent, n),
        (f"np.savetxt ({n // 10:,} rows, scaled)", rows_savetxt, n // 10),
    ]
    print(f"\nFormatting {n:,} rows x 3 coordinates as '%.10f' "
          f"(median of 3, seconds per {n:,} rows):")
    for name, method, rows in methods:
        seconds = timed(lambda: method(xyz[:rows]), 3) * n / rows
        sample = [" ".join(line.split()) for line in
                  method(xyz[:20000]).decode().splitlines()]
        exact = "exact" if sample == reference else "NOT exact"
        print(f"  {name:<44} {seconds:7.3f} s   {exact} vs Python '%' on 20,000 rows")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="100k and 1M atoms")
    args = parser.parse_args()
    small, large = (29, 63) if args.quick else (63, 136)  # 4 n^3 atoms

    rows = []
    with tempfile.TemporaryDirectory(prefix="cellbuild-bench-") as tmp:
        out_dir = Path(tmp)
        s = fcc_supercell(small)
        for key in FORMATS:
            rows.append(bench_writer(s, key, out_dir, repeats=3))
        del s
        s = fcc_supercell(large)
        rows.append(bench_writer(s, "lammps-data", out_dir, repeats=1))
        del s
    print(f"\nWriters (python {sys.version.split()[0]}, numpy {np.__version__}, "
          f"{os.cpu_count()} cores; chunk {_text.CHUNK_ROWS:,} rows).")
    print("'to disk' = write_structure (format + sha256 + atomic rename + fsync); "
          "'format' = into a null sink;\n'peak MB' = tracemalloc peak during one "
          "write_structure, beyond the structure's own arrays.\n")
    print_table(rows)
    compare_alternatives(100_000 if args.quick else 1_000_000)
    maxrss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1e3
    print(f"\nProcess max RSS: {maxrss:,.0f} MB (includes the {4 * large ** 3:,}-atom "
          "structure: positions, species and site arrays).")


if __name__ == "__main__":
    main()
