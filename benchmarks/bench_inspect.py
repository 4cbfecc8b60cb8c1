"""Whole-process benchmark of `cellbuild inspect` against `cellbuild make` writing the same file.

Run from the repository root:  python benchmarks/bench_inspect.py  [--runs N] [--n CELLS]

The files are the 1M-atom fcc recipe of bench_make.py (Cu, 1 % vacancies, 10 % Ni)
written as LAMMPS data (atom style atomic), extended XYZ and P 1 CIF, and the
rock salt recipe of bench_make.py (Schottky defects, 10 % Ca, charges) as LAMMPS
data (atom style charge). Each round runs, for every file, `cellbuild make`
writing only that file and then `cellbuild inspect FILE --json`, each in its
own child process (wall time from the parent's clock, start-up included; peak
memory from the child's rusage), so that make and inspect alternate under the
same machine load. Prints medians over the rounds, the ratio inspect / make
(targets: <= 1 for LAMMPS data and extended XYZ, <= 2 for the CIF), and where
inspect's time goes: start-up and imports, reading, and each step of the
analysis, measured inside one process.
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

FCC = """\
name: {name}
crystal: {{element: Cu, lattice: fcc, a: 3.615}}
size: {{repeat: [{n}, {n}, {n}]}}
seed: 1
outputs: [{output}]
defects:
  vacancies: {{fraction: 0.01}}
  substitutions:
    - {{element: Ni, fraction: 0.10}}
"""

ROCKSALT = """\
name: {name}
crystal: {{lattice: rocksalt, species: {{A: Mg, B: O}}, a: 4.212}}
size: {{repeat: [{n}, {n}, {n}]}}
seed: 1
outputs: [{output}]
charges: {{Mg: 2, O: -2, Ca: 2}}
defects:
  schottky: {{count: {schottky}}}
  substitutions: [{{element: Ca, fraction: 0.10, on: A}}]
"""

#: (label, recipe template, output key, file extension, inspect / make target)
CASES = (
    ("fcc, LAMMPS data (atomic)", FCC, "lammps-data", ".lmp", 1.0),
    ("fcc, extended XYZ", FCC, "xyz", ".xyz", 1.0),
    ("fcc, P 1 CIF", FCC, "cif", ".cif", 2.0),
    ("rock salt, LAMMPS data (charge)", ROCKSALT, "lammps-data", ".lmp", 1.0),
)

#: In-process timing of inspect's parts (run as a child: a fresh interpreter).
PROFILE = r"""
import json, sys, time
t0 = time.perf_counter()
import cellbuild.cli  # what `cellbuild inspect` imports before it reads
from cellbuild import inspection as I
from cellbuild import slab_detect as S
from cellbuild.readers import read_file
t1 = time.perf_counter()
steps = {}
def timed(module, name):
    function = getattr(module, name, None)
    if function is None:  # a step of another version of inspect
        return
    def wrapper(*args, **kwargs):
        start = time.perf_counter()
        try:
            return function(*args, **kwargs)
        finally:
            steps[name] = steps.get(name, 0.0) + time.perf_counter() - start
    setattr(module, name, wrapper)
for name in ("pair_distribution", "_pair_distribution", "_closest_pairs", "match_lattice", "match_prototype",
             "_pairs_below", "_crowded_neighbours", "order_of_file", "space_group",
             "typical_spacing", "_typical_spacing", "find_shells", "infer_defects"):
    timed(I, name)
timed(I.neighbours, "coordination_counts")
timed(S, "find_vacuum")
read = read_file(sys.argv[1])
t2 = time.perf_counter()
I.analyse(read.structure, file=sys.argv[1], source={}, partial_occupancy=read.partial_occupancy)
t3 = time.perf_counter()
print(json.dumps({"imports": t1 - t0, "read": t2 - t1, "analysis": t3 - t2, "steps": steps,
                  "reader": read.reader}))
