"""crystal_from_cif against pymatgen's own reading of the same files.

Sources of the values:
* hcp Ti: a = 2.95 A, c = 4.68 A (from memory, Kittel), space group P6_3/mmc,
  194 (International Tables; common practice), 2 atoms per conventional cell.
* rutile TiO2: P4_2/mnm, 136, a = 4.594 A, c = 2.959 A, O at (u, u, 0) with
  u = 0.305 (from memory), 2 Ti + 4 O per cell.
* rock salt MgO: Fm-3m, 225, a = 4.212 A (from memory), 4 Mg + 4 O per cell.
* Cu3Au (L1_2) as Ti + 3 O on the cube corners and faces: Pm-3m, 221 (common
  practice); with the face-centre O split into labels O1 (1c) and O2 (2e) the
  labelled crystal is P4/mmm, 123 (International Tables, from memory).
* Reference geometry: pymatgen's CifWriter writes the files, its CifParser and
  SpacegroupAnalyzer(symprec=1e-3).get_conventional_standard_structure() and
  make_supercell give the expected cells and sites; spglib gives the labelled
  space group independently.
Hostile files run in one subprocess with ``timeout=`` and RLIMIT_AS, each
timed, so that a regression fails instead of hanging CI.
"""
from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import textwrap
from collections import Counter

import numpy as np
import pytest

from cellbuild import cif_crystal
from cellbuild.cif_crystal import crystal_from_cif
from cellbuild.errors import InputError

MEMORY = 2 << 30      # bytes of address space for the hostile-file subprocess
TIMEOUT = 180         # seconds for the whole subprocess, generous for a busy 2-core machine
PER_FILE = 15.0       # seconds any one hostile file may take (most take milliseconds)
QUICK = 3.0           # seconds for files refused before pymatgen parses them (import included)
REFUSED_BEFORE_PARSING = {"empty.cif", "garbage.cif", "no_cell.cif", "huge.cif",
                          "too_many_rows.cif"}


def _write_cif(path, structure):
    from pymatgen.io.cif import CifWriter

    CifWriter(structure, symprec=1e-3).write_file(str(path))
    return path


def _pymatgen_conventional(path):
    from pymatgen.io.cif import CifParser
    from pymatgen.symmetry.analyzer import SpacegroupAnalyzer

    structure = CifParser(str(path)).parse_structures(primitive=False)[0]
    return SpacegroupAnalyzer(structure, symprec=1e-3).get_conventional_standard_structure()


def _same_periodic_sets(frac_a, frac_b, lattice, tol):
    """True when two sets of fractional positions in one cell match one to one
    within ``tol`` Angstrom, periodically."""
    if len(frac_a) != len(frac_b):
        return False
    d = frac_a[:, None, :] - frac_b[None, :, :]
    d -= np.round(d)
    dist = np.linalg.norm(d @ lattice, axis=2)
    nearest = dist.argmin(axis=1)
    return bool(np.all(dist.min(axis=1) < tol)) and len(set(nearest.tolist())) == len(frac_a)


@pytest.fixture(scope="module")
def rutile(tmp_path_factory):
    from pymatgen.core import Lattice, Structure

    s = Structure.from_spacegroup("P4_2/mnm", Lattice.tetragonal(4.594, 2.959), ["Ti", "O"],
                                  [[0, 0, 0], [0.305, 0.305, 0]])
    return _write_cif(tmp_path_factory.mktemp("rutile") / "rutile.cif", s)


