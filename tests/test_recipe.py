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
    ("lattice: fcc", "lattice: hpc", "crystal.lattice"),
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
    assert "sc, bcc, fcc, diamond" in str(_error(GOOD.replace("lattice: fcc", "lattice: hpc")))


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


# ----------------------------------------------------------------------------- messages


def _recipe(**changes) -> dict:
    data = {"name": "m", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.6},
            "size": {"repeat": [2, 2, 2]}}
    data.update(changes)
    return data


def _parse_error(data: dict) -> str:
    with pytest.raises(InputError) as err:
        parse_recipe(data, file="r.yaml")
    return str(err.value)


@pytest.mark.parametrize("data,shown", [
    (_recipe(crystal={"element": "Cu", "lattice": "fcc", "a\n": 1}), "`crystal.a\\n` = 1"),
    (_recipe(crystal={"element": "Cu", "lattice": "fcc", "a\u2028b": 1}), "`crystal.a\\u2028b`"),
    (_recipe(crystal={"element": "Cu\x1b[31m", "lattice": "fcc"}), "'Cu\\x1b[31m'"),
    (_recipe(**{"se`ed": 1}), "`se\\x60ed` = 1"),
    (_recipe(name="a\nb"), "`name` = 'a\\nb'"),
    (_recipe(defects={"substitutions": [{"element": "Ni", "fraction": -0.1}]}),
     "`defects.substitutions[0].fraction` = -0.1"),
    (_recipe(defects={"interstitials": [{"element": "C", "site": "x", "count": 1}]}),
     "`defects.interstitials[0].site` = 'x'"),
])
def test_messages_are_one_line_with_escaped_keys_and_values(data, shown):
    message = _parse_error(data)
    assert "\n" not in message and message.isprintable(), message
    assert shown in message, message


def test_numpy_values_print_as_plain_numbers():
    import numpy as np

    from cellbuild.recipe import Crystal, Size

    with pytest.raises(InputError) as err:
        Crystal("Cu", "fcc", a=np.float64(-1.5))
    assert "`crystal.a` = -1.5:" in str(err.value) and "np." not in str(err.value)
    with pytest.raises(InputError) as err:
        Size(repeat=np.array([2, 0, 2]))
    assert "`size.repeat[1]` = 0:" in str(err.value)
    assert Size(repeat=np.array([2, 3, 4])).repeat == (2, 3, 4)
    assert type(Size(repeat=(np.int64(2),) * 3).repeat[0]) is int
    assert InputError("x", key="k", value=[np.int64(1), np.float64(0.5)]).__str__() == \
        "`k` = [1, 0.5]: x."


# ----------------------------------------------------------------------------- Python API


def _cu(**fields):
    from cellbuild.recipe import Crystal, Recipe, Size

    args = {"name": "cu", "crystal": Crystal("Cu", "fcc", a=3.615), "size": Size(repeat=(1, 1, 1))}
    args.update(fields)
    return Recipe(**args)


def test_an_escaping_name_cannot_be_built_in_python(tmp_path):
    from cellbuild.pipeline import make

    out = tmp_path / "out"
    with pytest.raises(InputError) as err:
        make(_cu(name="../escaped"), out)
    assert err.value.key == "name" and "safe file stem" in str(err.value)
    assert list(tmp_path.iterdir()) == []


