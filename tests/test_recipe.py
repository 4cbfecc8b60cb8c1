"""Recipe loading and validation: every error names the key and the value."""
from __future__ import annotations

import pytest

from cellbuild.errors import InputError
from cellbuild.recipe import load_recipe, parse_recipe, parse_yaml

GOOD = """\
name: al-host-perfect
crystal:
  element: Al
  lattice: fcc
  a: 4.05
size:
  repeat: [10, 10, 10]
seed: 1
outputs: [lammps-data, cif, xyz, poscar]
"""


def _error(text: str) -> InputError:
    data, lines = parse_yaml(text, "r.yaml")
    with pytest.raises(InputError) as err:
        parse_recipe(data, lines, "r.yaml")
    return err.value


def test_good_recipe_parses(tmp_path):
    path = tmp_path / "r.yaml"
    path.write_text(GOOD)
    r = load_recipe(path)
    assert r.name == "al-host-perfect" and r.crystal.a == 4.05
    assert r.size.repeat == (10, 10, 10) and r.seed == 1
    assert r.outputs == ("lammps-data", "cif", "xyz", "poscar")


def test_unknown_key_names_it_lists_allowed_and_line():
    err = _error(GOOD.replace("  a: 4.05", "  lattice_constant: 4.05"))
    text = str(err)
    assert "crystal.lattice_constant" in text and "allowed" in text and "density" in text
    assert err.line == 5


def test_near_miss_gets_a_suggestion():
    assert "did you mean `element`" in str(_error(GOOD.replace("element: Al", "elemnt: Al")))


def test_two_exclusive_keys():
    text = str(_error(GOOD.replace("  a: 4.05", "  a: 4.05\n  density: 2.7")))
    assert "crystal.density" in text and "crystal.a" in text


@pytest.mark.parametrize("old,new,key", [
    ("a: 4.05", "a: four", "crystal.a"),
    ("a: 4.05", "a: -1", "crystal.a"),
    ("a: 4.05", "a: .nan", "crystal.a"),
    ("repeat: [10, 10, 10]", "repeat: [10, 10]", "size.repeat"),
    ("repeat: [10, 10, 10]", "repeat: [10, 0, 10]", "size.repeat[1]"),
    ("element: Al", "element: Xx", "crystal.element"),
    ("lattice: fcc", "lattice: hcp", "crystal.lattice"),
    ("xyz, poscar]", "xyz, pdb]", "outputs[3]"),
    ("name: al-host-perfect", "name: ../escape", "name"),
    ("name: al-host-perfect", "name: /abs/path", "name"),
    ("seed: 1", "seed: -3", "seed"),
])
def test_bad_values_name_key_and_value(old, new, key):
    err = _error(GOOD.replace(old, new))
    assert err.key == key
    assert key in str(err)


def test_unknown_lattice_lists_known():
    assert "sc, bcc, fcc, diamond" in str(_error(GOOD.replace("lattice: fcc", "lattice: hcp")))


def test_unknown_format_lists_known():
    assert "lammps-data, cif, xyz, poscar" in str(_error(GOOD.replace("xyz, poscar]", "xyz, pdb]")))


def test_missing_required_section():
    assert "size" in str(_error("name: x\ncrystal: {element: Cu, lattice: fcc}\n"))


def test_duplicate_key_refused_with_line():
    with pytest.raises(InputError) as err:
        parse_yaml(GOOD + "seed: 2\n", "r.yaml")
    assert "duplicate" in str(err.value) and err.value.line == 10


def test_object_constructing_tag_refused():
    with pytest.raises(InputError) as err:
        parse_yaml("name: !!python/object/apply:os.system ['echo hi']\n", "r.yaml")
    assert "tags" in str(err.value)


def test_types_must_cover_every_element():
    text = GOOD + "types: [Mg]\n"
    assert "does not list Al" in str(_error(text))
