"""`inspect` on hostile and damaged files: every one is refused with one sentence
(exit 2) or fails a check (exit 1), within time and memory bounds.

Each run is a subprocess with ``timeout=`` and ``RLIMIT_AS`` (2 GiB), so that a
regression fails instead of hanging or swapping CI. Sources of the values:
* fcc Cu, a = 3.61 A (Kittel, from memory, +-0.5 %); ASE's bulk builder writes
  the files.
* LAMMPS refuses a data file with more Atoms rows than its header declares
  ("Unknown identifier in data file", LAMMPS read_data; from memory) and a box
  with xlo >= xhi (read_data, common practice).
* A POSCAR gives one atom count per species name (VASP manual, POSCAR; common
  practice).
* Covalent radius of Cu 1.32 A (Cordero et al. 2008, via ase.data): Cu-Cu
  pairs 0.36 A apart (a in nm) are closer than any solid allows.
"""
from __future__ import annotations

import os
import resource
import subprocess
import sys
import time

import numpy as np
import pytest

MEMORY = 2 << 30   # bytes of address space for each inspect run
TIMEOUT = 60       # seconds; generous for a busy 2-core machine


def _limit_memory():
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY, MEMORY))


def inspect_cli(*args, timeout=TIMEOUT):
    """Run `cellbuild inspect ARGS` in a memory-bounded subprocess: (code, output, seconds)."""
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    start = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", "from cellbuild.cli import app; app()",
                           "inspect", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, preexec_fn=_limit_memory, env=env)
    return done.returncode, done.stdout + done.stderr, time.perf_counter() - start


def one_sentence_refusal(code, output):
    assert code == 2, output
    assert "Traceback" not in output and "MemoryError" not in output, output
    assert output.count("error: ") == 1, output


def cu(repeat=(3, 3, 3), a=3.61):
    from ase.build import bulk

    return bulk("Cu", "fcc", a=a, cubic=True).repeat(repeat)


def write(atoms, path, fmt):
    import ase.io

    extra = {"masses": True} if fmt == "lammps-data" else {}
    ase.io.write(str(path), atoms, format=fmt, **extra)
    return path


# ----------------------------------------------------------------------------- point 3: grid trap


@pytest.mark.parametrize("n_atoms", [31, 500])
def test_atom_moved_by_1e_4_angstrom_is_inspected_in_seconds(tmp_path, n_atoms):
    # such a file once made the grid fast path pick a 10^5-sites-per-atom grid
    # (minutes); the general engine takes milliseconds
    atoms = cu((5, 5, 5))[:n_atoms]
    atoms.positions[3, 0] += 1e-4
    code, output, seconds = inspect_cli(write(atoms, tmp_path / "moved.xyz", "extxyz"),
                                        timeout=30)
    assert code in (0, 1), output
    assert seconds < 5.0, seconds


def test_fine_grid_goes_to_the_general_engine_with_the_same_counts():
    from ase.neighborlist import neighbor_list

    from cellbuild.neighbours import coordination_counts, locate_grid

    atoms = cu((2, 2, 2))[:31]
    atoms.positions[3, 0] += 1e-4
    assert locate_grid(atoms.cell.array, atoms.positions) is None
    start = time.perf_counter()
    counts = coordination_counts(atoms.cell.array, atoms.positions, 3.0)
    assert time.perf_counter() - start < 5.0
    # ASE's neighbour list as the reference
    i = neighbor_list("i", atoms, 3.0)
    assert np.array_equal(counts, np.bincount(i, minlength=len(atoms)))


# ----------------------------------------------------------------------------- point 4: pairs


@pytest.mark.parametrize("n_atoms", [8_000, 20_000])
def test_atoms_on_one_position_are_refused_within_memory(tmp_path, n_atoms):
    from ase import Atoms

    atoms = Atoms(["Cu"] * n_atoms, positions=np.full((n_atoms, 3), 5.0), cell=[20, 20, 20],
                  pbc=True)
    code, output, _ = inspect_cli(write(atoms, tmp_path / "pile.xyz", "extxyz"))
    one_sentence_refusal(code, output)
    assert "overlaps itself" in output
    # every pair of the pile is closer than any threshold: n(n-1)/2 of them
    shown = int(output.split("about ")[1].split(" pairs")[0].replace(",", ""))
    assert shown == pytest.approx(n_atoms * (n_atoms - 1) / 2, rel=0.05)


