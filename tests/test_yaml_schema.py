"""Recipes are read by the YAML 1.2 core schema, and every snippet the docs show loads.

Source of the expected values: the YAML 1.2.2 specification, section 10.3.2
"Tag Resolution" of the core schema (yaml.org/spec/1.2.2): booleans are only
true|True|TRUE|false|False|FALSE, null is null|Null|NULL|~ or empty, integers
are decimal, 0o octal or 0x hex, floats include exponents, .inf and .nan, and
every other plain scalar is a string. YAML 1.1 (PyYAML's SafeLoader) read
`on`, `yes`, `no` as booleans, `010` as octal, `12:30:00` as base 60 and
`5e-3` as a string (YAML 1.1 type repository; from memory).
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import pytest

from cellbuild.errors import InputError
from cellbuild.lattices import LATTICES
from cellbuild.recipe import parse_recipe, parse_yaml
from cellbuild.sweep import expand
from cellbuild.templates import template_for

README = Path(__file__).resolve().parent.parent / "README.md"

BASE = "name: x\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\nsize: {repeat: 2}\n"


@pytest.fixture(autouse=True, params=["libyaml", "pure"])
def yaml_loader(request, monkeypatch):
    """Every case with libyaml's parser (when PyYAML has it) and with PyYAML's
    pure-Python one; tests/test_yaml_loaders.py compares the two directly."""
    from cellbuild import yamlread

    if request.param == "libyaml" and not yamlread.has_libyaml():
        pytest.skip("PyYAML without libyaml")
    if request.param == "pure":
        monkeypatch.setattr(yamlread, "has_libyaml", lambda: False)
    return request.param


def _value(text: str):
    data, _ = parse_yaml(f"v: {text}\n")
    return data["v"]


@pytest.mark.parametrize("text,expected", [
    # booleans: the six spellings of the core schema only
    ("true", True), ("True", True), ("TRUE", True),
    ("false", False), ("False", False), ("FALSE", False),
    ("yes", "yes"), ("No", "No"), ("on", "on"), ("OFF", "OFF"), ("y", "y"), ("tRUE", "tRUE"),
    # null
    ("null", None), ("Null", None), ("NULL", None), ("~", None), ("", None), ("nULL", "nULL"),
    # integers: decimal (leading zeros included), 0o octal, 0x hex
    ("10", 10), ("-7", -7), ("+3", 3), ("010", 10), ("0o17", 15), ("0x1F", 31), ("0", 0),
    ("0b101", "0b101"), ("1_000", "1_000"), ("12:30:00", "12:30:00"),
    # floats, with exponents and the special values
    ("5e-3", 0.005), ("1e30", 1e30), ("4.05e0", 4.05), ("-1.5E+2", -150.0), (".5", 0.5),
    ("1.", 1.0), ("3.615", 3.615), (".inf", math.inf), ("-.Inf", -math.inf), ("+.INF", math.inf),
    # strings: timestamps and base-60 numbers of YAML 1.1 are text in 1.2
    ("2024-01-01", "2024-01-01"), ("1:30", "1:30"), ("inf", "inf"), ("nan", "nan"),
    ("'5e-3'", "5e-3"), ('"true"', "true"),
])
def test_core_schema_scalars(text, expected):
    value = _value(text)
    assert value == expected and type(value) is type(expected), (text, value)


def test_nan_spellings():
    for text in (".nan", ".NaN", ".NAN"):
        assert math.isnan(_value(text))
    assert _value(".Nan") == ".Nan"


def test_explicit_core_tags_follow_the_same_rules():
    assert _value("!!str 10") == "10" and _value("!!int 010") == 10
    assert _value("!!float 1") == 1.0 and _value("!!bool TRUE") is True
    with pytest.raises(InputError) as err:
        parse_yaml("v: !!bool yes\n", "r.yaml")
    assert "YAML 1.2 bool" in str(err.value) and err.value.line == 1


@pytest.mark.parametrize("text", ["!!timestamp 2024-01-01", "!!binary aGk=", "!!set {a}",
                                  "!!omap [{a: 1}]", "!custom x", "!!python/name:os.system"])
def test_other_tags_are_refused(text):
    with pytest.raises(InputError) as err:
        parse_yaml(f"v: {text}\n", "r.yaml")
    assert "tag" in str(err.value) and err.value.line == 1


def test_merge_keys_are_ordinary_keys():
    # YAML 1.2 has no merge key: `<<` is an unknown recipe key, not a silent copy
    data, _ = parse_yaml("a: &a {x: 1}\nb: {<<: *a}\n")
    assert data["b"] == {"<<": {"x": 1}}
    with pytest.raises(InputError) as err:
        data, lines = parse_yaml(BASE.replace("size: {repeat: 2}", "size: {<<: {repeat: 2}}"),
                                 "r.yaml")
        parse_recipe(data, lines, "r.yaml")
    assert "size.<<" in str(err.value) and "unknown key" in str(err.value)


def test_name_is_text_as_written():
    for written in ("010", "1e3", "0x10", "true", "7", "1.50"):
        data, lines = parse_yaml(BASE.replace("name: x", f"name: {written}"))
        assert parse_recipe(data, lines).name == written
    # only the top-level name: other keys keep their types
    data, _ = parse_yaml(BASE + "seed: 010\n")
    assert data["seed"] == 10


def test_numbers_in_exponent_form_reach_the_recipe():
    text = BASE.replace("a: 3.615", "a: 3.615e0") + "defects:\n  vacancies: {fraction: 5e-3}\n"
    recipe = parse_recipe(*parse_yaml(text))
    assert recipe.crystal.a == 3.615 and recipe.defects.vacancies[0].amount.fraction == 0.005


def test_on_keys_name_the_sites():
    text = BASE.replace("element: Cu", "element: Cu") + (
        "defects:\n"
        "  vacancies: {count: 2, on: Cu}\n"
        "  substitutions: [{element: Ni, count: 1, on: Cu}]\n")
    recipe = parse_recipe(*parse_yaml(text))
    assert recipe.defects.vacancies[0].on == "Cu" and recipe.defects.vacancies[0].amount.count == 2
    assert recipe.defects.substitutions[0].on == "Cu"


def test_element_symbols_that_were_booleans_are_elements():
    # "No" is nobelium and "Y" yttrium; YAML 1.1 read `No` as false
    data, _ = parse_yaml(BASE + "types: [Cu, No, Y]\n")
    assert parse_recipe(data).types == ("Cu", "No", "Y")


@pytest.mark.parametrize("key", ["true", "False", "TRUE"])
def test_boolean_keys_are_refused_in_one_sentence(key):
    with pytest.raises(InputError) as err:
        parse_yaml(BASE + f"checks:\n  {key}: 1\n", "r.yaml")
    text = str(err.value)
    assert "keys must be words" in text and "boolean" in text and key in text
    assert err.value.line == 5 and err.value.key == "checks" and "\n" not in text


def test_null_and_collection_keys_are_refused():
    for text in ("~: 1\n", "? [a]\n: 1\n", "? {a: 1}\n: 1\n"):
        with pytest.raises(InputError) as err:
            parse_yaml(text, "r.yaml")
        assert "keys must be" in str(err.value) and err.value.line == 1


def test_number_keys_keep_their_text():
    data, lines = parse_yaml("010: a\n1e3: b\n")
    assert data == {"010": "a", "1e3": "b"} and lines["1e3"] == 2


def test_lines_and_duplicates_survive():
    data, lines = parse_yaml(BASE + "defects:\n  substitutions:\n    - {element: Ni, count: 1}\n")
    assert lines["crystal"] == 2 and lines["defects.substitutions"] == 5
    assert lines["defects.substitutions[0].count"] == 6
    with pytest.raises(InputError) as err:
        parse_yaml(BASE + "seed: 1\nseed: 2\n", "r.yaml")
    assert "duplicate" in str(err.value) and err.value.line == 5
    # `on` and `true` were both True in YAML 1.1; now they are distinct keys (and
    # `true:` is refused), so `on:` twice is the duplicate
    with pytest.raises(InputError) as err:
        parse_yaml("v: {on: Cu, on: Ni}\n", "r.yaml")
    assert "duplicate" in str(err.value) and "v.on" in str(err.value)


# ----------------------------------------------------------------------------- YAML errors


@pytest.mark.parametrize("text,line", [
    ("a: [1, 2\n", 2), ("a: b: c\n", 1), ("a:\n\tb: 1\n", 2), ("- a\nb: 1\n", 2),
    ("a: *x\n", 1), ("a: &a 1\nb: &a 2\n", 2), ("a: 'x\n", 2), ('a: "\\q"\n', 1),
    ("a: 1\n---\nb: 2\n", 2), ("a: !x!y b\n", 1), ("a: @\n", 1), ("a: \x07\n", 1),
])
def test_yaml_errors_are_one_sentence_with_the_line(text, line):
    with pytest.raises(InputError) as err:
        parse_yaml(text, "r.yaml")
    message = str(err.value)
    assert message.startswith(f"r.yaml, line {line}: YAML error"), message
    assert "\n" not in message and message.endswith(".") and message.count(". ") == 0, message
    assert message.isprintable(), message
    # PyYAML's problem alone is sometimes a fragment; the message joins it to its context
    assert ": but " not in message and "second occurrence" not in message, message


# ----------------------------------------------------------------------------- the docs


def _yaml_blocks(text: str) -> list[str]:
    return re.findall(r"^```yaml\n(.*?)^```", text, re.S | re.M)


def test_readme_recipe_reference_and_sweep_blocks_load():
    blocks = _yaml_blocks(README.read_text(encoding="utf-8"))
    reference = [b for b in blocks if b.startswith("name: al-host-perfect")]
    sweeps = [b for b in blocks if "\nsweep:" in b]
    assert len(reference) == 1 and len(sweeps) == 1, blocks
    for block in blocks:
        parse_yaml(block, "README.md")  # every block is valid YAML by the core schema
    data, lines = parse_yaml(reference[0], "README.md")
    recipe = parse_recipe(data, lines, "README.md")
    # the values the block shows (README.md, "Recipe reference")
    assert recipe.crystal.a == 4.05 and recipe.size.repeat == (10, 10, 10)
    assert recipe.types == ("Al", "Mg", "Si", "H") and recipe.defects.vacancies[0].on == "Al"
    assert recipe.defects.substitutions[0].amount.fraction == 0.05
    assert recipe.checks.min_distance == 1.5 and recipe.checks.physical_spacing is True
    # the sweep block stands for "crystal, size, defects as usual": those of the reference
    sweep, sweep_lines = parse_yaml(sweeps[0], "README.md")
    merged = {**data, **sweep}
    points = expand(merged, {**lines, **sweep_lines}, "README.md")
    assert len(points) == 5 * 2 and points[0].name == "al-vac__seed-1__fraction-0.005"


@pytest.mark.parametrize("lattice", list(LATTICES))
def test_templates_load_as_text_with_their_commented_sections(lattice):
    text = template_for(lattice)
    recipe = parse_recipe(*parse_yaml(text, "template.yaml"), "template.yaml")
    assert recipe.crystal.lattice == lattice
    # the commented `defects:` and `checks:` sections, uncommented, are valid too
    tail = text[text.index("# defects:"):]
    uncommented = re.sub(r"^# ", "", tail, flags=re.M)
    recipe = parse_recipe(*parse_yaml(text + uncommented, "template.yaml"), "template.yaml")
    assert recipe.defects.vacancies[0].amount.count == 1
    assert recipe.defects.interstitials[0].element == "C"
    assert recipe.checks.min_distance == 1.0


def test_readme_compound_snippet_builds_as_yaml_text(cli, tmp_path):
    """The indented `crystal:` line of the README's compound paragraph, read as YAML
    text with a size added, builds and passes its audit."""
    text = README.read_text(encoding="utf-8")
    found = re.findall(r"^  ```yaml\n(  crystal: \{lattice: .*?)^  ```", text, re.S | re.M)
    assert len(found) == 1, found
    path = tmp_path / "compound.yaml"
    path.write_text("name: readme-compound\n" + re.sub(r"^  ", "", found[0], flags=re.M)
                    + "size: {repeat: 2}\n")
    result = cli("make", path, "--out", tmp_path / "out")
    assert result.exit_code == 0 and "all checks passed" in result.output, result.output


def test_readme_reference_commented_sections_load_and_build(tmp_path):
    """The reference block's commented calculation sections (kpoints, espresso, strain,
    displace, relax), uncommented as a user would, load as YAML text and build."""
    from cellbuild.pipeline import make

    blocks = _yaml_blocks(README.read_text(encoding="utf-8"))
    (reference,) = [b for b in blocks if b.startswith("name: al-host-perfect")]
    keys = ("kpoints", "espresso", "strain", "displace", "relax")
    lines = [ln[2:] if ln.startswith(tuple(f"# {k}:" for k in keys)) else ln
             for ln in reference.splitlines()]
    assert sum(ln.startswith(keys) for ln in lines) == len(keys)
    text = "\n".join(lines).replace("outputs: [lammps-data, cif, xyz, poscar]",
                                    "outputs: [espresso-in, kpoints, poscar]") + "\n"
    recipe = parse_recipe(*parse_yaml(text, "README.md"), "README.md")
    assert recipe.kpoints.spacing == 0.25 and recipe.espresso.ecutwfc == 45
    assert recipe.strain.volumetric == 0.02 and recipe.displace.rattle == 0.05
    assert recipe.relax.within == 6.0
    result = make(recipe, tmp_path, workers=1)
    assert set(result.outputs) == {"espresso-in", "kpoints", "poscar"}
    assert result.report["relax"]["free"] > 0 and result.report["strain"] is not None
