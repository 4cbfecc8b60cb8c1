"""LAMMPS itself reads our data files (skipped where no `lmp` binary is installed,
e.g. Debian's `lammps` package): atom count, box volume and per-atom coordination
from LAMMPS's compute coord/atom (an outside program) agree with the report.
"""
from __future__ import annotations

import json
import shutil
import subprocess

import numpy as np
import pytest

from conftest import recipe_dict

LMP = shutil.which("lmp") or shutil.which("lmp_serial")
pytestmark = pytest.mark.skipif(LMP is None, reason="no LAMMPS binary (lmp) on PATH")

INPUT = """\
units metal
atom_style atomic
boundary p p p
read_data {data}
pair_style zero {pair_cutoff}
pair_coeff * *
compute cn all coord/atom cutoff {cutoff}
dump d all custom 1 {dump} id type c_cn
dump_modify d sort id
thermo_style custom step atoms vol
run 0
"""


@pytest.mark.parametrize("lattice,site", [("fcc", "octahedral"), ("bcc", "tetrahedral"),
                                          ("diamond", "tetrahedral")])
def test_lammps_reads_counts_and_coordination(cli, recipe_file, tmp_path, lattice, site):
    defects = {"vacancies": {"count": 3}, "substitutions": [{"element": "Ni", "count": 5}],
               "interstitials": [{"element": "C", "site": site, "count": 1}]}
    data = recipe_dict("Cu", lattice, 3.6, (3, 3, 3), outputs=["lammps-data"], defects=defects)
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / f"cu-{lattice}.report.json").read_text())
    cutoff = report["coordination"]["cutoff"]
    script = tmp_path / "in.check"
    dump = tmp_path / "cn.dump"
    script.write_text(INPUT.format(data=out / f"cu-{lattice}.lmp", cutoff=cutoff,
                                   pair_cutoff=cutoff + 0.5, dump=dump))
    run = subprocess.run([LMP, "-in", str(script), "-log", "none", "-screen", "none"],
                         capture_output=True, text=True, timeout=120, cwd=tmp_path)
    assert run.returncode == 0, run.stdout + run.stderr
    rows = np.loadtxt(dump, skiprows=9, ndmin=2)
    assert len(rows) == report["n_atoms"]
    counts = rows[:, 2].astype(int)
    hist = {str(k): int(v) for k, v in enumerate(np.bincount(counts)) if v}
    assert hist == report["coordination"]["histogram"]
    types = rows[:, 1].astype(int)
    assert np.count_nonzero(types == report["types"].index("Ni") + 1) == 5