def test_hcp_titanium_two_sites_194_and_the_hexagonal_cell(tmp_path):
    from pymatgen.core import Lattice, Structure

    s = Structure.from_spacegroup("P6_3/mmc", Lattice.hexagonal(2.95, 4.68), ["Ti"],
                                  [[1 / 3, 2 / 3, 1 / 4]])
    c = crystal_from_cif(_write_cif(tmp_path / "ti.cif", s))
    assert c.basis.shape == (2, 3)                         # hcp: 2 atoms per cell
    assert c.space_group == ("P6_3/mmc", 194)              # International Tables
    assert c.labelled_space_group == c.space_group and c.notes == ()
    lengths = np.linalg.norm(c.cell, axis=1)
    np.testing.assert_allclose(lengths, [2.95, 2.95, 4.68], atol=1e-6)
    gamma = np.degrees(np.arccos(c.cell[0] @ c.cell[1] / (lengths[0] * lengths[1])))
    assert abs(gamma - 120.0) < 1e-6                        # hexagonal cell
    assert c.a == pytest.approx(2.95, abs=1e-6)
    assert len(set(c.sublattice)) == 1 and c.occupancy == ((c.sublattice[0], (("Ti", 1.0),)),)
    assert c.source == str(tmp_path / "ti.cif")


def test_rutile_labels_and_basis_match_pymatgens_conventional_structure(rutile):
    c = crystal_from_cif(str(rutile))
    assert c.space_group[1] == 136 and len(c.basis) == 6   # P4_2/mnm; 2 Ti + 4 O
    element = dict((label, species[0][0]) for label, species in c.occupancy)
    assert Counter(element[s] for s in c.sublattice) == {"Ti": 2, "O": 4}
    assert set(c.sublattice) == {"Ti0", "O1"}                # the labels CifWriter wrote
    ref = _pymatgen_conventional(rutile)
    np.testing.assert_allclose(c.cell, ref.lattice.matrix, atol=1e-6)
    for symbol in ("Ti", "O"):  # each label's sites are pymatgen's sites of its element
        mine = c.basis[[element[s] == symbol for s in c.sublattice]]
        theirs = ref.frac_coords[[sp.symbol == symbol for sp in ref.species]]
        assert _same_periodic_sets(mine, theirs, c.cell, 1e-6)
    assert np.all((c.basis >= 0) & (c.basis < 1))


def test_the_same_file_always_gives_the_same_order(rutile):
    first, second = crystal_from_cif(rutile), crystal_from_cif(rutile)
    assert first.sublattice == second.sublattice == tuple(sorted(first.sublattice))
    np.testing.assert_array_equal(first.basis, second.basis)
    # within a label, sorted by coordinates (lexicographic x, y, z)
    o = first.basis[np.array(first.sublattice) == "O1"]
    assert [tuple(r) for r in o.tolist()] == sorted(tuple(r) for r in o.tolist())


def test_rock_salt_mgo_gives_eight_sites_in_fm3m(tmp_path):
    from pymatgen.core import Lattice, Structure

    s = Structure.from_spacegroup("Fm-3m", Lattice.cubic(4.212), ["Mg", "O"],
                                  [[0, 0, 0], [0.5, 0.5, 0.5]])
    c = crystal_from_cif(_write_cif(tmp_path / "mgo.cif", s))
    assert c.space_group == ("Fm-3m", 225)
    assert Counter(c.sublattice) == {"Mg0": 4, "O1": 4}
    assert c.labelled_space_group == c.space_group      # 4 + 4 per conventional cell
    np.testing.assert_allclose(c.cell, 4.212 * np.eye(3), atol=1e-6)
    mg = c.basis[np.array(c.sublattice) == "Mg0"]
    o = c.basis[np.array(c.sublattice) == "O1"]
    assert _same_periodic_sets((mg + 0.5) % 1.0, o, c.cell, 1e-6)  # O = Mg + (1/2,1/2,1/2)


FCC_HEAD = """\
data_test
_cell_length_a {a}
_cell_length_b {a}
_cell_length_c {a}
_cell_angle_alpha 90
_cell_angle_beta 90
_cell_angle_gamma 90
_symmetry_space_group_name_H-M '{group}'
loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
_atom_site_occupancy
"""


def _cif(tmp_path, rows, a=3.9, group="F m -3 m", name="t.cif"):
    path = tmp_path / name
    path.write_text(FCC_HEAD.format(a=a, group=group) + textwrap.dedent(rows))
    return path


