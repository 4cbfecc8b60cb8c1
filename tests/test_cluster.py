"""Libraries built and verified on a Dask cluster (issue 16).

A scheduler and two worker processes are started on loopback by the tests
(``distributed.LocalCluster``, the reference implementation of a Dask cluster
from the registry). What is checked against the local pool:

* the demo library ``recipes/alloys`` gives the same manifest (apart from
  ``created``) and the same bytes in every file through the cluster;
* one worker killed (SIGKILL) while it runs a structure: the batch still
  completes, with the same manifest and bytes, and no temporaries are left;
* an address where no scheduler listens is refused (exit 2) within a bounded
  time, naming the address;
* a worker that cannot see the output folder (a private mount namespace
  hides it, as a node without the shared filesystem would) is refused before
  anything is built.
"""
from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

distributed = pytest.importorskip("distributed")

from cellbuild.batch import build_library  # noqa: E402
from cellbuild.errors import InputError  # noqa: E402
from cellbuild.executors import DaskExecutor, open_executor  # noqa: E402
from cellbuild.verify import verify  # noqa: E402

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def client():
    """Two single-threaded worker processes on 127.0.0.1 (their nannies restart a killed one)."""
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=":0",
                                       silence_logs=logging.CRITICAL)
    client = distributed.Client(cluster, set_as_default=False)
    yield client
    client.close()
    cluster.close()


@pytest.fixture(scope="module")
def library(tmp_path_factory):
    """The demo library recipes/alloys, and its local build (one process) as the reference."""
    root = tmp_path_factory.mktemp("cluster")
    shutil.copytree(REPO / "recipes" / "alloys", root / "lib" / "alloys")
    result = build_library(root / "lib", root / "lib" / "out-local", workers=1)
    assert result.exit_code == 0
    return root / "lib", root / "lib" / "out-local"


def manifest_without_created(out: Path) -> dict:
    manifest = json.loads((out / "manifest.json").read_text())
    manifest.pop("created")
    return manifest


def file_hashes(out: Path) -> dict[str, str]:
    """sha256 of every file under ``out`` except the manifest (whose ``created`` differs)."""
    return {p.relative_to(out).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(out.rglob("*")) if p.is_file() and p.name != "manifest.json"}


def test_cluster_build_and_verify_match_the_local_build(client, library):
    lib, local = library
    executor = DaskExecutor(client)
    try:
        result = build_library(lib, lib / "out-dask", executor=executor)
    finally:
        executor.close()
    assert result.exit_code == 0
    assert manifest_without_created(lib / "out-dask") == manifest_without_created(local)
    assert file_hashes(lib / "out-dask") == file_hashes(local)
    # both workers took part, and the counts cover every structure
    counts = result.per_worker()
    assert len(counts) == 2 and sum(counts.values()) == len(result.outcomes)
    assert all(worker.startswith("tcp://127.0.0.1:") for worker in counts)
    executor = DaskExecutor(client)
    try:
        checked = verify(lib / "out-dask" / "manifest.json", executor=executor,
                         scratch=lib.parent)
    finally:
        executor.close()
    assert checked.ok, [d.line() for d in checked.differences]
    assert not list(lib.parent.glob(".cellbuild-shared-*")), "markers are removed"


def test_a_worker_killed_mid_run_loses_nothing(client, library):
    lib, local = library
    killed = []

    def kill_a_busy_worker(outcome):
        if killed:
            return
        busy = [address for address, keys in client.processing().items() if keys]
        if busy:
            pid = client.run(os.getpid, workers=[busy[0]])[busy[0]]
            os.kill(pid, signal.SIGKILL)
            killed.append(busy[0])

    executor = DaskExecutor(client)
    try:
        result = build_library(lib, lib / "out-killed", executor=executor,
                               on_done=kill_a_busy_worker)
    finally:
        executor.close()
    assert killed, "a worker was running a structure when the first one came back"
    assert result.exit_code == 0
    assert manifest_without_created(lib / "out-killed") == manifest_without_created(local)
    assert file_hashes(lib / "out-killed") == file_hashes(local)
    assert not [p for p in (lib / "out-killed").rglob("*.part")]
    client.wait_for_workers(2, timeout=60)  # the nanny restarted it, for the other tests


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_an_unreachable_scheduler_is_refused_quickly_naming_it():
    address = f"tcp://127.0.0.1:{free_port()}"  # nothing listens there
    start = time.monotonic()
    with pytest.raises(InputError) as err:
        with open_executor(address, timeout=2.0):
            pass
    assert time.monotonic() - start < 15.0
    assert address in str(err.value) and err.value.key == "--scheduler"


