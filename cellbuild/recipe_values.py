"""Checks of single recipe values, shared by the recipe dataclasses and the parser.

Each check takes the value and the dotted key it sits at, returns the value
normalised (``int``/``float``/``str``, numpy scalars as Python numbers) and
raises :class:`~cellbuild.errors.InputError` naming the key and the value
otherwise. No heavy imports: ``ase.data`` only for element symbols, lazily.
"""
from __future__ import annotations

import difflib
import math
import numbers
from typing import Any

from .errors import InputError

#: Whole numbers must fit a signed 64-bit integer (numpy's default integer).
MAX_INTEGER = 2**63 - 1


def fail(key: str, value: Any, message: str, hint: str | None = None):
    raise InputError(message, key=key, value=value, hint=hint)


def kind(value: Any) -> str:
    """What a value is, in a recipe's words ("text", "a list", "true/false")."""
    if value is None:
        return "empty"
    return {dict: "a mapping", list: "a list", tuple: "a list", str: "text",
            bool: "true/false"}.get(type(value), type(value).__name__)


def store(obj, name: str, value) -> None:
    """Store a normalised field value on a frozen dataclass (from ``__post_init__`` only)."""
    object.__setattr__(obj, name, value)


def exclusive(obj, names: tuple[str, ...], prefix: str, *, required: bool) -> str | None:
    """The one of ``names`` that is set on ``obj``; refuses two (and none if ``required``)."""
    given = [n for n in names if getattr(obj, n) is not None]
    if len(given) > 1:
        fail(join(prefix, given[1]), getattr(obj, given[1]),
             f"cannot be given together with `{join(prefix, given[0])}`",
             f"give exactly one of {', '.join(names)}")
    if required and not given:
        raise InputError(f"needs one of {', '.join(names)}", key=prefix or None)
    return given[0] if given else None


def _is_bool(value: Any) -> bool:
    return isinstance(value, bool) or type(value).__name__ == "bool_"  # numpy.bool_ too


def number(value: Any, key: str, *, positive: bool = True) -> float:
    """A finite real number (greater than zero unless ``positive=False``) as float."""
    if _is_bool(value) or not isinstance(value, numbers.Real):
        fail(key, value, f"must be a number, not {kind(value)}")
    try:
        result = float(value)
    except OverflowError:  # an int beyond 1.8e308
        fail(key, value, "is too large", "recipe lengths and densities are small numbers")
    if not math.isfinite(result):
        fail(key, value, "must be a finite number")
    if positive and result <= 0:
        fail(key, value, "must be greater than zero")
    return result


def integer(value: Any, key: str, *, minimum: int = 0) -> int:
    """A whole number (a float with no fraction part is accepted) of at least ``minimum``."""
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    if _is_bool(value) or not isinstance(value, numbers.Integral):
        fail(key, value, f"must be a whole number, not {kind(value)}")
    value = int(value)
    if value < minimum:
        fail(key, value, f"must be at least {minimum}")
    if value > MAX_INTEGER:
        fail(key, value, "is too large: must be below 2**63")
    return value


def fraction(value: Any, key: str) -> float:
    """A number between 0 and 1."""
    result = number(value, key, positive=False)
    if not 0.0 <= result <= 1.0:
        fail(key, value, "must lie between 0 and 1")
    return result


def boolean(value: Any, key: str) -> bool:
    """``true`` or ``false`` (a YAML 1.2 boolean; yes/no/on/off are text)."""
    if not isinstance(value, bool):
        fail(key, value, f"must be true or false, not {kind(value)}",
             "write true or false (yes, no, on and off are not booleans in YAML 1.2)")
    return value


def text(value: Any, key: str) -> str:
    if not isinstance(value, str):
        fail(key, value, f"must be text, not {kind(value)}")
    return value


def element(value: Any, key: str) -> str:
    """A chemical element symbol as ASE spells it (``Cu``, not ``cu``)."""
    from ase.data import atomic_numbers, chemical_symbols

    symbol = text(value, key)
    if symbol not in atomic_numbers or symbol == "X":
        near = difflib.get_close_matches(symbol.capitalize()[:8], chemical_symbols[1:], n=1,
                                         cutoff=0.5)
        hint = f"did you mean `{near[0]}`? " if near else ""
        fail(key, value, "is not a chemical element symbol",
             f"{hint}use a symbol such as Cu, Fe or Si (capitalised)")
    return symbol


def mapping(value: Any, key: str, message: str, hint: str | None = None) -> dict:
    """A mapping given as a dict or as a tuple of (key, value) pairs (the parser
    passes YAML mappings as pairs; a YAML list is refused, not read as pairs)."""
    if isinstance(value, dict):
        return dict(value)
    if isinstance(value, tuple) and all(isinstance(x, tuple) and len(x) == 2 for x in value):
        return dict(value)
    fail(key, value, message, hint)


def sequence(value: Any, key: str, message: str) -> tuple:
    """A list, tuple or numpy array as a tuple (of Python numbers, for an array)."""
    if type(value).__module__ == "numpy" and getattr(value, "ndim", 0) == 1:
        value = value.tolist()
    if isinstance(value, (str, bytes)) or not isinstance(value, (list, tuple)):
        fail(key, value, message)
    return tuple(value)


def join(prefix: str, key: str | None) -> str:
    """``prefix`` + ``key`` as a dotted recipe key: ``a`` + ``b`` -> ``a.b``,
    ``a`` + ``[0].b`` -> ``a[0].b``."""
    if not key:
        return prefix
    if not prefix:
        return key
    return f"{prefix}{key}" if key.startswith("[") else f"{prefix}.{key}"


#: Largest |index| of a direction or supercell-matrix entry.
MAX_INDEX = 100


def index_triple(value: Any, key: str) -> tuple[int, int, int]:
    """Three whole numbers (a lattice direction or a matrix row), not all zero."""
    message = "must be a list of three whole numbers, such as [1, -1, 0]"
    items = sequence(value, key, message)
    if len(items) != 3:
        fail(key, value, message)
    out = tuple(integer(x, f"{key}[{i}]", minimum=-MAX_INDEX) for i, x in enumerate(items))
    if any(abs(x) > MAX_INDEX for x in out):
        fail(key, list(out), f"has an index beyond {MAX_INDEX}")
    if not any(out):
        fail(key, list(out), "is the zero vector", "give a direction")
    return out