def test_a_mixed_site_reports_each_species_occupancy(tmp_path):
    # one label, two rows (the CIF way to write a mixed site): Cu 0.5 / Au 0.5 on fcc
    c = crystal_from_cif(_cif(tmp_path, "M1 Cu 0 0 0 0.5\nM1 Au 0 0 0 0.5\n"))
    assert c.occupancy == (("M1", (("Au", 0.5), ("Cu", 0.5))),)
    assert c.sublattice == ("M1",) * 4 and c.space_group[1] == 225  # fcc: 4 sites, Fm-3m


def test_a_partly_vacant_oxygen_label_reports_its_occupancy(tmp_path):
    rows = "Mg1 Mg 0 0 0 1\nO1 O 0.5 0.5 0.5 0.75(2)\n"
    c = crystal_from_cif(_cif(tmp_path, rows, a=4.212))
    assert c.occupancy == (("Mg1", (("Mg", 1.0),)), ("O1", (("O", 0.75),)))
    assert Counter(c.sublattice) == {"Mg1": 4, "O1": 4} and c.space_group[1] == 225


def test_two_labels_on_one_position_become_one_site_with_a_note(tmp_path):
    from pymatgen.core import Lattice, Structure

    s = Structure.from_spacegroup("Fm-3m", Lattice.cubic(3.9), [{"Cu": 0.5, "Au": 0.5}],
                                  [[0, 0, 0]])
    c = crystal_from_cif(_write_cif(tmp_path / "cuau.cif", s))  # rows Cu0 and Au1
    assert len(c.basis) == 4 and len(c.occupancy) == 1
    assert c.occupancy[0][1] == (("Au", 0.5), ("Cu", 0.5))
    assert any("share their position" in n for n in c.notes)


def test_occupancy_rounding_is_a_note_not_an_error(tmp_path):
    c = crystal_from_cif(_cif(tmp_path, "M1 Cu 0 0 0 0.5005\nM1 Au 0 0 0 0.5\n"))
    total = sum(v for _, v in c.occupancy[0][1])
    assert total == pytest.approx(1.0, abs=1e-9)           # pymatgen rescales to 1
    assert any("sum to > 1" in n for n in c.notes)


def test_pymatgens_warnings_become_notes_and_none_escapes(tmp_path):
    import warnings

    path = _cif(tmp_path, "Cu1 Cu 0 0 0 1\n", a=3.615)  # fcc Cu by name only: pymatgen warns
    with warnings.catch_warnings():
        warnings.simplefilter("error", UserWarning)
        c = crystal_from_cif(path)
    assert len(c.basis) == 4 and c.space_group == ("Fm-3m", 225)  # fcc: 4 atoms, 225
    assert any("_symmetry_space_group_name_H-M used" in n for n in c.notes)


def test_labels_of_one_element_stay_apart_in_the_symmetry(tmp_path):
    # Cu3Au-like Ti + 3 O (Pm-3m) with the face centres split into O1 (1c) and O2 (2e)
    rows = "Ti1 Ti 0 0 0 1\nO1 O 0.5 0.5 0 1\nO2 O 0.5 0 0.5 1\n"
    path = _cif(tmp_path, rows, a=4.0, group="P 4/m m m")
    c = crystal_from_cif(path)
    assert c.labelled_space_group == ("P4/mmm", 123)
    assert c.space_group == ("Pm-3m", 221)                    # elements alone: L1_2
    assert Counter(c.sublattice) == {"Ti1": 1, "O1": 1, "O2": 2}
    ti = c.basis[np.array(c.sublattice) == "Ti1"][0]
    dz = lambda lab: np.abs((c.basis[np.array(c.sublattice) == lab] - ti)[:, 2] % 1.0)
    np.testing.assert_allclose(dz("O1"), [0.0], atol=1e-9)   # 1c: in the Ti plane
    np.testing.assert_allclose(dz("O2"), [0.5, 0.5], atol=1e-9)  # 2e: half a c above
    assert any("from Pm-3m (221) to P4/mmm (123)" in n for n in c.notes)


