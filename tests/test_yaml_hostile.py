"""Hostile recipe text is refused with one sentence naming the file (exit 2),
within time and memory bounds.

Each case runs `cellbuild plan FILE` in a subprocess with ``timeout=`` and
``RLIMIT_AS`` (1 GiB), and the subprocess times the command itself (imports
excluded), so that a regression fails instead of hanging or swapping CI.
Sources:
* "Billion laughs": nested YAML anchors and aliases, each level repeating the
  one below ten times, stand for 10**9 values in a few hundred bytes (a known
  attack on XML and YAML parsers; common practice).
* Python refuses to convert decimal texts of more than 4,300 digits to int
  (sys.int_info.default_max_str_digits, Python 3.11 documentation).
* A float of more than 309 integer digits exceeds the largest IEEE-754 double,
  1.8e308 (common practice).
"""
from __future__ import annotations

import os
import resource
import subprocess
import sys

import pytest

from cellbuild.yamlread import MAX_BYTES, MAX_DEPTH, MAX_NODES

MEMORY = 1 << 30   # bytes of address space for each run
TIMEOUT = 60       # seconds: a hang fails the test instead of the CI job
SECONDS = 8.0      # what any refusal may take inside the command (imports excluded; generous
                   # because CI shares 2 cores; today about 0.5 s on a quiet machine)

_RUN = """\
import os, sys, time
from cellbuild.cli import main
if os.environ.get("CELLBUILD_TEST_YAML") == "pure":
    import cellbuild.yamlread
    cellbuild.yamlread.has_libyaml = lambda: False
start = time.perf_counter()
try:
    main(sys.argv[1:])
except SystemExit as exc:
    code = exc.code
sys.stderr.write(f"\\nELAPSED {time.perf_counter() - start:.3f}\\n")
sys.exit(code)
"""

HEADER = "name: x\ncrystal: {element: Cu, lattice: fcc, a: 3.615}\nsize: {repeat: 2}\n"


@pytest.fixture(autouse=True, params=["libyaml", "pure"])
def yaml_loader(request, monkeypatch):
    """Every case with libyaml's parser (when PyYAML has it) and with the pure-Python
    one, in this process and in the `plan` subprocesses."""
    from cellbuild import yamlread

    if request.param == "libyaml" and not yamlread.has_libyaml():
        pytest.skip("PyYAML without libyaml")
    if request.param == "pure":
        monkeypatch.setattr(yamlread, "has_libyaml", lambda: False)
    monkeypatch.setenv("CELLBUILD_TEST_YAML", request.param)
    return request.param


def _limit_memory():
    resource.setrlimit(resource.RLIMIT_AS, (MEMORY, MEMORY))


def plan(path) -> tuple[int, str, float]:
    """`cellbuild plan PATH` in a bounded subprocess: (exit code, output, seconds in the command)."""
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")  # + CELLBUILD_TEST_YAML
    done = subprocess.run([sys.executable, "-c", _RUN, "plan", str(path)], capture_output=True,
                          text=True, timeout=TIMEOUT, preexec_fn=_limit_memory, env=env)
    output, _, elapsed = (done.stdout + done.stderr).rpartition("\nELAPSED ")
    return done.returncode, output.strip(), float(elapsed)


def refused(path, *words: str) -> str:
    code, output, elapsed = plan(path)
    assert code == 2, output
    assert output.startswith("error: ") and "\n" not in output, output
    assert "Traceback" not in output and "memory" not in output, output
    assert str(path) in output, output
    for word in words:
        assert word in output, (word, output)
    assert elapsed < SECONDS, (elapsed, output)
    return output


def billion_laughs(levels: int = 9) -> str:
    """Nine levels of ten aliases each: 10**9 values in about 350 bytes."""
    names = "abcdefghi"[:levels]
    lines = [f"{names[0]}: &{names[0]} [x,x,x,x,x,x,x,x,x,x]"]
    for below, name in zip(names, names[1:]):
        lines.append(f"{name}: &{name} [" + ",".join([f"*{below}"] * 10) + "]")
    return "\n".join(lines) + "\n"


