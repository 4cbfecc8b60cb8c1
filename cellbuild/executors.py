"""Who runs a library's jobs: the local process pool, or a Dask cluster.

The batch and verify runners hand a list of :class:`~cellbuild.outcomes.Job`
values to an executor and get back one :class:`~cellbuild.outcomes.Outcome`
per job; nothing else in them knows which executor ran. Jobs and outcomes are
plain picklable values, and the manifest is built from the outcomes by the
caller, so it has the same bytes whatever ran the jobs.

* :class:`LocalPool` -- worker processes on this machine (the default).
* :class:`DaskExecutor` -- the workers of a Dask scheduler (``distributed``,
  the optional extra ``cellbuild[cluster]``), reached at ``tcp://HOST:PORT``
  or through a scheduler file, or a :class:`distributed.LocalCluster` started
  for the run (``local``).

Dask workers write into the library on a filesystem they share with this
process (the usual setting on clusters). :meth:`DaskExecutor.check_shared`
refuses a folder some worker cannot see, before anything is built; a worker
that joins later and cannot see it records its structures as errors instead
of writing files nobody will find.

A worker that dies takes its running jobs with it; the scheduler gives them
to another worker, up to its ``allowed-failures`` bound (:data:`WORKER_LOSSES`
for a local cluster; a remote scheduler's own setting, default 3). Each
structure's files are staged and renamed into place
(:class:`cellbuild.fileio.StagedFiles`) and a rebuild writes the same bytes,
so a file is whole or absent; the temporaries a killed worker left are
removed by the runner after the jobs are done.
"""
from __future__ import annotations

import contextlib
import os
import uuid
from dataclasses import replace
from pathlib import Path
from typing import Callable, Iterator, Protocol, Sequence

from .errors import InputError
from .outcomes import Job, Outcome
from .pool import chunked

#: Seconds to wait for a Dask scheduler to answer before refusing its address.
CONNECT_TIMEOUT = 10.0

#: Seconds to wait for a scheduler with no workers yet to get its first one.
WORKER_WAIT = 60.0

#: How many workers a job may lose (die while running it) on a local Dask
#: cluster before the scheduler gives up on it and it is recorded as an error.
WORKER_LOSSES = 3

#: The extra that brings Dask, named in the error when it is missing.
INSTALL_HINT = "install the cluster extra: python3 -m pip install -e '.[cluster]'"

OnDone = Callable[[Outcome], None]


class Executor(Protocol):
    """What the batch and verify runners need from whoever runs the jobs."""

    #: ``"pool"`` or ``"dask"``
    kind: str
    #: who runs the jobs, for the summary ("a local Dask cluster of 2 worker(s)")
    description: str

    def check_shared(self, folder: Path, key: str) -> None:
        """Raise :class:`InputError` (naming ``key``) if a worker cannot see ``folder``."""

    def run(self, jobs: Sequence[Job], on_done: OnDone | None = None) -> list[Outcome]:
        """Build every job; call ``on_done`` as each outcome arrives; return them all."""


# ----------------------------------------------------------------------------- local


class LocalPool:
    """Worker processes on this machine (:func:`cellbuild.pool.run_jobs`)."""

    kind = "pool"

    def __init__(self, workers: int | None = None):
        from .pool import default_workers

        if workers is not None and workers < 1:
            raise InputError("must be at least 1", key="--workers", value=workers)
        self.workers = workers or default_workers()
        self.description = f"{self.workers} local worker process(es)"

    def check_shared(self, folder: Path, key: str) -> None:
        """Every worker runs on this machine and sees what this process sees."""

    def run(self, jobs: Sequence[Job], on_done: OnDone | None = None) -> list[Outcome]:
        from .pool import run_jobs

        return run_jobs(jobs, self.workers, on_done)


# ----------------------------------------------------------------------------- Dask


def _distributed():
    """The ``distributed`` module, or :class:`InputError` naming the extra to install."""
    try:
        import distributed
    except ImportError:
        raise InputError("needs Dask's `distributed` package, which is not installed",
                         key="--scheduler", hint=INSTALL_HINT) from None
    return distributed