def _invalid_constructions():
    from cellbuild.recipe import (Amount, Checks, Crystal, Defects, Interstitial, Size,
                                  Substitution, Vacancies)

    return [
        ("name", lambda: _cu(name="/abs")),
        ("name", lambda: _cu(name=".hidden")),
        ("name", lambda: _cu(name=7)),
        ("seed", lambda: _cu(seed=-1)),
        ("seed", lambda: _cu(seed=2**63)),
        ("seed", lambda: _cu(seed=True)),
        ("outputs[0]", lambda: _cu(outputs=("pdb",))),
        ("outputs", lambda: _cu(outputs=())),
        ("outputs[1]", lambda: _cu(outputs=("xyz", "xyz"))),
        ("types", lambda: _cu(types=("Cu", "Cu"))),
        ("types", lambda: _cu(types=("Ni",))),
        ("crystal", lambda: _cu(crystal={"element": "Cu"})),
        ("crystal.element", lambda: Crystal("Xx", "fcc")),
        ("crystal.element", lambda: Crystal("cu", "fcc")),
        ("crystal.lattice", lambda: Crystal("Cu", "hpc")),
        ("crystal.a", lambda: Crystal("Cu", "fcc", a=-1.0)),
        ("crystal.a", lambda: Crystal("Cu", "fcc", a=float("nan"))),
        ("crystal.a", lambda: Crystal("Cu", "fcc", a="3.6")),
        ("crystal.a", lambda: Crystal("Cu", "fcc", a=10**400)),
        ("crystal.density", lambda: Crystal("Cu", "fcc", a=3.6, density=8.9)),
        ("size", lambda: Size()),
        ("size.repeat[0]", lambda: Size(repeat=(0, 1, 1))),
        ("size.repeat[1]", lambda: Size(repeat=(1, 1.5, 1))),
        ("size.repeat", lambda: Size(repeat=(1, 1))),
        ("size.atoms", lambda: Size(atoms=0)),
        ("size.min_length[2]", lambda: Size(min_length=(1.0, 1.0, float("inf")))),
        ("size.atoms", lambda: Size(repeat=(1, 1, 1), atoms=4)),
        ("count", lambda: Amount(count=-1)),
        ("fraction", lambda: Amount(fraction=1.5)),
        ("fraction", lambda: Amount(count=1, fraction=0.1)),
        (None, lambda: Amount()),
        ("on", lambda: Vacancies(Amount(count=1), "two words")),
        ("on", lambda: Vacancies(Amount(count=1), 3)),
        ("element", lambda: Substitution("Cu", Amount(count=1), "Cu")),
        ("amount", lambda: Substitution("Ni", 3, "Cu")),
        ("element", lambda: Interstitial("Zz", "octahedral", Amount(count=1))),
        ("defects.min_separation", lambda: Defects(min_separation=-2.0)),
        ("defects.substitutions[0]", lambda: Defects(substitutions=("Ni",))),
        ("defects.interstitials[0].site", lambda: _cu(defects=Defects(interstitials=(
            Interstitial("C", "cube-centre", Amount(count=1)),)))),
        ("checks.min_distance", lambda: Checks(min_distance=0)),
        ("checks.physical_spacing", lambda: Checks(physical_spacing="no")),
        ("checks.physical_spacing", lambda: Checks(physical_spacing=0)),
    ]


@pytest.mark.parametrize("index", range(len(_invalid_constructions())))
def test_invalid_values_cannot_be_constructed(index):
    key, build = _invalid_constructions()[index]
    with pytest.raises(InputError) as err:
        build()
    assert err.value.key == key, str(err.value)
    assert "\n" not in str(err.value)


def test_valid_values_are_normalised():
    from cellbuild.recipe import Amount, Crystal, Defects, Size

    assert Crystal("Cu", "fcc", a=4).a == 4.0 and type(Crystal("Cu", "fcc", a=4).a) is float
    assert Size(repeat=3).repeat == (3, 3, 3) and Size(repeat=[1, 2, 3]).repeat == (1, 2, 3)
    assert Size(min_length=20).min_length == (20.0, 20.0, 20.0)
    assert Amount(count=2.0).count == 2 and Amount(fraction=0).fraction == 0.0
    assert Defects(substitutions=[]).substitutions == ()
    recipe = _cu(outputs="xyz", types=["Cu", "Ni"])
    assert recipe.outputs == ("xyz",) and recipe.types == ("Cu", "Ni")


# ----------------------------------------------------------------------------- checks


def test_physical_spacing_is_a_boolean_defaulting_to_true():
    assert parse_recipe(_recipe()).checks.physical_spacing is True
    for text, value in (("false", False), ("true", True), ("False", False)):
        data, lines = parse_yaml(GOOD + f"checks:\n  physical_spacing: {text}\n")
        assert parse_recipe(data, lines).checks.physical_spacing is value


@pytest.mark.parametrize("text", ["no", "off", "0", "'false'", "~", "[false]"])
def test_physical_spacing_refuses_anything_but_true_or_false(text):
    err = _error(GOOD + f"checks:\n  physical_spacing: {text}\n")
    assert err.key == "checks.physical_spacing" and err.line == 11
    assert "must be true or false" in str(err) and "\n" not in str(err)


def test_physical_spacing_can_be_swept():
    from cellbuild.sweep import expand

    data, lines = parse_yaml(GOOD + "sweep:\n  checks.physical_spacing: [true, false]\n")
    points = expand(data, lines)
    assert [p.name for p in points] == ["al-host-perfect__physical_spacing-true",
                                        "al-host-perfect__physical_spacing-false"]
    assert points[1].recipe.checks.physical_spacing is False