def test_alias_bomb_is_refused_quickly(tmp_path):
    text = billion_laughs()
    assert len(text.encode()) < 400
    path = tmp_path / "laughs.yaml"
    path.write_text(text)
    refused(path, "aliases expand", f"{MAX_NODES:,}")


def test_modest_aliases_still_load(tmp_path):
    # the same construction, three levels (1,110 values), is within the bounds
    from cellbuild.recipe import parse_yaml

    data, _ = parse_yaml(billion_laughs(3))
    assert len(data["c"]) == 10 and len(data["c"][0]) == 10 and data["c"][9][9][9] == "x"


def test_recursive_alias_is_refused(tmp_path):
    path = tmp_path / "loop.yaml"
    path.write_text(HEADER + "defects: &d {vacancies: *d}\n")
    # PyYAML lets an alias refer to the mapping that holds it; expanded, it never ends
    refused(path, "levels deep")


@pytest.mark.parametrize("opening,closing", [("[", "]"), ("{a: ", "}")])
def test_deep_nesting_is_refused(tmp_path, opening, closing):
    path = tmp_path / "deep.yaml"
    path.write_text("defects: " + opening * 10_000 + "1" + closing * 10_000 + "\n")
    refused(path, "levels deep", "line 1")


def test_nesting_within_the_limit_loads():
    from cellbuild.recipe import parse_yaml

    data, _ = parse_yaml("[" * (MAX_DEPTH - 1) + "1" + "]" * (MAX_DEPTH - 1))
    for _ in range(MAX_DEPTH - 1):
        data = data[0]
    assert data == 1


def test_long_float_is_not_finite_at_its_key(tmp_path):
    path = tmp_path / "float.yaml"
    path.write_text(HEADER.replace("a: 3.615", "a: " + "9" * 400 + ".5"))
    refused(path, "`crystal.a` = inf", "finite", "line 2")


def test_long_integer_is_too_large_at_its_key(tmp_path):
    path = tmp_path / "int.yaml"
    path.write_text(HEADER.replace("a: 3.615", "a: " + "9" * 400))
    refused(path, "`crystal.a`", "too large", "line 2")


def test_integer_beyond_pythons_digit_limit_is_too_large(tmp_path):
    path = tmp_path / "digits.yaml"
    path.write_text(HEADER + "seed: " + "7" * 5000 + "\n")
    refused(path, "`seed`", "too large", "5,000 digits", "line 4")


def test_dev_zero_is_refused_after_a_bounded_read():
    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero")
    refused("/dev/zero", "too large")


def test_huge_comment_file_is_refused_by_size(tmp_path):
    path = tmp_path / "comments.yaml"
    with open(path, "w") as handle:
        block = ("# " + "c" * 1021 + "\n") * 1024  # 1 MiB
        for _ in range(100):
            handle.write(block)
    refused(path, "too large", f"{MAX_BYTES // 2**20} MB")


def test_a_file_at_the_size_limit_is_read():
    from cellbuild.recipe import parse_yaml

    text = HEADER + "#" * (MAX_BYTES - len(HEADER) - 1) + "\n"
    assert len(text) == MAX_BYTES
    data, _ = parse_yaml(text)
    assert data["name"] == "x"


def test_too_many_values_are_refused_while_composing(tmp_path):
    path = tmp_path / "wide.yaml"
    path.write_text("sweep: {seed: [" + "1," * (MAX_NODES + 10) + "]}\n")
    refused(path, "more than 100,000 values")


def test_a_long_key_is_refused(tmp_path):
    path = tmp_path / "key.yaml"
    path.write_text(HEADER + "? " + "k" * 5000 + "\n: 1\n")  # `? ` allows keys over 1,024
    refused(path, "5,000 characters", "line 4")
