"""`cellbuild batch` and `cellbuild verify`: a folder of recipes built in parallel,
its manifest, the JUnit report, and the checks a CI job relies on."""
from __future__ import annotations

import hashlib
import json
import shutil
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
import yaml

from conftest import recipe_dict

REPO = Path(__file__).resolve().parents[1]


def _write(path: Path, data) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(data if isinstance(data, str) else yaml.safe_dump(data, sort_keys=False))
    return path


def _library(root: Path) -> Path:
    """A tiny library: one plain recipe, a 2 x 2 sweep in a subfolder, one deeper."""
    lib = root / "lib"
    _write(lib / "cu.yaml", recipe_dict(outputs=["xyz", "cif"]))
    _write(lib / "vac" / "swept.yml", recipe_dict(
        outputs=["lammps-data"], defects={"vacancies": {"count": 1}},
        sweep={"seed": [1, 2], "defects.vacancies.count": [1, 2]}) | {"name": "cu-vac"})
    _write(lib / "vac" / "w" / "w.yaml", recipe_dict("W", "bcc", 3.165, outputs=["poscar"]))
    return lib


N_STRUCTURES = 6  # 1 + 2 * 2 + 1


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A library built once (2 workers) for the tests that only read or copy it."""
    from typer.testing import CliRunner

    from cellbuild.cli import app

    root = tmp_path_factory.mktemp("built")
    lib = _library(root)
    result = CliRunner().invoke(app, ["batch", str(lib), "--out", str(root / "out"),
                                      "--workers", "2", "--junit", str(root / "junit.xml")],
                                catch_exceptions=False)
    assert result.exit_code == 0, result.output
    return root, result.output


@pytest.fixture
def copy_of(built, tmp_path):
    """A private copy of the built library (recipes and outputs, same relative layout)."""
    root, _ = built
    shutil.copytree(root / "lib", tmp_path / "lib")
    shutil.copytree(root / "out", tmp_path / "out")
    return tmp_path


def _manifest(out: Path) -> dict:
    return json.loads((out / "manifest.json").read_text())


def test_batch_mirrors_folders_and_writes_the_manifest(built):
    root, output = built
    out = root / "out"
    files = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert "vac/cu-vac__seed-1__count-2.lmp" in files
    assert "vac/cu-vac__seed-1__count-2.defects.json" in files
    assert "vac/w/w-bcc.vasp" in files and "cu-fcc.cif" in files
    manifest = _manifest(out)
    assert manifest["cellbuild"] and manifest["created"] and manifest["source"] == "../lib"
    entries = manifest["structures"]
    assert [e["name"] for e in entries] == sorted(e["name"] for e in entries)
    assert len(entries) == N_STRUCTURES
    by_name = {e["name"]: e for e in entries}
    swept = by_name["cu-vac__seed-2__count-1"]
    assert swept["recipe"] == "../lib/vac/swept.yml"
    assert swept["sweep"] == {"seed": 2, "defects.vacancies.count": 1}
    # fcc 2x2x2: 4 atoms per conventional cell (Kittel ch. 1) x 8 cells, less 1 vacancy
    assert swept["seed"] == 2 and swept["n_atoms"] == 31 and swept["passed"] is True
    assert "error" not in swept
    recipe_bytes = (root / "lib" / "vac" / "swept.yml").read_bytes()
    assert swept["recipe_sha256"] == hashlib.sha256(recipe_bytes).hexdigest()
    assert set(swept["outputs"]) == {"lammps-data", "report", "defects"}
    for entry in entries:
        for info in entry["outputs"].values():
            data = (out / info["path"]).read_bytes()
            assert hashlib.sha256(data).hexdigest() == info["sha256"]
            assert len(data) == info["bytes"]
    # not a terminal: one plain line per structure
    assert output.count(" atoms  passed") == N_STRUCTURES


def test_manifest_is_the_same_for_one_and_two_workers(built, cli, tmp_path):
    root, _ = built
    lib = shutil.copytree(root / "lib", tmp_path / "lib")
    for workers in ("1", "2"):
        result = cli("batch", lib, "--out", tmp_path / f"out{workers}", "--workers", workers)
        assert result.exit_code == 0, result.output
    one, two = _manifest(tmp_path / "out1"), _manifest(tmp_path / "out2")
    one.pop("created"), two.pop("created")
    assert one == two
    reference = _manifest(root / "out")
    reference.pop("created")
    assert one == reference


def test_verify_passes_on_a_fresh_build(built, cli):
    root, _ = built
    result = cli("verify", root / "out" / "manifest.json", "--workers", "1")
    assert result.exit_code == 0, result.output
    assert f"all {N_STRUCTURES} structure(s) match" in result.output


def _flip_one_byte(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("tamper, entry, words", [
    (lambda t: _flip_one_byte(t / "out/vac/cu-vac__seed-1__count-2.lmp"),
     "cu-vac__seed-1__count-2", ["changed on disk", "vac/cu-vac__seed-1__count-2.lmp"]),
    (lambda t: (t / "out/vac/w/w-bcc.vasp").unlink(),
     "w-bcc", ["missing", "vac/w/w-bcc.vasp"]),
    (lambda t: (t / "out/cu-fcc.report.json").unlink(),
     "cu-fcc", ["missing", "cu-fcc.report.json"]),
    (lambda t: _write(t / "lib/vac/w/w.yaml", recipe_dict("W", "bcc", 3.17, outputs=["poscar"])),
     "w-bcc", ["recipe changed", "../lib/vac/w/w.yaml", "changed vac/w/w-bcc.vasp"]),
    (lambda t: (t / "lib/cu.yaml").write_text((t / "lib/cu.yaml").read_text() + "# edited\n"),
     "cu-fcc", ["recipe changed", "in recipe_sha256"]),
    (lambda t: (t / "lib/cu.yaml").unlink(), "cu-fcc", ["recipe missing", "../lib/cu.yaml"]),
    (lambda t: (t / "out/vac/stray.xyz").write_text("1\n\nCu 0 0 0\n"),
     "vac/stray.xyz", ["extra"]),
])
def test_verify_fails_naming_the_entry(copy_of, cli, tamper, entry, words):
    tamper(copy_of)
    result = cli("verify", copy_of / "out" / "manifest.json", "--workers", "1")
    assert result.exit_code == 1, result.output
    lines = [line for line in result.output.splitlines() if line.startswith(f"{entry}: ")]
    assert lines, result.output
    for word in words:
        assert any(word in line for line in lines), (word, result.output)
    assert "difference(s)" in result.output
    # nothing else is reported for the untouched entries
    untouched = [e["name"] for e in _manifest(copy_of / "out")["structures"] if e["name"] != entry]
    assert not any(line.startswith(f"{name}: ") for name in untouched
                   for line in result.output.splitlines())


def test_verify_reports_changed_sweeps_and_new_recipes(copy_of, cli):
    swept = copy_of / "lib/vac/swept.yml"
    data = yaml.safe_load(swept.read_text())
    data["sweep"]["seed"] = [2, 3]
    _write(swept, data)
    _write(copy_of / "lib/new.yaml", recipe_dict(name="new"))
    result = cli("verify", copy_of / "out", "--workers", "2")
    assert result.exit_code == 1
    assert "cu-vac__seed-1__count-1: no longer produced" in result.output
    assert "cu-vac__seed-3__count-1: not in manifest" in result.output
    assert "../lib/new.yaml: new recipe" in result.output


def test_one_invalid_recipe_does_not_stop_the_others(tmp_path, cli):
    lib = _library(tmp_path)
    _write(lib / "vac" / "bad.yaml", recipe_dict(name="bad") | {"seeed": 3})
    _write(lib / "broken.yaml", "name: [unclosed\n")
    _write(lib / "toomany.yaml", recipe_dict(name="toomany", defects={"vacancies": {"count": 99}}))
    junit = tmp_path / "reports" / "junit.xml"
    result = cli("batch", lib, "--out", tmp_path / "out", "--workers", "2", "--junit", junit)
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output
    entries = {e["name"]: e for e in _manifest(tmp_path / "out")["structures"]}
    assert len(entries) == N_STRUCTURES + 3
    assert "`seeed` = 3: unknown key" in entries["bad"]["error"]
    assert entries["bad"]["error"].startswith("../lib/vac/bad.yaml, line ")
    assert entries["broken"]["error"].startswith("../lib/broken.yaml, line 2: YAML error")
    assert "toomany" in entries and entries["toomany"]["outputs"] == {}
    assert entries["toomany"]["passed"] is False
    good = [e for e in entries.values() if "error" not in e]
    assert len(good) == N_STRUCTURES and all(e["passed"] for e in good)
    assert (tmp_path / "out" / "vac" / "cu-vac__seed-2__count-2.lmp").is_file()
    assert "bad  ERROR  " in result.output and "lib/vac/bad.yaml, line" in result.output
    suite = ET.parse(junit).getroot()
    assert suite.get("tests") == str(N_STRUCTURES + 3) and suite.get("errors") == "3"
    assert len(suite.findall("testcase/error")) == 3
    # the manifest is trusted as it is: verify reproduces the same errors
    assert cli("verify", tmp_path / "out" / "manifest.json", "--workers", "1").exit_code == 0


def test_failed_checks_exit_1_and_show_in_junit(tmp_path, cli):
    lib = tmp_path / "lib"
    _write(lib / "ok.yaml", recipe_dict(name="ok", outputs=["xyz"]))
    # a threshold above the nearest-neighbour distance a/sqrt(2) = 2.556 A (fcc geometry,
    # Kittel ch. 1) fails `min_distance`; 32 atoms = 4 per cell x 2x2x2 cells
    _write(lib / "tight.yaml", recipe_dict(name="tight", outputs=["xyz"],
                                           checks={"min_distance": 3.0}))
    junit = tmp_path / "junit.xml"
    result = cli("batch", lib, "--out", tmp_path / "out", "--workers", "1", "--junit", junit)
    assert result.exit_code == 1, result.output
    assert "tight  32 atoms  FAILED (min_distance)" in result.output
    suite = ET.parse(junit).getroot()
    assert (suite.tag, suite.get("name")) == ("testsuite", "cellbuild")
    assert suite.get("tests") == "2" and suite.get("failures") == "1" and suite.get("errors") == "0"
    cases = {c.get("name"): c for c in suite.findall("testcase")}
    assert set(cases) == {"ok", "tight"}
    assert cases["tight"].get("classname").endswith("tight.yaml")
    failure = cases["tight"].find("failure")
    assert failure is not None and "min_distance" in failure.get("message")
    assert cases["ok"].find("failure") is None
    entry = {e["name"]: e for e in _manifest(tmp_path / "out")["structures"]}["tight"]
    assert entry["passed"] is False and entry["failed_checks"][0]["name"] == "min_distance"


def test_junit_has_one_case_per_structure(built):
    root, _ = built
    suite = ET.parse(root / "junit.xml").getroot()
    names = sorted(c.get("name") for c in suite.iter("testcase"))
    assert names == sorted(e["name"] for e in _manifest(root / "out")["structures"])
    assert suite.get("tests") == str(N_STRUCTURES) and suite.get("failures") == "0"


def test_same_output_path_is_an_error_for_the_later_structure(tmp_path, cli):
    lib = tmp_path / "lib"
    _write(lib / "a.yaml", recipe_dict(name="twin", outputs=["xyz"]))
    _write(lib / "b.yaml", recipe_dict(name="twin", outputs=["cif"], seed=2))
    _write(lib / "sub" / "c.yaml", recipe_dict(name="twin", outputs=["xyz"]))  # other folder: fine
    result = cli("batch", lib, "--out", tmp_path / "out", "--workers", "1")
    assert result.exit_code == 2
    entries = _manifest(tmp_path / "out")["structures"]
    assert [(e["recipe"], "error" in e) for e in entries] == [
        ("../lib/a.yaml", False), ("../lib/b.yaml", True), ("../lib/sub/c.yaml", False)]
    assert ("would write `twin.report.json`, which `twin` (../lib/a.yaml) already writes"
            in entries[1]["error"])


def test_rebuild_replaces_outputs_and_removes_stale_ones(copy_of, cli):
    out = copy_of / "out"
    (out / "notes.txt").write_text("kept")
    swept = copy_of / "lib/vac/swept.yml"
    data = yaml.safe_load(swept.read_text())
    data["sweep"]["seed"] = [1]
    _write(swept, data)
    result = cli("batch", copy_of / "lib", "--out", out, "--workers", "1")
    assert result.exit_code == 0, result.output
    assert "removed 6 file(s)" in result.output  # 2 points x (lmp, report, defects)
    assert not (out / "vac" / "cu-vac__seed-2__count-1.lmp").exists()
    assert (out / "vac" / "cu-vac__seed-1__count-1.lmp").exists()
    assert (out / "notes.txt").read_text() == "kept"
    assert len(_manifest(out)["structures"]) == N_STRUCTURES - 2
    assert cli("verify", out / "manifest.json", "--workers", "1").exit_code == 0


@pytest.mark.parametrize("content, words", [
    (None, "no manifest here"),
    ("{not json", "is not valid JSON"),
    ('{"cellbuild": "0.1.0", "source": "../lib"}', "`structures` is missing"),
    ('{"cellbuild": "0.1.0", "source": ".", "structures": [{"name": "x", "recipe": "r.yaml", '
     '"outputs": {"xyz": {"path": "../../etc/passwd", "sha256": "0"}}}]}',
     "leaves the manifest's folder"),
])
def test_unreadable_manifest_exits_2_in_one_sentence(tmp_path, cli, content, words):
    path = tmp_path / "manifest.json"
    if content is not None:
        path.write_text(content)
    result = cli("verify", path)
    assert result.exit_code == 2
    assert words in result.output and "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) == 1


@pytest.mark.parametrize("make_dir", [lambda t: t / "nowhere", lambda t: t])
def test_batch_refuses_a_folder_without_recipes(tmp_path, cli, make_dir):
    result = cli("batch", make_dir(tmp_path), "--out", tmp_path / "out")
    assert result.exit_code == 2
    assert result.output.startswith("error: `DIR` = ")
    assert not (tmp_path / "out").exists()


def test_the_demo_library_builds_and_verifies(tmp_path, cli):
    lib = shutil.copytree(REPO / "recipes", tmp_path / "recipes")
    result = cli("batch", lib, "--out", tmp_path / "library", "--workers", "2")
    assert result.exit_code == 0, result.output
    manifest = _manifest(tmp_path / "library")
    assert len(manifest["structures"]) >= 20
    assert all(e["passed"] and e["n_atoms"] <= 20_000 for e in manifest["structures"])
    result = cli("verify", tmp_path / "library" / "manifest.json", "--workers", "2")
    assert result.exit_code == 0, result.output


def test_an_unexpected_error_in_one_structure_is_recorded_not_raised(tmp_path, monkeypatch):
    from cellbuild import batch, pipeline

    lib = tmp_path / "lib"
    _write(lib / "a.yaml", recipe_dict(name="a", outputs=["xyz"]))
    _write(lib / "b.yaml", recipe_dict(name="b", outputs=["xyz"]))
    real_make = pipeline.make

    def make(recipe, out_dir, **kwargs):
        if recipe.name == "a":
            raise RuntimeError("simulated bug")
        return real_make(recipe, out_dir, **kwargs)

    monkeypatch.setattr(pipeline, "make", make)
    result = batch.build_library(lib, tmp_path / "out", workers=1)
    assert [o.status for o in result.outcomes] == ["error", "passed"]
    assert "internal error (RuntimeError: simulated bug)" in result.outcomes[0].error
    assert result.exit_code == 2


def test_warnings_reach_the_manifest_and_junit(tmp_path, cli):
    """A structure that passes with a warning is marked in the manifest, in JUnit and
    on its line. Cs fcc with a = 21 A: outside the 1-20 A range cellbuild calls
    plausible, yet its nearest-neighbour distance a/sqrt(2) = 14.85 A (fcc geometry,
    Kittel ch. 1) is below 3.2 x twice the covalent radius of Cs (2.44 A, Cordero et
    al. 2008), so it is built, with a warning."""
    lib = tmp_path / "lib"
    _write(lib / "wide.yaml", recipe_dict("Cs", "fcc", 21.0, name="wide", outputs=["xyz"]))
    _write(lib / "ok.yaml", recipe_dict(name="ok", outputs=["xyz"]))
    manifests = []
    for workers in ("1", "2"):
        out = tmp_path / f"out{workers}"
        junit = tmp_path / f"junit{workers}.xml"
        result = cli("batch", lib, "--out", out, "--workers", workers, "--junit", junit)
        assert result.exit_code == 0, result.output
        manifests.append((out / "manifest.json").read_bytes())
    # byte-stable whatever the number of workers, apart from the creation time
    one, two = (json.loads(m) for m in manifests)
    one.pop("created"), two.pop("created")
    assert one == two
    entries = {e["name"]: e for e in one["structures"]}
    report = json.loads((tmp_path / "out1" / "wide.report.json").read_text())
    assert report["warnings"] and entries["wide"]["warnings"] == report["warnings"]
    assert "outside the plausible range" in report["warnings"][0]
    assert entries["wide"]["passed"] is True
    assert "warnings" not in entries["ok"]  # only when there are some
    assert "wide  32 atoms  passed; 1 warning(s): lattice constant 21" in result.output
    cases = {c.get("name"): c for c in ET.parse(tmp_path / "junit2.xml").getroot()
             .findall("testcase")}
    props = cases["wide"].findall("properties/property")
    assert [(p.get("name"), p.get("value")) for p in props] == [("warning", report["warnings"][0])]
    assert "with 1 warning(s)" in cases["wide"].find("system-out").text
    assert report["warnings"][0] in cases["wide"].find("system-err").text
    assert cases["ok"].find("properties") is None and cases["ok"].find("system-err") is None
    assert cli("verify", tmp_path / "out1", "--workers", "1").exit_code == 0
