"""Throughput of `cellbuild batch`: structures per second, 1 and 2 workers.

Writes generated recipe files to a temporary folder (one file per structure,
so recipe discovery and expansion are part of the measurement) and times
:func:`cellbuild.batch.build_library`, the code behind `cellbuild batch`,
from the first file read to the manifest written, process-pool start-up
included. Two sizes:

* small: fcc Cu 3 x 3 x 3 (108 sites) with one vacancy -> 107 atoms;
* large: fcc Cu 14 x 14 x 14 (10,976 sites) with one vacancy -> 10,975 atoms.

Each point is the median of ``--repeats`` runs into a fresh output folder.
Besides wall-clock rates the table shows structures per CPU-second (this
process and its workers, start-up included): on a shared machine other work
slows the wall clock of the 2-worker rows, not the CPU cost per structure.
Target: at least 50 small structures per second per core.

    python benchmarks/bench_batch.py                       # all formats (default outputs)
    python benchmarks/bench_batch.py --outputs lammps-data # one format per structure
    python benchmarks/bench_batch.py --profile             # where a small structure's time goes
    python benchmarks/bench_batch.py --small 1000 --large 0 --workers 1 --repeats 5
                                                           # issue 17's target: >= 200 per CPU-second

``--large 0`` leaves a size out; ``--workers 1`` measures one worker only.
``--tmp /dev/shm`` puts recipes and outputs on a RAM file system: on a disk that
other work keeps busy, creating, renaming and flushing files costs kernel CPU
time (measured: 2 to 3 s of system time per 500 small structures on this
machine's shared ext4 disk, 0.4 s on tmpfs), which this separates from ours.
Each repeat writes into a fresh output folder, and all of them are removed when
the run ends. ``--churn`` removes each one before the next repeat instead, so a
build follows thousands of deletions: on this machine's ext4 (no journal), the
kernel's inode allocator then skips over recently freed inodes one by one
(``find_inode_bit`` / ``recently_deleted`` in ``perf``), 1 to 2 ms of system
time per small structure, growing with every repeat.
``--sync end`` passes ``sync="end"`` to ``build_library`` (one flush at the end,
see ``cellbuild.fileio.sync_files``) once the batch takes it.
"""
from __future__ import annotations

import argparse
import os
import resource
import shutil
import statistics
import tempfile
import time
from pathlib import Path

SIZES = {"small": 3, "large": 14}  # conventional fcc cells per axis


def write_recipes(folder: Path, kind: str, count: int, outputs: list[str]) -> None:
    """``count`` recipe files of one size, differing by seed, in two subfolders."""
    n = SIZES[kind]
    for i in range(count):
        sub = folder / kind / f"group{i % 2}"
        sub.mkdir(parents=True, exist_ok=True)
        (sub / f"{kind}-{i:05d}.yaml").write_text(
            f"name: {kind}-{i:05d}\n"
            f"crystal: {{element: Cu, lattice: fcc, a: 3.615}}\n"
            f"size: {{repeat: [{n}, {n}, {n}]}}\n"
            f"seed: {i + 1}\n"
            f"outputs: [{', '.join(outputs)}]\n"
            f"defects: {{vacancies: {{count: 1}}}}\n")


def cpu_seconds() -> float:
    """CPU time (user + system) of this process and of its finished worker processes."""
    me, children = (resource.getrusage(who) for who in
                    (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN))
    return me.ru_utime + me.ru_stime + children.ru_utime + children.ru_stime


#: extra keywords of build_library (``--sync``); empty: the library's default
SYNC: dict = {}
#: ``--churn``: delete each repeat's outputs before the next repeat
CHURN = False


def time_batch(source: Path, workers: int, repeats: int) -> tuple[float, float, int, int]:
    """Median wall-clock and CPU seconds of a full build (worker start-up included),
    the structure count and the atoms per structure."""
    from cellbuild.batch import build_library

    walls, cpus = [], []
    for _ in range(repeats):
        # Each repeat builds into a fresh folder, kept until the whole run ends
        # (the enclosing temporary folder goes then): with ``--churn`` the folder
        # goes right after its repeat, so the next build follows thousands of
        # deletions, which some file systems make costly (see the module note).
        out = tempfile.mkdtemp(prefix="bench-out-", dir=source.parent)
        cpu, start = cpu_seconds(), time.perf_counter()
        result = build_library(source, out, workers=workers, **SYNC)
        walls.append(time.perf_counter() - start)
        cpus.append(cpu_seconds() - cpu)
        if CHURN:
            shutil.rmtree(out)
        bad = [o for o in result.outcomes if o.status != "passed"]
        if bad:
            raise SystemExit(f"benchmark structure not built: {bad[0].error or bad[0].name}")
    atoms = result.outcomes[0].n_atoms
    return statistics.median(walls), statistics.median(cpus), len(result.outcomes), atoms


