"""`defects.placement: distinct`: every symmetry-inequivalent placement, one structure each.

Checked against combinatorics (the multiplicities of the configurations count every
placement once: C(n, 2) for two vacancies on n sites, n(n - 1) for two labelled
defects on one sublattice), textbook fcc geometry (12 first neighbours at a/sqrt2, 6
second at a: common practice) and the site counts of the interstitial sublattices
(fcc: 4 octahedral and 8 tetrahedral sites per conventional cell, textbook).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

A = 3.615
FCC = {"element": "Cu", "lattice": "fcc", "a": A}


def _make(cli, recipe_file, tmp_path, defects, crystal=FCC, repeat=3, name="d",
          outputs=("xyz",)):
    data = {"name": name, "crystal": crystal, "size": {"repeat": repeat}, "seed": 1,
            "outputs": list(outputs), "defects": {**defects, "placement": "distinct"}}
    out = tmp_path / "out"
    result = cli("make", recipe_file(data, f"{name}.yaml"), "--out", out)
    reports = sorted((json.loads(p.read_text()) for p in out.glob(f"{name}__config-*.report.json")),
                     key=lambda r: r["configuration"]["index"])
    return result, reports, out


def test_divacancies_count_every_site_pair_once(cli, recipe_file, tmp_path):
    result, reports, out = _make(cli, recipe_file, tmp_path, {"vacancies": {"count": 2}},
                                 outputs=("xyz", "lammps-data"))
    assert result.exit_code == 0, result.output
    n = 108  # 4 sites per conventional fcc cell, 27 cells
    facts = [r["configuration"] for r in reports]
    assert [f["index"] for f in facts] == list(range(1, len(facts) + 1))
    assert all(f["configurations"] == len(facts) for f in facts)
    assert sum(f["multiplicity"] for f in facts) == math.comb(n, 2) == facts[0]["placements"]
    # 48 point operations (m-3m) times 108 lattice translations of the supercell
    assert facts[0]["operations"] == 48 * n
    # compact first: nearest neighbours (12 at a/sqrt2), then second (6 at a)
    assert facts[0]["pair_distance"] == pytest.approx(A / 2 ** 0.5)
    assert facts[0]["multiplicity"] == n * 12 // 2
    assert facts[1]["pair_distance"] == pytest.approx(A)
    assert facts[1]["multiplicity"] == n * 6 // 2
    distances = [f["pair_distance"] for f in facts]
    assert len(set(np.round(distances, 6))) >= 8  # distinct shells up to the half box
    for r in reports:
        assert r["passed"] and r["n_atoms"] == n - 2
        holes = json.loads((out / f"{r['name']}.defects.json").read_text())["defects"][0]
        gap = np.subtract(*holes["positions"])
        gap -= 3 * A * np.round(gap / (3 * A))
        assert np.linalg.norm(gap) == pytest.approx(r["configuration"]["pair_distance"], abs=1e-6)
    assert len({r["outputs"]["xyz"]["sha256"] for r in reports}) == len(reports)


@pytest.mark.parametrize("crystal,defects,n", [
    # one substitution on the 32 equivalent A sites of 2 x 2 x 2 rock salt
    ({"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212},
     {"substitutions": [{"element": "Ni", "count": 1, "on": "A"}]}, 32),
    # one interstitial on the octahedral sites (4 per fcc cell) and tetrahedral (8)
    (FCC, {"interstitials": [{"element": "H", "site": "octahedral", "count": 1}]}, 32),
    (FCC, {"interstitials": [{"element": "H", "site": "tetrahedral", "count": 1}]}, 64),
])
def test_one_defect_on_equivalent_sites_is_one_configuration(cli, recipe_file, tmp_path,
                                                             crystal, defects, n):
    result, reports, _ = _make(cli, recipe_file, tmp_path, defects, crystal=crystal, repeat=2)
    assert result.exit_code == 0, result.output
    assert len(reports) == 1
    facts = reports[0]["configuration"]
    assert (facts["configurations"], facts["multiplicity"], facts["placements"]) == (1, n, n)
    assert facts["pair_distance"] is None


@pytest.mark.parametrize("vacancy_on,placements", [("A", 32 * 31), ("B", 32 * 32)])
def test_labelled_defects_in_a_compound(cli, recipe_file, tmp_path, vacancy_on, placements):
    """A Ni on a Mg site and a vacancy on a Mg site (ordered pairs of distinct sites) or on
    an O site (any pair): rock salt 2 x 2 x 2, 32 sites per sublattice."""
    rocksalt = {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212}
    defects = {"vacancies": {"count": 1, "on": vacancy_on},
               "substitutions": [{"element": "Ni", "count": 1, "on": "A"}]}
    result, reports, _ = _make(cli, recipe_file, tmp_path, defects, crystal=rocksalt, repeat=2)
    assert result.exit_code == 0, result.output
    assert sum(r["configuration"]["multiplicity"] for r in reports) == placements
    assert all(r["composition"]["Ni"] == 1 for r in reports)
    # the Ni-vacancy distances found are rock-salt distances: on one sublattice a/sqrt2
    # first; across sublattices a/2 first (cation-anion contact)
    first = reports[0]["configuration"]["pair_distance"]
    assert first == pytest.approx(4.212 / 2 ** 0.5 if vacancy_on == "A" else 4.212 / 2)


def test_a_library_holds_a_whole_divacancy_study(cli, recipe_file, tmp_path):
    lib = tmp_path / "lib"
    lib.mkdir()
    (lib / "dv.yaml").write_text(
        "name: dv\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\nsize: {repeat: 2}\n"
        "outputs: [xyz]\ndefects: {vacancies: {count: 2}, placement: distinct}\n")
    out = tmp_path / "built"
    result = cli("batch", lib, "--out", out, "--workers", "1")
    assert result.exit_code == 0, result.output
    manifest = json.loads((out / "manifest.json").read_text())
    names = sorted(e["name"] for e in manifest["structures"])
    reports = [json.loads((out / f"{n}.report.json").read_text()) for n in names]
    assert names[0].startswith("dv__config-")
    assert sum(r["configuration"]["multiplicity"] for r in reports) == math.comb(32, 2)
    assert cli("verify", out).exit_code == 0


def test_too_many_placements_are_refused_with_the_number(cli, recipe_file, tmp_path):
    result, reports, out = _make(cli, recipe_file, tmp_path, {"vacancies": {"count": 3}},
                                 repeat=5)
    assert result.exit_code == 2, result.output
    assert f"{math.comb(500, 3):,} placements" in result.output and "`defects.placement`" in \
        result.output
    assert len(result.output.strip().splitlines()) == 1 and not out.exists()


def test_too_large_a_supercell_is_refused(cli, recipe_file, tmp_path):
    result, reports, out = _make(cli, recipe_file, tmp_path, {"vacancies": {"count": 1}},
                                 repeat=6)
    assert result.exit_code == 2 and "864" in result.output and not out.exists(), \
        result.output


@pytest.mark.parametrize("defects,key", [
    ({"placement": "all", "vacancies": {"count": 1}}, "defects.placement"),
    ({"placement": "distinct", "vacancies": {"count": 1}, "min_separation": 3.0},
     "defects.placement"),
    ({"placement": "distinct", "substitutions": [{"element": "Ni", "count": 1}],
      "arrangement": {"shells": 1}}, "defects.placement"),
    ({"placement": "distinct"}, "defects.placement"),
])
def test_bad_placements_exit_2_in_one_sentence(cli, recipe_file, tmp_path, defects, key):
    data = {"name": "b", "crystal": FCC, "size": {"repeat": 2}, "defects": defects}
    result = cli("make", recipe_file(data, "b.yaml"), "--out", tmp_path / "out")
    assert result.exit_code == 2, result.output
    assert f"`{key}`" in result.output and len(result.output.strip().splitlines()) == 1, \
        result.output


def test_the_python_api_asks_for_a_variant(tmp_path):
    from cellbuild.errors import InputError
    from cellbuild.pipeline import make
    from cellbuild.recipe import parse_recipe
    from cellbuild.variants import variants_of

    recipe = parse_recipe({"name": "p", "crystal": FCC, "size": {"repeat": 2},
                           "defects": {"vacancies": {"count": 2}, "placement": "distinct"}})
    with pytest.raises(InputError, match="stands for"):
        make(recipe, tmp_path)
    variants = variants_of(recipe)
    assert [v.name for v in variants[:2]] == ["p__config-1", "p__config-2"]
    result = make(variants[0], tmp_path)
    assert result.report["configuration"]["pair_distance"] == pytest.approx(A / 2 ** 0.5)


def test_a_first_neighbour_divacancy_shows_in_the_vacancy_alphas(cli, recipe_file, tmp_path):
    """Counted by hand for 108 fcc sites (12 first neighbours each, common practice):
    the two vacant sites neighbour each other, so P_1(Va | Va) = 1/12 with c_Va = 2/108,
    alpha_1(Va, Va) = 1 - 4.5 = -3.5; the 22 Ni-Va bonds over 106 x 12 Ni neighbour
    sites give alpha_1(Ni, Va) = 1 - (22 / 1272) / (2 / 108) (Cowley 1950 definition)."""
    result, reports, _ = _make(cli, recipe_file, tmp_path, {"vacancies": {"count": 2}})
    assert result.exit_code == 0, result.output
    order = reports[0]["short_range_order"]["A"]
    assert order["alpha"] == {"Cu-Cu": [0.0, 0.0, 0.0]}  # one species: nothing to order
    vac = order["vacancies"]
    assert vac["concentration"]["Va"] == pytest.approx(2 / 108)
    assert vac["alpha"]["Va-Va"][0] == pytest.approx(-3.5)
    assert vac["alpha"]["Cu-Va"][0] == pytest.approx(1 - (22 / 1272) / (2 / 108))
    # the second-neighbour divacancy: no Va-Va first neighbours (alpha_1 = 1)
    assert reports[1]["short_range_order"]["A"]["vacancies"]["alpha"]["Va-Va"][0] == 1.0
