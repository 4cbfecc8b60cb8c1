"""Error types that cross module boundaries.

``InputError`` is the one exception the command line turns into exit code 2: it
carries the recipe key (a dotted path), the offending value, a hint and, where
known, the file and line. Everything else that escapes is a bug.

Messages are one line whatever the input holds: keys, values, file names and
texts are rendered with control and other non-printable characters escaped
(``\\n``, ``\\x1b``), numpy scalars as plain numbers and long values cut in the
middle.
"""
from __future__ import annotations

#: Longest rendering of a value in a message, characters.
MAX_SHOWN = 240

#: Items of a list or mapping shown before "..."; values nested deeper than
#: ``_SHOWN_DEPTH`` are shown as "...". Both keep a message cheap to build
#: even for a 100,000-item list.
_SHOWN_ITEMS = 40
_SHOWN_DEPTH = 6


class InputError(Exception):
    """Bad input: a recipe key, a value, a file or a request that cannot be met.

    Args:
        message: what is wrong, one sentence, without the key or file.
        key: dotted recipe key such as ``crystal.a`` (or a command-line option).
        value: the offending value as given.
        hint: what would be accepted.
        file: the file the input came from.
        line: 1-based line in ``file`` where known.
    """

    _UNSET = object()

    def __init__(self, message: str, *, key: str | None = None, value=_UNSET,
                 hint: str | None = None, file: str | None = None,
                 line: int | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.key = key
        self.value = value
        self.hint = hint
        self.file = file
        self.line = line

    @property
    def has_value(self) -> bool:
        return self.value is not InputError._UNSET

    def located(self, file: str | None = None, line: int | None = None) -> "InputError":
        """The same error with the file (and line) filled in where still unknown."""
        if self.file is None and file is not None:
            self.file = file
        if self.line is None and line is not None:
            self.line = line
        return self

    def __str__(self) -> str:
        where = ""
        if self.file:
            where = one_line(str(self.file))
            if self.line:
                where += f", line {self.line}"
            where += ": "
        what = ""
        if self.key:
            what = f"`{show_key(self.key)}`"
            if self.has_value:
                what += f" = {_show(self.value)}"
            what += ": "
        text = f"{where}{what}{one_line(str(self.message))}"
        if self.hint:
            text = text.rstrip(".") + f"; {one_line(str(self.hint))}"
        return text.rstrip(".") + "."


def one_line(text: str) -> str:
    """``text`` with every non-printable character (newline, tab, escape,
    U+2028...) written as its Python escape, so that it stays on one line."""
    if text.isprintable():
        return text
    return "".join(ch if ch.isprintable() else ch.encode("unicode_escape").decode("ascii")
                   for ch in text)


def show_key(key) -> str:
    """A recipe key for a message, between backticks: escaped like :func:`one_line`,
    with a backtick in the key written as ``\\x60`` so the quoting stays unambiguous."""
    return one_line(str(key)).replace("`", "\\x60")


def _show(value) -> str:
    """A short, single-line rendering of a recipe value for messages."""
    text = _render(value, 0)
    # keep both ends of long values: a path's tail is often the informative part
    return text if len(text) <= MAX_SHOWN else text[:150] + " ... " + text[-85:]


def _render(value, depth: int) -> str:
    if depth > _SHOWN_DEPTH:
        return "..."
    if type(value).__module__ == "numpy":
        # np.int64(1) -> 1, arrays -> lists: numbers as a recipe writes them
        value = value.tolist() if hasattr(value, "tolist") else value
    if isinstance(value, (list, tuple)):
        items = [_render(v, depth + 1) for v in value[:_SHOWN_ITEMS]]
        if len(value) > _SHOWN_ITEMS:
            items.append("...")
        open_, close = ("[", "]") if isinstance(value, list) else ("(", ")")
        return open_ + ", ".join(items) + close
    if isinstance(value, dict):
        items = [f"{_render(k, depth + 1)}: {_render(v, depth + 1)}"
                 for k, v in list(value.items())[:_SHOWN_ITEMS]]
        if len(value) > _SHOWN_ITEMS:
            items.append("...")
        return "{" + ", ".join(items) + "}"
    if isinstance(value, int) and not isinstance(value, bool) and value.bit_length() > 800:
        # str() of a huge int is quadratic and limited to 4,300 digits
        return f"<a whole number of about {int(value.bit_length() * 0.30103) + 1:,} digits>"
    if isinstance(value, str) and len(value) > 4 * MAX_SHOWN:
        value = value[:2 * MAX_SHOWN] + value[-MAX_SHOWN:]  # only the ends are shown anyway
    return one_line(repr(value))


def interruption_behind(exc: BaseException) -> BaseException | None:
    """The ``KeyboardInterrupt`` or ``SystemExit`` (a signal handler's) that ``exc``
    was raised from, if any, or None.

    A signal that arrives while a compiled extension module initialises (the
    first ``import spglib`` of a build, say) reaches the caller as an
    ``ImportError("initialization failed")`` caused by the handler's exception:
    that is the signal, not a bug, and must end the run as the signal would.
    """
    seen = set()
    link = exc
    while link is not None and id(link) not in seen:
        if isinstance(link, (KeyboardInterrupt, SystemExit)):
            return link
        seen.add(id(link))
        link = link.__cause__ or link.__context__
    return None
