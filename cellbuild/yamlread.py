"""Recipe text into plain data: YAML 1.2 core schema, line numbers, bounds on hostile input.

PyYAML's SafeLoader follows YAML 1.1, where ``on``/``yes``/``no`` are booleans,
``5e-3`` is text, ``010`` is octal 8 and ``12:30:00`` is the number 45000. A
recipe is read here by the YAML 1.2 core schema instead: booleans are only
``true``/``false`` (also ``True``/``TRUE``/``False``/``FALSE``), null is ``null``,
``~`` or nothing, integers are decimal (``010`` is ten), ``0o`` octal or ``0x``
hex, floats include ``5e-3``, ``1e30``, ``.inf`` and ``.nan``; everything else
is text. There are no merge keys (``<<`` is an ordinary key) and no timestamps.

Mappings, lists and scalars are built here, not by PyYAML's constructor, so
that each key's line is recorded, duplicate keys are refused and a hostile file
cannot make the loader run for minutes or fill the memory:

- files above :data:`MAX_BYTES` are refused after reading at most one byte more;
- nesting deeper than :data:`MAX_DEPTH` levels is refused while composing (the
  composer recurses, so ``[[[[...`` would otherwise end in ``RecursionError``);
- more than :data:`MAX_NODES` values are refused, counting an alias each time
  it is expanded ("billion laughs": a few hundred bytes of nested aliases
  stand for billions of values);
- keys longer than :data:`MAX_KEY_LENGTH` characters are refused, and key paths
  are recorded only :data:`LINE_DEPTH` levels deep, so the line table stays small.

Two loaders share these rules. When PyYAML has libyaml (``yaml.__with_libyaml__``),
libyaml's C parser turns the text into events and PyYAML's own composer, bounded
as above, builds the nodes from them (about six times faster than PyYAML's
pure-Python reader, scanner and parser: a recipe in about 0.1 ms instead of 0.6 ms).
Any refusal on that path is answered by the pure-Python loader instead, which
reads the text again: every error message, line numbers included, is worded by
PyYAML's pure-Python parser exactly as before, and a text libyaml refuses but
PyYAML accepts still loads. The composer stays in Python so that the depth and
value bounds apply while composing on both paths (libyaml's composer recurses in
C, where ``[[[[...`` would exhaust the stack).
"""
from __future__ import annotations

import functools
import re
from pathlib import Path
from typing import Any

from .errors import InputError

#: Largest recipe file, bytes. The largest sweep allowed (100,000 values) is
#: under 1 MB of text; pure-Python YAML reads dense text at about 1 MB/s, so
#: this keeps the worst refusal within a few seconds.
MAX_BYTES = 2 * 1024 * 1024

#: Most values (mapping keys and values, list items, scalars) one recipe may
#: hold, counting an alias once per expansion.
MAX_NODES = 100_000

#: Deepest nesting of mappings and lists; a recipe needs five.
MAX_DEPTH = 32

#: Longest mapping key, characters; recipe and sweep keys are words and dotted paths.
MAX_KEY_LENGTH = 100

#: Keys below this depth share the line of their ancestor at this depth.
LINE_DEPTH = 8

_STR = "tag:yaml.org,2002:str"
_NULL = "tag:yaml.org,2002:null"
_BOOL = "tag:yaml.org,2002:bool"
_INT = "tag:yaml.org,2002:int"
_FLOAT = "tag:yaml.org,2002:float"
_MAP = "tag:yaml.org,2002:map"
_SEQ = "tag:yaml.org,2002:seq"

# The YAML 1.2 core schema (yaml.org/spec/1.2.2, section 10.3.2), in resolution order:
# an int pattern is tried before the float pattern, which also matches "10".
_CORE = (
    (_BOOL, re.compile(r"^(?:true|True|TRUE|false|False|FALSE)$"), "tTfF"),
    (_NULL, re.compile(r"^(?:~|null|Null|NULL|)$"), ["~", "n", "N", ""]),
    (_INT, re.compile(r"^(?:[-+]?[0-9]+|0o[0-7]+|0x[0-9a-fA-F]+)$"), "-+0123456789"),
    (_FLOAT, re.compile(r"^(?:[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?"
                        r"|[-+]?\.(?:inf|Inf|INF)|\.(?:nan|NaN|NAN))$"), "-+0123456789."),
)
_PATTERN = {tag: pattern for tag, pattern, _ in _CORE}

