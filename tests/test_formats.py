"""Output formats: exact number formatting, round trips through outside readers,
byte determinism and atomic writes.

Reference readers (outside libraries, not this package):
  * ASE's readers (reference library): ``ase.io.read`` for lammps-data, cif,
    extended xyz and POSCAR;
  * pymatgen's readers (reference library): ``CifParser`` and ``Poscar``;
  * Python's own ``'%.<d>f' % x`` formatting (reference for the digits).
"""
from __future__ import annotations

import hashlib
import io
import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cellbuild.formats import FORMATS, _rounding, _text, write_structure
from cellbuild.formats import lammps as lammps_format
from cellbuild.structure import Structure

TOL = 1e-8  # Angstrom: round-trip tolerance required of every writer
KEYS = tuple(FORMATS)


# --------------------------------------------------------------------------
# Structures, built with plain numpy
# --------------------------------------------------------------------------

FCC = [[0, 0, 0], [0, .5, .5], [.5, 0, .5], [.5, .5, 0]]
BCC = [[0, 0, 0], [.5, .5, .5]]
DIAMOND = FCC + [[x + .25, y + .25, z + .25] for x, y, z in FCC]


def cubic(a: float, basis, reps: int, codes, symbols) -> Structure:
    """A reps^3 supercell of a cubic cell with lattice constant ``a`` (A)."""
    grid = np.stack(np.meshgrid(*[np.arange(reps)] * 3, indexing="ij"), -1).reshape(-1, 1, 3)
    frac = ((grid + np.asarray(basis, dtype=float)) / reps).reshape(-1, 3)
    cell = np.eye(3) * a * reps
    species = np.resize(np.asarray(codes, dtype=np.int32), len(frac))
    return Structure(cell, frac @ cell, species, tuple(symbols))


def triclinic_cu() -> Structure:
    """fcc Cu primitive cell (ASE's bulk builder) repeated 2x2x2, rattled, with
    some atoms moved out of the cell by lattice vectors."""
    from ase.build import bulk

    atoms = bulk("Cu", "fcc", a=3.6).repeat((2, 2, 2))
    s = Structure.from_ase(atoms)
    rng = np.random.default_rng(7)
    images = rng.integers(-2, 3, size=(s.n_atoms, 3)) @ s.cell
    positions = s.positions + rng.normal(0, 0.05, s.positions.shape) + images
    return Structure(s.cell, positions, s.species, s.symbols)


def left_handed() -> Structure:
    """A skewed cell with left-handed lattice vectors and two species."""
    cell = np.array([[4.0, 0.3, 0.2], [0.5, 5.0, 0.1], [0.4, -0.6, -6.0]])
    assert np.linalg.det(cell) < 0
    rng = np.random.default_rng(3)
    frac = rng.random((20, 3))
    return Structure(cell, frac @ cell, np.arange(20, dtype=np.int32) % 2, ("Fe", "Cr"))


def big_box() -> Structure:
    """A ~2000 A triclinic box with random positions, some outside the cell:
    checks that the digits kept are enough for 1e-8 A at this size."""
    cell = np.array([[2000.0, 0, 0], [150.3, 1900.7, 0], [-80.1, 120.9, 1999.3]])
    rng = np.random.default_rng(11)
    frac = rng.uniform(-0.5, 1.5, (300, 3))
    return Structure(cell, frac @ cell, rng.integers(0, 3, 300).astype(np.int32),
                     ("Al", "Mg", "Zn"))


STRUCTURES = {
    "fcc-Cu": lambda: cubic(3.615, FCC, 2, [0], ["Cu"]),
    "bcc-Fe": lambda: cubic(2.8665, BCC, 3, [0], ["Fe"]),
    "diamond-Si": lambda: cubic(5.431, DIAMOND, 2, [0], ["Si"]),
    # Ni and Al interleaved; Cu is in the type map but on no atom
    "NiAl-absent-Cu": lambda: cubic(2.887, BCC, 3, [0, 2], ["Ni", "Cu", "Al"]),
    "triclinic-Cu": triclinic_cu,
    "left-handed": left_handed,
    "big-box": big_box,
}


