"""Arrangements with a target short-range order (`defects.arrangement`), judged by
the report's Warren-Cowley alphas, which the audit counts independently of the
search (J. M. Cowley, Phys. Rev. 77, 669 (1950)); the quasirandom target is the
special quasirandom structure method (Zunger, Wei, Ferreira, Bernard, Phys. Rev.
Lett. 65, 353 (1990)). Cell sizes and thresholds are those the issue names.
"""
from __future__ import annotations

import json

import pytest

FCC = {"element": "Cu", "lattice": "fcc", "a": 3.6}


def _make(cli, recipe_file, tmp_path, crystal, repeat, subs, arrangement, name="x", **extra):
    data = {"name": name, "crystal": crystal, "size": {"repeat": repeat}, "seed": 5,
            "outputs": ["xyz"], "defects": {"substitutions": subs, "arrangement": arrangement},
            **extra}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    path = out / f"{name}.report.json"
    return result, (json.loads(path.read_text()) if path.exists() else None)


def test_equiatomic_32_atom_cell_is_quasirandom(cli, recipe_file, tmp_path):
    result, report = _make(cli, recipe_file, tmp_path, FCC, 2, [{"element": "Au", "count": 16}],
                           {"target": "quasirandom", "shells": 2})
    assert result.exit_code == 0 and report["passed"], result.output
    a1, a2, _ = report["short_range_order"]["A"]["alpha"]["Cu-Au"]
    assert abs(a1) <= 0.05 and abs(a2) <= 0.05
    facts = report["arrangement"]
    assert facts["objective"] <= facts["random_objective"] and facts["steps"] >= 1
    assert report["composition"] == {"Cu": 16, "Au": 16}


def test_five_component_80_atom_cell(cli, recipe_file, tmp_path):
    subs = [{"element": e, "count": 16} for e in ("Ni", "Co", "Fe", "Cr")]
    result, report = _make(cli, recipe_file, tmp_path, FCC, [2, 2, 5], subs,
                           {"target": "quasirandom", "shells": 1, "steps": 400000})
    assert result.exit_code == 0 and report["passed"], result.output
    alphas = report["short_range_order"]["A"]["alpha"]
    unlike = {k: v for k, v in alphas.items() if k.split("-")[0] != k.split("-")[1]}
    assert len(unlike) == 10 and all(abs(v[0]) <= 0.05 for v in unlike.values()), unlike


def test_an_ordering_target_is_reached(cli, recipe_file, tmp_path):
    result, report = _make(cli, recipe_file, tmp_path, FCC, 3, [{"element": "Au", "count": 54}],
                           {"target": {1: -0.2}, "shells": 1, "steps": 300000})
    assert result.exit_code == 0 and report["passed"], result.output
    a1 = report["short_range_order"]["A"]["alpha"]["Cu-Au"][0]
    assert a1 == pytest.approx(-0.2, abs=0.05)


def test_rock_salt_cations_arranged_and_oxygen_untouched(cli, recipe_file, tmp_path):
    rocksalt = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.2}
    subs = [{"element": e, "count": 16, "on": "A"} for e in ("Co", "Ni", "Cu", "Zn")]
    result, report = _make(cli, recipe_file, tmp_path, rocksalt, [2, 2, 5], subs,
                           {"target": "quasirandom", "shells": 1, "steps": 300000})
    assert result.exit_code == 0 and report["passed"], result.output
    assert report["sublattices"]["B"] == {"O": 80}
    assert set(report["short_range_order"]) == {"A"}
    assert report["arrangement"]["sublattice"] == "A"
    alphas = report["short_range_order"]["A"]["alpha"]
    assert all(abs(v[0]) <= 0.05 for k, v in alphas.items() if k.split("-")[0] != k.split("-")[1])


def test_the_same_recipe_and_seed_give_the_same_bytes(cli, recipe_file, tmp_path):
    args = (FCC, 2, [{"element": "Au", "count": 12}], {"shells": 3, "steps": 5000})
    first = _make(cli, recipe_file, tmp_path / "a", *args)[1]
    second = _make(cli, recipe_file, tmp_path / "b", *args)[1]
    assert first["outputs"]["xyz"]["sha256"] == second["outputs"]["xyz"]["sha256"]
    assert first["arrangement"] == second["arrangement"]


@pytest.mark.parametrize("subs,arrangement,key", [
    ([], {"target": "quasirandom"}, "defects.arrangement"),
    ([{"element": "Au", "count": 4}], {"target": "random"}, "defects.arrangement.target"),
    ([{"element": "Au", "count": 4}], {"shells": 4}, "defects.arrangement.shells"),
    ([{"element": "Au", "count": 4}], {"target": {3: 0.1}, "shells": 2}, "defects.arrangement.shells"),
    ([{"element": "Au", "count": 4}], {"steps": 0}, "defects.arrangement.steps"),
    ([{"element": "Au", "count": 4}], {"weights": [1, 2]}, "defects.arrangement.weights"),
    ([{"element": "Au", "count": 4}], {"temperature": 3}, "defects.arrangement.temperature"),
])
def test_bad_arrangements_exit_2_in_one_sentence(cli, recipe_file, tmp_path, subs, arrangement,
                                                 key):
    result, _ = _make(cli, recipe_file, tmp_path, FCC, 2, subs, arrangement)
    assert result.exit_code == 2, result.output
    assert f"`{key}" in result.output and len(result.output.strip().splitlines()) == 1, result.output


def test_substitutions_on_two_sublattices_cannot_be_arranged(cli, recipe_file, tmp_path):
    rocksalt = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.2}
    subs = [{"element": "Ni", "count": 2, "on": "A"}, {"element": "S", "count": 2, "on": "B"}]
    result, _ = _make(cli, recipe_file, tmp_path, rocksalt, 2, subs, {"shells": 1})
    assert result.exit_code == 2 and "`defects.arrangement`" in result.output, result.output