def test_huge_cutoff_is_refused_naming_the_option(tmp_path):
    path = write(cu()[:31], tmp_path / "cu.xyz", "extxyz")
    code, output, _ = inspect_cli(path, "--cutoff", "1000")
    one_sentence_refusal(code, output)
    assert "--cutoff" in output and "would list about" in output


@pytest.mark.parametrize("lattice", ['1e9 0 0 0 3.61 0 0 0 3.61', '3.61 0 0 0 3.61 0 0 0 0',
                                     'nan 0 0 0 3.61 0 0 0 3.61'])
def test_huge_or_degenerate_cells_are_refused(tmp_path, lattice):
    path = tmp_path / "cell.xyz"
    path.write_text(f'2\nLattice="{lattice}" Properties=species:S:1:pos:R:3\n'
                    "Cu 0 0 0\nCu 1.8 1.8 0\n")
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)


# ----------------------------------------------------------------------------- point 5: headers


def _inflated(tmp_path, fmt):
    path = write(cu(), tmp_path / {"xyz": "big.xyz", "lammps-data": "big.lmp",
                                   "vasp": "POSCAR"}[fmt], "extxyz" if fmt == "xyz" else fmt)
    lines = path.read_text().splitlines()
    if fmt == "xyz":
        k = 0
        lines[0] = "1000000000000"
    elif fmt == "lammps-data":
        k = next(i for i, ln in enumerate(lines) if ln.strip().endswith(" atoms"))
        lines[k] = "1000000000000 atoms"
    else:
        k = 6
        lines[k] = "1000000000000"
    path.write_text("\n".join(lines) + "\n")
    return path, k + 1


@pytest.mark.parametrize("fmt", ["xyz", "lammps-data", "vasp"])
def test_header_claiming_10_to_the_12_atoms_is_refused_with_its_line(tmp_path, fmt):
    path, line = _inflated(tmp_path, fmt)
    good = write(cu(), tmp_path / "good.xyz", "extxyz")
    code, output, seconds = inspect_cli(path, good, "--json", timeout=30)
    assert code == 2 and seconds < 20
    assert f"line {line}" in output and "claims 1,000,000,000,000 atoms" in output
    # the other file on the command line is still inspected
    assert '"file": "' + str(good) in output and '"lattice": "fcc"' in output


# ----------------------------------------------------------------------------- point 6: silent results


def test_lammps_header_with_fewer_atoms_than_rows_is_refused(tmp_path):
    path = write(cu()[:31], tmp_path / "cu.lmp", "lammps-data")
    text = path.read_text().replace("31 atoms", "20 atoms")
    path.write_text(text)
    row = next(i for i, ln in enumerate(text.splitlines()) if ln.split()[:1] == ["21"])
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)
    assert f"line {row + 1}" in output and "20 atoms" in output


def test_lammps_box_with_xlo_above_xhi_is_refused(tmp_path):
    path = write(cu(), tmp_path / "cu.lmp", "lammps-data")
    lines = path.read_text().splitlines()
    k = next(i for i, ln in enumerate(lines) if ln.endswith("xlo xhi"))
    low, high = lines[k].split()[:2]
    lines[k] = f"{high} {low} xlo xhi"
    path.write_text("\n".join(lines) + "\n")
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)
    assert f"line {k + 1}" in output and "lo < hi" in output


def test_cif_with_half_occupied_sites_fails_site_occupancy(tmp_path):
    from cellbuild.inspection import inspect_file

    path = tmp_path / "cuau.cif"
    path.write_text("data_CuAu\n_cell_length_a 3.8\n_cell_length_b 3.8\n_cell_length_c 3.8\n"
                    "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n"
                    "_symmetry_space_group_name_H-M 'F m -3 m'\n_symmetry_Int_Tables_number 225\n"
                    "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n"
                    "_atom_site_fract_y\n_atom_site_fract_z\n_atom_site_occupancy\n"
                    "Cu1 Cu 0 0 0 0.5\nAu1 Au 0 0 0 0.5\n")
    result = inspect_file(path)
    check = next(c for c in result["checks"] if c["name"] == "site_occupancy")
    assert not check["passed"] and not result["passed"]
    assert "Cu1 Cu occupancy 0.5 (line 17)" in check["detail"]
    assert [p["symbol"] for p in result["partial_occupancy"]] == ["Cu", "Au"]