@pytest.fixture(params=sorted(STRUCTURES))
def structure(request) -> Structure:
    return STRUCTURES[request.param]()


# --------------------------------------------------------------------------
# Comparison up to a rigid rotation of the frame and periodic images
# --------------------------------------------------------------------------

def assert_same(ref: Structure, cell, positions, symbols, order=None) -> None:
    """The structure read back equals ``ref`` (atoms in ``order``) to TOL.

    The reader's frame may be rotated (LAMMPS, CIF). ``order="match"`` pairs
    the atoms by position, for readers that regroup them.
    """
    cell = np.asarray(cell, dtype=float)
    positions = np.asarray(positions, dtype=float)
    rotation = _best_rotation(ref.cell, cell)
    assert np.abs(ref.cell @ rotation - cell).max() < TOL, "cell differs"
    assert len(positions) == ref.n_atoms
    expected = ref.positions @ rotation
    if isinstance(order, str):
        order = _pair_by_position(expected, positions, cell)
    order = np.arange(ref.n_atoms) if order is None else order
    assert list(symbols) == list(ref.chemical_symbols()[order]), "species differ"
    assert np.max(_periodic_distance(positions - expected[order], cell)) < TOL, \
        "positions differ"


def _periodic_distance(delta: np.ndarray, cell: np.ndarray) -> np.ndarray:
    """|delta| up to lattice vectors (delta small compared with the cell)."""
    frac = delta @ np.linalg.inv(cell)
    frac -= np.rint(frac)  # periodic images are the same atom
    return np.linalg.norm(frac @ cell, axis=-1)


def _pair_by_position(expected: np.ndarray, positions: np.ndarray, cell) -> np.ndarray:
    """For each atom read, the index of the nearest expected atom (a bijection)."""
    distance = _periodic_distance(positions[:, None, :] - expected[None, :, :], cell)
    order = distance.argmin(axis=1)
    assert len(set(order.tolist())) == len(order), "atoms do not pair up"
    return order