def test_both_space_groups_agree_with_spglib(tmp_path):
    import spglib
    from pymatgen.core import Lattice, Structure
    from pymatgen.io.cif import CifParser, CifWriter

    # Bi (A7, R-3m, 166; from memory a = 4.546, c = 11.862 A, z = 0.2341) in its
    # primitive cell, written in P 1 with one label per atom: the labels break
    # the inversion that swaps the two atoms
    bi = Structure.from_spacegroup("R-3m", Lattice.hexagonal(4.546, 11.862), ["Bi"],
                                   [[0, 0, 0.2341]]).get_primitive_structure()
    path = tmp_path / "bi.cif"
    CifWriter(bi).write_file(str(path))
    s = CifParser(str(path)).parse_structures(primitive=False)[0]
    cell = (s.lattice.matrix, s.frac_coords)
    by_label = np.unique(np.array(s.labels), return_inverse=True)[1].reshape(-1) + 1
    c = crystal_from_cif(path)
    assert c.space_group[1] == spglib.get_symmetry_dataset(
        (*cell, [83] * len(s)), symprec=1e-3).number == 166
    assert c.labelled_space_group[1] == spglib.get_symmetry_dataset(
        (*cell, by_label), symprec=1e-3).number != 166
    assert len(c.basis) == 6 and len(set(c.sublattice)) == 2  # hexagonal cell: 3 x 2


@pytest.mark.parametrize("repeat", [(2, 2, 3)])
def test_replicated_basis_reproduces_pymatgens_supercell(rutile, tmp_path, repeat):
    from pymatgen.core import Lattice, Structure

    hcp = Structure.from_spacegroup("P6_3/mmc", Lattice.hexagonal(2.95, 4.68), ["Ti"],
                                    [[1 / 3, 2 / 3, 1 / 4]])
    for path in (rutile, _write_cif(tmp_path / "ti.cif", hcp)):
        c = crystal_from_cif(path)
        shifts = np.stack(np.meshgrid(*map(np.arange, repeat), indexing="ij"), -1).reshape(-1, 3)
        mine = np.concatenate([(c.basis + s) @ c.cell for s in shifts])
        ref = _pymatgen_conventional(path)
        ref.make_supercell(list(repeat))
        big = ref.lattice.matrix
        np.testing.assert_allclose(big, np.diag(repeat) @ c.cell, atol=1e-6)
        assert _same_periodic_sets(mine @ np.linalg.inv(big), ref.frac_coords, big, 1e-6)


def test_conventional_cell_above_the_site_cap_is_refused(tmp_path, monkeypatch):
    from pymatgen.core import Lattice, Structure

    # primitive rock salt: 2 sites in the file, 8 in the conventional cell (Fm-3m)
    prim = Structure(Lattice([[0, 2.106, 2.106], [2.106, 0, 2.106], [2.106, 2.106, 0]]),
                     ["Mg", "O"], [[0, 0, 0], [0.5, 0.5, 0.5]])
    path = tmp_path / "prim.cif"
    from pymatgen.io.cif import CifWriter

    CifWriter(prim).write_file(str(path))  # written in P 1
    assert len(crystal_from_cif(path).basis) == 8
    monkeypatch.setattr(cif_crystal, "MAX_SITES", 7)
    with pytest.raises(InputError, match="8 sites in the conventional cell"):
        crystal_from_cif(path)


def test_the_first_block_with_atoms_is_read_and_others_are_noted(rutile, tmp_path):
    one = rutile.read_text()
    path = tmp_path / "blocks.cif"
    path.write_text("data_global\n_journal_year 2020\n\n" + one)
    c = crystal_from_cif(path)
    assert c.space_group[1] == 136 and len(c.basis) == 6 and c.notes == ()
    path.write_text(one + "\n" + one.replace("data_TiO2", "data_second"))
    c = crystal_from_cif(path)
    assert len(c.basis) == 6 and any("holds 2 structures" in n for n in c.notes)