"""


def run_child(args: list[str]) -> str:
    """Run a child process; return its stdout."""
    proc = subprocess.run(args, capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"{args} failed ({proc.returncode}): {proc.stderr}")
    return proc.stdout


def run_measured(args: list[str]) -> tuple[float, float, str]:
    """Run a child process; return (wall s, peak resident MB from rusage, stdout)."""
    start = time.perf_counter()
    with tempfile.TemporaryFile() as sink:
        proc = subprocess.Popen(args, stdout=sink, stderr=subprocess.PIPE)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - start
        err = proc.stderr.read().decode()
        proc.stderr.close()
        code = os.waitstatus_to_exitcode(status)
        sink.seek(0)
        out = sink.read().decode()
    if code not in (0, 1):
        raise RuntimeError(f"{args} failed ({code}): {err}")
    return wall, usage.ru_maxrss / 1024.0, out


def cellbuild_cmd() -> list[str]:
    return [sys.executable, "-m", "cellbuild.cli"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=3, help="rounds (medians over them)")
    parser.add_argument("--n", type=int, default=63,
                        help="fcc cells per edge (63: 990,186 atoms; rock salt gets n - 13)")
    args = parser.parse_args()
    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python "
          f"{platform.python_version()}; medians of {args.runs} alternating runs")
    with tempfile.TemporaryDirectory(prefix="cellbuild-bench-inspect-") as tmp:
        work = Path(tmp)
        files, recipes = [], []
        for k, (label, template, output, ext, _) in enumerate(CASES):
            name = f"case{k}"
            n = args.n if template is FCC else args.n - 13
            recipe = work / f"{name}.yaml"
            recipe.write_text(template.format(name=name, n=n, output=output,
                                              schottky=round(5000 * (n / 50) ** 3)))
            recipes.append(recipe)
            files.append(work / "out" / f"{name}{ext}")
        make, inspect, atoms, sizes, peaks = ({k: [] for k in range(len(CASES))} for _ in range(5))
        for _ in range(args.runs):
            for k in range(len(CASES)):
                wall, peak, out = run_measured(cellbuild_cmd() + [
                    "make", str(recipes[k]), "--out", str(work / "out"), "--force"])
                make[k].append(wall)
                atoms[k] = int(out.split(":")[1].split("atoms")[0].replace(",", ""))
                sizes[k] = files[k].stat().st_size
                wall, peak, out = run_measured(cellbuild_cmd() + ["inspect", str(files[k]),
                                                                  "--json"])
                inspect[k].append(wall)
                peaks[k].append(peak)
                result = json.loads(out)
                result = result[0] if isinstance(result, list) else result
                assert result["n_atoms"] == atoms[k], (result["n_atoms"], atoms[k])
        parts = []
        for k in range(len(CASES)):
            parts.append(json.loads(run_child([sys.executable, "-c", PROFILE, str(files[k])])))
    print()
    print(f"| {'file':32s} | {'atoms':>9s} | {'MB':>5s} | {'make s':>6s} | {'inspect s':>9s} "
          f"| {'peak MB':>7s} | {'inspect / make':>14s} | {'target':>6s} |")
    print(f"|{'-' * 34}|{'-' * 11}|{'-' * 7}|{'-' * 8}|{'-' * 11}|{'-' * 9}|{'-' * 16}|{'-' * 8}|")
    for k, (label, _, _, _, target) in enumerate(CASES):
        m, i = statistics.median(make[k]), statistics.median(inspect[k])
        mark = "met" if i / m <= target else "not met"
        print(f"| {label:32s} | {atoms[k]:9,d} | {sizes[k] / 1e6:5.0f} | {m:6.2f} | {i:9.2f} "
              f"| {max(peaks[k]):7.0f} | {i / m:14.2f} | {'<= ' + format(target, 'g'):>6s} | {mark}")
    print()
    print("where inspect's time goes (one in-process run, s):")
    for k, (label, *_rest) in enumerate(CASES):
        p = parts[k]
        steps = ", ".join(f"{name} {t:.2f}" for name, t in
                          sorted(p["steps"].items(), key=lambda item: -item[1]) if t >= 0.005)
        print(f"  {label}: imports {p['imports']:.2f}, read {p['read']:.2f} ({p['reader']}), "
              f"analysis {p['analysis']:.2f} [{steps}]")


if __name__ == "__main__":
    main()
