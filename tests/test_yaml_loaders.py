"""libyaml's parser reads recipes exactly as PyYAML's pure-Python parser does.

The reference is PyYAML's own pure-Python loader (the one cellbuild used before
libyaml): for every text of a corpus (the recipes and templates shipped, the
README's YAML blocks, YAML constructs a recipe may use, and seeded random edits
of all of them, most of them broken YAML), both loaders must give the same data
and the same line table, or the libyaml path must refuse (then the pure-Python
loader answers). The libyaml path may never accept a text the pure-Python
loader refuses, and :func:`parse_yaml` must word every refusal as the
pure-Python loader does.
"""
from __future__ import annotations

import random
import re
from pathlib import Path

import pytest

from cellbuild import yamlread
from cellbuild.errors import InputError
from cellbuild.lattices import LATTICES
from cellbuild.templates import template_for

ROOT = Path(__file__).resolve().parent.parent

pytestmark = pytest.mark.skipif(not yamlread.has_libyaml(), reason="PyYAML without libyaml")

#: YAML constructs beyond the shipped recipes (YAML 1.1/1.2 specifications' examples
#: of block scalars, folding, quoting, escapes, anchors, explicit keys, directives)
CONSTRUCTS = [
    "a: |\n  line one\n  line two\nb: >\n  folded\n  text\n\n  para\nc: |-\n  keep\n",
    "a: >+\n  kept\n\n\nb: 1\n",
    "a: plain\n  continued\n  lines\nb: 'single ''quoted''\n  folded'\n",
    'a: "esc \\t \\n \\x41 \\u00e9 \\U0001F600 \\\\ \\" \\/ \\0 \\a \\e \\N \\_ \\L \\P"\n',
    'a: "line\\\n  joined"\n',
    "a: &x {b: 1, c: [1, 2]}\nd: *x\ne: [*x, *x]\n",
    "? long key\n: value\n? [a, b]\n: c\n",
    "%YAML 1.2\n---\na: 1\n...\n",
    "%YAML 1.1\n%TAG !e! tag:example.com,2000:\n--- \na: !e!x 1\n",
    "--- \na: 1\n--- \nb: 2\n",
    "\ufeffa: 1\n",
    "a: 1\r\nb: [1,\r\n 2]\r\n",
    "a: 1\x85b: 2\n",
    "a: x\u2028y\n",
    "a:\n- 1\n- - 2\n  - 3\n- {b: c}\n",
    "a: [1, 2,]\nb: {c: d,}\n",
    "a: {b, c: }\n",
    "a: [b: c, d]\n",
    "a:\n-\n- 1\n-\nb:\nc: [a, ]\nd: {e: , f}\n",
    "-\n- \n-   # c\n",
    "a:\n  -\n  b:\n",
    "a:\n\n\nb:\n\n",
    "a: 1 # comment\n# another\nb: 'x # not a comment'\n",
    "a:\tb\n",
    "a: \t1\n",
    "\ta: 1\n",
    "a: [\t1]\n",
    "a: 'é ü 中文 😀'\nb: ö\n",
    "a: !!str 1\nb: !!int '7'\nc: !!float '1e3'\nd: !!null ''\ne: !!bool 'true'\n",
    "a: !!map {b: 1}\nc: !!seq [1]\n",
    "a: !<tag:yaml.org,2002:str> x\n",
    "a: ! 12\n",
    "a: -1\nb: - 1\nc: -\n",
    "a: .5\nb: +.5\nc: 1e5\nd: 1.e5\ne: 0x_1\nf: 0o8\ng: 0X1F\n",
    "a: @x\n",
    "a: `x`\n",
    "a: 'unterminated\n",
    'a: "unterminated\n',
    "a: [1, 2\n",
    "a: {b: 1\n",
    "a: b: c\n",
    "a:\n  b: 1\n c: 2\n",
    "- a\nb: 1\n",
    "a: *undefined\n",
    "a: &x 1\nb: &x 2\n",
    "a: 1\n...\nb: 2\n",
    "",
    "# only a comment\n",
    "---\n",
    "a: \x07\n",
    "a: \x00\n",
    "a: '\ud800'\n",
    "%YAML 2.0\n---\na: 1\n",
    "%YAML 1.3\n---\na: 1\n",
    "%FOO bar\n---\na: 1\n",
    "a: 1\n%YAML 1.2\n",
    "&a a: 1\n",
    "a: !!python/object:os.system x\n",
    "[a, b]: 1\n",
    "{a: 1}: 2\n",
    "a: " + "x" * 1100 + ": 1\n",
    "? " + "k" * 1100 + "\n: 1\n",
]


def _corpus() -> list[str]:
    texts = [path.read_text() for path in sorted((ROOT / "recipes").rglob("*.y*ml"))]
    texts += [template_for(lattice) for lattice in LATTICES]
    readme = (ROOT / "README.md").read_text()
    texts += re.findall(r"```ya?ml\n(.*?)```", readme, flags=re.S)
    return texts + CONSTRUCTS