def _best_rotation(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The orthogonal matrix closest to solve(a, b), mapping rows of a onto b."""
    u, _, vt = np.linalg.svd(np.linalg.solve(a, b))
    return u @ vt


def write_bytes(s: Structure, key: str, title: str = "test structure") -> bytes:
    handle = io.BytesIO()
    FORMATS[key].writer()(s, handle, title)
    return handle.getvalue()


def grouped(s: Structure) -> np.ndarray:
    return np.argsort(s.species, kind="stable")


# --------------------------------------------------------------------------
# Round trips
# --------------------------------------------------------------------------

def test_lammps_data_round_trip_with_ase(structure, tmp_path):
    import ase.io

    path = tmp_path / "s.lmp"
    write_structure(structure, "lammps-data", path, "round trip")
    # ASE's reader (reference library); it guesses elements from the masses
    atoms = ase.io.read(path, format="lammps-data", atom_style="atomic")
    right_handed = structure
    if np.linalg.det(structure.cell) < 0:  # LAMMPS needs a right-handed box: c -> -c
        right_handed = Structure(structure.cell * [[1], [1], [-1]], structure.positions,
                                 structure.species, structure.symbols)
    assert_same(right_handed, atoms.cell[:], atoms.positions, atoms.get_chemical_symbols())
    assert np.array_equal(atoms.arrays["type"], structure.species + 1)
    assert np.array_equal(atoms.arrays["id"], np.arange(1, structure.n_atoms + 1))
    # LAMMPS box: a along x, b in the xy plane; atoms wrapped into it
    assert atoms.cell[0, 1] == atoms.cell[0, 2] == atoms.cell[1, 2] == 0
    frac = atoms.get_scaled_positions(wrap=False)
    assert frac.min() >= -1e-12 and frac.max() < 1
    text = path.read_text()
    n_types = len(structure.symbols)
    assert f"\n{n_types} atom types\n" in text
    masses = text.split("\nMasses\n\n")[1].split("\n\n")[0].splitlines()
    from ase.data import atomic_masses, atomic_numbers  # ASE's table (reference)
    assert masses == [f"{t + 1} {float(atomic_masses[atomic_numbers[s]])!r}  # {s}"
                      for t, s in enumerate(structure.symbols)]
    assert "\nAtoms  # atomic\n" in text
    assert text.splitlines()[0] == "round trip (units metal, atom_style atomic)"


def test_xyz_round_trip_with_ase(structure, tmp_path):
    import ase.io

    path = tmp_path / "s.xyz"
    write_structure(structure, "xyz", path, 'title with "quotes"')
    # ASE's extended XYZ reader (reference library)
    atoms = ase.io.read(path, format="extxyz")
    assert_same(structure, atoms.cell[:], atoms.positions, atoms.get_chemical_symbols())
    assert atoms.pbc.all()
    # extended xyz keeps the positions as given (no wrapping): compare exactly to 1e-10
    assert np.abs(atoms.positions - structure.positions).max() < 1e-10
    assert "title" in atoms.info


def test_poscar_round_trip_with_ase_and_pymatgen(structure, tmp_path):
    import ase.io
    from pymatgen.io.vasp import Poscar

    path = tmp_path / "POSCAR"
    write_structure(structure, "poscar", path, "round trip")
    order = grouped(structure)
    # ASE's VASP reader (reference library)
    atoms = ase.io.read(path, format="vasp")
    assert_same(structure, atoms.cell[:], atoms.positions, atoms.get_chemical_symbols(), order)
    # pymatgen's Poscar reader (reference library)
    pmg = Poscar.from_file(path).structure
    assert_same(structure, pmg.lattice.matrix, pmg.cart_coords,
                [site.specie.symbol for site in pmg], order)
    lines = path.read_text().splitlines()
    composition = structure.composition()
    assert lines[5].split() == list(composition)
    assert [int(n) for n in lines[6].split()] == list(composition.values())
    assert lines[7] == "Direct"
    frac = np.array([line.split() for line in lines[8:]], dtype=float)
    assert frac.min() >= 0 and frac.max() < 1


def test_cif_round_trip_with_pymatgen_and_ase(structure, tmp_path):
    import ase.io
    from pymatgen.io.cif import CifParser

    path = tmp_path / "s.cif"
    write_structure(structure, "cif", path, "round trip")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # pymatgen's CIF parser (reference library); it rebuilds the cell
        # from lengths and angles in its own orientation
        pmg = CifParser(path).parse_structures(primitive=False)[0]
        # ASE's CIF reader (reference library)
        atoms = ase.io.read(path, format="cif")
    assert_same(structure, pmg.lattice.matrix, pmg.cart_coords,
                [site.specie.symbol for site in pmg], order="match")  # pymatgen regroups
    assert_same(structure, atoms.cell[:], atoms.positions, atoms.get_chemical_symbols())
    text = path.read_text()
    assert text.startswith("#\\#CIF_1.1\ndata_round_trip\n")
    assert "_symmetry_space_group_name_H-M 'P 1'" in text
    rows = [line.split() for line in text.split("_atom_site_occupancy\n")[1].splitlines()]
    labels = [r[0] for r in rows]
    symbols = structure.chemical_symbols()
    expected = []
    seen: dict[str, int] = {}
    for s in symbols:  # plain-Python reference for the running labels
        seen[s] = seen.get(s, 0) + 1
        expected.append(f"{s}{seen[s]}")
    assert labels == expected
    assert {r[1] for r in rows} == set(structure.composition())  # absent elements left out
    assert all(r[5] == "1" for r in rows)


def test_structure_order_of_a_shuffled_two_species_structure(tmp_path):
    """Type order, not appearance, decides the POSCAR grouping and LAMMPS types."""
    base = STRUCTURES["NiAl-absent-Cu"]()
    perm = np.random.default_rng(5).permutation(base.n_atoms)
    s = Structure(base.cell, base.positions[perm], base.species[perm][::-1].copy(), base.symbols)
    text = write_bytes(s, "poscar").decode().splitlines()
    assert text[5:7] == ["Ni Al", f"{(s.species == 0).sum()} {(s.species == 2).sum()}"]
    types = [int(line.split()[1]) for line in
             write_bytes(s, "lammps-data").decode().split("# atomic\n\n")[1].splitlines()]
    assert types == list(s.species + 1)


# --------------------------------------------------------------------------
# Determinism and block independence
# --------------------------------------------------------------------------

@pytest.mark.parametrize("key", KEYS)
def test_same_structure_gives_same_bytes(key):
    for make in STRUCTURES.values():
        assert write_bytes(make(), key) == write_bytes(make(), key)


@pytest.mark.parametrize("key", KEYS)
def test_bytes_do_not_depend_on_the_block_size(key, monkeypatch):
    s = STRUCTURES["NiAl-absent-Cu"]()
    whole = write_bytes(s, key)
    monkeypatch.setattr(_text, "CHUNK_ROWS", 5)  # many blocks, uneven last block
    assert write_bytes(s, key) == whole


def test_no_negative_zeros():
    cell = np.eye(3) * 10.0
    positions = np.array([[-0.0, -1e-13, 0.0], [-4e-11, 1.5, -2.25]])
    s = Structure(cell, positions, np.zeros(2, dtype=np.int32), ("H",))
    lines = write_bytes(s, "xyz").decode().splitlines()
    assert lines[2].split() == ["H", "0.0000000000", "0.0000000000", "0.0000000000"]
    assert lines[3].split() == ["H", "0.0000000000", "1.5000000000", "-2.2500000000"]
    for key in KEYS:
        assert b"-0.000000000000 " not in write_bytes(s, key)


# --------------------------------------------------------------------------
# Number formatting against Python's '%' (reference)
# --------------------------------------------------------------------------

def python_fixed(x: float, decimals: int) -> str:
    """Python's '%.<d>f', with the minus dropped when the value rounds to zero."""
    text = "%.*f" % (decimals, x)
    return text[1:] if text.startswith("-") and set(text[1:]) <= {"0", "."} else text


def rendered(values, decimals: int, signed: bool = True) -> list[str]:
    values = np.asarray(values, dtype=float)
    digits = _rounding.int_digits_for(np.abs(values).max(), decimals)
    row = _text.Row([_text.Fixed(digits, decimals, signed)])
    matrix = row.render([values])
    assert matrix.shape[1] % 8 == 0
    return matrix.tobytes().decode().split()


def hard_values(decimals: int, rng) -> np.ndarray:
    """Random values, zeros, and values at or next to rounding ties."""
    unit = 10.0 ** -decimals
    ties = np.round(rng.uniform(-1e3, 1e3, 4000), decimals) + 0.5 * unit
    dyadic = rng.integers(-2 ** 12, 2 ** 12, 4000) / 2.0 ** rng.integers(0, 45, 4000)
    return np.concatenate([
        rng.uniform(-1e4, 1e4, 4000), rng.uniform(-1, 1, 2000),
        rng.uniform(-1e-9, 1e-9, 500) * unit * 1e9,
        [0.0, -0.0, 5e-324, -1e-300, 0.5, -0.5, 1.5, 2.5, 9999.5, -9999.999999999999,
         9999.99999999999, 1e4, -1e4, 0.5 * unit, -0.5 * unit, 1.5 * unit, 2 ** -11],
        ties, np.nextafter(ties, np.inf), np.nextafter(ties, -np.inf), dyadic,
    ])


@pytest.mark.parametrize("decimals", [1, 3, 6, 10, 12])
def test_fixed_fields_match_python_formatting(decimals):
    values = hard_values(decimals, np.random.default_rng(decimals))
    assert rendered(values, decimals) == [python_fixed(v, decimals) for v in values]
    assert _rounding.format_fixed(values, decimals) == [python_fixed(v, decimals) for v in values]


def test_unsigned_fixed_fields_match_python_formatting():
    values = np.concatenate([np.random.default_rng(1).random(5000), [0.0, -0.0, -1e-14]])
    assert rendered(values, 12, signed=False) == [python_fixed(v, 12) for v in values]
    with pytest.raises(ValueError):
        rendered([0.5, -0.25], 12, signed=False)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(min_value=-1e4, max_value=1e4, allow_nan=False), min_size=1,
                max_size=40),
       st.sampled_from([1, 2, 5, 10, 12]))
