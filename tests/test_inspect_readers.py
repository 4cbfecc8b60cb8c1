"""The numpy fast paths of `inspect`'s readers against ASE's readers (an outside
program), bit for bit where the numbers are the same text.

Sources: ASE's extended XYZ reader (``ase.io.read(format="extxyz")``: the cell
vectors are the rows of ``Lattice`` in the order written), ASE's LAMMPS data
reader (``format="lammps-data"``, atoms ordered by id), ASE's CIF reader
(``format="cif"``); Python's ``float`` is correctly rounded (IEEE 754), so the
same digits give the same double in every reader.
"""
from __future__ import annotations

import numpy as np
import pytest

from cellbuild.readers import read_file


def _hcp(repeat=(3, 3, 2)):
    from ase.build import bulk

    # hcp Mg: a = 3.21 A, c = 5.21 A (Kittel ch. 1, from memory); its cell rows
    # a = (a, 0, 0), b = (-a/2, a sqrt(3)/2, 0) make a non-symmetric matrix
    return bulk("Mg", "hcp", a=3.21, c=5.21).repeat(repeat)


def _same(ours, theirs, exact=True):
    """Same cell, positions and symbols: bit for bit, or to 1e-9 A (ASE's LAMMPS
    reader rotates a triclinic box's rows through its own arithmetic)."""
    close = np.array_equal if exact else (lambda a, b: np.allclose(a, b, rtol=0, atol=1e-9))
    assert close(ours.cell, theirs.cell)
    assert close(ours.positions, theirs.positions)
    assert list(ours.chemical_symbols()) == list(theirs.chemical_symbols())


def test_fast_xyz_gives_ases_cell_for_a_non_symmetric_lattice(tmp_path):
    import ase.io

    atoms = _hcp()
    path = tmp_path / "mg.xyz"
    ase.io.write(str(path), atoms, format="extxyz")
    ours, ase_read = read_file(path, fast=True), read_file(path, fast=False)
    assert ours.reader == "cellbuild" and ase_read.reader == "ase"
    _same(ours.structure, ase_read.structure)
    # ASE: the first cell vector is the first three numbers of Lattice
    assert np.array_equal(ours.structure.cell, ase.io.read(str(path)).cell[:])
    assert ours.structure.cell[1, 0] < 0.0


@pytest.mark.parametrize("comment", [
    # quotes inside a value and a bare flag: ASE's own comment parser decides
    'Lattice="{cell}" Properties=species:S:1:pos:R:3 title="a \\"quoted\\" word" flag',
    # commas between the numbers, pbc as one word per flag, T T F warned about
    'Lattice="{comma}" Properties=species:S:1:pos:R:3 pbc="T T F"',
])
def test_fast_xyz_comment_lines_read_as_ase_reads_them(tmp_path, comment):
    import ase.io

    atoms = _hcp()
    path = tmp_path / "mg.xyz"
    ase.io.write(str(path), atoms, format="extxyz")
    lines = path.read_text().splitlines()
    numbers = [repr(float(v)) for v in atoms.cell[:].ravel()]
    lines[1] = comment.format(cell=" ".join(numbers), comma=",".join(numbers))
    path.write_text("\n".join(lines) + "\n")
    ours, ase_read = read_file(path, fast=True), read_file(path, fast=False)
    assert ours.reader == "cellbuild"
    _same(ours.structure, ase_read.structure)
    assert ours.warnings == ase_read.warnings


def test_lammps_with_crlf_lines_and_velocities_reads_as_ase(tmp_path):
    import ase.io

    atoms = _hcp()
    atoms.symbols[::3] = "Al"
    path = tmp_path / "mg.lmp"
    ase.io.write(str(path), atoms, format="lammps-data", masses=True, specorder=["Mg", "Al"],
                 velocities=True)
    text = path.read_text()
    assert "Velocities" in text  # the header parser jumps over both sections
    reference = read_file(path, fast=False)
    ours = read_file(path, fast=True)
    assert ours.reader == "cellbuild" and reference.reader == "ase"
    _same(ours.structure, reference.structure, exact=False)
    path.write_bytes(text.replace("\n", "\r\n").encode())  # Windows line ends
    crlf = read_file(path, fast=True)
    _same(crlf.structure, read_file(path, fast=False).structure, exact=False)
    _same(crlf.structure, ours.structure)  # the same numbers: the same doubles


def test_lammps_velocities_rows_beyond_the_atom_count_are_refused_with_the_line(tmp_path):
    import ase.io

    from cellbuild.errors import InputError

    atoms = _hcp()
    path = tmp_path / "mg.lmp"
    ase.io.write(str(path), atoms, format="lammps-data", masses=True, velocities=True)
    lines = path.read_text().splitlines()
    lines.append(lines[-1])  # one Velocities row more than the atoms (LAMMPS refuses it)
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(InputError) as caught:
        read_file(path, fast=True)
    assert caught.value.line == len(lines) and "Velocities" in str(caught.value)


def _p1_cif(path, atoms, label_only=False, separator=" ", label_format="{s}{k}"):
    """A P 1 CIF of ``atoms`` in the layout of a CIF 1.1 atom_site loop."""
    a, b, c, alpha, beta, gamma = atoms.cell.cellpar()
    heads = ["_atom_site_label"] + ([] if label_only else ["_atom_site_type_symbol"]) + [
        "_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z",
        "_atom_site_occupancy"]
    rows = []
    for k, (s, f) in enumerate(zip(atoms.get_chemical_symbols(),
                                   atoms.get_scaled_positions())):
        fields = [label_format.format(s=s, k=k + 1)] + ([] if label_only else [s]) + [
            f"{v:.12f}" for v in f] + ["1"]
        rows.append(separator.join(fields))
    text = "\n".join(["data_test", f"_cell_length_a {a:.10f}", f"_cell_length_b {b:.10f}",
                      f"_cell_length_c {c:.10f}", f"_cell_angle_alpha {alpha:.10f}",
                      f"_cell_angle_beta {beta:.10f}", f"_cell_angle_gamma {gamma:.10f}",
                      "_symmetry_space_group_name_H-M 'P 1'", "_symmetry_Int_Tables_number 1",
                      "", "loop_", *heads, *rows, ""])
    path.write_text(text)
    return path


@pytest.mark.parametrize("layout", [dict(), dict(label_only=True), dict(separator="\t"),
                                    dict(label_format="{s}_{k}")])
def test_p1_cif_tables_read_as_ase_reads_them(tmp_path, layout):
    from ase.io import read

    from cellbuild.cif_text import cif_loops, fast_p1_cif, plain_atom_table

    atoms = _hcp()
    atoms.symbols[1::4] = "Zn"
    path = _p1_cif(tmp_path / "mg.cif", atoms, **layout)
    result = read_file(path)
    assert result.reader == "cellbuild (P 1 table)"
    reference = read(str(path), format="cif")
    np.testing.assert_allclose(result.structure.cell, reference.cell[:], atol=1e-9)
    delta = result.structure.fractional() - reference.get_scaled_positions(wrap=False)
    np.testing.assert_allclose(delta - np.round(delta), 0.0, atol=1e-9)
    assert list(result.structure.chemical_symbols()) == reference.get_chemical_symbols()
    # the one-pass table and the field-by-field text path give the same doubles
    text = path.read_text()
    loops = cif_loops(text)
    plain = plain_atom_table(loops)
    assert (plain is None) == ("_" in layout.get("label_format", ""))  # '_': text path
    by_text = fast_p1_cif(text, loops)
    _same(result.structure, by_text)
