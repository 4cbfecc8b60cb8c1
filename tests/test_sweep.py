"""Sweeps: expansion count and order, point names, key validation, `plan` and `make`."""
from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from cellbuild.errors import InputError
from cellbuild.recipe import NAME_PATTERN, parse_yaml
from cellbuild.sweep import MAX_POINTS, expand, render

from conftest import recipe_dict

SWEPT = """\
name: cu-vac
crystal: {element: Cu, lattice: fcc, a: 3.615}
size: {repeat: [2, 2, 2]}
sweep:                          # cartesian product
  seed: [1, 2, 3, 4, 5]
  defects.vacancies.fraction: [0.005, 0.01]
"""


def _expand(text: str, file: str = "r.yaml"):
    data, lines = parse_yaml(text, file)
    return expand(data, lines, file)


def _with_sweep(sweep_lines: str, base: str = SWEPT) -> str:
    return base.split("sweep:")[0] + "sweep:\n" + sweep_lines


def _error(text: str) -> str:
    with pytest.raises(InputError) as info:
        _expand(text)
    return str(info.value)


def test_cartesian_product_count_order_and_names():
    points = _expand(SWEPT)
    assert len(points) == 10
    names = [p.name for p in points]
    assert len(set(names)) == 10
    # the last key varies fastest
    assert names[:3] == ["cu-vac__seed-1__fraction-0.005", "cu-vac__seed-1__fraction-0.01",
                         "cu-vac__seed-2__fraction-0.005"]
    first = points[0]
    assert first.values == {"seed": 1, "defects.vacancies.fraction": 0.005}
    assert first.recipe.name == first.name and first.recipe.seed == 1
    assert first.recipe.defects.vacancies[0].amount.fraction == 0.005
    assert "sweep" not in first.data
    assert all(NAME_PATTERN.match(n) for n in names)


def test_expansion_is_deterministic_and_leaves_the_input_alone():
    data, lines = parse_yaml(SWEPT)
    before = json.dumps(data, sort_keys=True)
    a = [p.name for p in expand(data, lines)]
    b = [p.name for p in expand(data, lines)]
    assert a == b
    assert json.dumps(data, sort_keys=True) == before


def test_a_recipe_without_sweep_is_one_point():
    points = _expand(SWEPT.split("sweep:")[0])
    assert [p.name for p in points] == ["cu-vac"] and points[0].values == {}


def test_shared_leaf_names_get_longer_unique_labels():
    base = SWEPT.split("sweep:")[0] + "defects:\n  substitutions:\n    - {element: Ni, count: 1}\n"
    points = _expand(_with_sweep("  defects.vacancies.count: [1, 2]\n"
                                 "  defects.substitutions.0.count: [3]\n", base))
    assert [p.name for p in points] == [
        "cu-vac__vacancies.count-1__substitutions.0.count-3",
        "cu-vac__vacancies.count-2__substitutions.0.count-3"]
    assert points[1].recipe.defects.substitutions[0].amount.count == 3


def test_list_item_keys_and_list_values():
    base = SWEPT.split("sweep:")[0] + "defects:\n  substitutions:\n    - {element: Ni, fraction: 0.1}\n"
    points = _expand(_with_sweep("  defects.substitutions[0].element: [Ni, Ag]\n"
                                 "  size.repeat: [[2, 2, 3], 1]\n", base))
    assert [p.name for p in points] == ["cu-vac__element-Ni__repeat-2x2x3", "cu-vac__element-Ni__repeat-1",
                                        "cu-vac__element-Ag__repeat-2x2x3", "cu-vac__element-Ag__repeat-1"]
    assert points[2].recipe.defects.substitutions[0].element == "Ag"
    assert points[0].recipe.size.repeat == (2, 2, 3)


@pytest.mark.parametrize("sweep, words", [
    ("  defects.vacancy.fraction: [0.01]\n", ["sweep.defects.vacancy.fraction", "not a recipe key",
                                             "vacancies"]),
    ("  crystal.colour: [red]\n", ["sweep.crystal.colour", "not a recipe key"]),
    ("  crystal.a.b: [1]\n", ["sweep.crystal.a.b", "holds a value"]),
    ("  name: [a, b]\n", ["sweep.name", "cannot be swept"]),
    ("  seed: []\n", ["sweep.seed", "non-empty list"]),
    ("  seed: 3\n", ["sweep.seed", "non-empty list"]),
    ("  seed: [1, 1]\n", ["same name", "cu-vac__seed-1"]),
    ("  defects.substitutions.0.fraction: [0.1]\n", ["sweep.defects.substitutions.0.fraction",
                                                     "item 0", "0 item"]),
    ("  defects.substitutions.first: [1]\n", ["`first` is not a position"]),
    ("  defects.vacancies.fraction: [0.01, 2.0]\n", ["`defects.vacancies.fraction` = 2.0",
                                                     "between 0 and 1",
                                                     "cu-vac__fraction-2.0"]),
])
def test_bad_sweeps_are_refused_naming_the_key(sweep, words):
    message = _error(_with_sweep(sweep))
    assert message.startswith("r.yaml, line ")
    for word in words:
        assert word in message, message