def profile_one(source: Path, sort: str = "cumulative", cpu: bool = False) -> None:
    """Top functions (cumulative time) for building the small recipes in one process.

    ``cpu``: time functions by this process's CPU clock (``time.process_time``),
    not the wall clock, so that waiting for the disk (fsync) or for other work
    on the machine is not counted; a second thread's CPU is then counted in
    whatever the profiled thread runs meanwhile.
    """
    import cProfile
    import pstats

    from cellbuild.batch import build_library

    with tempfile.TemporaryDirectory(prefix="bench-prof-", dir=source.parent) as out:
        profiler = cProfile.Profile(time.process_time) if cpu else cProfile.Profile()
        profiler.enable()
        build_library(source, out, workers=1)
        profiler.disable()
    pstats.Stats(profiler).sort_stats(sort).print_stats(40)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--small", type=int, default=200, help="number of small recipes")
    parser.add_argument("--large", type=int, default=24, help="number of large recipes")
    parser.add_argument("--repeats", type=int, default=3, help="runs per point (median)")
    parser.add_argument("--outputs", default="lammps-data,cif,xyz,poscar",
                        help="comma-separated output formats of every recipe")
    parser.add_argument("--workers", default="1,2",
                        help="comma-separated worker counts to measure")
    parser.add_argument("--tmp", default=None,
                        help="folder for the recipes and outputs (default: the system's)")
    parser.add_argument("--sync", default=None, choices=["file", "end"],
                        help="durability passed to build_library (default: its own)")
    parser.add_argument("--churn", action="store_true",
                        help="delete each repeat's outputs before the next repeat")
    parser.add_argument("--profile", action="store_true", help="profile the small recipes")
    parser.add_argument("--profile-sort", default="cumulative",
                        help="pstats sort key of --profile (cumulative, tottime)")
    parser.add_argument("--profile-cpu", action="store_true",
                        help="--profile by CPU time instead of wall time")
    args = parser.parse_args()
    outputs = args.outputs.split(",")
    global CHURN
    CHURN = args.churn

    import cellbuild.pipeline  # noqa: F401 -- import cost is not part of the measurement
    from cellbuild.batch import build_library, default_workers

    if args.sync is not None:
        import inspect

        if "sync" not in inspect.signature(build_library).parameters:
            raise SystemExit("this cellbuild's build_library takes no `sync` yet")
        SYNC["sync"] = args.sync

    with tempfile.TemporaryDirectory(prefix="bench-recipes-", dir=args.tmp) as tmp:
        tmp = Path(tmp)
        write_recipes(tmp, "small", args.small, outputs)
        write_recipes(tmp, "large", args.large, outputs)
        if args.profile:
            profile_one(tmp / "small", args.profile_sort, args.profile_cpu)
            return
        print(f"outputs per structure: {', '.join(outputs)} + report (+ defects sidecar); "
              f"folder {tmp.parent}; sync {args.sync or 'default'}; "
              f"outputs {'deleted after each repeat' if CHURN else 'kept until the end'}")
        print(f"cores available: {default_workers()}; load average before: "
              f"{os.getloadavg()[0]:.2f} (other work on the machine skews the 2-worker rows)")
        print(f"{'recipe':>8} {'atoms':>7} {'workers':>7} {'structures':>10} "
              f"{'wall s':>7} {'struct/s':>9} {'per core':>9} {'CPU s':>7} {'per CPU s':>10}")
        for kind, count in (("small", args.small), ("large", args.large)):
            if count == 0:
                continue
            for workers in (int(w) for w in args.workers.split(",")):
                wall, cpu, n, atoms = time_batch(tmp / kind, workers, args.repeats)
                rate = n / wall
                print(f"{kind:>8} {atoms:>7,} {workers:>7} {n:>10} {wall:>7.2f} "
                      f"{rate:>9.1f} {rate / workers:>9.1f} {cpu:>7.2f} {n / cpu:>10.1f}",
                      flush=True)
        print(f"load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
