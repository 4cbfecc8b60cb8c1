"""Whole-process benchmark of `cellbuild make`, against a plain ASE script.

Run from the repository root:  python benchmarks/bench_make.py  [--skip-10m] [--runs N]

Every measurement is a separate child process; wall time from the parent's
clock, peak memory (maximum resident set size) from the child's rusage
(os.wait4). Prints a table: atoms, wall s, peak MB, s per million atoms, ratio
to the ASE script. The ASE script does the same job with ASE alone: bulk +
repeat, delete 1 % of the atoms at random, substitute 10 %, neighbour list for
coordination, write lammps-data. Rock salt and perovskite at about 1M atoms
(Schottky defects, a 10 % dopant, charges, LAMMPS data) are compared with fcc
at 1M atoms per atom, and so is fcc in a box along [1-10], [11-2], [111].
"""
from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

RECIPE = """\
name: {name}
crystal: {{element: Cu, lattice: fcc, a: 3.615}}
size: {{repeat: [{n}, {n}, {n}]}}
seed: 1
outputs: [{outputs}]
defects:
  vacancies: {{fraction: 0.01}}
  substitutions:
    - {{element: Ni, fraction: 0.10}}
"""

#: Compounds at about 1M atoms with defects and charges (neutral: Schottky
#: defects and an isovalent dopant), against fcc at the same size.
COMPOUNDS = {
    "rocksalt": ("{{lattice: rocksalt, species: {{A: Mg, B: O}}, a: 4.212}}", 50,
                 "schottky: {{count: 5000}}\n  substitutions: [{{element: Ca, fraction: 0.10, on: A}}]",
                 "{{Mg: 2, O: -2, Ca: 2}}"),
    "perovskite": ("{{lattice: perovskite, species: {{A: Sr, B: Ti, X: O}}, a: 3.905}}", 58,
                   "schottky: {{count: 1951}}\n  substitutions: [{{element: Ba, fraction: 0.10, on: A}}]",
                   "{{Sr: 2, Ti: 4, O: -2, Ba: 2}}"),
}

COMPOUND_RECIPE = """\
name: {{name}}
crystal: {crystal}
size: {{{{repeat: [{{n}}, {{n}}, {{n}}]}}}}
seed: 1
outputs: [{{outputs}}]
charges: {charges}
defects:
  {defects}
"""

#: fcc Cu in the box along [1-10], [11-2], [111] (6 atoms per unit), with the
#: defects of RECIPE, at about the size of the 63^3 cubic box.
ORIENTED_RECIPE = RECIPE.replace(
    "crystal: {{element: Cu, lattice: fcc, a: 3.615}}",
    "crystal: {{element: Cu, lattice: fcc, a: 3.615, "
    "axes: {{x: [1, -1, 0], y: [1, 1, -2], z: [1, 1, 1]}}}}").replace(
    "size: {{repeat: [{n}, {n}, {n}]}}", "size: {{atoms: {n}}}")

ASE_SCRIPT = """
import sys
import numpy as np
from ase.build import bulk
from ase.io import write
from ase.neighborlist import neighbor_list
n, path = int(sys.argv[1]), sys.argv[2]
atoms = bulk("Cu", "fcc", a=3.615, cubic=True).repeat((n, n, n))
rng = np.random.default_rng(1)
del atoms[rng.choice(len(atoms), size=round(0.01 * len(atoms)), replace=False)]
symbols = np.array(atoms.get_chemical_symbols())
symbols[rng.choice(len(atoms), size=round(0.10 * len(atoms)), replace=False)] = "Ni"
atoms.set_chemical_symbols(symbols)
cutoff = 0.5 * (3.615 / 2 ** 0.5 + 3.615)
counts = np.bincount(neighbor_list("i", atoms, cutoff), minlength=len(atoms))
write(path, atoms, format="lammps-data", specorder=["Cu", "Ni"], masses=True)
print(len(atoms), np.bincount(counts).tolist())
"""


def run_child(args: list[str]) -> tuple[float, float, str]:
    """Run a child process; return (wall s, peak resident MB, stdout)."""
    start = time.perf_counter()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    out = proc.stdout.read().decode()
    err = proc.stderr.read().decode()
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode not in (0, 1):
        raise RuntimeError(f"{args} failed ({proc.returncode}): {err}")
    return wall, usage.ru_maxrss / 1024.0, out


def cellbuild_cmd() -> list[str]:
    return [sys.executable, "-m", "cellbuild.cli"]