def test_fixed_fields_match_python_formatting_property(values, decimals):
    assert rendered(values, decimals) == [python_fixed(v, decimals) for v in values]


def test_mixed_row_matches_python_formatting():
    rng = np.random.default_rng(2)
    n = 3000
    ids = rng.integers(0, 10 ** 7, n)
    codes = rng.integers(0, 3, n)
    x = rng.uniform(-500, 500, n)
    labels = ("Cu", "O", "Xyz")
    for indent in range(8):  # every alignment of the fields within the words
        row = _text.Row([_text.Int(7), _text.Text(labels, right=indent % 2 == 1),
                         _text.Fixed(3, 10), _text.Const("1"), _text.Fixed(3 + indent % 3, 6)],
                        indent=indent)
        lines = row.render([ids, codes, x, None, -x]).tobytes().decode().splitlines()
        assert len({len(line) for line in lines}) == 1
        assert [line.split() for line in lines] == [
            [str(i), labels[c], python_fixed(v, 10), "1", python_fixed(-v, 6)]
            for i, c, v in zip(ids, codes, x)]


def test_formatting_errors():
    with pytest.raises(ValueError):
        rendered([1.0, math.nan], 10)
    with pytest.raises(ValueError):
        rendered([1.0, math.inf], 10)
    with pytest.raises(ValueError):  # does not fit the field
        _text.Row([_text.Fixed(2, 10)]).render([np.array([123.0])])
    with pytest.raises(ValueError):  # beyond int64 fixed point
        _rounding.fixed_point(np.array([1e9]), 10)
    with pytest.raises(ValueError):
        _text.Row([_text.Int(3)]).render([np.array([1000])])


