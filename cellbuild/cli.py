"""The `cellbuild` command line: a thin layer over :mod:`cellbuild.pipeline`.

Exit codes: 0 success, 1 a check failed, 2 bad input (nothing written), 3 a bug in
cellbuild (one sentence asking for a report; ``--debug`` shows the traceback), 141 the
reader of standard output went away (``cellbuild ... | head``), 130 / 143 interrupted or
terminated (no partial files are left).
"""
from __future__ import annotations

import contextlib
import json
import sys
from pathlib import Path
from typing import List, Optional

import typer

from .cli_text import batch_summary, plan_text, summary
from .errors import InputError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Build, check and write cubic crystal structures from YAML recipes.",
    pretty_exceptions_enable=False,
    # plain help text: the rich layout costs about 65 ms of start-up (its import) on every --help
    rich_markup_mode=None,
)

EXIT_OK, EXIT_FAILED_CHECK, EXIT_BAD_INPUT, EXIT_BUG = 0, 1, 2, 3
#: 128 + the signal number, as a shell reports a process ended by that signal.
EXIT_INTERRUPTED, EXIT_BROKEN_PIPE, EXIT_TERMINATED = 130, 141, 143

SCHEDULER_HELP = ("Run on Dask: tcp://HOST:PORT or a scheduler file of a running cluster, or "
                  "`local` for a local Dask cluster (needs the `cluster` extra).")


class _State:
    debug = False


def _fail(exc: BaseException) -> "typer.Exit":
    """Print one clear sentence for bad input and return the exit to raise."""
    if _State.debug:
        import traceback

        traceback.print_exception(exc)
    typer.echo(f"error: {exc}", err=True)
    return typer.Exit(EXIT_BAD_INPUT)


def _os_error(exc: OSError, out: Path | None) -> InputError:
    """A write failure (disk full, permissions) as bad input naming the file or folder."""
    where = exc.filename or (str(out) if out is not None else None)
    what = exc.strerror or type(exc).__name__
    if where is None:
        return InputError(f"cannot write the outputs ({what})", key="--out")
    return InputError(f"cannot write ({what})", key="--out", value=str(where))


@contextlib.contextmanager
def _bad_input_exits(out: Path | None = None):
    """Turn bad input (and write failures under ``out``) inside the block into exit 2.

    A closed standard output (BrokenPipeError) is not a write failure of ours:
    it passes through to :func:`main`.
    """
    try:
        yield
    except InputError as exc:
        raise _fail(exc) from None
    except BrokenPipeError:
        raise
    except OSError as exc:
        raise _fail(_os_error(exc, out)) from None


def _positive_workers(workers: Optional[str]) -> Optional[int]:
    """``--workers`` as a whole number of at least 1 (None: every core)."""
    if workers is None:
        return None
    try:
        count = int(workers)
    except ValueError:
        count = 0
    if count < 1 or str(count) != workers.strip():
        raise InputError("must be a whole number of at least 1", key="--workers", value=workers,
                         hint="leave it out to use every core")
    return count


@app.callback()
def _root(debug: bool = typer.Option(False, "--debug", help="Show a traceback on errors.")) -> None:
    _State.debug = debug