def test_ordered_cif_passes_site_occupancy(tmp_path):
    from cellbuild.inspection import inspect_file

    result = inspect_file(write(cu(), tmp_path / "cu.cif", "cif"))
    assert {c["name"]: c["passed"] for c in result["checks"]}["site_occupancy"] is True


@pytest.mark.parametrize("formula, refused", [("Cu4", False), ("Cu5", True), ("Cu.", False),
                                               ("Cu4.", False), ("Cu..4", False),
                                               ("Cu4 Ni0", False)])
def test_cif_formula_sum_is_checked_only_when_it_is_a_formula(tmp_path, formula, refused):
    """A declared _chemical_formula_sum that is not a whole multiple of the atoms
    read is a sign of a cut table (bad input); one whose counts are no numbers
    ('Cu.') or zero ('Ni0'), both found by the damaged-files property test,
    cannot be checked and is left aside, never a crash (common practice: the
    CIF dictionary's formula sum gives positive counts)."""
    path = write(cu(), tmp_path / "cu.cif", "cif")  # 108 atoms: 27 x Cu4, no whole x Cu5
    lines = [line for line in path.read_text().splitlines()
             if not line.startswith("_chemical_formula_sum")]
    at = next(k for k, line in enumerate(lines) if line.startswith("data_")) + 1
    lines.insert(at, f"_chemical_formula_sum '{formula}'")
    path.write_text("\n".join(lines) + "\n")
    code, output, _ = inspect_cli(path)
    assert code == (2 if refused else 0), output
    assert "Traceback" not in output and ("_chemical_formula_sum" in output) == refused


def test_poscar_with_two_species_and_one_count_is_refused(tmp_path):
    path = write(cu(), tmp_path / "POSCAR", "vasp")
    lines = path.read_text().splitlines()
    lines[5] = "Cu Ni"
    path.write_text("\n".join(lines) + "\n")
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)
    assert "line 7" in output and "2 species" in output


@pytest.mark.parametrize("a, unit", [(0.361, "nm"), (361.0, "pm")])
def test_file_in_the_wrong_unit_fails_physical_spacing(tmp_path, a, unit):
    code, output, _ = inspect_cli(write(cu(a=a), tmp_path / "cu.xyz", "extxyz"))
    assert code == 1, output
    line = next(ln for ln in output.splitlines() if "physical_spacing" in ln)
    assert "FAILED" in line and f"in {unit}, not Angstrom" in line


def test_file_in_angstrom_passes_physical_spacing(tmp_path):
    from cellbuild.inspection import inspect_file

    result = inspect_file(write(cu(), tmp_path / "cu.xyz", "extxyz"))
    assert {c["name"]: c["passed"] for c in result["checks"]}["physical_spacing"] is True
    # fcc nearest neighbour a / sqrt 2 (Kittel ch. 1)
    assert result["nearest_neighbour_median"] == pytest.approx(3.61 / 2 ** 0.5, rel=1e-9)


# ----------------------------------------------------------------------------- points 7, 8


def test_a_library_bug_is_not_reported_as_bad_input(tmp_path, monkeypatch):
    # a TypeError inside a library reader is a bug (exit 3), not a bad file
    import ase.io

    from cellbuild.readers import read_file

    path = write(cu(), tmp_path / "cu.cif", "cif")
    path.write_text(path.read_text().replace("_symmetry_space_group_name_H-M", "_x"))

    def broken(*args, **kwargs):
        raise TypeError("bug")

    monkeypatch.setattr(ase.io, "read", broken)
    monkeypatch.setattr("cellbuild.readers.fast_p1_cif", lambda *args: None)
    with pytest.raises(TypeError):
        read_file(path)