def test_bad_species_codes_are_refused():
    s = STRUCTURES["fcc-Cu"]()
    bad = Structure(s.cell, s.positions, np.full(s.n_atoms, 1, dtype=np.int32), ("Cu",))
    for key in KEYS:
        with pytest.raises(ValueError):
            write_bytes(bad, key)


# --------------------------------------------------------------------------
# write_structure: atomic, hashed
# --------------------------------------------------------------------------

def test_write_structure_reports_the_file_hash(tmp_path):
    s = STRUCTURES["diamond-Si"]()
    for key in KEYS:
        written = write_structure(s, key, tmp_path / f"out{FORMATS[key].extension}", "Si")
        data = written.path.read_bytes()
        assert written.sha256 == hashlib.sha256(data).hexdigest()
        assert written.bytes == len(data)
        assert data == write_bytes(s, key, "Si")


def _failing_writer(structure, handle, title, options=None):
    handle.write(b"half a file\n" * 1000)
    raise RuntimeError("writer failed midway")


def test_failed_write_leaves_no_file(tmp_path, monkeypatch):
    monkeypatch.setattr(lammps_format, "write", _failing_writer)
    with pytest.raises(RuntimeError):
        write_structure(STRUCTURES["fcc-Cu"](), "lammps-data", tmp_path / "out.lmp", "x")
    assert list(tmp_path.iterdir()) == []  # neither the file nor a temporary file


def test_failed_write_keeps_the_previous_file(tmp_path, monkeypatch):
    path = tmp_path / "out.lmp"
    write_structure(STRUCTURES["fcc-Cu"](), "lammps-data", path, "x")
    before = path.read_bytes()
    monkeypatch.setattr(lammps_format, "write", _failing_writer)
    with pytest.raises(RuntimeError):
        write_structure(STRUCTURES["bcc-Fe"](), "lammps-data", path, "x")
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["out.lmp"]


