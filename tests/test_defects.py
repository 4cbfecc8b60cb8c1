"""Seeded point defects and the exact coordination audit.

References: ASE's neighbour list (reference library) for per-atom counts; the
vacancy and interstitial neighbour counts are geometry of the lattices (common
practice).
"""
from __future__ import annotations

import json
import math

import numpy as np
import pytest

from cellbuild.pipeline import build
from cellbuild.recipe import parse_recipe

from conftest import recipe_dict


def _ase_counts(structure, cutoff):
    from ase.neighborlist import neighbor_list

    i = neighbor_list("i", structure.to_ase(), cutoff)
    return np.bincount(i, minlength=structure.n_atoms)


def _built(lattice="fcc", a=3.615, repeat=(3, 3, 3), seed=7, **defects):
    data = recipe_dict("Cu", lattice, a, repeat, seed=seed, defects=defects)
    return build(parse_recipe(data))


ALL_KINDS = {
    "vacancies": {"fraction": 0.02},
    "substitutions": [{"element": "Ni", "fraction": 0.10}, {"element": "Mg", "count": 5}],
    "interstitials": [{"element": "C", "site": "octahedral", "count": 3}],
}


def test_same_seed_same_bytes_other_seed_differs(cli, recipe_file, tmp_path):
    data = recipe_dict("Cu", "fcc", 3.615, (4, 4, 4), seed=2026, defects=ALL_KINDS)
    path = recipe_file(data)
    assert cli("make", path, "--out", tmp_path / "a").exit_code == 0
    assert cli("make", path, "--out", tmp_path / "b").exit_code == 0
    names = sorted(p.name for p in (tmp_path / "a").iterdir())
    assert "cu-fcc.defects.json" in names
    for name in names:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    data["seed"] = 2027
    assert cli("make", recipe_file(data, "other.yaml"), "--out", tmp_path / "c").exit_code == 0
    assert (tmp_path / "a" / "cu-fcc.xyz").read_bytes() != (tmp_path / "c" / "cu-fcc.xyz").read_bytes()


def test_exact_counts_for_count_and_fraction():
    b = _built(repeat=(5, 5, 5), vacancies={"fraction": 0.01},
               substitutions=[{"element": "Ni", "fraction": 0.1}, {"element": "Mg", "count": 5}],
               interstitials=[{"element": "C", "site": "tetrahedral", "count": 4}])
    # 500 sites: 1 % -> 5 vacancies, 10 % -> 50 Ni, 5 Mg, 4 C
    assert b.structure.composition() == {"Cu": 500 - 5 - 50 - 5, "Ni": 50, "Mg": 5, "C": 4}
    assert [p.count for p in b.placements] == [5, 50, 5, 4]


def test_fraction_rounds_half_up():
    # 108 sites * 0.125 = 13.5 -> 14 (nearest, halves up)
    b = _built(repeat=(3, 3, 3), vacancies={"fraction": 0.125})
    assert b.placements[0].count == 14


@pytest.mark.parametrize("lattice,site", [("fcc", "octahedral"), ("fcc", "tetrahedral"),
                                          ("bcc", "octahedral"), ("bcc", "tetrahedral"),
                                          ("sc", "cube-centre"), ("diamond", "tetrahedral")])
def test_coordination_matches_ase_neighbour_list_with_defects(cli, recipe_file, tmp_path,
                                                              lattice, site):
    defects = {"vacancies": {"count": 3}, "substitutions": [{"element": "Ni", "count": 4}],
               "interstitials": [{"element": "C", "site": site, "count": 2}]}
    data = recipe_dict("Cu", lattice, 3.6, (3, 3, 3), defects=defects)
    out = tmp_path / "out"
    result = cli("make", recipe_file(data), "--out", out)
    assert result.exit_code == 0, result.output
    report = json.loads((out / f"cu-{lattice}.report.json").read_text())
    b = build(parse_recipe(data))
    counts = _ase_counts(b.structure, report["coordination"]["cutoff"])
    expected_hist = {str(k): int(v) for k, v in enumerate(np.bincount(counts)) if v}
    assert report["coordination"]["histogram"] == expected_hist
    assert report["coordination"]["mismatched"] == 0
    coordination_check = next(c for c in report["checks"] if c["name"] == "coordination")
    assert coordination_check["passed"]