def test_a_bad_point_is_located_at_its_value_in_the_sweep():
    message = _error(_with_sweep("  defects.vacancies.fraction:\n    - 0.01\n    - -1.0\n"))
    assert message.startswith("r.yaml, line 7:"), message


def test_overlapping_keys_and_absurd_products_are_refused():
    assert "overlaps" in _error(_with_sweep("  size.repeat: [2]\n  size: [{repeat: 2}]\n"))
    big = int(MAX_POINTS ** 0.5) + 1
    message = _error(_with_sweep(f"  seed: {list(range(big))}\n  crystal.a: "
                                 f"{[3.6 + i / 1e4 for i in range(big)]}\n"))
    assert "more than the 100,000 allowed" in message


def test_too_long_names_are_refused():
    text = SWEPT.replace("name: cu-vac", "name: " + "c" * 190)
    assert "longer than 200 characters" in _error(text)


@settings(max_examples=40, deadline=None)
@given(st.lists(st.one_of(st.integers(0, 2**62), st.floats(0.0, 1.0), st.text(max_size=8)),
                min_size=1, max_size=6, unique_by=lambda v: (type(v), v)))
def test_rendered_values_are_name_safe(values):
    for v in values:
        assert NAME_PATTERN.match(f"x-{render(v)}")


def test_plan_lists_every_sweep_point(cli, recipe_file):
    path = recipe_file(SWEPT)
    result = cli("plan", path, "--json")
    assert result.exit_code == 0, result.output
    plans = json.loads(result.output)
    assert len(plans) == 10
    assert plans[0]["name"] == "cu-vac__seed-1__fraction-0.005"
    assert plans[0]["sweep"] == {"seed": 1, "defects.vacancies.fraction": 0.005}
    assert plans[1]["n_atoms"] == 32 - round(32 * 0.01)
    text = cli("plan", path).output
    assert text.count("cu-vac__seed-") == 10


def test_make_builds_every_sweep_point(cli, recipe_file, tmp_path):
    data = recipe_dict(outputs=["xyz"], sweep={"seed": [1, 2], "size.repeat": [1, 2]})
    result = cli("make", recipe_file(data), "--out", tmp_path / "out")
    assert result.exit_code == 0, result.output
    names = sorted(p.name for p in (tmp_path / "out").glob("*.xyz"))
    assert names == ["cu-fcc__seed-1__repeat-1.xyz", "cu-fcc__seed-1__repeat-2.xyz",
                     "cu-fcc__seed-2__repeat-1.xyz", "cu-fcc__seed-2__repeat-2.xyz"]


def test_make_refuses_a_bad_sweep_in_one_sentence(cli, recipe_file, tmp_path):
    data = recipe_dict(sweep={"crystal.lattice_constant": [3.6]})
    result = cli("make", recipe_file(data), "--out", tmp_path / "out")
    assert result.exit_code == 2
    assert "sweep.crystal.lattice_constant" in result.output
    assert "Traceback" not in result.output and not (tmp_path / "out").exists()


def test_a_large_sweep_expands_in_linear_time():
    # 20,000 points: copying the key -> line table for every point (as before) made
    # this quadratic, about three minutes here; shared, it takes under a second
    import time

    text = SWEPT.split("sweep:")[0] + "sweep:\n  seed: [" + ", ".join(map(str, range(20_000))) + "]\n"
    start = time.perf_counter()
    points = _expand(text)
    assert time.perf_counter() - start < 15.0
    assert len(points) == 20_000 and points[-1].recipe.seed == 19_999
    assert points[-1].name == "cu-vac__seed-19999"


def test_a_swept_point_is_located_at_its_value_and_its_replaced_keys_lose_theirs():
    base = SWEPT.split("sweep:")[0] + "defects:\n  vacancies: {count: 1}\n"
    text = base + "sweep:\n  defects.vacancies: [{count: 1}, {count: -1}]\n"
    message = _error(text)
    # the bad value is in the sweep list on line 7 (the `defects` lines 4-5 no longer apply)
    assert message.startswith("r.yaml, line 7:") and "defects.vacancies.count" in message, message
