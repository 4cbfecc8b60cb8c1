"""The format registry is the one place format knowledge lives.

Every registered format round-trips a built structure: read back by ASE's reader for
it (an outside program) and by ours, positions to 1e-8 A under periodic images and
symbols in order; told from its file name and, with the name hidden, from its
content. The rest of the package takes its lists from the registry.
"""
from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from cellbuild.formats import EXTENSIONS, FORMATS

PACKAGE = Path(__file__).resolve().parent.parent / "cellbuild"


@pytest.fixture(scope="module")
def built():
    from cellbuild.pipeline import build
    from cellbuild.recipe import parse_recipe

    recipe = parse_recipe({"name": "reg", "seed": 3, "size": {"repeat": 2},
                           "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"},
                                       "a": 4.212},
                           "defects": {"substitutions": [{"element": "Ni", "count": 3, "on": "A"}],
                                       "vacancies": {"count": 1, "on": "B"}}})
    return build(recipe).structure


def _gap(cell, a, b):
    """Largest distance between a[i] and b[i] under the cell's periodic images (A)."""
    f = (a - b) @ np.linalg.inv(cell)
    f -= np.round(f)
    return float(np.abs(f @ cell).max())


@pytest.mark.parametrize("key", [k for k, f in FORMATS.items() if f.structure])
def test_every_format_round_trips_and_is_recognised(built, key, tmp_path):
    import ase.io

    from cellbuild.formats import output_path, write_structure
    from cellbuild.readers import read_file

    fmt = FORMATS[key]
    path = write_structure(built, key, output_path(tmp_path, "reg", key), title="reg").path
    kwargs = {"atom_style": "atomic"} if fmt.ase_format == "lammps-data" else {}
    theirs = ase.io.read(path, format=fmt.ase_format, **kwargs)
    ours = read_file(path, types=list(built.symbols) if key == "lammps-data" else None)
    assert ours.format == key
    symbols = [built.symbols[c] for c in built.species]
    for atoms in (theirs, ours.structure.to_ase()):
        assert len(atoms) == built.n_atoms
        if key != "lammps-data":  # ASE names LAMMPS types by mass, tested elsewhere
            assert sorted(atoms.get_chemical_symbols()) == sorted(symbols)
        assert np.allclose(np.abs(np.linalg.det(atoms.cell[:])), built.volume, rtol=1e-9)
    # both readers keep the atom order the writers share (atom ids hold in every file)
    assert _gap(built.cell, ours.structure.positions, built.positions) < 1e-8
    assert _gap(built.cell, theirs.positions @ np.linalg.inv(theirs.cell[:]) @ built.cell
                if key == "lammps-data" else theirs.positions, built.positions) < 1e-8
    # told from the content alone, with the name hidden
    hidden = tmp_path / "structure"
    hidden.write_bytes(path.read_bytes())
    assert read_file(hidden, types=list(built.symbols) if key == "lammps-data" else None
                     ).format == key


def test_the_package_takes_its_format_lists_from_the_registry():
    from cellbuild.build import resolve
    from cellbuild.manifest import OUTPUT_SUFFIXES
    from cellbuild.formats import DEFAULT_KEYS
    from cellbuild.recipe import DEFAULT_OUTPUTS, FORMAT_KEYS, parse_recipe
    from cellbuild.templates import template_for

    assert FORMAT_KEYS == tuple(FORMATS) and DEFAULT_OUTPUTS == DEFAULT_KEYS
    assert set(EXTENSIONS) <= set(OUTPUT_SUFFIXES)
    assert f"outputs: [{', '.join(DEFAULT_KEYS)}]" in template_for("fcc")
    plan = resolve(parse_recipe({"name": "p", "crystal": {"element": "Cu", "lattice": "fcc",
                                                          "a": 3.6}, "size": {"repeat": 2}}))
    assert plan.estimated_files == {k: FORMATS[k].bytes_per_atom * 32 for k in DEFAULT_KEYS}
    # no module outside formats/ spells a written extension (a second place to edit)
    pattern = re.compile("|".join(re.escape(f'"{e}"') for e in EXTENSIONS))
    offenders = [p.name for p in PACKAGE.glob("*.py") if pattern.search(p.read_text())]
    assert not offenders