def test_missing_file_and_folder_are_refused(tmp_path):
    with pytest.raises(InputError, match="cannot be read"):
        crystal_from_cif(tmp_path / "nothing.cif")
    with pytest.raises(InputError, match="folder"):
        crystal_from_cif(tmp_path)


# ----------------------------------------------------------------------------- hostile files

GENERAL = "\n".join(f"C{k} C {0.011 + 0.0131 * k:.4f} {0.023 + 0.0071 * k:.4f} "
                    f"{0.037 + 0.0053 * k:.4f} 1" for k in range(30))


def _hostile_files(folder):
    """name -> (path, a word the refusal must contain)."""
    cases = {}

    def text(name, body, word):
        (folder / name).write_text(body)
        cases[name] = (folder / name, word)

    text("empty.cif", "", "empty")
    text("blank.cif", " \n\t\n", "empty")
    (folder / "garbage.cif").write_bytes(bytes(range(256)) * 64)
    cases["garbage.cif"] = (folder / "garbage.cif", "not a text file")
    text("prose.cif", "hello, this is no crystal\n", "no data_ block")
    text("nul.cif", "data_x\n\x00\x00\n", "NUL")
    with open(folder / "huge.cif", "wb") as handle:  # sparse: no disk written
        handle.truncate(cif_crystal.MAX_BYTES + 1)
    cases["huge.cif"] = (folder / "huge.cif", "bytes")
    rows = "loop_\n_atom_site_label\n_atom_site_fract_x\n_atom_site_fract_y\n" \
           "_atom_site_fract_z\nCu1 0 0 0\n"
    text("no_cell.cif", "data_x\n" + rows, "no cell")
    cell = FCC_HEAD.format(a=3.6, group="F m -3 m").split("loop_")[0]
    text("no_atoms.cif", cell, "no atom sites")
    text("empty_loop.cif", cell + "loop_\n", "loop_ without column names")
    text("loop_no_values.cif", cell + "loop_\n_atom_site_label\n_atom_site_fract_x\n",
         "loop_ of 2 columns with 0 value")
    text("short_row.cif", FCC_HEAD.format(a=3.6, group="F m -3 m") + "Cu1 Cu 0 0\n",
         "6 columns with 4 value(s)")
    text("ragged.cif", FCC_HEAD.format(a=3.6, group="F m -3 m") + "Cu1 Cu 0 0 0 1\nCu2 Cu\n",
         "not a readable CIF")
    head = FCC_HEAD.format(a=3.9, group="F m -3 m")
    text("over.cif", head + "M1 Cu 0 0 0 0.6\nM1 Au 0 0 0 0.5\n", "sum to 1.1")
    text("occ_word.cif", head + "M1 Cu 0 0 0 abc\n", "'abc'")
    text("overlap.cif", head + "O1 O 0 0 0 0.5\nO2 O 0.05 0 0 0.5\n", "apart")
    text("no_element.cif", head + "Q1 Qq 0 0 0 1\n", "no element")
    text("bad_angle.cif", FCC_HEAD.format(a=3.6, group="F m -3 m").replace(
        "_cell_angle_alpha 90", "_cell_angle_alpha 200") + "Cu1 Cu 0 0 0 1\n", "make no cell")
    text("cell_word.cif", FCC_HEAD.format(a="abc", group="F m -3 m") + "Cu1 Cu 0 0 0 1\n",
         "not a number")
    text("cartesian.cif", cell + "loop_\n_atom_site_label\n_atom_site_Cartn_x\n"
         "_atom_site_Cartn_y\n_atom_site_Cartn_z\nCu1 0 0 0\n", "fractional")
    text("too_many_sites.cif", FCC_HEAD.format(a=60, group="F m -3 m") + GENERAL + "\n",
         "sites in its cell")
    many = "\n".join(f"C{k} C 0.{k:05d} 0.1 0.2 1" for k in range(6000))
    text("too_many_positions.cif", FCC_HEAD.format(a=60, group="F m -3 m") + many + "\n",
         "positions")
    ops = "loop_\n_symmetry_equiv_pos_as_xyz\n'x, y, z'\n'%s'\n" + FCC_HEAD.split("\n", 8)[8]
    ops = FCC_HEAD.format(a=3.6, group="F m -3 m").split("loop_")[0] + ops
    text("op_word.cif", ops % "x, y, q" + "Cu1 Cu 0.1 0.2 0.3 1\n", "'x, y, q'")
    text("op_scale.cif", ops % "2x, y, z" + "Cu1 Cu 0.1 0.2 0.3 1\n", "no symmetry of its cell")
    # a hexagonal operation on a cubic cell (it does not keep the metric)
    text("op_metric.cif", ops % "-y, x-y, z" + "Cu1 Cu 0.1 0.2 0.3 1\n", "'-y, x-y, z'")
    text("group_misfit.cif", FCC_HEAD.format(a=3.6, group="F m -3 m").replace(
        "_cell_length_c 3.6", "_cell_length_c 4.0") + "Cu1 Cu 0 0 0 1\n",
        "cell parameters do not have")
    text("cell_loop.cif", "data_x\nloop_\n_cell_length_a\n1\n2\n" + FCC_HEAD.format(
        a=3.6, group="F m -3 m").split("\n", 2)[2] + "Cu1 Cu 0 0 0 1\n", "a loop")
    text("unknown_group.cif", FCC_HEAD.format(a=3.6, group="Q 9") + "Cu1 Cu 0 0 0 1\n",
         "does not recognise")
    text("no_labels.cif", FCC_HEAD.replace("_atom_site_label\n", "").format(
        a=3.6, group="F m -3 m") + "Cu 0 0 0 1\n", "_atom_site_label")
    text("negative_occ.cif", head + "Cu1 Cu 0 0 0 -0.5\n", "occupancies above 0")
    text("far.cif", head + "Cu1 Cu 1e9 0 0 1\n", "at most 1000 in size")
    rows = "\n".join(f"C{k} C {k / 20001:.6f} 0.5 0.5 1" for k in range(20001))
    text("too_many_rows.cif", FCC_HEAD.format(a=1e4, group="P 1") + rows + "\n",
         "20,001 atom rows")
    rows = "\n".join(f"C{k} C {k / 6000:.6f} 0.5 0.5 1" for k in range(6000))
    text("too_many_rows_in_p1.cif", FCC_HEAD.format(a=5e3, group="P 1") + rows + "\n",
         "6,000 sites in its cell")
    return cases