@pytest.mark.parametrize("lattice,first_shell", [("fcc", 12), ("bcc", 8)])
def test_single_vacancy_leaves_first_shell_one_short(lattice, first_shell):
    # common practice: a vacancy in fcc leaves 12 atoms with 11 neighbours, in bcc 8 with 7
    from cellbuild.audit import expected_coordination

    b = _built(lattice=lattice, repeat=(4, 4, 4), vacancies={"count": 1})
    from cellbuild.lattices import shells

    counts = _ase_counts(b.structure, shells(lattice).audit_cutoff * 3.615)
    assert np.count_nonzero(counts == first_shell - 1) == first_shell
    assert np.count_nonzero(counts != first_shell) == first_shell
    np.testing.assert_array_equal(expected_coordination(b.structure, b.plan.crystal, (4, 4, 4)), counts)


def _host_distances(b):
    from ase.geometry import get_distances

    s = b.structure
    interstitial = s.positions[-1:]
    _, d = get_distances(interstitial, s.positions[:-1], cell=s.cell, pbc=True)
    return np.sort(d.ravel())


@pytest.mark.parametrize("gather", [True, False], ids=["table", "shifts"])
@pytest.mark.parametrize("lattice,site", [("fcc", "octahedral"), ("bcc", "tetrahedral"),
                                          ("diamond", "tetrahedral")])
def test_expected_coordination_by_table_and_by_shifts_match_ase(lattice, site, gather,
                                                                  monkeypatch):
    """Both routes of the topology count (a neighbour table gathered for small
    supercells, shifted occupancy grids for large ones) give, around vacancies,
    substitutions and interstitials, what ASE's neighbour list counts within the
    audit cutoff (reference library)."""
    from cellbuild import audit

    audit._neighbour_sites.cache_clear()
    if not gather:
        monkeypatch.setattr(audit, "_TABLE_ENTRIES", 0)
    try:
        # lattice constants (Angstrom, from memory): Si 5.43, Cu 3.615 (Kittel); the
        # check itself is ASE's count, whatever the constant
        b = _built(lattice=lattice, a=5.43 if lattice == "diamond" else 3.615, repeat=(3, 4, 2),
                   vacancies={"count": 3}, substitutions=[{"element": "Ni", "count": 4}],
                   interstitials=[{"element": "C", "site": site, "count": 2}])
        crystal = b.plan.crystal
        assert (audit._neighbour_sites(crystal, (3, 4, 2)) is not None) == gather
        counts = _ase_counts(b.structure, crystal.audit_cutoff)
        np.testing.assert_array_equal(
            audit.expected_coordination(b.structure, crystal, (3, 4, 2)), counts)
    finally:
        audit._neighbour_sites.cache_clear()


def test_octahedral_interstitial_geometry_fcc():
    # geometry (common practice): an octahedral site in fcc is a/2 from 6 host atoms
    a = 3.615
    b = _built(repeat=(3, 3, 3), a=a, interstitials=[{"element": "C", "site": "octahedral", "count": 1}])
    d = _host_distances(b)
    np.testing.assert_allclose(d[:6], a / 2, rtol=1e-12)
    assert d[6] > a / 2 + 0.1


def test_octahedral_interstitial_geometry_bcc():
    # geometry (common practice): an octahedral site in bcc is a/2 from 2 atoms and a/sqrt2 from 4
    a = 2.87
    b = _built(lattice="bcc", a=a, repeat=(4, 4, 4),
               interstitials=[{"element": "C", "site": "octahedral", "count": 1}])
    d = _host_distances(b)
    np.testing.assert_allclose(d[:2], a / 2, rtol=1e-12)
    np.testing.assert_allclose(d[2:6], a / math.sqrt(2), rtol=1e-12)
    assert d[6] > a / math.sqrt(2) + 0.1