def test_cli_refuses_an_unreachable_scheduler_with_exit_2(tmp_path):
    address = f"tcp://127.0.0.1:{free_port()}"
    (tmp_path / "lib").mkdir()
    shutil.copy(REPO / "recipes" / "al-host-perfect.yaml", tmp_path / "lib")
    start = time.monotonic()
    run = subprocess.run([sys.executable, "-m", "cellbuild.cli", "batch", "lib", "--out",
                          "lib/out", "--scheduler", address], cwd=tmp_path,
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2, run.stderr
    assert time.monotonic() - start < 60.0
    assert address in run.stderr and "Traceback" not in run.stderr
    assert len(run.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "lib" / "out").exists(), "nothing written"


def test_a_bad_scheduler_value_and_workers_with_an_address_are_bad_input():
    with pytest.raises(InputError, match="not a scheduler address"):
        with open_executor("localhost:8786"):
            pass
    with pytest.raises(InputError) as err:
        with open_executor("tcp://127.0.0.1:1", workers=2):
            pass
    assert err.value.key == "--workers"


def _blind_worker(address: str, hidden: Path) -> subprocess.Popen:
    """A worker process in its own mount namespace, where an empty tmpfs covers ``hidden``."""
    code = ("import asyncio, distributed\n"
            "async def main():\n"
            f"    async with distributed.Worker({address!r}, nthreads=1) as worker:\n"
            "        await worker.finished()\n"
            "asyncio.run(main())\n")
    return subprocess.Popen(["unshare", "--mount", "--propagation", "private", "sh", "-c",
                             f'mount -t tmpfs none "{hidden}" && exec "{sys.executable}" -c "$0"',
                             code], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)


def test_a_worker_that_cannot_see_out_is_refused_before_building(tmp_path):
    if shutil.which("unshare") is None or subprocess.run(
            ["unshare", "--mount", "--propagation", "private", "true"],
            capture_output=True).returncode != 0:
        pytest.skip("no private mount namespaces here to hide a folder from one worker")
    hidden = tmp_path / "shared"
    (hidden / "lib").mkdir(parents=True)
    shutil.copy(REPO / "recipes" / "al-host-perfect.yaml", hidden / "lib")
    cluster = distributed.LocalCluster(n_workers=0, host="127.0.0.1", dashboard_address=":0",
                                       silence_logs=logging.CRITICAL)
    client = distributed.Client(cluster, set_as_default=False)
    worker = _blind_worker(cluster.scheduler_address, hidden)
    try:
        client.wait_for_workers(1, timeout=60)
        executor = DaskExecutor(client)
        with pytest.raises(InputError) as err:
            build_library(hidden / "lib", hidden / "lib" / "out", executor=executor)
        assert err.value.key == "--out" and "not visible to 1 of 1 Dask worker" in str(err.value)
        assert not (hidden / "lib" / "out").exists(), "nothing created before the check"
        assert not list(hidden.rglob(".cellbuild-shared-*")), "the marker is removed"
    finally:
        worker.terminate()
        worker.wait(30)
        client.close()
        cluster.close()


def test_cli_batch_and_verify_on_a_local_cluster(library):
    """The commands as the README gives them: `--scheduler local` for batch and verify."""
    lib, local = library
    command = [sys.executable, "-m", "cellbuild.cli"]
    run = subprocess.run(command + ["batch", str(lib), "--out", str(lib / "out-cli"),
                                    "--scheduler", "local", "--workers", "2"],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert "built on a local Dask cluster of 2 worker(s): tcp://127.0.0.1:" in run.stdout
    assert manifest_without_created(lib / "out-cli") == manifest_without_created(local)
    run = subprocess.run(command + ["verify", str(lib / "out-cli" / "manifest.json"),
                                    "--scheduler", "local", "--workers", "2",
                                    "--scratch", str(lib.parent)],
                         capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stdout + run.stderr
    assert "verified: all 18 structure(s) match the manifest" in run.stdout


def test_a_late_worker_that_cannot_see_out_builds_nothing(client, tmp_path):
    """A task that lands on a worker without the marker records errors and writes nothing
    (the marker is made unreadable here, as on a worker that joined without the share)."""
    from cellbuild.executors import build_chunk_on_worker
    from cellbuild.batch import discover, plan_jobs

    (tmp_path / "lib").mkdir()
    shutil.copy(REPO / "recipes" / "al-host-perfect.yaml", tmp_path / "lib")
    jobs, failed = plan_jobs(discover(tmp_path / "lib", tmp_path / "lib"), tmp_path / "out")
    assert jobs and not failed
    marker = str(tmp_path / ".cellbuild-shared-missing")  # never written
    outcomes = client.submit(build_chunk_on_worker, jobs, marker, "token", pure=False).result()
    assert [o.status for o in outcomes] == ["error"]
    assert "cannot see it" in outcomes[0].error and outcomes[0].write_problem
    assert outcomes[0].worker.startswith("tcp://127.0.0.1:")
    assert not (tmp_path / "out").exists()


def test_scheduler_without_the_extra_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # as if not installed
    with pytest.raises(InputError, match=r"\[cluster\]"):
        with open_executor("local", workers=1):
            pass