def sees_marker(path: str, token: str) -> bool:
    """True if ``path`` exists here and holds ``token`` (runs on a worker)."""
    try:
        with open(path, encoding="ascii") as handle:
            return handle.read() == token
    except (OSError, UnicodeDecodeError):
        return False


def build_chunk_on_worker(jobs: list[Job], marker: str, token: str) -> list[Outcome]:
    """A Dask task: build ``jobs`` unless this worker cannot see the library.

    Each outcome carries the worker's address. A worker that cannot see the
    marker file (it joined after the check, on a machine without the shared
    folder) builds nothing: writing there would leave files nobody finds.
    """
    from distributed import get_worker

    from .outcomes import error_outcome
    from .pool import build_job

    address = get_worker().address
    if not sees_marker(marker, token):
        why = f"the Dask worker at {address} cannot see it"
        outcomes = []
        for job in jobs:
            error = InputError(f"is not visible to the worker that took this structure "
                               f"({why})", key="--out", value=job.out_dir,
                               hint="put it on a filesystem every worker mounts at the same path",
                               file=job.source.recipe)
            outcomes.append(error_outcome(job.name, job.source, job.recipe_sha256, error,
                                          job.sweep, write_problem=why))
        return [replace(outcome, worker=address) for outcome in outcomes]
    return [replace(build_job(job), worker=address) for job in jobs]


class DaskExecutor:
    """The workers of a Dask scheduler, through a ``distributed.Client``.

    Use :func:`open_executor` to connect by address (it closes what it
    opened); a client the caller made can be passed in directly.
    """

    kind = "dask"

    def __init__(self, client, description: str | None = None):
        self.client = client
        self.description = description or f"the Dask scheduler at {client.scheduler.address}"
        self._markers: list[str] = []
        self._shared: tuple[str, str] | None = None  # (marker path, token) of the jobs' folder

    def worker_count(self) -> int:
        """Threads of the workers connected now (one structure each at a time; at least
        one worker is waited for in :meth:`check_shared`)."""
        return max(1, sum(self.client.nthreads().values()))

    def check_shared(self, folder: Path, key: str) -> None:
        """Write a marker file into ``folder`` and ask every worker to read it back.

        ``folder`` need not exist yet: the marker then goes into the nearest
        folder above it that does (nothing is created before the check).
        Refuses (``InputError`` naming ``key``, ``folder`` and the workers that
        cannot see it) before anything is built. The marker stays until
        :meth:`close`, so tasks can check it again on workers that join later.
        """
        self._wait_for_workers()
        token = uuid.uuid4().hex
        marker = os.path.join(_existing_folder(folder), f".cellbuild-shared-{token}")
        with open(marker, "x", encoding="ascii") as handle:
            handle.write(token)
        self._markers.append(marker)
        seen = self.client.run(sees_marker, marker, token)
        blind = sorted(address for address, ok in seen.items() if not ok)
        if blind:
            self.close()
            shown = ", ".join(blind[:3]) + (f" and {len(blind) - 3} more" if len(blind) > 3 else "")
            raise InputError(f"is not visible to {len(blind)} of {len(seen)} Dask worker(s) "
                             f"({shown}), so their files would be lost", key=key,
                             value=str(folder),
                             hint="put it on a filesystem every worker mounts at the same path")
        self._shared = (marker, token)

    def _wait_for_workers(self) -> None:
        try:
            self.client.wait_for_workers(1, timeout=WORKER_WAIT)
        except TimeoutError:
            raise InputError(f"has no workers after {WORKER_WAIT:g} s", key="--scheduler",
                             value=self.client.scheduler.address,
                             hint="start workers for it (see the README's cluster recipe)") from None

    def run(self, jobs: Sequence[Job], on_done: OnDone | None = None) -> list[Outcome]:
        """Send the jobs in chunks, collect outcomes as they complete.

        A chunk whose task failed for good (its workers died more often than
        the scheduler allows) is recorded as errors, like a dead pool worker.
        An interrupt cancels what is still queued and propagates.
        """
        from distributed import as_completed

        from .pool import crashed

        if not jobs:
            return []
        if self._shared is None:  # a caller that did not check: check the jobs' common folder
            self.check_shared(Path(os.path.commonpath([job.out_dir for job in jobs])), "--out")
        marker, token = self._shared
        note = on_done or (lambda outcome: None)
        chunks = chunked(jobs, self.worker_count())
        futures = {self.client.submit(build_chunk_on_worker, chunk, marker, token,
                                      pure=False, key=f"cellbuild-{i}-{uuid.uuid4().hex}"): chunk
                   for i, chunk in enumerate(chunks)}
        outcomes: list[Outcome] = []
        try:
            for future in as_completed(futures, loop=self.client.loop):
                try:
                    done = future.result()
                except Exception as exc:  # noqa: BLE001 -- KilledWorker, a lost scheduler
                    done = [crashed(job, exc) for job in futures[future]]
                for outcome in done:
                    outcomes.append(outcome)
                    note(outcome)
                future.release()
        except BaseException:
            self.client.cancel(list(futures))
            raise
        return outcomes

    def close(self) -> None:
        """Remove the marker files written by :meth:`check_shared`."""
        for marker in self._markers:
            with contextlib.suppress(OSError):
                os.unlink(marker)
        self._markers.clear()


