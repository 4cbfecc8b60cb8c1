"""What the commands print: the summary of a made structure, of a plan and of a
library build (plain text on stdout, through ``typer.echo``)."""
from __future__ import annotations

import typer


def species_text(r: dict) -> str:
    """``Cu`` for one species, ``A=Mg B=O`` for a compound's sublattices."""
    species = r["species"]
    if len(species) == 1:
        return r["element"]
    return " ".join(f"{label}={element}" for label, element in species.items())


def summary(result) -> None:
    r = result.report
    box = " x ".join(f"{x:.3f}" for x in r["cell_lengths"])
    passed = sum(c["passed"] for c in r["checks"])
    verdict = "all checks passed" if result.passed else "CHECKS FAILED"
    typer.echo(f"{r['name']}: {r['n_atoms']:,} atoms, {r['lattice']} {species_text(r)} "
               f"a = {r['lattice_constant']:.5f} A, box {box} A; "
               f"{passed}/{len(r['checks'])} checks passed ({verdict})")
    if r.get("size_note"):
        typer.echo(f"  note: {r['size_note']}")
    for w in r.get("warnings", []):
        typer.echo(f"  warning: {w}")
    for c in r["checks"]:
        if not c["passed"]:
            typer.echo(f"  failed {c['name']}: {c['detail']}")
    arranged, config = r.get("arrangement"), r.get("configuration")
    if arranged:
        rank = f" (rank {arranged['rank']} of {arranged['of']})" if "rank" in arranged else ""
        typer.echo(f"  arrangement  objective {arranged['objective']:.4g}{rank}; best of "
                   f"{arranged['random_draws']} random draws {arranged['best_random_objective']:.4g}; "
                   f"{arranged['steps']:,} steps")
    if config:
        pair = (f", defects {config['pair_distance']:.4f} A apart" if config["pair_distance"]
                is not None else "")
        typer.echo(f"  placement    configuration {config['index']} of {config['configurations']}, "
                   f"multiplicity {config['multiplicity']:,} of {config['placements']:,}{pair}")
    for key, info in r["outputs"].items():
        typer.echo(f"  {key:12s} {info['path']}  {info['bytes']:,} bytes")
    typer.echo(f"  report       {result.report_path}")


def plan_text(p: dict) -> str:
    lines = [
        f"{p['name']}: {p['lattice']} {species_text(p)}",
        f"  lattice constant  {p['lattice_constant']:.6f} A ({p['lattice_constant_source']})",
        f"  repeat            {' x '.join(map(str, p['repeat']))} "
        + ("oriented boxes" if p["axes"] else "cells of the matrix" if p["matrix"]
           else "conventional cells"),
        f"  box               {' x '.join(f'{x:.4f}' for x in p['box'])} A"
        + ("" if all(abs(v) < 1e-12 for i, row in enumerate(p["cell"]) for j, v in enumerate(row)
                     if i != j) else
           "; vectors " + ", ".join("(" + " ".join(f"{v:.4f}" for v in row) + ")"
                                    for row in p["cell"])),
        f"  atoms             {p['n_atoms']:,} ({p['n_sites']:,} lattice sites)",
    ]
    if p["size_note"]:
        lines.append(f"  note: {p['size_note']}")
    if p["axes"]:
        lines.append("  axes              " + ", ".join(
            f"{n} [{' '.join(map(str, a))}]" for n, a in p["axes"].items()))
    if p["matrix"]:
        lines.append("  matrix            " + " ".join(str(r) for r in p["matrix"]))
    if p["cif"]:
        lines.append(f"  from CIF          {p['cif']}")
    for name, value in p["parameters"].items():
        lines.append(f"  {name:17s} {value:.6g}")
    if len(p["sublattices"]) > 1:
        lines.append("  sublattices       " + ", ".join(
            f"{label} {s['element']} {s['sites']:,}" for label, s in p["sublattices"].items()))
    for d in p["defects"]:
        lines.append(f"  {d['kind']:17s} {d['placed']:,} {d['element']} on {d['on']} ({d['key']})")
    if p["arrangement"]:
        a = p["arrangement"]
        lines.append(f"  arrangement       {a['target']} over {a['shells']} shell(s), "
                     f"up to {a['steps']:,} swaps")
    lines.append(f"  memory (est.)     {p['estimated_memory_bytes'] / 1e6:,.1f} MB")
    for key, size in p["estimated_file_bytes"].items():
        lines.append(f"  {key:17s} ~{size / 1e6:,.2f} MB")
    for w in p["warnings"]:
        lines.append(f"  warning: {w}")
    return "\n".join(lines)


def batch_summary(result, show_problems: bool) -> None:
    """Counts, where the manifest went and (after a progress bar) the problem lines."""
    from .batch import outcome_line

    statuses = [o.status for o in result.outcomes]
    if show_problems:
        for o in result.outcomes:
            if o.status != "passed":
                typer.echo(outcome_line(o))
    if show_problems:
        for o in result.outcomes:
            if o.status == "passed" and o.warnings:
                typer.echo(outcome_line(o))
    if result.removed:
        typer.echo(f"removed {len(result.removed)} file(s) the previous manifest listed "
                   "and this build no longer writes")
    if result.temporaries:
        typer.echo(f"removed {len(result.temporaries)} temporary file(s) left by an "
                   "interrupted run")
    if result.lost:
        typer.echo(f"removed {len(result.lost)} temporary file(s) left by workers that "
                   "stopped mid-write (their structures were built again)")
    counts = result.per_worker()
    if counts and (len(counts) > 1 or result.executor_kind == "dask"):
        typer.echo(f"built on {result.executor}: " + ", ".join(
            f"{worker} {n}" for worker, n in counts.items()))
    typer.echo(f"{len(statuses)} structure(s): {statuses.count('passed')} passed, "
               f"{statuses.count('failed')} failed checks, {statuses.count('error')} "
               f"could not be built; manifest {result.manifest_path}")
