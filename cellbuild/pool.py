"""Building many structures: one :func:`cellbuild.pipeline.make` per job, in a process pool.

Interruption is part of the design. A signal (SIGTERM from ``timeout`` or a job
scheduler, SIGINT from Ctrl-C) must not leave staged temporaries behind, so:

* each worker process turns SIGTERM and SIGINT into :class:`Terminated` (a
  ``SystemExit``), which unwinds through ``StagedFiles.__exit__`` (removing
  the temporaries) and then ends the worker;
* the parent, interrupted while it waits, terminates the workers (SIGTERM:
  the same clean unwinding), waits for them and re-raises;
* :func:`sigterm_as_interrupt` makes SIGTERM a ``KeyboardInterrupt`` in the
  parent for the duration of a build, unless the program has its own handler.
"""
from __future__ import annotations

import contextlib
import math
import os
import signal
import time
from dataclasses import replace
from pathlib import Path
from typing import Callable, Iterator, Sequence

from .errors import InputError, interruption_behind
from .outcomes import Job, Outcome, error_outcome

#: Largest number of structures sent to a worker at once: enough to make the
#: inter-process overhead negligible for 100-atom structures, small enough
#: that the last chunks still spread over the workers.
MAX_CHUNK = 16

#: Seconds the parent waits for terminated workers to clean up before killing them.
STOP_GRACE = 30.0

#: Native thread pools (OpenBLAS, OpenMP, MKL, ...) limited to one thread per worker.
_THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                     "BLIS_NUM_THREADS", "NUMEXPR_NUM_THREADS", "VECLIB_MAXIMUM_THREADS")


class Terminated(SystemExit):
    """Raised in a worker process by SIGTERM or SIGINT."""


def default_workers() -> int:
    """The cores this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not available on macOS and Windows
        return max(1, os.cpu_count() or 1)


# ----------------------------------------------------------------------------- one job


def build_job(job: Job) -> Outcome:
    """Build, audit and write one structure (runs in a worker process)."""
    from .pipeline import make

    start = time.perf_counter()
    try:
        # workers=1: the pool already uses every core; a second level of
        # threads in the neighbour search would only oversubscribe them.
        result = make(job.recipe, job.out_dir, force=True, recipe_sha256=job.recipe_sha256,
                      workers=1, sync=job.sync)
    except InputError as exc:
        return _input_error(job, exc, time.perf_counter() - start)
    except OSError as exc:
        error = InputError(f"cannot write ({exc.strerror or exc})", key="--out",
                           value=_shown_path(exc.filename, job), file=job.source.recipe)
        return error_outcome(job.name, job.source, job.recipe_sha256, error, job.sweep,
                             time.perf_counter() - start, write_problem=exc.strerror or str(exc))
    except Exception as exc:  # noqa: BLE001 -- a bug met by one structure must not stop the library
        signal_exc = interruption_behind(exc)  # a signal met inside an import, say
        if signal_exc is not None:
            raise signal_exc from None  # the worker stops, as the signal asks
        return crashed(job, exc)
    report = result.report
    prefix = f"{job.source.rel_dir}/" if job.source.rel_dir else ""
    outputs = {key: {"path": prefix + Path(info["path"]).as_posix(), "sha256": info["sha256"],
                     "bytes": info["bytes"]}
               for key, info in report["outputs"].items()}
    for key in ("report", "defects", "lammps_groups"):
        if key in result.sidecars:
            written = result.sidecars[key]
            outputs[key] = {"path": prefix + written.path.name, "sha256": written.sha256,
                            "bytes": written.bytes}
    failed = tuple({"name": c["name"], "detail": c["detail"]}
                   for c in report["checks"] if not c["passed"])
    return Outcome(name=job.name, source=job.source, recipe_sha256=job.recipe_sha256,
                   sweep=job.sweep, seed=report["seed"], n_atoms=report["n_atoms"],
                   passed=bool(report["passed"]), outputs=outputs, failed_checks=failed,
                   warnings=tuple(str(w) for w in report.get("warnings") or ()),
                   seconds=time.perf_counter() - start)


def _shown_path(filename, job: Job) -> str:
    """A path in an error: relative to the job's folder when inside it (not a temporary's)."""
    if not filename:
        return job.out_dir
    name = os.path.basename(os.fsdecode(filename))
    from .fileio import is_temporary

    if is_temporary(name):  # the user never asked for that file: name the folder
        return job.out_dir
    return _in_library(os.fsdecode(filename), job)


def _in_library(path: str, job: Job) -> str:
    """``path`` relative to the library (OUT) when inside the job's folder: the
    message goes into the manifest, which must not depend on how OUT was named."""
    if not _in_folder(path, job.out_dir):
        return path
    prefix = f"{job.source.rel_dir}/" if job.source.rel_dir else ""
    return prefix + Path(os.path.relpath(path, job.out_dir)).as_posix()


def _input_error(job: Job, exc: InputError, seconds: float) -> Outcome:
    """The outcome of an InputError from ``make``: about the recipe, or about the output folder."""
    problem = None
    if exc.key == "--out":
        problem = exc.message
    elif exc.file is not None and _in_folder(exc.file, job.out_dir):
        # about a file in the output folder (StagedFiles.commit), not the recipe:
        # keep that file's name in the message while the recipe is named as usual
        problem = exc.message
        exc = InputError(exc.message, key="--out", value=_in_library(exc.file, job),
                         hint=exc.hint, file=job.source.recipe)
    return error_outcome(job.name, job.source, job.recipe_sha256, exc, job.sweep, seconds,
                         write_problem=problem)


def _in_folder(path: str, folder: str) -> bool:
    a, b = os.path.abspath(path), os.path.abspath(folder)
    return os.path.commonpath([a, b]) == b


def crashed(job: Job, exc: BaseException) -> Outcome:
    """An error outcome for a structure whose build failed unexpectedly (a bug or a
    dead worker process), so the rest of the library still gets built."""
    error = InputError(f"could not be built because of an internal error "
                       f"({type(exc).__name__}: {exc})", key="name", value=job.name,
                       hint="`cellbuild --debug make` on this recipe shows the traceback",
                       file=job.source.recipe)
    return error_outcome(job.name, job.source, job.recipe_sha256, error, job.sweep)


def chunked(jobs: Sequence[Job], workers: int) -> list[list[Job]]:
    """Jobs in chunks: about four per worker, at most :data:`MAX_CHUNK` jobs each,
    so the per-call overhead is small and the last chunks still spread out."""
    size = max(1, min(MAX_CHUNK, math.ceil(len(jobs) / (4 * max(1, workers)))))
    return [list(jobs[i:i + size]) for i in range(0, len(jobs), size)]


def build_labelled(job: Job) -> Outcome:
    """:func:`build_job`, the outcome labelled with this process (for the summary's counts)."""
    return replace(build_job(job), worker=f"process {os.getpid()}")


def build_chunk(jobs: list[Job]) -> list[Outcome]:
    """Build several structures in one worker call (fewer round trips between processes).

    A :class:`Terminated` has already removed the temporaries on its way up
    (``StagedFiles.__exit__``); the worker then ends at once instead of
    taking the next chunk, which the pool would otherwise hand it.
    """
    try:
        return [build_labelled(job) for job in jobs]
    except (Terminated, KeyboardInterrupt):
        os._exit(128 + signal.SIGTERM)


# ----------------------------------------------------------------------------- signals


def _terminate_worker(signum, frame) -> None:
    # block further signals: a second SIGTERM (the parent's, after the group's)
    # must not cut the clean-up short
    signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGTERM, signal.SIGINT})
    raise Terminated(128 + signum)