def _existing_folder(folder: Path) -> str:
    """``folder``, or the nearest folder above it that exists (absolute)."""
    path = os.path.abspath(folder)
    while not os.path.isdir(path) and os.path.dirname(path) != path:
        path = os.path.dirname(path)
    return path


def _connect(address: str, timeout: float):
    """A client of the scheduler at ``address`` (or named by a scheduler file)."""
    distributed = _distributed()
    is_file = address.endswith(".json")
    if is_file and not os.path.isfile(address):
        raise InputError("is not a scheduler file", key="--scheduler", value=address,
                         hint="give tcp://HOST:PORT, a scheduler file, or local")
    if not is_file and "://" not in address:
        raise InputError("is not a scheduler address", key="--scheduler", value=address,
                         hint="give tcp://HOST:PORT, a scheduler file (*.json), or local")
    kwargs = {"scheduler_file": address} if is_file else {"address": address}
    try:
        return distributed.Client(timeout=timeout, set_as_default=False, **kwargs)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"cannot be reached within {timeout:g} s ({type(exc).__name__})",
                         key="--scheduler", value=address,
                         hint="check that the scheduler runs and that this machine may "
                              "connect to it") from None


def _local_cluster(workers: int):
    """A Dask cluster on this machine: one single-threaded process per worker."""
    import dask

    distributed = _distributed()
    import logging

    with dask.config.set({"distributed.scheduler.allowed-failures": WORKER_LOSSES}):
        return distributed.LocalCluster(n_workers=workers, threads_per_worker=1,
                                        processes=True, host="127.0.0.1",
                                        dashboard_address=":0",  # any free port: no clash on 8787
                                        silence_logs=logging.CRITICAL)


@contextlib.contextmanager
def open_executor(scheduler: str | None = None, workers: int | None = None,
                  timeout: float = CONNECT_TIMEOUT) -> Iterator[Executor]:
    """The executor for ``--scheduler`` (None: the local pool) and ``--workers``.

    ``local`` starts a local Dask cluster of ``workers`` processes (default:
    every core) for the duration of the block; an address connects to a
    running scheduler, whose workers are its own (``--workers`` is refused).
    """
    if scheduler is None:
        yield LocalPool(workers)
        return
    if scheduler == "local":
        from .pool import default_workers

        count = workers or default_workers()
        cluster = _local_cluster(count)
        client = _distributed().Client(cluster, set_as_default=False)
        executor = DaskExecutor(client, f"a local Dask cluster of {count} worker(s)")
    else:
        if workers is not None:
            raise InputError("applies to the local pool and `--scheduler local` only",
                             key="--workers", value=workers,
                             hint="a running scheduler has its own workers; leave --workers out")
        cluster = None
        client = _connect(scheduler, timeout)
        executor = DaskExecutor(client, f"the Dask scheduler at {scheduler}")
    try:
        yield executor
    finally:
        executor.close()
        client.close()
        if cluster is not None:
            cluster.close()