def test_truncated_lammps_row_is_bad_input_not_a_library_error(tmp_path):
    path = write(cu(), tmp_path / "cu.lmp", "lammps-data")
    lines = path.read_text().splitlines()
    k = next(i for i, ln in enumerate(lines) if ln.split()[:2] == ["5", "1"])
    lines[k] = " ".join(lines[k].split()[:4])
    path.write_text("\n".join(lines) + "\n")
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)


@pytest.mark.parametrize("value", ["1" * 400 + ".5", "inf", "nan", "-1e400"])
@pytest.mark.parametrize("fmt", ["xyz", "vasp", "lammps-data", "cif"])
def test_huge_or_non_finite_numbers_are_refused_with_the_line(tmp_path, fmt, value):
    name = {"xyz": "cu.xyz", "vasp": "POSCAR", "lammps-data": "cu.lmp", "cif": "cu.cif"}[fmt]
    path = write(cu((1, 1, 1)), tmp_path / name, "extxyz" if fmt == "xyz" else fmt)
    lines = path.read_text().splitlines()
    # the last line holds the last atom's row in each of these formats
    k = max(i for i, ln in enumerate(lines) if len(ln.split()) >= 3)
    fields = lines[k].split()
    position = {"xyz": 1, "vasp": 0, "lammps-data": 2, "cif": 3}[fmt]  # an x coordinate
    fields[position] = value
    lines[k] = " ".join(fields)
    path.write_text("\n".join(lines) + "\n")
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)
    assert f"line {k + 1}" in output, output


# ----------------------------------------------------------------------------- rows taken on trust


def _cellbuild_lammps(tmp_path):
    """A LAMMPS data file as cellbuild writes it (every atom row equally wide)."""
    from cellbuild.formats import write_structure
    from cellbuild.structure import Structure

    path = tmp_path / "cu.lmp"
    write_structure(Structure.from_ase(cu()), "lammps-data", path, title="cu")
    return path


def test_lammps_rows_taken_on_trust_are_confirmed_by_their_parse(tmp_path):
    """The header skips equally wide rows without counting their newlines; the
    fixed-width parse of exactly that span confirms it, and the atoms are those of
    the reader that counts every newline (and, by the ASE comparison in
    test_inspect.py, ASE's)."""
    from cellbuild.read_lammps import fast_lammps, header_and_rows, lammps_header

    path = _cellbuild_lammps(tmp_path)
    data = path.read_bytes()
    head, structure = header_and_rows(path, data, None)
    assert head.trusted_rows is not None and head.trusted_rows[1] == len(data)
    counted = lammps_header(path, data)
    assert counted.trusted_rows is None
    reference = fast_lammps(path, counted, None, data)
    assert np.array_equal(structure.positions, reference.positions)
    assert np.array_equal(structure.species, reference.species)
    assert structure.symbols == reference.symbols == ("Cu",)


def test_lammps_rows_taken_on_trust_are_judged_again_when_one_is_unequal(tmp_path):
    """A row one byte short followed by a blank line keeps every row end where the
    first row's width puts it, so the header's trust holds up to the parse, which
    finds the unequal row: the file is then judged as the counting reader judges it,
    refused in one sentence, as LAMMPS refuses it (read_data reads the blank line
    as an atom; common practice: no blank line among the Atoms rows)."""
    from lammps_run import run_lammps

    path = _cellbuild_lammps(tmp_path)
    lines = path.read_text().split("\n")
    first = next(i for i, ln in enumerate(lines) if ln.startswith("Atoms")) + 2
    k = first + 5
    assert lines[k].startswith(" ") and len(lines[k]) == len(lines[first])
    lines[k] = lines[k][1:] + "\n"  # one byte shorter, then an empty line
    path.write_text("\n".join(lines))
    from cellbuild.read_lammps import _fast_rows, lammps_header

    data = path.read_bytes()
    trusting = lammps_header(path, data, trust_rows=True)
    assert trusting.trusted_rows == (trusting.trusted_rows[0], len(data))  # trust held here
    assert _fast_rows(path, trusting, None, data) == (None, None)  # the parse finds the row
    code, output, _ = inspect_cli(path)
    one_sentence_refusal(code, output)
    assert "Atoms rows" in output
    with pytest.raises(AssertionError, match="LAMMPS failed"):
        run_lammps(f"units metal\natom_style atomic\nread_data {path}\n", tmp_path)