def make_run(work: Path, n: int, outputs: str, runs: int,
             template: str = RECIPE, name: str = "cu") -> tuple[int, float, float]:
    """Median wall and peak memory of `cellbuild make` on n x n x n cells of the
    recipe ``template`` (fcc Cu with the defects by default)."""
    recipe = work / f"{name}{n}.yaml"
    recipe.write_text(template.format(name=f"{name}{n}", n=n, outputs=outputs))
    walls, peaks = [], []
    for _ in range(runs):
        wall, peak, out = run_child(cellbuild_cmd() + ["make", str(recipe), "--out",
                                                       str(work / "out"), "--force"])
        walls.append(wall)
        peaks.append(peak)
    atoms = int(out.split(":")[1].split("atoms")[0].replace(",", ""))
    for f in (work / "out").glob(f"{name}{n}.*"):
        f.unlink()
    return atoms, statistics.median(walls), max(peaks)


def ase_run(work: Path, n: int) -> tuple[int, float, float]:
    script = work / "ase_only.py"
    script.write_text(ASE_SCRIPT)
    wall, peak, out = run_child([sys.executable, str(script), str(n), str(work / "ase.lmp")])
    (work / "ase.lmp").unlink()
    return int(out.split()[0]), wall, peak


def startup(work: Path, runs: int = 5) -> tuple[float, float]:
    recipe = work / "small.yaml"
    recipe.write_text(RECIPE.format(name="small", n=2, outputs="xyz"))
    helps = [run_child(cellbuild_cmd() + ["--help"])[0] for _ in range(runs)]
    plans = [run_child(cellbuild_cmd() + ["plan", str(recipe)])[0] for _ in range(runs)]
    return statistics.median(helps), statistics.median(plans)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--skip-10m", action="store_true", help="leave out the 10M-atom run")
    parser.add_argument("--runs", type=int, default=3, help="runs per cellbuild size (median)")
    args = parser.parse_args()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    rows = []
    with tempfile.TemporaryDirectory(prefix="cellbuild-bench-") as tmp:
        work = Path(tmp)
        help_s, plan_s = startup(work)
        print(f"start-up (median of 5): cellbuild --help {help_s:.3f} s, cellbuild plan {plan_s:.3f} s")
        atoms, wall, peak = ase_run(work, 40)
        rows.append(("ASE-only script, 40^3", atoms, wall, peak, None))
        ase_wall = wall
        atoms, wall, peak = make_run(work, 40, "lammps-data", args.runs)
        rows.append(("cellbuild make, 40^3, lammps-data", atoms, wall, peak, ase_wall / wall))
        atoms, wall, peak = make_run(work, 63, "lammps-data", args.runs)
        rows.append(("cellbuild make, fcc 63^3, lammps-data", atoms, wall, peak, None))
        fcc_per_atom = wall / atoms
        o_atoms, o_wall, o_peak = make_run(work, 1000188, "lammps-data", args.runs,
                                           ORIENTED_RECIPE, "cu111-")
        rows.append(("cellbuild make, fcc along [111], lammps-data", o_atoms, o_wall, o_peak, None))
        print(f"oriented fcc: wall per atom / cubic fcc's = {o_wall / o_atoms / fcc_per_atom:.2f}")
        for key, (crystal, n, defects, charges) in COMPOUNDS.items():
            template = COMPOUND_RECIPE.format(crystal=crystal, defects=defects, charges=charges)
            c_atoms, c_wall, c_peak = make_run(work, n, "lammps-data", args.runs, template, key)
            rows.append((f"cellbuild make, {key} {n}^3, charges", c_atoms, c_wall, c_peak, None))
            print(f"{key}: wall per atom / fcc's = {c_wall / c_atoms / fcc_per_atom:.2f}")
        atoms, wall, peak = make_run(work, 63, "lammps-data, xyz", args.runs)
        rows.append(("cellbuild make, 63^3, lammps-data + xyz", atoms, wall, peak, None))
        per_m_1m = wall / atoms * 1e6
        if not args.skip_10m:
            atoms, wall, peak = make_run(work, 136, "lammps-data", 1)
            rows.append(("cellbuild make, 136^3, lammps-data", atoms, wall, peak, None))
            print(f"linearity: s per million atoms at 10M / at 1M = "
                  f"{wall / atoms * 1e6 / per_m_1m:.2f}")
    print()
    print(f"| {'run':42s} | {'atoms':>10s} | {'wall s':>7s} | {'peak MB':>8s} | {'s / M atoms':>11s} | {'ASE / ours':>10s} |")
    print(f"|{'-' * 44}|{'-' * 12}|{'-' * 9}|{'-' * 10}|{'-' * 13}|{'-' * 12}|")
    for label, atoms, wall, peak, ratio in rows:
        r = f"{ratio:.1f}" if ratio else ""
        print(f"| {label:42s} | {atoms:10,d} | {wall:7.2f} | {peak:8.0f} | {wall / atoms * 1e6:11.2f} | {r:>10s} |")


if __name__ == "__main__":
    main()