def test_defects_never_share_a_site():
    b = _built(repeat=(3, 3, 3), vacancies={"fraction": 0.3},
               substitutions=[{"element": "Ni", "fraction": 0.3}, {"element": "Mg", "fraction": 0.3}])
    ids = np.concatenate([p.site_ids for p in b.placements])
    assert len(np.unique(ids)) == len(ids)


def test_min_separation_is_kept():
    from ase.geometry import get_distances

    from cellbuild.build import site_positions

    b = _built(repeat=(6, 6, 6), vacancies={"count": 10},
               substitutions=[{"element": "Ni", "count": 20}], min_separation=5.0,
               interstitials=[{"element": "C", "site": "octahedral", "count": 5}])
    pos = np.concatenate([site_positions(b.plan.crystal, (6, 6, 6), p.site_ids) for p in b.placements])
    _, d = get_distances(pos, cell=b.structure.cell, pbc=True)
    d[np.diag_indices_from(d)] = np.inf
    assert d.min() >= 5.0


def test_types_fix_the_lammps_type_map(cli, recipe_file, tmp_path):
    from ase.io import read

    data = recipe_dict("Cu", "fcc", 3.615, (2, 2, 2), types=["Ni", "Cu", "Ag"],
                       defects={"substitutions": [{"element": "Ni", "count": 2}]})
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    text = (out / "cu-fcc.lmp").read_text()
    assert "3 atom types" in text
    atoms = read(out / "cu-fcc.lmp", format="lammps-data", atom_style="atomic")
    types = atoms.get_array("type") if "type" in atoms.arrays else atoms.numbers
    assert np.count_nonzero(types == 1) == 2 and np.count_nonzero(types == 2) == 30


def test_default_type_order_host_substituents_interstitials(cli, recipe_file, tmp_path):
    data = recipe_dict("Fe", "bcc", 2.87, (3, 3, 3), defects={
        "interstitials": [{"element": "C", "site": "octahedral", "count": 1}],
        "substitutions": [{"element": "Cr", "count": 3}]})
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    report = json.loads((out / "fe-bcc.report.json").read_text())
    assert report["types"] == ["Fe", "Cr", "C"]


@pytest.mark.parametrize("defects,key", [
    ({"vacancies": {"count": 200}}, "defects.vacancies.count"),
    ({"vacancies": {"fraction": 0.6}, "substitutions": [{"element": "Ni", "fraction": 0.6}]},
     "defects.substitutions[0].fraction"),
    ({"interstitials": [{"element": "C", "site": "cube-centre", "count": 1}]},
     "defects.interstitials[0].site"),
    ({"vacancies": {"count": 40}, "min_separation": 6.0}, "defects.min_separation"),
    ({"vacancies": {"count": 1, "on": "Ni"}}, "defects.vacancies.on"),
    ({"vacancies": {"fraction": 1.5}}, "defects.vacancies.fraction"),
])
def test_impossible_requests_exit_2_and_write_nothing(cli, recipe_file, tmp_path, defects, key):
    data = recipe_dict("Cu", "fcc", 3.615, (3, 3, 3), defects=defects)
    out = tmp_path / "out"
    result = cli("make", recipe_file(data), "--out", out)
    assert result.exit_code == 2
    assert key in result.output
    assert not out.exists()


def test_defect_sites_sidecar_finds_the_defects(cli, recipe_file, tmp_path):
    from ase.io import read

    data = recipe_dict("Cu", "fcc", 3.615, (3, 3, 3), defects=ALL_KINDS)
    out = tmp_path / "out"
    assert cli("make", recipe_file(data), "--out", out).exit_code == 0
    sites = json.loads((out / "cu-fcc.defects.json").read_text())
    atoms = read(out / "cu-fcc.xyz", format="extxyz")
    symbols = np.array(atoms.get_chemical_symbols())
    for entry in sites["defects"]:
        if entry["kind"] in ("substitution", "interstitial"):
            ids = np.array(entry["atom_ids"]) - 1
            assert set(symbols[ids]) == {entry["element"]}
        if entry["kind"] == "interstitial":
            np.testing.assert_allclose(atoms.positions[ids], entry["positions"], atol=1e-8)
