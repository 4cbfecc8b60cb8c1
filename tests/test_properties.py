"""Property tests: whatever recipe comes in, `make` either builds (exit 0 with a
passing report, or exit 1 with the failed checks named in the report) or
refuses with exit 2 and one message, and never raises or leaves a file behind.

Hypothesis profiles (CELLBUILD_HYPOTHESIS_PROFILE): "default", 60 examples per
test; "ci", 400 examples and no example database, so that every run draws
fresh examples. Either must pass for any ``--hypothesis-seed``.
"""
from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from cellbuild.cli import app

settings.register_profile("default", max_examples=60, deadline=None,
                          suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("ci", max_examples=400, deadline=None, database=None,
                          suppress_health_check=[HealthCheck.too_slow])
# the profile is the parent of this module's settings, not loaded globally: other
# test modules keep their own example counts
SETTINGS = settings(settings.get_profile(os.environ.get("CELLBUILD_HYPOTHESIS_PROFILE", "default")))

JUNK = st.one_of(
    st.none(), st.booleans(), st.integers(-10**12, 10**12),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
    st.lists(st.integers(-3, 5), max_size=4), st.dictionaries(st.text(max_size=5), st.integers(), max_size=2),
)

ELEMENTS = st.sampled_from(["Cu", "Fe", "Si", "Al", "W", "Ni", "Po", "Xx", "cu", ""])
LATTICES = st.sampled_from(["sc", "bcc", "fcc", "diamond", "hcp"])


@st.composite
def recipes(draw) -> dict:
    """Mostly valid small recipes, with optional defects."""
    crystal = {"element": draw(ELEMENTS), "lattice": draw(LATTICES)}
    which = draw(st.sampled_from(["a", "density", "radius", None]))
    if which:
        crystal[which] = draw(st.one_of(st.floats(0.5, 8.0), JUNK))
    size = draw(st.sampled_from([
        {"repeat": draw(st.lists(st.integers(-1, 3), min_size=1, max_size=4))},
        {"atoms": draw(st.integers(-5, 300))},
        {"min_length": draw(st.floats(-1.0, 12.0))},
    ]))
    data = {"name": draw(st.sampled_from(["p", "p-1", "../p", "", "a/b"])),
            "crystal": crystal, "size": size, "seed": draw(st.integers(0, 5)),
            "outputs": draw(st.lists(st.sampled_from(["lammps-data", "cif", "xyz", "poscar", "pdb"]),
                                     min_size=1, max_size=3))}
    if draw(st.booleans()):
        defects = {}
        if draw(st.booleans()):
            defects["vacancies"] = draw(st.sampled_from([
                {"count": draw(st.integers(-1, 6))}, {"fraction": draw(st.floats(-0.1, 1.2))}]))
        if draw(st.booleans()):
            defects["substitutions"] = [{"element": draw(ELEMENTS),
                                         "count": draw(st.integers(0, 6))}]
        if draw(st.booleans()):
            defects["interstitials"] = [{
                "element": draw(ELEMENTS),
                "site": draw(st.sampled_from(["octahedral", "tetrahedral", "cube-centre", "x"])),
                "count": draw(st.integers(0, 3))}]
        if draw(st.booleans()):
            defects["min_separation"] = draw(st.floats(0.1, 9.0))
        data["defects"] = defects
    return data


@st.composite
def mutated(draw) -> dict:
    """A valid recipe with one value replaced by junk or one key renamed."""
    data = {"name": "m", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.6},
            "size": {"repeat": [2, 2, 2]}, "seed": 1, "outputs": ["xyz"],
            "defects": {"vacancies": {"count": 1}}}
    section = draw(st.sampled_from(["name", "crystal", "size", "seed", "outputs", "defects"]))
    if isinstance(data[section], dict) and draw(st.booleans()):
        key = draw(st.sampled_from(sorted(data[section])))
        if draw(st.booleans()):
            data[section][key] = draw(JUNK)
        else:
            data[section][key + draw(st.text(min_size=1, max_size=3))] = data[section].pop(key)
    else:
        data[section] = draw(JUNK)
    return data


#: Larger structures are only planned here: a junk integer such as `repeat: 204`
#: is a valid 34M-atom recipe, whose build takes minutes (bench_make.py measures it).
MAX_BUILT_ATOMS = 200_000


