"""Start-up time of the `cellbuild` command against `python3 -c pass`.

Each command runs as a child process, ``--runs`` times in turn with the others
(so that a busy moment of the shared machine hits every command alike); the
table shows the median wall time, the median CPU time (user + system of the
child, from ``resource.getrusage``) and the ratio of the median wall time to
that of ``python3 -c pass``. Commands:

* ``python3 -c pass``: the floor. It includes what every Python start pays here:
  ``site`` and the ``.pth`` files of the installed packages, among them the
  finder of cellbuild's editable install (``__editable___cellbuild_*_finder``).
* ``cellbuild --help``: target within 3x of the floor.
* ``cellbuild plan recipes/al-host-perfect.yaml``.
* ``cellbuild make`` of a 107-atom recipe (fcc Cu 3 x 3 x 3, one vacancy, four
  formats), into a fresh folder each run.

The console script is run through the interpreter's own bin folder (not a
pyenv shim, which adds a shell and ``pyenv exec``); ``--script`` picks another.

    python benchmarks/bench_startup.py
    python benchmarks/bench_startup.py --runs 11 --importtime   # also the slowest imports
"""
from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SMALL = ("name: small\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\n"
         "size: {repeat: [3, 3, 3]}\nseed: 1\noutputs: [lammps-data, cif, xyz, poscar]\n"
         "defects: {vacancies: {count: 1}}\n")


def run(argv: list[str]) -> tuple[float, float, int]:
    """(wall seconds, CPU seconds of the child, exit code) of one child process."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    done = subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    wall = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu, done.returncode


def default_script() -> str:
    """The `cellbuild` console script beside this interpreter (no shim)."""
    beside = Path(sys.executable).with_name("cellbuild")
    return str(beside) if beside.exists() else (shutil.which("cellbuild") or "cellbuild")


def slowest_imports(argv: list[str], count: int = 12) -> list[str]:
    """The ``count`` largest cumulative import times (``-X importtime``) of one run."""
    done = subprocess.run([sys.executable, "-X", "importtime", *argv], capture_output=True,
                          text=True)
    rows = []
    for line in done.stderr.splitlines():
        if line.startswith("import time:") and "|" in line:
            _, cumulative, name = (part.strip() for part in line[12:].split("|"))
            if cumulative.isdigit():
                rows.append((int(cumulative), name))
    return [f"{us / 1000:7.1f} ms  {name}" for us, name in sorted(rows, reverse=True)[:count]]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--runs", type=int, default=5, help="runs of each command (median)")
    parser.add_argument("--script", default=default_script(), help="the cellbuild executable")
    parser.add_argument("--importtime", action="store_true",
                        help="also list the slowest imports of each cellbuild command")
    args = parser.parse_args()

    with tempfile.TemporaryDirectory(prefix="bench-startup-") as tmp:
        recipe = Path(tmp) / "small.yaml"
        recipe.write_text(SMALL)
        out = Path(tmp) / "out"
        commands = {
            "python3 -c pass": [sys.executable, "-c", "pass"],
            "cellbuild --help": [args.script, "--help"],
            "cellbuild plan al-host-perfect": [args.script, "plan",
                                               str(ROOT / "recipes" / "al-host-perfect.yaml")],
            "cellbuild make (107 atoms)": [args.script, "make", str(recipe), "--out", str(out),
                                           "--force"],
        }
        times: dict[str, list[tuple[float, float]]] = {name: [] for name in commands}
        for _ in range(args.runs):
            for name, argv in commands.items():  # interleaved: noise hits every command
                wall, cpu, code = run(argv)
                if code != 0:
                    raise SystemExit(f"{name} exited {code}")
                times[name].append((wall, cpu))
        floor = statistics.median(w for w, _ in times["python3 -c pass"])
        print(f"python {sys.version.split()[0]}; {args.runs} runs each; load average "
              f"{os.getloadavg()[0]:.2f}")
        print(f"{'command':34} {'wall ms':>8} {'CPU ms':>8} {'x pass':>7}")
        for name, rows in times.items():
            wall = statistics.median(w for w, _ in rows)
            cpu = statistics.median(c for _, c in rows)
            print(f"{name:34} {wall * 1000:8.1f} {cpu * 1000:8.1f} {wall / floor:7.2f}")
        if args.importtime:
            # the console script's own lines, run as python -c so -X importtime applies
            entry = "import sys; from cellbuild.cli import main; sys.argv[0] = 'cellbuild'; main()"
            for name, argv in list(commands.items())[1:]:
                print(f"\nslowest imports, {name}:")
                print("\n".join(slowest_imports(["-c", entry, *argv[1:]])))


if __name__ == "__main__":
    main()