@app.command(short_help="Build, audit and write recipes.")
def make(
    recipes: List[Path] = typer.Argument(..., help="Recipe files (YAML)."),
    out: Path = typer.Option(..., "--out", "-o", help="Output folder."),
    force: bool = typer.Option(False, "--force", help="Replace existing outputs."),
    strict: bool = typer.Option(False, "--strict", help="Treat implausible values as errors."),
) -> None:
    """Build each recipe, audit it and write its files and NAME.report.json."""
    from collections import Counter

    from .memory import REUSE_MEMORY_ATOMS, reuse_freed_memory
    from .pipeline import build, check_outputs_free, make as make_one
    from .build import resolve

    with _bad_input_exits(out):
        loaded = _load_points(recipes)
        names = [r.name for r in loaded]
        dup = next((n for n, k in Counter(names).items() if k > 1), None)  # linear: sweeps are long
        if dup:
            raise InputError("is used by more than one recipe", key="name", value=dup,
                             hint="give each recipe its own name")
        atoms = max(resolve(r, strict=strict).n_atoms for r in loaded)  # refuse bad recipes first
        check_outputs_free(loaded, out, force)
        if atoms >= REUSE_MEMORY_ATOMS:  # this process ends after the build: keep freed pages
            reuse_freed_memory()
        if len(loaded) > 1:
            # placement can still refuse (min_separation): place every recipe's
            # defects once before the first file is written
            for r in loaded:
                build(r, strict=strict)
    code = EXIT_OK
    for recipe in loaded:
        with _bad_input_exits(out):
            result = make_one(recipe, out, force=force, strict=strict,
                              progress=_progress(recipe.name))
        summary(result)
        if not result.passed:
            code = EXIT_FAILED_CHECK
    raise typer.Exit(code)


def _load_points(paths: List[Path]) -> list:
    """Every structure the recipe files stand for: one per sweep point (validated)."""
    from .sweep import expand_file

    return [point.recipe for path in paths for point in expand_file(path)]


def _progress(name: str):
    """Phase messages on a terminal; silent when output is piped."""
    if not sys.stderr.isatty():
        return None
    import time

    start = time.perf_counter()

    def note(phase: str) -> None:
        typer.echo(f"  {name}: {phase} ... ({time.perf_counter() - start:.1f} s)", err=True)

    return note


@app.command(short_help="Resolve a recipe without building.")
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
        typer.echo(plan_text(p))


@app.command(short_help="Print a commented recipe for a lattice.")
def template(lattice: str = typer.Argument(..., help="a lattice or prototype: fcc, rocksalt, ...")) -> None:
    """Print a commented recipe for LATTICE that `make` accepts as it is."""
    from .templates import template_for

    try:
        typer.echo(template_for(lattice), nl=False)
    except InputError as exc:
        raise _fail(exc) from None


