"""Throughput of `cellbuild batch` through the local pool and through a local Dask cluster.

Run from the repository root (needs the cluster extra):

    python benchmarks/bench_cluster.py [--count 1000] [--workers 2] [--repeats 3]

Writes ``--count`` recipe files of fcc Cu 3 x 3 x 3 with one vacancy (107
atoms, the default outputs) and times :func:`cellbuild.batch.build_library`
from the first recipe read to the manifest written, with the same number of
workers, alternately through:

* ``pool``: the local process pool (worker start-up included);
* ``dask``: a ``distributed.LocalCluster`` of single-threaded worker processes,
  timed without its start-up (a cluster runs for many batches) and with it
  (what one `batch --scheduler local` costs).

Prints structures per second for each, the ratio dask / pool (target: at
least 0.7 on this machine, so that N machines give close to N times one) and
the Dask overhead per structure, ``(t_dask - t_pool) / count``. Also checks
that both manifests are the same apart from ``created``.
"""
from __future__ import annotations

import argparse
import json
import logging
import os
import platform
import statistics
import tempfile
import time
from pathlib import Path


def write_recipes(folder: Path, count: int) -> None:
    """``count`` recipe files of 107 atoms each, differing by seed, in four subfolders."""
    for i in range(count):
        sub = folder / f"group{i % 4}"
        sub.mkdir(parents=True, exist_ok=True)
        (sub / f"cu-{i:05d}.yaml").write_text(
            f"name: cu-{i:05d}\n"
            "crystal: {element: Cu, lattice: fcc, a: 3.615}\n"
            "size: {repeat: [3, 3, 3]}\n"
            f"seed: {i + 1}\n"
            "defects: {vacancies: {count: 1}}\n")


def timed_build(source: Path, out_parent: Path, executor) -> tuple[float, dict]:
    """Wall seconds of one build into a fresh folder, and its manifest without ``created``."""
    from cellbuild.batch import build_library

    out = Path(tempfile.mkdtemp(prefix="out-", dir=out_parent))
    start = time.perf_counter()
    result = build_library(source, out, executor=executor)
    seconds = time.perf_counter() - start
    bad = [o for o in result.outcomes if o.status != "passed"]
    if bad:
        raise SystemExit(f"benchmark structure not built: {bad[0].error or bad[0].name}")
    manifest = json.loads((out / "manifest.json").read_text())
    manifest.pop("created")
    return seconds, manifest


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--count", type=int, default=1000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

    import distributed

    from cellbuild.executors import DaskExecutor, LocalPool

    print(f"machine: {platform.machine()}, {os.cpu_count()} cores, Python "
          f"{platform.python_version()}, distributed {distributed.__version__}")
    with tempfile.TemporaryDirectory(prefix="bench-cluster-") as tmp:
        root = Path(tmp)
        source = root / "lib"
        write_recipes(source, args.count)
        start = time.perf_counter()
        cluster = distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1,
                                           processes=True, host="127.0.0.1",
                                           dashboard_address=":0",
                                           silence_logs=logging.CRITICAL)
        client = distributed.Client(cluster, set_as_default=False)
        startup = time.perf_counter() - start
        pool_times, dask_times, manifests = [], [], []
        try:
            for _ in range(args.repeats):  # alternating, so drifts in load hit both
                seconds, manifest = timed_build(source, source, LocalPool(args.workers))
                pool_times.append(seconds)
                manifests.append(manifest)
                executor = DaskExecutor(client)
                try:
                    seconds, manifest = timed_build(source, source, executor)
                finally:
                    executor.close()
                dask_times.append(seconds)
                manifests.append(manifest)
        finally:
            client.close()
            cluster.close()
    same = all(m == manifests[0] for m in manifests)
    pool, dask = statistics.median(pool_times), statistics.median(dask_times)
    n = args.count
    print(f"{n} structures of 107 atoms, {args.workers} workers, median of {args.repeats}")
    print(f"{'executor':<28}{'wall s':>9}{'structures/s':>15}")
    print(f"{'local pool':<28}{pool:>9.2f}{n / pool:>15.1f}")
    print(f"{'local Dask cluster':<28}{dask:>9.2f}{n / dask:>15.1f}")
    print(f"{'local Dask, start-up included':<28}{dask + startup:>9.2f}{n / (dask + startup):>15.1f}")
    print(f"Dask cluster start-up: {startup:.2f} s (once per run of `batch --scheduler local`)")
    print(f"throughput dask / pool: {pool / dask:.2f}, start-up included "
          f"{pool / (dask + startup):.2f} (target >= 0.7)")
    print(f"Dask overhead per structure: {1e3 * (dask - pool) / n:+.2f} ms")
    print(f"manifests identical apart from `created`: {same}")
    if not same:
        raise SystemExit(1)


if __name__ == "__main__":
    main()
