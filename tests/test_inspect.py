"""`cellbuild inspect` on files written by other programs (ASE and pymatgen), held
against textbook geometry, spglib and ASE's own readers.

Reference values (copied with their sources; the project does not read them):

* Coordination and nearest-neighbour distance of cubic lattices: geometry of
  touching hard spheres (Kittel, Introduction to Solid State Physics, ch. 1;
  Callister, Materials Science and Engineering, ch. 3): sc 6 at a, bcc 8 at
  a*sqrt(3)/2, fcc 12 at a/sqrt(2), diamond 4 at a*sqrt(3)/4.
* Neighbour shells (distance in units of a: count), derived from the lattice
  vectors (common practice): SC 1:6, sqrt2:12, sqrt3:8; BCC sqrt3/2:8, 1:6,
  sqrt2:12; FCC 1/sqrt2:12, 1:6, sqrt(3/2):24; diamond sqrt3/4:4,
  1/sqrt2:12, sqrt(11)/4:12.
* Space groups (International Tables Vol. A; spglib computes them
  independently): sc Pm-3m 221, bcc Im-3m 229, fcc Fm-3m 225, diamond Fd-3m 227;
  rock salt Fm-3m 225.
* Lattice constants (Kittel, from memory, +-0.5 %): Cu fcc 3.61, Fe bcc 2.87,
  Si diamond 5.43 Angstrom.
* Standard atomic weights (IUPAC): Cu 63.546, Fe 55.845, Si 28.085, Ni 58.6934.
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from cellbuild.readers import element_of_mass, read_file

SQ2, SQ3 = math.sqrt(2.0), math.sqrt(3.0)
AVOGADRO = 6.02214076e23  # 1/mol, exact (SI 2019)

# Kittel ch. 1 / Callister ch. 3 (coordination); shells from the lattice vectors
# (common practice), units of a; space groups: International Tables Vol. A.
REFERENCE = {
    "sc": {"coordination": 6, "shells": [(1.0, 6), (SQ2, 12), (SQ3, 8)], "space_group": 221,
           "atoms_per_cell": 1},
    "bcc": {"coordination": 8, "shells": [(SQ3 / 2, 8), (1.0, 6), (SQ2, 12)], "space_group": 229,
            "atoms_per_cell": 2},
    "fcc": {"coordination": 12, "shells": [(1 / SQ2, 12), (1.0, 6), (math.sqrt(1.5), 24)],
            "space_group": 225, "atoms_per_cell": 4},
    "diamond": {"coordination": 4, "shells": [(SQ3 / 4, 4), (1 / SQ2, 12),
                                              (math.sqrt(11) / 4, 12)],
                "space_group": 227, "atoms_per_cell": 8},
}
# Kittel, from memory (+-0.5 %), Angstrom
KITTEL_A = {"Cu": 3.61, "Fe": 2.87, "Si": 5.43}
# IUPAC standard atomic weights, g/mol
IUPAC_WEIGHT = {"Cu": 63.546, "Fe": 55.845, "Si": 28.085, "Ni": 58.6934}

# name -> (element, lattice, how ASE builds it)
CRYSTALS = {
    "fe-bcc": ("Fe", "bcc", dict(cubic=True), (3, 3, 3)),
    "cu-fcc": ("Cu", "fcc", dict(cubic=True), (3, 3, 3)),
    "si-diamond": ("Si", "diamond", dict(cubic=True), (2, 2, 2)),
    # the triclinic primitive fcc cell (60 degree angles), repeated
    "cu-fcc-primitive": ("Cu", "fcc", {}, (4, 4, 4)),
}
ASE_FORMATS = {"cif": "ase.cif", "extxyz": "ase.xyz", "lammps-data": "ase.lmp",
               "vasp": "ase.vasp"}


def crystal(name):
    from ase.build import bulk

    element, lattice, kwargs, repeat = CRYSTALS[name]
    return bulk(element, lattice, a=KITTEL_A[element], **kwargs).repeat(repeat)


def write_ase(atoms, folder, fmt, name=None):
    import ase.io

    path = folder / (name or ASE_FORMATS[fmt])
    extra = {"masses": True, "specorder": sorted(set(atoms.get_chemical_symbols()))} \
        if fmt == "lammps-data" else {}
    ase.io.write(str(path), atoms, format=fmt, **extra)
    return path


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """Every crystal written by ASE in four formats and by pymatgen as CIF and POSCAR."""
    from pymatgen.io.ase import AseAtomsAdaptor

    files = {}
    for name in CRYSTALS:
        folder = tmp_path_factory.mktemp(name)
        atoms = crystal(name)
        for fmt in ASE_FORMATS:
            files[(name, f"ase-{fmt}")] = write_ase(atoms, folder, fmt)
        structure = AseAtomsAdaptor.get_structure(atoms)
        structure.to(filename=str(folder / "pymatgen.cif"))
        structure.to(filename=str(folder / "POSCAR"))  # pymatgen names the format by file name
        files[(name, "pymatgen-cif")] = folder / "pymatgen.cif"
        files[(name, "pymatgen-poscar")] = folder / "POSCAR"
    return files


def inspect_json(cli, *args):
    result = cli("inspect", "--json", *args)
    return result, (json.loads(result.stdout) if result.stdout.strip() else None)


WRITERS = [f"ase-{f}" for f in ASE_FORMATS] + ["pymatgen-cif", "pymatgen-poscar"]


@pytest.mark.parametrize("writer", WRITERS)
@pytest.mark.parametrize("name", list(CRYSTALS))
def test_lattice_shells_and_space_group_of_foreign_files(cli, written, name, writer):
    element, lattice, _, _ = CRYSTALS[name]
    ref = REFERENCE[lattice]
    result, report = inspect_json(cli, written[(name, writer)], "--expect", lattice)
    assert result.exit_code == 0, result.output
    n = report["n_atoms"]
    assert report["composition"] == {element: n}
    assert report["lattice"] == lattice
    # every atom has the textbook coordination (Kittel ch. 1)
    assert report["coordination"]["histogram"] == {str(ref["coordination"]): n}
    assert report["coordination"]["by_species"] == {element: {str(ref["coordination"]): n}}
    a = KITTEL_A[element]
    assert report["lattice_match"]["lattice_constant"] == pytest.approx(a, rel=1e-6)
    # shells: distance ratios from the lattice vectors (common practice), x the constant
    for shell, (factor, count) in zip(report["shells"], ref["shells"]):
        assert shell["distance"] == pytest.approx(factor * a, rel=1e-6)
        assert shell["count"] == pytest.approx(count, abs=1e-9)
    assert report["min_distance"] == pytest.approx(ref["shells"][0][0] * a, rel=1e-6)
    # spglib, against International Tables
    assert report["space_group"]["number"] == ref["space_group"]
    # density = Z M / (N_A a^3) with the IUPAC weight (Callister ch. 3)
    rho = ref["atoms_per_cell"] * IUPAC_WEIGHT[element] / (AVOGADRO * (a * 1e-8) ** 3)
    assert report["density"] == pytest.approx(rho, rel=1e-4)
    assert report["defects"]["vacancy_like"] == 0 and report["defects"]["crowded"] == 0
    assert report["passed"] and all(c["passed"] for c in report["checks"])


def test_triclinic_cell_reports_angles_and_widths(cli, written):
    # primitive fcc vectors a/2 (0,1,1) etc.: 60 degrees between each pair (geometry),
    # and the distance between opposite faces is the (111) spacing a/sqrt(3)
    # (d = a / sqrt(h^2 + k^2 + l^2), common practice), x 4 repeats
    result, report = inspect_json(cli, written[("cu-fcc-primitive", "ase-lammps-data")])
    assert result.exit_code == 0
    assert report["cell_angles"] == pytest.approx([60.0, 60.0, 60.0], abs=1e-6)
    assert report["perpendicular_widths"] == pytest.approx([4 * 3.61 / SQ3] * 3, rel=1e-9)


def test_two_atoms_0_3_angstrom_apart_fail(cli, tmp_path):
    atoms = crystal("cu-fcc")
    atoms.append("Cu")
    atoms.positions[-1] = atoms.positions[5] + [0.3, 0.0, 0.0]
    result, report = inspect_json(cli, write_ase(atoms, tmp_path, "extxyz"))
    assert result.exit_code == 1
    check = next(c for c in report["checks"] if c["name"] == "min_distance")
    assert not check["passed"] and not report["passed"]
    assert report["min_distance"] == pytest.approx(0.3, abs=1e-9)
    assert sorted(report["min_distance_pair"]) == [5, len(atoms) - 1]
    assert report["close_pairs"]["count"] == 1
    assert report["lattice"] == "fcc"  # one extra atom does not hide the host lattice
    assert report["defects"]["crowded"] >= 2
    human = cli("inspect", tmp_path / "ase.xyz")
    assert human.exit_code == 1 and "min_distance FAILED" in human.output


def test_box_narrower_than_twice_the_potential_cutoff_fails(cli, written):
    path = written[("cu-fcc", "ase-lammps-data")]  # 3 x 3.61 = 10.83 A wide
    result, report = inspect_json(cli, path, "--potential-cutoff", "5.5")
    assert result.exit_code == 1
    check = next(c for c in report["checks"] if c["name"] == "potential_cutoff")
    assert not check["passed"] and "11" in check["detail"]
    assert cli("inspect", path, "--potential-cutoff", "5.4").exit_code == 0


def test_triclinic_box_is_judged_by_perpendicular_widths(cli, written):
    # cell vectors are 4 x 2.55 = 10.2 A long, but opposite faces are only
    # 4 a / sqrt(3) = 8.34 A apart: a 4.5 A cutoff (2R = 9) does not fit
    path = written[("cu-fcc-primitive", "ase-cif")]
    assert cli("inspect", path, "--potential-cutoff", "4.5").exit_code == 1
    assert cli("inspect", path, "--potential-cutoff", "4.1").exit_code == 0


def test_expect_other_lattice_fails(cli, written):
    result, report = inspect_json(cli, written[("cu-fcc", "ase-cif")], "--expect", "bcc")
    assert result.exit_code == 1
    check = next(c for c in report["checks"] if c["name"] == "expected_lattice")
    assert not check["passed"] and "fcc" in check["detail"]


@pytest.mark.parametrize("fmt", list(ASE_FORMATS))
def test_truncated_file_exits_2(cli, written, tmp_path, fmt):
    source = written[("cu-fcc", f"ase-{fmt}")]
    data = source.read_bytes()
    cut = tmp_path / source.name
    cut.write_bytes(data[: len(data) // 2])
    result = cli("inspect", cut)
    assert result.exit_code == 2
    assert str(cut) in result.output and "Traceback" not in result.output
    if fmt != "cif":  # line-based tables: the line where the rows break off
        assert ", line " in result.output


@pytest.mark.parametrize("fmt", ["lammps-data", "extxyz"])
def test_truncated_large_file_exits_2_on_the_fast_path(written, tmp_path, fmt):
    from cellbuild.errors import InputError

    source = written[("cu-fcc", f"ase-{fmt}")]
    data = source.read_bytes()
    for end in (len(data) // 2, data.rindex(b"\n", 0, len(data) - 1) + 1):
        cut = tmp_path / source.name
        cut.write_bytes(data[:end])
        with pytest.raises(InputError) as caught:
            read_file(cut, fast=True)
        assert caught.value.file == str(cut) and caught.value.line


def test_empty_and_binary_files_exit_2(cli, tmp_path):
    empty = tmp_path / "empty.cif"
    empty.write_bytes(b"")
    binary = tmp_path / "binary.lmp"
    binary.write_bytes(bytes(range(256)) * 8)
    for path, words in ((empty, "empty"), (binary, "binary")):
        result = cli("inspect", path)
        assert result.exit_code == 2 and words in result.output


def test_plain_xyz_without_lattice_exits_2(cli, tmp_path):
    path = tmp_path / "plain.xyz"
    path.write_text("2\nno cell here\nCu 0 0 0\nCu 1.8 1.8 0\n")
    result = cli("inspect", path)
    assert result.exit_code == 2 and "Lattice=" in result.output


def test_lammps_mass_that_matches_no_element_needs_types(cli, written, tmp_path):
    text = written[("cu-fcc", "ase-lammps-data")].read_text()
    mass_line = next(ln for ln in text.splitlines() if ln.strip().startswith("1 ")
                     and "Cu" in ln)
    path = tmp_path / "odd.lmp"
    path.write_text(text.replace(mass_line, "1 77.7"))
    result = cli("inspect", path)
    assert result.exit_code == 2
    assert "atom type 1" in result.output and "77.7" in result.output
    assert "--types" in result.output
    ok, report = inspect_json(cli, path, "--types", "Ni")
    assert ok.exit_code == 0 and report["composition"] == {"Ni": report["n_atoms"]}


def test_lammps_types_from_masses_and_charge_style(cli, tmp_path):
    import ase.io

    alloy = crystal("cu-fcc")
    alloy.symbols[::3] = "Ni"
    path = tmp_path / "alloy.data"
    ase.io.write(str(path), alloy, format="lammps-data", masses=True, specorder=["Cu", "Ni"],
                 atom_style="charge")
    result, report = inspect_json(cli, path)
    assert result.exit_code == 0, result.output
    assert report["composition"] == {"Cu": 72, "Ni": 36}
    assert set(report["coordination"]["by_species"]) == {"Cu", "Ni"}
    assert report["lattice"] == "fcc"


def test_mass_to_element_uses_standard_atomic_weights():
    # IUPAC standard atomic weights
    for symbol, weight in IUPAC_WEIGHT.items():
        assert element_of_mass(weight) == symbol
        assert element_of_mass(weight + 0.03) == symbol
    assert element_of_mass(77.7) is None
    assert element_of_mass(208.98) is None  # Bi 208.98 and Po 208.98: ambiguous


@pytest.mark.parametrize("fmt", ["lammps-data", "extxyz"])
@pytest.mark.parametrize("name", ["cu-fcc-primitive", "si-diamond"])
def test_fast_reader_agrees_with_ase(written, name, fmt):
    path = written[(name, f"ase-{fmt}")]
    ours, ase_read = read_file(path, fast=True), read_file(path, fast=False)
    assert ours.reader == "cellbuild" and ase_read.reader == "ase"
    a, b = ours.structure, ase_read.structure
    assert np.allclose(a.cell, b.cell, atol=1e-9)
    assert np.allclose(a.positions, b.positions, atol=1e-9)
    assert list(a.chemical_symbols()) == list(b.chemical_symbols())


def test_fast_lammps_reader_agrees_with_ase_on_charges_types_and_order(tmp_path):
    import ase.io

    alloy = crystal("cu-fcc-primitive")
    alloy.symbols[1::4] = "Ni"
    path = tmp_path / "alloy.lmp"
    ase.io.write(str(path), alloy, format="lammps-data", masses=True, specorder=["Ni", "Cu"],
                 atom_style="charge")
    lines = path.read_text().splitlines()
    at = lines.index(next(ln for ln in lines if ln.startswith("Atoms")))
    rows = lines[at + 2: at + 2 + len(alloy)]
    lines[at + 2: at + 2 + len(alloy)] = rows[::-1]  # ids out of order: both sort by id
    path.write_text("\n".join(lines) + "\n")
    ours, ase_read = read_file(path, fast=True), read_file(path, fast=False)
    assert np.allclose(ours.structure.positions, ase_read.structure.positions, atol=1e-9)
    assert list(ours.structure.chemical_symbols()) == list(ase_read.structure.chemical_symbols())
    assert ours.structure.composition() == {"Cu": 48, "Ni": 16}


def test_format_is_sniffed_from_content(cli, written, tmp_path):
    for fmt in ASE_FORMATS:
        nameless = tmp_path / f"structure-{fmt.replace('-', '_')}"
        nameless.write_bytes(written[("fe-bcc", f"ase-{fmt}")].read_bytes())
        result, report = inspect_json(cli, nameless)
        assert result.exit_code == 0, (fmt, result.output)
        # our format keys (the writers' and the recipe's), not ASE's names
        assert report["lattice"] == "bcc" and report["format"] == {
            "extxyz": "xyz", "vasp": "poscar"}.get(fmt, fmt)


def test_plot_is_a_png(cli, written, tmp_path):
    png = tmp_path / "cu.png"
    result = cli("inspect", written[("cu-fcc", "ase-cif")], "--plot", png)
    assert result.exit_code == 0
    data = png.read_bytes()
    assert data.startswith(b"\x89PNG\r\n\x1a\n") and len(data) > 10_000
    assert not list(tmp_path.glob(".*.part"))  # written atomically, nothing left over


def test_several_files_json_list_and_one_plot_each(cli, written, tmp_path):
    files = [written[("cu-fcc", "ase-cif")], written[("fe-bcc", "ase-vasp")]]
    result, reports = inspect_json(cli, *files, "--plot", tmp_path / "check.png")
    assert result.exit_code == 0
    assert isinstance(reports, list) and [r["lattice"] for r in reports] == ["fcc", "bcc"]
    pngs = sorted(p.name for p in tmp_path.glob("check-*.png"))
    assert pngs == ["check-ase.cif.png", "check-ase.vasp.png"]  # both stems are "ase"


def test_one_unreadable_file_among_several_exits_2(cli, written, tmp_path):
    bad = tmp_path / "bad.xyz"
    bad.write_text("5\nLattice=\"1 0 0 0 1 0 0 0 1\"\nCu 0 0 0\n")
    result, reports = inspect_json(cli, written[("cu-fcc", "ase-cif")], bad)
    assert result.exit_code == 2
    assert reports[0]["passed"] and "error" in reports[1]


def test_one_vacancy_in_fcc_is_inferred(cli, tmp_path):
    atoms = crystal("cu-fcc")
    del atoms[40]
    result, report = inspect_json(cli, write_ase(atoms, tmp_path, "vasp"))
    assert result.exit_code == 0
    assert report["lattice"] == "fcc"
    defects = report["defects"]
    # each fcc vacancy leaves its 12 nearest neighbours (Kittel ch. 1) with 11
    assert defects["vacancy_like"] == 12
    assert defects["estimated_vacancies"] == pytest.approx(1.0)
    assert defects["estimated_vacancies_from_sites"] == 1
    assert report["coordination"]["histogram"] == {"11": 12, "12": 95}


def test_displaced_atoms_still_match_fcc(cli, tmp_path):
    atoms = crystal("cu-fcc")
    atoms.rattle(stdev=0.05, seed=7)  # ASE's seeded Gaussian displacement, 0.05 A
    result, report = inspect_json(cli, write_ase(atoms, tmp_path, "extxyz"), "--expect", "fcc")
    assert result.exit_code == 0, result.output
    assert report["lattice"] == "fcc"
    assert report["coordination"]["histogram"] == {"12": len(atoms)}
    for shell, (factor, count) in zip(report["shells"], REFERENCE["fcc"]["shells"]):
        assert shell["distance"] == pytest.approx(factor * 3.61, rel=0.01)
        assert shell["count"] == pytest.approx(count, abs=1e-9)
    # the lattice constant, corrected for the broadening, is the one built with
    assert report["lattice_match"]["lattice_constant"] == pytest.approx(3.61, rel=1e-3)
    assert report["defects"]["estimated_vacancies_from_sites"] == 0
    assert report["space_group"]["number"] == 1  # spglib: no symmetry left (P1)


def test_cutoff_option_overrides_the_automatic_one(cli, written):
    # fcc: 12 neighbours at a/sqrt2 and 6 at a (shells, common practice): 18 within 1.02 a
    result, report = inspect_json(cli, written[("cu-fcc", "ase-cif")], "--cutoff",
                                  str(1.02 * 3.61))
    assert report["coordination"]["histogram"] == {"18": report["n_atoms"]}
    assert report["coordination"]["cutoff_source"] == "--cutoff"


def test_rock_salt_sites_form_simple_cubic(cli, tmp_path):
    from ase.build import bulk

    # the species-blind lattice match sees NaCl's sites as sc with a/2; the
    # prototype match with species names rock salt (ASE's bulk builds it); the
    # space group stays Fm-3m 225 (International Tables)
    atoms = bulk("NaCl", "rocksalt", a=5.64, cubic=True).repeat(2)
    result, report = inspect_json(cli, write_ase(atoms, tmp_path, "cif"))
    assert report["lattice"] == "rocksalt"
    assert report["prototype"]["pattern"] == "sc"
    assert report["prototype"]["species"] == {"A": "Na", "B": "Cl"}
    assert report["lattice_match"]["lattice_constant"] == pytest.approx(5.64 / 2, rel=1e-6)
    assert report["space_group"]["number"] == 225


def test_space_group_of_a_large_supercell_from_its_repeating_unit(tmp_path):
    from cellbuild.inspection import space_group
    from cellbuild.structure import Structure

    atoms = crystal("cu-fcc").repeat(4)  # 6912 atoms: spglib alone takes minutes
    group, note = space_group(Structure.from_ase(atoms))
    assert group["number"] == 225 and group["atoms_analysed"] == 4 and note is None
    atoms.rattle(stdev=0.05, seed=1)
    group, note = space_group(Structure.from_ase(atoms))
    assert group is None and "6,912" in note


@pytest.mark.parametrize("option, value", [("--cutoff", "-1"), ("--potential-cutoff", "0"),
                                           ("--expect", "bct"), ("--types", "Cu,Qq")])
def test_bad_option_values_exit_2_naming_the_option(cli, written, option, value):
    result = cli("inspect", written[("cu-fcc", "ase-cif")], option, value)
    assert result.exit_code == 2 and option in result.output and value.split(",")[-1] in result.output


# --- the numpy reader for P 1 CIF tables, against ASE's CIF reader (reference library)

def _p1_cif_files(tmp_path):
    from ase.build import bulk
    from ase.io import write
    from pymatgen.io.ase import AseAtomsAdaptor

    atoms = bulk("Cu", "fcc", a=3.61).repeat((2, 3, 2))  # triclinic primitive cells
    atoms.rattle(0.05, seed=3)
    atoms.symbols[[1, 5]] = "Ni"
    ase_file = tmp_path / "ase_p1.cif"
    write(ase_file, atoms, format="cif")
    pmg_file = tmp_path / "pmg_p1.cif"
    AseAtomsAdaptor.get_structure(atoms).to(filename=str(pmg_file))
    return atoms, [ase_file, pmg_file]


def test_p1_cif_table_reader_agrees_with_ase(tmp_path):
    from ase.io import read

    from cellbuild.readers import read_file

    atoms, files = _p1_cif_files(tmp_path)
    for path in files:
        result = read_file(path)
        assert result.reader.startswith("cellbuild"), (path, result.reader)
        reference = read(path, format="cif")
        np.testing.assert_allclose(result.structure.cell, reference.cell[:], atol=1e-6)
        # the same sites up to whole lattice vectors (ASE wraps into the cell)
        delta = result.structure.fractional() - reference.get_scaled_positions(wrap=False)
        np.testing.assert_allclose(delta - np.round(delta), 0.0, atol=1e-7)
        assert list(result.structure.chemical_symbols()) == reference.get_chemical_symbols()
        assert result.structure.composition() == {"Cu": 10, "Ni": 2}


@pytest.mark.filterwarnings("ignore::DeprecationWarning")  # spglib, called by pymatgen's writer
def test_cif_with_symmetry_goes_to_the_general_reader(tmp_path):
    from pymatgen.core import Lattice, Structure as PmgStructure
    from pymatgen.io.cif import CifWriter

    from cellbuild.readers import read_file

    conventional = PmgStructure.from_spacegroup("Fm-3m", Lattice.cubic(3.61), ["Cu"], [[0, 0, 0]])
    path = tmp_path / "sym.cif"
    CifWriter(conventional, symprec=0.01).write_file(str(path))
    result = read_file(path)
    assert not result.reader.startswith("cellbuild")
    assert result.structure.n_atoms == 4  # symmetry expanded: fcc conventional cell (Kittel ch. 1)


def test_damaged_large_p1_cif_is_refused_with_its_line(cli, recipe_file, tmp_path):
    # a row with an extra field: the table reader cannot take it, and the general
    # reader would take minutes at this size, so the file is refused at that row
    data = {"name": "big", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.61},
            "size": {"repeat": [18, 18, 18]}, "outputs": ["cif"]}
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    path = out / "big.cif"
    lines = path.read_text().splitlines()
    row = len(lines) - 100
    lines[row] = "  x " + lines[row]
    path.write_text("\n".join(lines) + "\n")
    result = cli("inspect", path)
    assert result.exit_code == 2
    assert f"line {row + 1}" in result.output and "fields" in result.output
