"""Error types that cross module boundaries.

``InputError`` is the one exception the command line turns into exit code 2: it
carries the recipe key (a dotted path), the offending value, a hint and, where
known, the file and line. Everything else that escapes is a bug.
"""
from __future__ import annotations


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
            where = f"{self.file}"
            if self.line:
                where += f", line {self.line}"
            where += ": "
        what = ""
        if self.key:
            what = f"`{self.key}`"
            if self.has_value:
                what += f" = {_show(self.value)}"
            what += ": "
        text = f"{where}{what}{self.message}"
        if self.hint:
            text = text.rstrip(".") + f"; {self.hint}"
        return text.rstrip(".") + "."


def _show(value) -> str:
    """A short, single-line rendering of a recipe value for messages."""
    text = repr(value)
    # keep both ends of long values: a path's tail is often the informative part
    return text if len(text) <= 240 else text[:150] + " ... " + text[-85:]