#: characters that change how YAML reads a text
_SIGNIFICANT = list(":-[]{},#&*!|>'\"%@` \t\n?~.0e") + ["\n  ", ": ", "- ", "\r\n", "\\"]


def _mutations(texts: list[str], count: int, seed: int = 17) -> list[str]:
    """``count`` seeded random edits: a character deleted, a significant one
    inserted or substituted, a line doubled, moved or re-indented."""
    rng = random.Random(seed)
    out = []
    for _ in range(count):
        text = rng.choice(texts) or "a: 1\n"
        for _ in range(rng.randint(1, 3)):
            i = rng.randrange(len(text) + 1)
            kind = rng.randrange(6)
            if kind == 0 and text:
                text = text[:i] + text[i + 1:]
            elif kind == 1:
                text = text[:i] + rng.choice(_SIGNIFICANT) + text[i:]
            elif kind == 2 and text:
                text = text[:i] + rng.choice(_SIGNIFICANT) + text[i + 1:]
            else:
                lines = text.split("\n")
                j = rng.randrange(len(lines))
                if kind == 3:
                    lines.insert(j, lines[j])
                elif kind == 4:
                    lines.insert(rng.randrange(len(lines) + 1), lines.pop(j))
                else:
                    lines[j] = " " * rng.choice((1, 2, 4)) + lines[j]
                text = "\n".join(lines)
        out.append(text)
    return out


def _outcome(text: str, fast: bool):
    """('ok', repr of data and lines) or ('refused', message and line)."""
    try:
        data, lines = yamlread.parse_with(text, "r.yaml", fast=fast)
    except InputError as exc:
        return "refused", (str(exc), exc.line)
    except (UnicodeError, ValueError) as exc:  # only the libyaml path may raise these
        assert fast, exc
        return "refused", (type(exc).__name__, None)
    return "ok", repr((data, lines))  # repr: nan == nan


def _outcome_of_parse_yaml(text: str):
    try:
        data, lines = yamlread.parse_yaml(text, "r.yaml")
    except InputError as exc:
        return "refused", (str(exc), exc.line)
    return "ok", repr((data, lines))


CORPUS = _corpus()


@pytest.mark.parametrize("batch", range(4))
def test_both_loaders_agree_on_the_corpus_and_its_random_edits(batch):
    """parse_yaml answers exactly as the pure-Python loader; where it takes the
    libyaml path, that path alone already gives the pure-Python result."""
    texts = CORPUS if batch == 0 else _mutations(CORPUS, 1500, seed=batch)
    fast_ok = 0
    for text in texts:
        pure = _outcome(text, False)
        assert _outcome_of_parse_yaml(text) == pure, text
        if yamlread._LIBYAML_DIFFERS.search(text):
            continue  # goes to the pure-Python loader
        fast = _outcome(text, True)
        if fast[0] == "ok" and not fast[1].startswith("(None,"):
            # libyaml may refuse more (the pure loader then answers), never accept more
            assert fast == pure, (text, fast, pure)
            fast_ok += 1
    assert fast_ok > len(texts) // 10  # the comparison is not vacuous


def test_the_texts_libyaml_reads_otherwise_are_routed_to_the_pure_loader():
    """The differences the guard exists for (found by the test above without it)."""
    for text in ("a:\tb\n", "\n\ufeffa: 1\n", "a: {b: c?}\n", "a: !\nb: 1\n", "a: |#\n  x\n"):
        assert yamlread._LIBYAML_DIFFERS.search(text), text
        assert _outcome_of_parse_yaml(text) == _outcome(text, False), text
    # an empty document after `---`: libyaml puts it a line further down
    assert _outcome(text := "---", True) != _outcome(text, False)
    assert _outcome_of_parse_yaml(text) == _outcome(text, False)


def test_an_escape_beyond_unicode_is_refused_not_a_crash():
    """YAML 1.2.2 section 5.7: \\U takes 8 hex digits naming a Unicode character
    (at most U+10FFFF); PyYAML's pure-Python scanner crashed on larger ones."""
    for escape in ("\\UFFFFFFFF", "\\U00110000"):
        kind, (message, line) = _outcome_of_parse_yaml(f'x: 1\na: "{escape}"\n')
        assert kind == "refused" and line == 2 and "invalid Unicode character escape" in message


def test_the_shipped_recipes_take_the_libyaml_path(monkeypatch):
    """No silent fallback for ordinary recipes: the speed-up is real."""
    calls = []
    real = yamlread.parse_with

    def spy(text, file, *, fast):
        calls.append(fast)
        return real(text, file, fast=fast)

    monkeypatch.setattr(yamlread, "parse_with", spy)
    recipes = sorted((ROOT / "recipes").rglob("*.yaml"))
    assert recipes
    for path in recipes:
        yamlread.load_yaml(path)
    assert calls == [True] * len(recipes)


def test_loader_classes_are_built_once_per_kind():
    assert yamlread._loader_class(True) is yamlread._loader_class(True)
    assert yamlread._loader_class(False) is not yamlread._loader_class(True)
