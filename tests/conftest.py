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
