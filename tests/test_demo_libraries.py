"""The demo libraries, each recipe built with a passing audit and every output read
back by outside programs: ASE (all formats), pymatgen (CIF), spglib (the space
group the report gives) and LAMMPS (atom count and the sum of the charges).

recipes/oxides: MgO with Schottky defects, SrTiO3 with oxygen vacancies and
charges, GaAs with antisites, spinel MgAl2O4, hcp Ti with an octahedral
interstitial and rutile from a CIF. recipes/interfaces: a Cu(111) slab with
vacuum, a W box along [111] for a screw dislocation, a sqrt2 x sqrt2 x 2 MgO
cell from a matrix and a Sigma 5 (310)[001] tilt boundary in Cu. recipes/alloys:
quasirandom CuNi and five-component cells, a rock-salt high-entropy oxide, and
every distinct divacancy and solute pair of two small cells.
"""
from __future__ import annotations

from collections import Counter
from pathlib import Path

import pytest

from lammps_run import run_lammps

RECIPES = Path(__file__).resolve().parent.parent / "recipes"
READ_AS = {"cif": "cif", "xyz": "extxyz", "poscar": "vasp", "lammps-data": "lammps-data"}


def _points(folder: str):
    from cellbuild.sweep import expand_file

    return [point.recipe for path in sorted((RECIPES / folder).glob("*.yaml"))
            for point in expand_file(path)]


@pytest.fixture(scope="module", params=["oxides", "interfaces", "alloys"])
def built(request, tmp_path_factory):
    from cellbuild.pipeline import make

    out = tmp_path_factory.mktemp(request.param)
    results = [make(recipe, out, workers=1) for recipe in _points(request.param)]
    return out, {r.report["name"]: r.report for r in results}


def test_the_library_holds_each_material_and_every_audit_passes(built):
    _, reports = built
    lattices = Counter(r["lattice"] for r in reports.values())
    if "cuni-sqs" in reports:
        # every structure of the alloy library reports its short-range order
        assert all(r["short_range_order"] for r in reports.values())
        for study, sites in (("ni-divacancy", 108), ("alcu-pair", 32)):
            configs = [r["configuration"] for n, r in reports.items() if n.startswith(study)]
            # the multiplicities count every pair of sites once (combinatorics)
            assert sum(c["multiplicity"] for c in configs) == sites * (sites - 1) // 2
        heo = reports["heo-rocksalt"]
        assert heo["sublattices"]["B"] == {"O": 80} and set(heo["short_range_order"]) == {"A"}
        assert {r["arrangement"]["rank"] for n, r in reports.items() if n.startswith("cantor")} \
            == {1, 2}
    elif "mgo-schottky__count-1" in reports:
        assert {"rocksalt", "perovskite", "zincblende", "spinel", "hcp", "cif"} <= set(lattices)
    else:
        kinds = {("surface" if r["surface"] else "boundary" if r["grain_boundary"] else
                  "axes" if r["axes"] else "matrix" if r["matrix"] else "bulk")
                 for r in reports.values()}
        assert kinds == {"surface", "boundary", "axes", "matrix"}
    failed = {name: [c["name"] for c in r["checks"] if not c["passed"]]
              for name, r in reports.items() if not r["passed"]}
    assert not failed


def test_every_output_is_read_back_by_ase_with_the_reported_composition(built):
    import ase.io
    import spglib

    out, reports = built
    for name, report in reports.items():
        for key, entry in report["outputs"].items():
            path = out / entry["path"]
            kwargs = {}
            if key == "lammps-data":
                style = "charge" if report["charges"] else "atomic"
                kwargs = {"atom_style": style}
            atoms = ase.io.read(path, format=READ_AS[key], **kwargs)
            assert len(atoms) == report["n_atoms"], (name, key)
            if key == "lammps-data":  # types: counts in type order; charges per atom
                got = Counter(atoms.get_array("type").tolist())
                assert [got[t + 1] for t in range(len(report["types"]))] == \
                    [report["composition"].get(e, 0) for e in report["types"]]
                if report["charges"]:
                    assert atoms.get_initial_charges().sum() == pytest.approx(
                        report["net_charge"], abs=1e-8)
                continue
            assert dict(Counter(atoms.get_chemical_symbols())) == report["composition"], (name, key)
            vacancies = any(d["kind"] == "vacancy" for d in report["defects"])
            if report["space_group"]["number"] is not None and not vacancies:
                # without vacancies (which the report's spglib call marks as sites),
                # spglib on the atoms read back finds the report's space group
                codes = [report["types"].index(s) for s in atoms.get_chemical_symbols()]
                data = spglib.get_symmetry_dataset(
                    (atoms.cell[:], atoms.get_scaled_positions(), codes), symprec=1e-4)
                assert data.number == report["space_group"]["number"], (name, key)
            if key == "xyz" and report["charges"]:  # extended XYZ carries the charges
                assert atoms.get_initial_charges().sum() == pytest.approx(
                    report["net_charge"], abs=1e-8)


def test_pymatgen_reads_every_cif_with_the_reported_composition(built):
    import warnings

    from pymatgen.io.cif import CifParser

    out, reports = built
    for name, report in reports.items():
        if "cif" not in report["outputs"]:
            continue
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            structure = CifParser(str(out / report["outputs"]["cif"]["path"])).parse_structures(
                primitive=False)[0]
        got = {e.symbol: int(n) for e, n in structure.composition.items()}
        assert got == report["composition"], name
        assert structure.volume == pytest.approx(report["volume"], rel=1e-9)


def test_lammps_reads_every_data_file_with_its_charges(built, tmp_path):
    out, reports = built
    entries = [(name, r) for name, r in reports.items() if "lammps-data" in r["outputs"]]
    script = ""
    for i, (name, report) in enumerate(entries):
        style = "charge" if report["charges"] else "atomic"
        total = "c_total" if report["charges"] else "atoms"
        script += f"""clear
units metal
atom_style {style}
boundary p p p
read_data {out / report['outputs']['lammps-data']['path']}
pair_style zero 4.0
pair_coeff * *
{"compute q all property/atom q" if report["charges"] else ""}
{"compute total all reduce sum c_q" if report["charges"] else ""}
thermo_style custom step atoms {total}
thermo_modify format float %.10f
run 0
print "ENTRY {i} $(atoms) $({total}:%.10f)"
"""
    screen = run_lammps(script, tmp_path)
    found = {}
    for line in screen.splitlines():
        if line.startswith("ENTRY "):
            _, i, atoms, total = line.split()
            found[int(i)] = (int(atoms), float(total))
    assert len(found) == len(entries)
    for i, (name, report) in enumerate(entries):
        atoms, total = found[i]
        assert atoms == report["n_atoms"], name
        if report["charges"]:
            assert total == pytest.approx(report["net_charge"], abs=1e-6), name


def test_schottky_sweep_removes_whole_formula_units(tmp_path):
    from cellbuild.pipeline import make
    from cellbuild.sweep import expand_file

    reports = {p.name: make(p.recipe, tmp_path, workers=1).report
               for p in expand_file(RECIPES / "oxides" / "mgo-schottky.yaml")}
    for count in (1, 2):
        report = reports[f"mgo-schottky__count-{count}"]
        assert report["composition"] == {"Mg": 256 - count, "O": 256 - count}
        assert report["net_charge"] == 0.0
        # one Mg and one O vacancy per Schottky defect (MgO formula unit)
        assert [(d["key"], d["on"], d["placed"]) for d in report["defects"]] == [
            ("defects.schottky", "A", count), ("defects.schottky", "B", count)]