_RUNNER = """
import json, sys, time
from cellbuild.cif_crystal import crystal_from_cif
from cellbuild.errors import InputError
for path in sys.argv[1:]:
    start = time.perf_counter()
    try:
        crystal_from_cif(path)
        outcome = "accepted"
    except InputError as exc:
        outcome = str(exc)
    print(json.dumps({"path": path, "outcome": outcome,
                      "seconds": time.perf_counter() - start}), flush=True)
"""


def _limit_memory():
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY, MEMORY))


def test_hostile_files_are_refused_quickly_with_one_sentence(tmp_path):
    cases = _hostile_files(tmp_path)
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    done = subprocess.run([sys.executable, "-c", _RUNNER, *(str(p) for p, _ in cases.values())],
                          capture_output=True, text=True, timeout=TIMEOUT,
                          preexec_fn=_limit_memory, env=env)
    assert done.returncode == 0, done.stderr[-3000:]      # no traceback, no MemoryError
    results = {os.path.basename(r["path"]): r for r in map(json.loads, done.stdout.splitlines())}
    assert set(results) == set(cases)
    for name, (path, word) in cases.items():
        outcome, seconds = results[name]["outcome"], results[name]["seconds"]
        assert outcome != "accepted", name
        assert str(path) in outcome and word in outcome, (name, outcome)
        assert "\n" not in outcome and outcome.endswith("."), (name, outcome)
        assert seconds < (QUICK if name in REFUSED_BEFORE_PARSING else PER_FILE), (name, seconds)
