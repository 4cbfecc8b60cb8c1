"""The `cellbuild` command line: a thin layer over :mod:`cellbuild.pipeline`.

Exit codes: 0 success, 1 a check failed, 2 bad input (nothing written).
"""
from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import List, Optional

import typer

from .errors import InputError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Build, check and write cubic crystal structures from YAML recipes.",
    pretty_exceptions_enable=False,
)

EXIT_OK, EXIT_FAILED_CHECK, EXIT_BAD_INPUT = 0, 1, 2


class _State:
    debug = False


def _fail(exc: BaseException) -> "typer.Exit":
    """Print one clear sentence for bad input and return the exit to raise."""
    if _State.debug:
        import traceback

        traceback.print_exception(exc)
    typer.echo(f"error: {exc}", err=True)
    return typer.Exit(EXIT_BAD_INPUT)


def _os_error(exc: OSError) -> InputError:
    where = exc.filename or ""
    return InputError(f"cannot write ({exc.strerror or exc})", key="--out", value=str(where))


@app.callback()
def _root(debug: bool = typer.Option(False, "--debug", help="Show a traceback on errors.")) -> None:
    _State.debug = debug


@app.command()
def make(
    recipes: List[Path] = typer.Argument(..., help="Recipe files (YAML)."),
    out: Path = typer.Option(..., "--out", "-o", help="Output folder."),
    force: bool = typer.Option(False, "--force", help="Replace existing outputs."),
    strict: bool = typer.Option(False, "--strict", help="Treat implausible values as errors."),
) -> None:
    """Build each recipe, audit it and write its files and NAME.report.json."""
    from .pipeline import check_outputs_free, make as make_one
    from .build import resolve
    from .defects import planned_counts
    from .recipe import load_recipe

    try:
        loaded = [load_recipe(p) for p in recipes]
        names = [r.name for r in loaded]
        dup = next((n for n in names if names.count(n) > 1), None)
        if dup:
            raise InputError("is used by more than one recipe", key="name", value=dup,
                             hint="give each recipe its own name")
        for r in loaded:  # refuse every bad recipe before writing anything
            planned_counts(resolve(r, strict=strict))
        check_outputs_free(loaded, out, force)
    except InputError as exc:
        raise _fail(exc) from None
    code = EXIT_OK
    for recipe in loaded:
        try:
            result = make_one(recipe, out, force=True, strict=strict,
                              progress=_progress(recipe.name))
        except InputError as exc:
            raise _fail(exc) from None
        except OSError as exc:
            raise _fail(_os_error(exc)) from None
        _summary(result)
        if not result.passed:
            code = EXIT_FAILED_CHECK
    raise typer.Exit(code)


def _progress(name: str):
    """Phase messages on a terminal; silent when output is piped."""
    if not sys.stderr.isatty():
        return None
    import time

    start = time.perf_counter()

    def note(phase: str) -> None:
        typer.echo(f"  {name}: {phase} ... ({time.perf_counter() - start:.1f} s)", err=True)

    return note


def _summary(result) -> None:
    r = result.report
    box = " x ".join(f"{x:.3f}" for x in r["cell_lengths"])
    passed = sum(c["passed"] for c in r["checks"])
    verdict = "all checks passed" if result.passed else "CHECKS FAILED"
    typer.echo(f"{r['name']}: {r['n_atoms']:,} atoms, {r['lattice']} {r['element']} "
               f"a = {r['lattice_constant']:.5f} A, box {box} A; "
               f"{passed}/{len(r['checks'])} checks passed ({verdict})")
    for c in r["checks"]:
        if not c["passed"]:
            typer.echo(f"  failed {c['name']}: {c['detail']}")
    for key, info in r["outputs"].items():
        typer.echo(f"  {key:12s} {info['path']}  {info['bytes']:,} bytes")
    typer.echo(f"  report       {result.report_path}")


@app.command()
def plan(
    recipe: Path = typer.Argument(..., help="Recipe file (YAML)."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
    strict: bool = typer.Option(False, "--strict", help="Treat implausible values as errors."),
) -> None:
    """Resolve a recipe without building: lattice constant, size, counts, estimates."""
    from .planview import describe_plans

    try:
        plans = describe_plans(recipe, strict=strict)
    except InputError as exc:
        raise _fail(exc) from None
    if as_json:
        typer.echo(json.dumps(plans if len(plans) > 1 else plans[0], indent=2))
        return
    for p in plans:
        typer.echo(_plan_text(p))


def _plan_text(p: dict) -> str:
    lines = [
        f"{p['name']}: {p['lattice']} {p['element']}",
        f"  lattice constant  {p['lattice_constant']:.6f} A ({p['lattice_constant_source']})",
        f"  repeat            {' x '.join(map(str, p['repeat']))} conventional cells",
        f"  box               {' x '.join(f'{x:.4f}' for x in p['box'])} A",
        f"  atoms             {p['n_atoms']:,} ({p['n_sites']:,} lattice sites)",
    ]
    for d in p["defects"]:
        lines.append(f"  {d['kind']:17s} {d['placed']:,} {d['element']} on {d['on']} ({d['key']})")
    lines.append(f"  memory (est.)     {p['estimated_memory_bytes'] / 1e6:,.1f} MB")
    for key, size in p["estimated_file_bytes"].items():
        lines.append(f"  {key:17s} ~{size / 1e6:,.2f} MB")
    for w in p["warnings"]:
        lines.append(f"  warning: {w}")
    return "\n".join(lines)


@app.command()
def template(lattice: str = typer.Argument(..., help="sc, bcc, fcc or diamond.")) -> None:
    """Print a commented recipe for LATTICE that `make` accepts as it is."""
    from .templates import template_for

    try:
        typer.echo(template_for(lattice), nl=False)
    except InputError as exc:
        raise _fail(exc) from None


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        typer.echo("interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()