def test_lookup_and_mask_paths_give_the_same_text():
    """Short integer parts come from one table lookup, long ones from digit
    groups and masks: both must write the same bytes."""
    rng = np.random.default_rng(4)
    x = rng.uniform(-9999, 9999, 5000) * rng.choice([1, 1e-2, 1e-4], 5000)
    n = rng.integers(0, 1000, 5000)
    codes = rng.integers(0, 3, 5000)
    fields = [_text.Int(3, ("Cu", "O", "Xyz")), _text.Fixed(4, 10), _text.Int(2),
              _text.Fixed(1, 12, signed=False)]
    columns = [(n, codes), x, n % 100, np.abs(x) % 1]
    fast = _text.Row(fields).render(columns)
    assert fast.tobytes() == _text.Row(fields, lookup=False).render(columns).tobytes()
    assert [line.split()[0] for line in fast.tobytes().decode().splitlines()] == [
        f"{('Cu', 'O', 'Xyz')[c]}{v}" for v, c in zip(n, codes)]


@pytest.mark.parametrize("key", KEYS)
def test_titles_are_made_safe(key):
    s = STRUCTURES["fcc-Cu"]()
    text = write_bytes(s, key, 'two\nlines "quoted" \\ ü').decode("ascii")
    first = text.splitlines()[0 if key != "xyz" else 1]
    assert "\n" not in first and "ü" not in first


@pytest.mark.parametrize("key", KEYS)
def test_an_empty_structure_still_writes(key):
    s = Structure(np.eye(3) * 4.0, np.zeros((0, 3)), np.zeros(0, dtype=np.int32), ("Cu",))
    assert write_bytes(s, key)


def golden_structures() -> dict:
    """Structures from closed-form arithmetic only (no random streams or outside
    builders that could change between library versions)."""
    def skewed() -> Structure:
        cell = np.array([[4.0, 0.3, 0.2], [0.5, 5.0, 0.1], [0.4, -0.6, -6.0]])
        i = np.arange(24, dtype=np.float64)[:, None]
        frac = (i * np.array([0.1234567, 0.7654321, 0.3141592])) % 1.0 * 3.0 - 1.0
        # elementwise, not frac @ cell: BLAS results may differ between machines
        positions = frac[:, :1] * cell[0] + frac[:, 1:2] * cell[1] + frac[:, 2:] * cell[2]
        return Structure(cell, positions, (np.arange(24) % 3).astype(np.int32),
                         ("Fe", "Ni", "Cr"))
    return {"fcc-Cu": STRUCTURES["fcc-Cu"], "skewed": skewed}


#: sha256 of the files for golden_structures(), title "test structure". Any
#: change here changes every output file: update deliberately, never silently.
#: The same hashes on another machine show that the bytes are machine-independent.
GOLDEN = {
    ("fcc-Cu", "lammps-data"): "6c285da4a2a53c6e9c0bcea0dbc53efb74de5f403ce5147f65daccba063a1596",
    ("fcc-Cu", "cif"): "e2471ffa169bfd1104427d8ab78a6ba585e1ee78d7167dbad1f76051f1e073d8",
    ("fcc-Cu", "xyz"): "f2d1adddc54c034380d791db040701c449f8e977740254df1acf7e70de02ce33",
    ("fcc-Cu", "poscar"): "a5de30ee6afeea61af74bec837131b74c77158230d15a6a8c319ef5c4a1a7b23",
    ("skewed", "lammps-data"): "9c9066b66477f06b1d8db044a783a6732178cd043390aed810ce0a44deadfd32",
    ("skewed", "cif"): "ba66fcb2d9307cb77a1bfe4a37e86252038a9c5b188b9f4b27ab5d98f535cede",
    ("skewed", "xyz"): "43702c7232c199f5ef37245e79ca8d6275ff454ab5629f5472e6e1c584651312",
    ("skewed", "poscar"): "711c6cfd087997a33f92175b2c95263a67ae851985f4e8fd0e6fac9d028d6c88",
}


@pytest.mark.parametrize("name,key", sorted(GOLDEN))
def test_bytes_match_the_recorded_hashes(name, key):
    data = write_bytes(golden_structures()[name](), key)
    assert hashlib.sha256(data).hexdigest() == GOLDEN[name, key]