def _check_outcome(text: str) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        recipe = Path(tmp) / "r.yaml"
        recipe.write_text(text)
        out = Path(tmp) / "out"
        planned = CliRunner().invoke(app, ["plan", str(recipe), "--json"])
        assert planned.exception is None or isinstance(planned.exception, SystemExit)
        if planned.exit_code == 0 and any(p["n_atoms"] > MAX_BUILT_ATOMS
                                          for p in _json_list(planned.output)):
            return
        result = CliRunner().invoke(app, ["make", str(recipe), "--out", str(out)])
        # never an exception other than the exit itself
        assert result.exception is None or isinstance(result.exception, SystemExit), result.output
        assert result.exit_code in (0, 1, 2), result.output
        if result.exit_code == 2:
            message = result.output.strip()
            assert message.startswith("error: ") and "\n" not in message
            assert not out.exists() or not any(out.iterdir())
            return
        reports = list(out.glob("*.report.json"))
        assert len(reports) == 1
        report = json.loads(reports[0].read_text())
        assert report["passed"] == (result.exit_code == 0)
        if result.exit_code == 1:
            assert any(not c["passed"] for c in report["checks"])
        assert not list(out.glob("*.part"))


def _json_list(text: str) -> list:
    data = json.loads(text)
    return data if isinstance(data, list) else [data]


@SETTINGS
@given(recipes())
def test_generated_recipes_build_or_fail_cleanly(data):
    _check_outcome(yaml.safe_dump(data))


@SETTINGS
@given(mutated())
def test_mutated_recipes_build_or_fail_cleanly(data):
    _check_outcome(yaml.safe_dump(data))


@SETTINGS
@given(st.text(max_size=200))
def test_random_text_never_raises(text):
    _check_outcome(text)


@SETTINGS
@given(key=st.text(max_size=12), value=JUNK, file=st.text(max_size=12), hint=st.text(max_size=12))
def test_messages_are_one_printable_line(key, value, file, hint):
    from cellbuild.errors import InputError, show_key

    text = str(InputError("is wrong", key=key or None, value=value, file=file or None,
                          hint=hint or None))
    assert text.isprintable() and "\n" not in text
    if key:
        assert f"`{show_key(key)}` = " in text


@pytest.fixture(scope="module")
def small_files(tmp_path_factory) -> dict[str, bytes]:
    """A small structure with a substituent, written in every format."""
    from cellbuild.pipeline import make
    from cellbuild.recipe import parse_recipe

    out = tmp_path_factory.mktemp("files")
    recipe = parse_recipe({"name": "f", "crystal": {"element": "Fe", "lattice": "bcc", "a": 2.87},
                           "size": {"repeat": [2, 2, 2]},
                           "defects": {"substitutions": [{"element": "Cr", "count": 2}]}})
    make(recipe, out)
    return {ext: (out / f"f{ext}").read_bytes() for ext in (".lmp", ".cif", ".xyz", ".vasp")}


@st.composite
def damaged(draw, files: dict[str, bytes]) -> tuple[str, bytes]:
    """One of the files, cut short, with bytes flipped, or with a line dropped or repeated."""
    ext = draw(st.sampled_from(sorted(files)))
    data = bytearray(files[ext])
    how = draw(st.sampled_from(["cut", "flip", "drop", "repeat"]))
    if how == "cut":
        data = data[:draw(st.integers(0, len(data) - 1))]
    elif how == "flip":
        for _ in range(draw(st.integers(1, 4))):
            data[draw(st.integers(0, len(data) - 1))] = draw(st.integers(0, 255))
    else:
        lines = bytes(data).split(b"\n")
        i = draw(st.integers(0, len(lines) - 1))
        if how == "drop":
            del lines[i]
        else:
            lines.insert(i, lines[draw(st.integers(0, len(lines) - 1))])
        data = bytearray(b"\n".join(lines))
    return ext, bytes(data)


def test_damaged_files_inspect_cleanly(small_files):
    # inspect either reads the file (exit 0 or 1) or refuses it with one sentence (exit 2)
    @SETTINGS
    @given(damaged(small_files))
    def check(case):
        ext, data = case
        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / f"damaged{ext}"
            path.write_bytes(data)
            result = CliRunner().invoke(app, ["inspect", str(path)])
            assert result.exception is None or isinstance(result.exception, SystemExit), \
                repr(result.exception)
            assert result.exit_code in (0, 1, 2)
            if result.exit_code == 2:
                assert "error: " in result.output and "Traceback" not in result.output

    check()