#: Python refuses to turn longer decimal texts into an int (sys.int_info).
_MAX_DIGITS = 4300


def read_text(path: str | Path) -> str:
    """The text of a recipe file, read as UTF-8, at most :data:`MAX_BYTES` bytes.

    At most ``MAX_BYTES + 1`` bytes are read, so ``/dev/zero`` or a huge file is
    refused at once. Raises :class:`InputError` naming the file.
    """
    return decode_text(read_capped(path), path)


def read_capped(path: str | Path) -> bytes:
    """The bytes of a recipe file, refused (:class:`InputError` naming the file)
    when it cannot be read or holds more than :data:`MAX_BYTES`."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            data = handle.read(MAX_BYTES + 1)
    except FileNotFoundError:
        raise InputError("file not found", file=str(path)) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a recipe file", file=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot be read ({exc.strerror or type(exc).__name__})",
                         file=str(path)) from None
    if len(data) > MAX_BYTES:
        raise InputError(f"is larger than {MAX_BYTES // 2**20} MB, too large for a recipe",
                         hint="a recipe is a short YAML text file", file=str(path))
    return data


def decode_text(data: bytes, path: str | Path) -> str:
    """``data`` (a recipe file's bytes) as UTF-8 text, or an :class:`InputError`
    naming the file and the line of the first byte that is not UTF-8."""
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        raise InputError("is not UTF-8 text", hint="a recipe is a YAML text file",
                         file=str(path), line=line) from None


def load_yaml(path: str | Path) -> tuple[Any, dict[str, int]]:
    """Read a YAML file safely; return the data and dotted key -> 1-based line.

    Duplicate keys, YAML syntax errors, tags, files or documents beyond the
    bounds of this module and unreadable files raise :class:`InputError`.
    """
    return parse_yaml(read_text(path), str(path))


def parse_yaml(text: str, file: str | None = None) -> tuple[Any, dict[str, int]]:
    """Parse YAML text by the core schema; see :func:`load_yaml`.

    Uses libyaml's parser when PyYAML has it, the pure-Python one otherwise or
    whenever libyaml's path refuses the text (see the module's note).
    """
    if len(text) > MAX_BYTES:
        raise InputError(f"is larger than {MAX_BYTES // 2**20} MB, too large for a recipe",
                         hint="a recipe is a short YAML text file", file=file)
    if has_libyaml() and not _LIBYAML_DIFFERS.search(text):
        try:
            data, lines = parse_with(text, file, fast=True)
        except (InputError, *_yaml_errors()):
            pass  # refused: the pure-Python loader words the refusal, exactly as before
        else:
            if data is not None:
                return data, lines
            # an empty document after `---`: libyaml marks it a line further down
    return parse_with(text, file, fast=False)


#: Texts where libyaml's scanner accepts what PyYAML's pure-Python one refuses or
#: reads otherwise (found by tests/test_yaml_loaders.py, comparing the two on
#: random edits of recipes): tabs as separators (``a:<TAB>b``), a byte-order mark
#: past the start, ``?`` inside a plain scalar in flow context (``[a?]``), the
#: non-specific tag ``!`` before an empty value, ``#`` right after a block-scalar
#: header (``|#``). Such texts, rare in recipes, go to the pure-Python loader.
_LIBYAML_DIFFERS = re.compile(r"[\t\ufeff?!]|[|>][-+0-9]*#")


def has_libyaml() -> bool:
    """Whether PyYAML was built with libyaml (its C parser)."""
    import yaml

    return bool(getattr(yaml, "__with_libyaml__", False))


def _yaml_errors() -> tuple[type[BaseException], ...]:
    """What libyaml's path may raise for a text it refuses: PyYAML's errors, and
    UnicodeEncodeError for a string with lone surrogates (libyaml takes UTF-8
    bytes; the pure-Python reader refuses such characters with a line)."""
    import yaml

    return yaml.YAMLError, UnicodeError


def parse_with(text: str, file: str | None, *, fast: bool) -> tuple[Any, dict[str, int]]:
    """Parse ``text`` with one loader: libyaml's parser (``fast``, needs
    :func:`has_libyaml`) or PyYAML's pure-Python one; errors as :func:`load_yaml`'s."""
    import yaml

    loader = None
    try:
        loader = _loader_class(fast)(text)
        loader.file = file
        node = loader.get_single_node()
        if node is None:
            raise InputError("the recipe is empty", hint="see `cellbuild template fcc`",
                             file=file)
        lines: dict[str, int] = {}
        data = _Builder(file, lines).build(node, "", 0, 0)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        raise InputError(f"YAML error {_yaml_problem(exc)}", file=file, line=line) from None
    except yaml.reader.ReaderError as exc:
        line = text.count("\n", 0, exc.position) + 1
        raise InputError(f"YAML error: character {chr(exc.character)!r} is not allowed"
                         if isinstance(exc.character, int) else "YAML error: unreadable characters",
                         hint="a recipe is plain YAML text", file=file, line=line) from None
    except yaml.YAMLError as exc:
        raise InputError(f"YAML error: {str(exc).strip().splitlines()[0]}", file=file) from None
    except (ValueError, OverflowError):
        # PyYAML's pure-Python scanner calls chr() on a \U escape beyond U+10FFFF
        # ("\UFFFFFFFF") unchecked; libyaml refuses it in these words
        line = getattr(loader, "line", None)
        raise InputError("YAML error while parsing a quoted scalar: found invalid Unicode "
                         "character escape code", file=file,
                         line=line + 1 if isinstance(line, int) else None) from None
    finally:
        if loader is not None:
            loader.dispose()
    return data, lines


def _yaml_problem(exc) -> str:
    """PyYAML's problem and context as one clause: the problem alone is sometimes a
    fragment ("but found another document", "second occurrence")."""
    problem = (exc.problem or "").strip()
    context = (exc.context or "").strip()
    if context.startswith("found duplicate anchor"):
        return ": " + context.split(";")[0]
    if problem.startswith("but ") and context:
        return f": {context} {problem}"
    if context.startswith("while ") and problem:
        return f"{context}: {problem}"
    return ": " + (problem or context or "invalid YAML")


@functools.lru_cache(maxsize=2)
def _loader_class(fast: bool = False):
    """A loader class with the core-schema resolvers and bounded composing:
    PyYAML's composer over libyaml's parser (``fast``) or over PyYAML's own.

    Built once per kind (the cache holds at most the two classes; they carry
    no state between parses) and only when first needed: PyYAML is not
    imported for ``--help``.
    """
    import yaml
    from yaml.composer import Composer

    # Composer first: its Python composing methods, bounded below, take the place
    # of CParser's C ones; events still come from CParser (check/peek/get_event)
    bases = (Composer, yaml.CSafeLoader) if fast else (yaml.SafeLoader,)

    class CoreLoader(*bases):
        yaml_implicit_resolvers: dict = {}  # filled below; none of YAML 1.1's survive

        def __init__(self, text: str) -> None:
            bases[-1].__init__(self, text)
            if fast:
                Composer.__init__(self)  # its anchor table; CSafeLoader does not call it
            self.file: str | None = None
            self.depth = 0
            self.composed = 0

        def compose_node(self, parent, index):
            mark = self.peek_event().start_mark
            self.composed += 1
            if self.composed > MAX_NODES:
                raise InputError(f"holds more than {MAX_NODES:,} values, too many for a recipe",
                                 file=self.file, line=mark.line + 1)
            self.depth += 1
            try:
                if self.depth > MAX_DEPTH:
                    raise InputError(f"nests lists or mappings more than {MAX_DEPTH} levels deep",
                                     hint="a recipe needs a few levels", file=self.file,
                                     line=mark.line + 1)
                return Composer.compose_node(self, parent, index)
            finally:
                self.depth -= 1

    for tag, pattern, first in _CORE:
        CoreLoader.add_implicit_resolver(tag, pattern, first)
    return CoreLoader


class _Builder:
    """Turns a composed node graph into plain data, recording each key's line and
    counting every node built (an aliased node once per use)."""

    def __init__(self, file: str | None, lines: dict[str, int]) -> None:
        self.file = file
        self.lines = lines
        self.built = 0

    def fail(self, message: str, node, key: str, hint: str | None = None):
        raise InputError(message, key=key or None, hint=hint, file=self.file,
                         line=node.start_mark.line + 1)

    def build(self, node, path: str, depth: int, key_depth: int):
        import yaml

        self.built += 1
        if self.built > MAX_NODES:
            self.fail(f"YAML aliases expand to more than {MAX_NODES:,} values", node, "",
                      "write the values out; a recipe needs far fewer")
        if depth > MAX_DEPTH:  # only a recursive alias (&a [*a]) gets here
            self.fail(f"nests lists or mappings more than {MAX_DEPTH} levels deep", node, path,
                      "an alias may not refer to the list or mapping that holds it")
        self.lines.setdefault(path, node.start_mark.line + 1)
        if isinstance(node, yaml.ScalarNode):
            return self.scalar(node, path)
        if node.tag not in (_MAP, _SEQ):
            self.fail(f"YAML tag {node.tag} is not accepted", node, path,
                      "YAML tags that construct objects are refused")
        deeper = key_depth < LINE_DEPTH
        if isinstance(node, yaml.SequenceNode):
            return [self.build(item, f"{path}[{i}]" if deeper else path, depth + 1, key_depth + 1)
                    for i, item in enumerate(node.value)]
        out: dict[str, Any] = {}
        for key_node, value_node in node.value:
            key = self.key(key_node, path)
            child = (f"{path}.{key}" if path else key) if deeper else path
            if key in out:
                self.fail("duplicate key", key_node, child, "each key may appear once")
            if deeper:
                self.lines[child] = key_node.start_mark.line + 1
            out[key] = self.build(value_node, child, depth + 1, key_depth + 1)
        return out

    def key(self, node, path: str) -> str:
        """A mapping key as text: numbers as written (``010`` stays ``010``)."""
        import yaml

        self.built += 1
        if not isinstance(node, yaml.ScalarNode):
            self.fail("mapping keys must be plain words, not lists or mappings", node, path)
        if node.tag == _BOOL:
            self.fail(f"mapping keys must be words, and {node.value} is a boolean in YAML "
                      f"(true and false are booleans)", node, path,
                      f"quote it ('{node.value}') if the word is meant")
        if node.tag == _NULL:
            self.fail("mapping keys must be words, not empty (null)", node, path)
        if node.tag not in (_STR, _INT, _FLOAT):
            self.fail(f"YAML tag {node.tag} is not accepted", node, path,
                      "YAML tags that construct objects are refused")
        if len(node.value) > MAX_KEY_LENGTH:
            self.fail(f"has a key of {len(node.value):,} characters; keys must be words of at "
                      f"most {MAX_KEY_LENGTH}", node, path)
        return node.value

    def scalar(self, node, path: str):
        """A scalar by its (resolved or explicit) core-schema tag; ``name`` always as text."""
        tag, text = node.tag, node.value
        if tag == _STR:
            return text
        if path == "name" and tag != _NULL:
            return text  # a name is a file stem: `name: 010` means "010", not 10 or 8
        if tag in _PATTERN and not _PATTERN[tag].match(text):
            self.fail(f"`!!{tag.rsplit(':', 1)[1]} {text[:40]}` is not a YAML 1.2 "
                      f"{tag.rsplit(':', 1)[1]}", node, path)
        if tag == _NULL:
            return None
        if tag == _BOOL:
            return text.lower() == "true"
        if tag == _INT:
            return self.integer(node, path)
        if tag == _FLOAT:
            lower = text.lower()
            if lower.endswith(".inf"):
                return float("-inf") if lower.startswith("-") else float("inf")
            if lower == ".nan":
                return float("nan")
            return float(text)  # a 400-digit number becomes inf, refused in validation
        self.fail(f"YAML tag {tag} is not accepted", node, path,
                  "YAML tags that construct objects are refused")

    def integer(self, node, path: str) -> int:
        text = node.value
        if text.startswith("0o"):
            return int(text[2:], 8)
        if text.startswith("0x"):
            return int(text[2:], 16)
        if len(text) > _MAX_DIGITS:
            self.fail(f"is too large: a whole number of {len(text):,} digits", node, path,
                      "recipe numbers are small")
        return int(text, 10)