@app.command(short_help="Build a folder of recipes into a library.")
def batch(
    source: Path = typer.Argument(..., metavar="DIR",
                                  help="Folder of recipes, searched recursively for *.yaml and *.yml."),
    out: Path = typer.Option(..., "--out", "-o", help="Library folder; gets OUT/manifest.json."),
    workers: Optional[str] = typer.Option(None, "--workers", "-j", metavar="N",
                                          help="Worker processes (default: all cores)."),
    junit: Optional[Path] = typer.Option(None, "--junit", help="Also write a JUnit XML report."),
    collect: Optional[Path] = typer.Option(None, "--collect", metavar="FILE",
                                           help="Also gather every structure into one multi-frame extended XYZ file."),
    db: Optional[str] = typer.Option(None, "--db", metavar="DB",
                                     help="Also write every structure into an ASE database (NAME.db or a URL)."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", metavar="ADDRESS", help=SCHEDULER_HELP),
    sync: str = typer.Option("file", "--sync", metavar="file|end",
                             help="Flush each file to disk as it is written (file), or all files "
                                  "once before the manifest (end: faster on a busy disk)."),
) -> None:
    """Build every recipe under DIR (every sweep point) in parallel into OUT.

    Outputs mirror the recipe folders (DIR/a/b.yaml writes into OUT/a/), and
    OUT/manifest.json records every structure, its recipe and the sha256 of
    every file. Building into an existing OUT is a rebuild of the library: the
    files it writes are replaced, files the previous manifest listed that are
    no longer produced are removed, other files are left alone (`verify`
    reports leftover outputs as extra). A bad recipe is recorded as an error
    and the others are still built. Exit code: 0 all passed, 1 a check
    failed, 2 a recipe could not be built.
    """
    from .batch import ProgressBar, build_library, outcome_line, write_junit

    bar = ProgressBar() if sys.stderr.isatty() else None
    on_done = bar.update if bar else (lambda o: typer.echo(outcome_line(o)))
    try:
        with _bad_input_exits(out):
            workers = _positive_workers(workers)
            if collect is not None or db is not None:
                from .training_sets import check_targets

                check_targets(collect, db)
            from .executors import open_executor

            with open_executor(scheduler, workers) as executor:
                result = build_library(source, out, executor=executor, sync=sync,
                                       on_done=on_done, on_planned=bar.planned if bar else None)
            if junit is not None:
                write_junit(junit, result.outcomes)
    finally:
        if bar:
            bar.close()
    batch_summary(result, show_problems=bar is not None)
    with _bad_input_exits(out):
        if collect is not None or db is not None:
            from .training_sets import collect as collect_frames, to_database

            if collect is not None:
                n = collect_frames(Path(out), result.manifest, collect)
                typer.echo(f"collected {n} structure(s) into {collect}")
            if db is not None:
                written, updated = to_database(Path(out), result.manifest, db)
                typer.echo(f"database {db}: {written} row(s) written, {updated} updated")
    raise typer.Exit(result.exit_code)


@app.command(short_help="Rebuild a library and compare bytes.")
def verify(
    manifest: Path = typer.Argument(..., help="OUT/manifest.json written by `cellbuild batch`."),
    workers: Optional[str] = typer.Option(None, "--workers", "-j", metavar="N",
                                          help="Worker processes (default: all cores)."),
    db: Optional[str] = typer.Option(None, "--db", metavar="DB",
                                     help="Also check the ASE database rows against the manifest."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", metavar="ADDRESS", help=SCHEDULER_HELP),
    scratch: Optional[Path] = typer.Option(None, "--scratch", metavar="DIR",
                                           help="Folder for the rebuild (default: TMPDIR); on a "
                                                "cluster, one every worker sees."),
) -> None:
    """Rebuild every manifest entry in a temporary folder and compare bytes.

    Prints one line per difference (recipe changed or missing, output changed,
    changed on disk, missing, extra, entries no longer produced or new).
    Exit code: 0 everything matches, 1 something differs, 2 unreadable manifest.
    """
    from .batch import ProgressBar
    from .verify import verify as verify_manifest

    bar = ProgressBar(label="rebuilding") if sys.stderr.isatty() else None
    try:
        with _bad_input_exits():
            workers = _positive_workers(workers)
            from .executors import open_executor

            with open_executor(scheduler, workers) as executor:
                result = verify_manifest(manifest, executor=executor, scratch=scratch,
                                         on_planned=bar.planned if bar else None,
                                         on_done=bar.update if bar else None)
    finally:
        if bar:
            bar.close()
    for difference in result.differences:
        typer.echo(difference.line())
    if db is not None:
        from .manifest import read_manifest
        from .training_sets import check_database

        with _bad_input_exits():
            rows = check_database(read_manifest(manifest), db)
        for name, what in rows:
            typer.echo(f"{name}: {what}")
        if rows:
            typer.echo(f"{len(rows)} database row(s) differ from the manifest")
            raise typer.Exit(EXIT_FAILED_CHECK)
    if result.ok:
        typer.echo(f"verified: all {result.n_entries} structure(s) match the manifest")
        raise typer.Exit(EXIT_OK)
    typer.echo(f"{len(result.differences)} difference(s) against the manifest "
               f"({result.n_entries} structure(s) listed)")
    raise typer.Exit(EXIT_FAILED_CHECK)


@app.command("inspect", short_help="Check structure files before a run.")
def inspect_files(
    files: List[Path] = typer.Argument(..., metavar="FILE...",
                                       help="CIF, (extended) XYZ, LAMMPS data or POSCAR files."),
    types: Optional[str] = typer.Option(None, "--types",
                                        help="Element of each LAMMPS atom type, e.g. Cu,Ni."),
    expect: Optional[str] = typer.Option(None, "--expect",
                                         help="Fail unless the file matches sc, bcc, fcc, diamond or hcp."),
    cutoff: Optional[float] = typer.Option(None, "--cutoff",
                                           help="Neighbour cutoff in Angstrom (default: automatic)."),
    potential_cutoff: Optional[float] = typer.Option(
        None, "--potential-cutoff", help="Fail unless every box width is at least 2x this (A)."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON (a list for several files)."),
    plot: Optional[Path] = typer.Option(None, "--plot", help="Write g(r) and coordination PNG "
                                        "(several files: PLOT-STEM-<file stem>.png)."),
) -> None:
    """Check structure files before an expensive run: counts, neighbours, lattice, box.

    Prints atom count, composition, cell, density, closest pairs, neighbour
    shells, coordination per species, the cubic lattice matched, inferred point
    defects and the space group. Exit code: 0 all checks passed, 1 a check
    failed, 2 a file (or an option) could not be used.
    """
    from .inspection import describe, inspect_file, plot_paths
    from .memory import REUSE_MEMORY_FILE_BYTES, reuse_freed_memory

    try:
        symbols = _inspect_options(types, expect, cutoff, potential_cutoff, plot)
    except InputError as exc:
        raise _fail(exc) from None
    results, code = [], EXIT_OK
    if any(_file_bytes(path) >= REUSE_MEMORY_FILE_BYTES for path in files):
        reuse_freed_memory()  # this process ends after the files: keep freed pages
    for path, png in zip(files, plot_paths(plot, files)):
        try:
            result = inspect_file(path, types=symbols, cutoff=cutoff, expect=expect,
                                  potential_cutoff=potential_cutoff, plot=png)
        except (InputError, OSError, MemoryError) as exc:
            if isinstance(exc, MemoryError):  # the other files are still inspected
                exc = InputError("needs more memory than this machine has", file=str(path))
            elif isinstance(exc, OSError):
                exc = InputError(f"cannot write the plot ({exc.strerror or exc})",
                                 key="--plot", value=str(png))
            _fail(exc)  # prints the sentence; the other files are still inspected
            results.append({"file": str(path), "error": str(exc), "passed": False})
            code = EXIT_BAD_INPUT
            continue
        results.append(result)
        if not result["passed"] and code == EXIT_OK:
            code = EXIT_FAILED_CHECK
        if not as_json:
            typer.echo(describe(result))
    if as_json and (len(files) > 1 or code != EXIT_BAD_INPUT):
        typer.echo(json.dumps(results if len(files) > 1 else results[0], indent=2))
    raise typer.Exit(code)


def _file_bytes(path: Path) -> int:
    """Size of ``path`` in bytes, 0 if it cannot be read (the reader names the problem)."""
    try:
        return path.stat().st_size
    except OSError:
        return 0


def _inspect_options(types, expect, cutoff, potential_cutoff, plot) -> Optional[list]:
    """Validate the options of `inspect`; the --types symbols as a list (or None)."""
    import math

    from .inspection import EXPECT_CHOICES

    for key, value in (("--cutoff", cutoff), ("--potential-cutoff", potential_cutoff)):
        if value is not None and not (math.isfinite(value) and value > 0):
            raise InputError("must be a positive distance in Angstrom", key=key, value=value)
    if expect is not None and expect not in EXPECT_CHOICES:
        raise InputError("is not a lattice cellbuild knows", key="--expect", value=expect,
                         hint=f"use one of {', '.join(EXPECT_CHOICES)}")
    if plot is not None and not Path(plot).parent.is_dir():
        raise InputError("is in a folder that does not exist", key="--plot", value=str(plot))
    if types is None:
        return None
    from ase.data import chemical_symbols

    symbols = [s.strip() for s in types.split(",")]
    bad = next((s for s in symbols if s not in chemical_symbols[1:]), None)
    if bad is not None:
        raise InputError(f"names {bad!r}, which is not a chemical symbol", key="--types",
                         value=types, hint="give one element per LAMMPS type, e.g. Cu,Ni")
    return symbols


def main(argv: Optional[List[str]] = None) -> None:
    """Console-script entry point: no traceback reaches the user without --debug.

    Bad input exits 2 with one sentence; an unexpected exception is a bug and
    exits 3 with one sentence asking for a report; SIGTERM (sent by `timeout`
    and job schedulers) ends the run like Ctrl-C, removing staged files.
    """
    import signal

    click = _click()

    def _terminate(signum, frame):
        raise SystemExit(EXIT_TERMINATED)

    signal.signal(signal.SIGTERM, _terminate)
    try:
        # app's command with text, flag and path values coerced without pydantic
        # (about 0.1 s of every run; see cli_coerce.py); otherwise what app(...) runs
        from .cli_coerce import command

        code = command(app).main(args=argv, prog_name="cellbuild", standalone_mode=False)
    except (KeyboardInterrupt, typer.Abort):
        _say("interrupted; no partial files were left")
        code = EXIT_INTERRUPTED
    except SystemExit as exc:
        if exc.code == EXIT_TERMINATED:
            _say("terminated; no partial files were left")
        if type(sys.stdout).__name__ == "PacifyFlushWrapper":
            # click met a closed stdout (EPIPE), swapped in this wrapper and exits 1,
            # which would read as "a check failed"
            sys.exit(_broken_pipe())
        raise
    except BrokenPipeError:
        code = _broken_pipe()
    except click.exceptions.NoArgsIsHelpError as exc:
        exc.show()  # `cellbuild` alone, or a command without arguments: the help text
        code = EXIT_BAD_INPUT
    except click.exceptions.ClickException as exc:
        # usage errors (unknown option, missing argument, wrong type): one sentence
        command = exc.ctx.command_path if getattr(exc, "ctx", None) else "cellbuild"
        _say(f"error: {exc.format_message().rstrip('.')}; see `{command} --help`.")
        code = EXIT_BAD_INPUT
    except MemoryError:
        # not a bug: an input that asks for more memory than this machine has and that
        # no earlier size check caught (readers and planners refuse most such inputs)
        _say("error: the input needs more memory than this machine has; use a smaller "
             "structure or file.")
        code = EXIT_BAD_INPUT
    except Exception as exc:  # a bug, not bad input: one sentence, its own exit code
        from .errors import interruption_behind

        signal_exc = interruption_behind(exc)  # a signal met inside an import, say
        if isinstance(signal_exc, KeyboardInterrupt):
            _say("interrupted; no partial files were left")
            sys.exit(EXIT_INTERRUPTED)
        if isinstance(signal_exc, SystemExit) and signal_exc.code == EXIT_TERMINATED:
            _say("terminated; no partial files were left")
            sys.exit(EXIT_TERMINATED)
        if _State.debug:
            raise
        text = " ".join(str(exc).split())[:300]
        _say(f"error: unexpected {type(exc).__name__} inside cellbuild ({text}); this is a bug: "
             "please report it with the command and its input, and rerun with --debug for "
             "the traceback.")
        code = EXIT_BUG
    sys.exit(code if isinstance(code, int) else EXIT_OK)


def _click():
    """The click package that Typer runs on (recent Typer releases vendor their own)."""
    try:
        from typer import _click as click  # Typer >= 0.25 ships click inside itself
    except ImportError:
        import click
    return click


def _say(text: str) -> None:
    """One line on standard error, even when standard error has gone away."""
    with contextlib.suppress(OSError):
        typer.echo(text, err=True)


def _broken_pipe() -> int:
    """The reader of our output went away: stop quietly, as `cat` and `grep` do."""
    import os

    # Python would report the failed flush of stdout at exit: point it at devnull
    with contextlib.suppress(OSError, ValueError):
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    return EXIT_BROKEN_PIPE


if __name__ == "__main__":
    main()
