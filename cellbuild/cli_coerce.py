"""Command-line values turned into Python values without importing pydantic.

Recent Typer releases (0.2x) coerce every parameter value through a pydantic
``TypeAdapter``, built the first time a command runs; importing pydantic and
building the adapters took about 110 ms of the 0.4 s a `cellbuild plan` takes,
while our commands only take text, numbers, paths, flags and lists of paths.
For those five types, :func:`command` gives each parameter a coercion that does what
Typer's adapter does with a value from the command line (a path: ``Path(text)``,
then Typer's own existence and permission checks; text: the text itself), and
leaves every other type and every unexpected value to Typer's own adapter, so
messages, exit codes and results stay Typer's. With a Typer that has no such
coercion layer (older releases), nothing is changed.
"""
from __future__ import annotations

import re
from pathlib import Path
from typing import Any, List


def command(app) -> Any:
    """The click command of the Typer ``app``, its plain parameters primed to skip
    pydantic. Run it with ``.main(args=..., prog_name=..., standalone_mode=False)``,
    as ``app(...)`` would (with pretty exceptions off, the two are the same)."""
    import typer.main

    cmd = typer.main.get_command(app)
    plain = _plain_class()
    if plain is not None:
        for sub in _commands(cmd):
            for param in [*sub.params, *_help_option(sub)]:
                if (getattr(param, "_runtime_param", False) is None
                        and _is_plain(getattr(param, "type_descriptor", None))):
                    param._runtime_param = plain(parameter_info=param.type_descriptor.parameter_info,
                                                 annotation=param.type_descriptor.annotation)
    return cmd


def _help_option(cmd) -> list:
    """``cmd``'s --help option, made now (click makes it once per command, on first
    use, from the context's help option names: ``--help`` unless settings say
    otherwise, in which case it is left to be made then)."""
    if getattr(cmd, "context_settings", None) or not hasattr(cmd, "get_help_option"):
        return []
    from typer._click import Context  # Typers with the coercion layer ship click inside

    option = cmd.get_help_option(Context(cmd))
    return [option] if option is not None else []


def _commands(cmd) -> list:
    """``cmd`` and every command below it (groups of groups included)."""
    found, todo = [], [cmd]
    while todo:
        current = todo.pop()
        found.append(current)
        todo += list(getattr(current, "commands", {}).values())
    return found


_PATHS = (List[Path], list[Path])
_PLAIN = (str, bool, float, Path, *_PATHS)
#: A number written the way every parser reads alike (no inf, nan, underscores,
#: spaces or leading zeros): float(text) is pydantic's answer for it; any other
#: text goes to Typer's adapter, which words the refusal.
_PLAIN_FLOAT = re.compile(r"[+-]?(?:0|[1-9][0-9]*)(?:\.[0-9]+)?(?:[eE][+-]?[0-9]+)?")


def _is_plain(descriptor) -> bool:
    return (descriptor is not None and descriptor.annotation in _PLAIN
            and descriptor.file_annotation is None and not descriptor.is_choice
            and getattr(descriptor.parameter_info, "parser", None) is None
            and getattr(descriptor.parameter_info, "path_type", None) is None)


def _plain_class():
    """A Typer ``RuntimeParam`` for text, flags, paths and lists of paths, or None
    when this Typer has no such layer."""
    try:
        from dataclasses import dataclass

        from typer._coercion import RuntimeParam, build_runtime_param
        from typer._param_types import coerce_cli_path
    except ImportError:
        return None

    @dataclass(frozen=True)
    class PlainRuntimeParam(RuntimeParam):
        """What Typer's adapters return for a command-line text (``str``): the text
        for ``str``, ``float(text)`` for a plainly written ``float``, ``Path(text)``
        plus Typer's checks for ``Path``, a list of those for ``List[Path]``.
        Anything else goes to Typer's adapter."""

        def _coerce_value(self, value: Any, param, ctx) -> Any:
            annotation = self.annotation
            if annotation is str and isinstance(value, str):
                return value
            if annotation is bool and isinstance(value, bool):
                return value
            if annotation is float and isinstance(value, str) and _PLAIN_FLOAT.fullmatch(value):
                return float(value)
            if annotation is Path and isinstance(value, str):
                return self._path(value, param, ctx)
            if (annotation in _PATHS and isinstance(value, (list, tuple))
                    and all(isinstance(item, str) for item in value)):
                return [self._path(item, param, ctx) for item in value]
            typer_own = build_runtime_param(param.type_descriptor)
            return typer_own._coerce_value(value, param=param, ctx=ctx)

        def _path(self, text: str, param, ctx) -> Path:
            # pydantic's Path validator is Path(text) for a str (including "" -> ".");
            # given a Path, Typer's coerce_cli_path skips pydantic and runs its checks
            return coerce_cli_path(Path(text), self.parameter_info, path_type=Path,
                                   param=param, ctx=ctx)

    return PlainRuntimeParam