def _start_worker() -> None:
    """First thing in each (freshly spawned) worker: signals, one native thread, imports.

    The pool already puts one process on every core; numpy's BLAS threads in
    each worker would spin-wait for cores the other workers need (measured:
    the audit of a 100-atom cell took 3x longer with two workers). The limits
    must be set before numpy is imported, hence spawned workers, not forked
    ones that inherit the parent's thread pools. A value the user has set wins.
    """
    signal.signal(signal.SIGTERM, _terminate_worker)
    signal.signal(signal.SIGINT, _terminate_worker)
    for variable in _THREAD_VARIABLES:
        os.environ.setdefault(variable, "1")
    try:
        import cellbuild.pipeline  # noqa: F401 -- import once per worker, not per job
    except (Terminated, KeyboardInterrupt):
        # stopped while starting: nothing staged yet, so nothing to clean up; end
        # quietly (the pool would print the interrupted import as a traceback)
        os._exit(128 + signal.SIGTERM)


@contextlib.contextmanager
def sigterm_as_interrupt() -> Iterator[None]:
    """Within the block, SIGTERM raises ``KeyboardInterrupt`` (so ``with`` blocks clean up).

    Only where SIGTERM still has its default action (which kills the process
    with no clean-up at all) and only in the main thread (the only one that
    may set handlers); a program's own handler is left alone.
    """
    import threading

    if threading.current_thread() is not threading.main_thread() \
            or signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL:
        yield
        return

    def interrupt(signum, frame):
        raise KeyboardInterrupt

    previous = signal.signal(signal.SIGTERM, interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


# ----------------------------------------------------------------------------- the pool


def run_jobs(jobs: Sequence[Job], workers: int,
             on_done: Callable[[Outcome], None] | None = None) -> list[Outcome]:
    """Build every job, ``workers`` processes at a time; call ``on_done`` as each finishes.

    With one worker (or one job) the jobs run in this process, without a pool.
    A worker process that dies takes its chunk down with it: those structures
    are recorded as errors and the others go on. An interrupt (or a signal
    turned into one) stops the workers cleanly and propagates.
    """
    note = on_done or (lambda outcome: None)
    if workers <= 1 or len(jobs) <= 1:
        outcomes = []
        for job in jobs:
            outcomes.append(build_labelled(job))
            note(outcomes[-1])
        return outcomes
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    chunks = chunked(jobs, workers)
    outcomes = []
    pool = ProcessPoolExecutor(max_workers=min(workers, len(chunks)),
                               mp_context=multiprocessing.get_context("spawn"),
                               initializer=_start_worker)
    try:
        futures = {pool.submit(build_chunk, chunk): chunk for chunk in chunks}
        for future in as_completed(futures):
            try:
                done = future.result()
            except Exception as exc:  # noqa: BLE001 -- a dead worker must not stop the rest
                # (BrokenProcessPool after a crash, or a result that cannot be pickled)
                done = [crashed(job, exc) for job in futures[future]]
            for outcome in done:
                outcomes.append(outcome)
                note(outcome)
    except BaseException:
        stop_workers(pool)
        raise
    pool.shutdown(wait=True)
    return outcomes


def stop_workers(pool) -> None:
    """Terminate the pool's workers (SIGTERM: they remove their temporaries), wait
    for them, kill the ones still alive after :data:`STOP_GRACE` seconds."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    for process in processes:
        with contextlib.suppress(OSError, ValueError):  # already gone
            process.terminate()
    deadline = time.monotonic() + STOP_GRACE
    for process in processes:
        with contextlib.suppress(OSError, ValueError):
            process.join(max(0.0, deadline - time.monotonic()))
            if process.is_alive():
                process.kill()
                process.join(1.0)
    pool.shutdown(wait=False, cancel_futures=True)
