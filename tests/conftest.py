"""Shared test helpers: recipe files in a temporary folder and an in-process CLI runner."""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from typer.testing import CliRunner

from cellbuild.cli import app


@pytest.fixture
def recipe_file(tmp_path):
    """Write a recipe (a dict, or YAML text) to a file and return its path."""

    def write(recipe, name: str = "recipe.yaml") -> Path:
        path = tmp_path / name
        text = recipe if isinstance(recipe, str) else yaml.safe_dump(recipe, sort_keys=False)
        path.write_text(text)
        return path

    return write


@pytest.fixture
def cli():
    """Run the command line in-process; returns the click Result (exit_code, output)."""
    runner = CliRunner()

    def run(*args: str):
        return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)

    return run


def recipe_dict(element="Cu", lattice="fcc", a=3.615, repeat=(2, 2, 2), **extra) -> dict:
    """A small valid recipe as a dict; ``extra`` keys are merged in at the top level."""
    crystal = {"element": element, "lattice": lattice}
    if a is not None:
        crystal["a"] = a
    data = {"name": f"{element.lower()}-{lattice}", "crystal": crystal,
            "size": {"repeat": list(repeat)}, "seed": 1}
    data.update(extra)
    return data


# ----------------------------------------------------------------------------- LAMMPS reads
# Every LAMMPS data file that `make` writes during the suite (and that is still as
# its report recorded it) is read by the real LAMMPS at the end of the run, in
# tests/test_lammps_reads.py::test_lammps_reads_every_data_file_the_suite_wrote.

WRITTEN_DATA_FILES = pytest.StashKey[list]()


def pytest_configure(config):
    config.stash[WRITTEN_DATA_FILES] = []


def pytest_collection_modifyitems(session, config, items):
    # the collector test runs last, after every other test has written its files
    last = [i for i in items if i.name == "test_lammps_reads_every_data_file_the_suite_wrote"]
    items[:] = [i for i in items if i not in last] + last


def pytest_runtest_teardown(item, nextitem):
    import hashlib
    import json

    tmp = item.funcargs.get("tmp_path") if hasattr(item, "funcargs") else None
    if tmp is None or not Path(tmp).is_dir():
        return
    found = item.config.stash[WRITTEN_DATA_FILES]
    for report_path in sorted(Path(tmp).rglob("*.report.json"))[:50]:
        try:
            report = json.loads(report_path.read_text())
            entry = report["outputs"]["lammps-data"]
        except (ValueError, KeyError, TypeError, OSError):
            continue  # not a cellbuild report, or no LAMMPS data written
        data = report_path.parent / entry["path"]
        if len(set(report["coordination"].get("cutoff_by_sublattice", {0: 0}).values())) > 1:
            continue  # a compound counts per sublattice: test_compounds.py runs LAMMPS per species
        if (data.is_file() and report.get("n_atoms", 0) <= 20000
                and hashlib.sha256(data.read_bytes()).hexdigest() == entry["sha256"]):
            found.append((str(data), report["n_atoms"], report["coordination"]["cutoff"],
                          report["coordination"]["histogram"], item.nodeid))
