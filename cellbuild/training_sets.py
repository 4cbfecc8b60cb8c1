"""A library's structures gathered for training sets: one multi-frame extended
XYZ file (``batch --collect``) and an ASE database (``batch --db``).

Both read what ``batch`` wrote, entry by entry in manifest order, from the
manifest (``OUT/manifest.json``) and each structure's report: a structure is read
back from its first written structure file (extended XYZ, POSCAR, CIF or LAMMPS
data, in that order of preference) with cellbuild's readers, so the frames hold
exactly the written geometry. Metadata per structure: its name, recipe, seed,
sweep values, whether its checks passed, defect counts per kind, the strain
asked, and the sha256 of each of its files.

The database is ASE's (``ase.db.connect``: SQLite for a file name, PostgreSQL
for a ``postgresql://`` URL); a structure's row is found by its ``structure``
key and updated in place, so building the same library again does not
duplicate rows. ``verify --db`` checks every manifest entry against its row.
"""
from __future__ import annotations

import io
import json
import re
from pathlib import Path

from .errors import InputError

#: Structure files read back for the frames, by preference.
READ_ORDER = ("xyz", "poscar", "cif", "lammps-data")


def _entries(out: Path, manifest: dict):
    """(entry, report, atoms) of every built structure in manifest order."""
    from .readers import read_file

    for entry in manifest["structures"]:
        outputs = entry.get("outputs") or {}
        key = next((k for k in READ_ORDER if k in outputs), None)
        if entry.get("error") or key is None or "report" not in outputs:
            continue
        report = json.loads(_inside(out, outputs["report"]["path"]).read_text())
        types = report["types"] if key == "lammps-data" else None
        atoms = read_file(_inside(out, outputs[key]["path"]), types).structure.to_ase()
        yield entry, report, atoms


def _inside(out: Path, relative: str) -> Path:
    """``out / relative``, refused unless it resolves inside the library folder."""
    path = (out / relative).resolve()
    if not path.is_relative_to(out.resolve()):
        raise InputError("lists a file outside the library", key="manifest", value=relative,
                         hint="rebuild the library with cellbuild batch")
    return path


def metadata(entry: dict, report: dict) -> dict:
    """The key-value metadata of one structure (numbers, text and booleans only)."""
    counts: dict[str, int] = {}
    for d in report["defects"]:
        counts[d["kind"]] = counts.get(d["kind"], 0) + d["placed"]
    strain = (report.get("strain") or {}).get("recovered") or {}
    meta = {"structure": entry["name"], "recipe": entry["recipe"], "seed": int(entry["seed"]),
            "passed": bool(entry["passed"]), "sweep": json.dumps(entry.get("sweep") or {}),
            "strain_volumetric": float(strain.get("volumetric", 0.0))}
    meta.update({f"n_{kind}": n for kind, n in sorted(counts.items())})
    for key, value in (entry.get("sweep") or {}).items():  # each swept value as its own key
        if isinstance(value, (bool, int, float, str)):
            meta["sweep_" + re.sub(r"\W", "_", str(key))] = value
    for key, info in (entry.get("outputs") or {}).items():
        meta["sha256_" + re.sub(r"\W", "_", key)] = info["sha256"]
    config = report.get("configuration")
    if config:  # placement: distinct
        meta.update(configuration=config["index"], multiplicity=config["multiplicity"])
    return meta


def collect(out: Path, manifest: dict, path: Path) -> int:
    """Write every structure as one frame of the extended XYZ file ``path``
    (atomically); returns the number of frames."""
    import ase.io

    from .fileio import atomic_writer

    frames = []
    for entry, report, atoms in _entries(out, manifest):
        atoms.info.update(metadata(entry, report))
        atoms.info["sha256"] = json.dumps({k: v["sha256"] for k, v in entry["outputs"].items()},
                                          sort_keys=True)
        frames.append(atoms)
    with atomic_writer(path) as handle:
        text = io.StringIO()
        ase.io.write(text, frames, format="extxyz")
        handle.write(text.getvalue().encode())
    return len(frames)


def to_database(out: Path, manifest: dict, target: str) -> tuple[int, int]:
    """Write or update one row per structure in the ASE database ``target``;
    returns (rows written, rows updated)."""
    db = _connect(target)
    written = updated = 0
    for entry, report, atoms in _entries(out, manifest):
        meta = metadata(entry, report)
        data = {"sha256": {k: v["sha256"] for k, v in entry["outputs"].items()},
                "sweep": entry.get("sweep") or {}}
        rows = list(db.select(structure=entry["name"]))
        if rows:
            db.update(rows[0].id, atoms=atoms, data=data, **meta)
            updated += 1
        else:
            db.write(atoms, data=data, **meta)
            written += 1
    return written, updated


def check_database(manifest: dict, target: str) -> list[tuple[str, str]]:
    """(structure, what differs) for every manifest entry whose database row is
    missing or records other file hashes."""
    db = _connect(target)
    problems = []
    for entry in manifest["structures"]:
        if entry.get("error"):
            continue
        rows = list(db.select(structure=entry["name"]))
        if not rows:
            problems.append((entry["name"], "no row in the database"))
            continue
        recorded = rows[0].data.get("sha256", {})
        now = {k: v["sha256"] for k, v in entry["outputs"].items()}
        if recorded != now:
            changed = sorted(k for k in set(recorded) | set(now) if recorded.get(k) != now.get(k))
            problems.append((entry["name"], f"database row records other files: {', '.join(changed)}"))
    return problems


def check_targets(collect: Path | None, target: str | None) -> None:
    """Refuse, before anything is built, a ``--collect`` file whose folder is missing
    and a ``--db`` that is neither a database file name nor a URL."""
    if collect is not None and not Path(collect).parent.is_dir():
        raise InputError("is in a folder that does not exist", key="--collect",
                         value=str(collect), hint="create the folder first")
    if target is not None and "://" not in target and Path(target).suffix not in (".db", ".json"):
        raise InputError("is not a database file name or URL", key="--db", value=target,
                         hint="give NAME.db (SQLite) or a postgresql:// URL")


def _connect(target: str):
    import ase.db

    check_targets(None, target)
    try:
        return ase.db.connect(target)
    except (OSError, ValueError) as exc:
        raise InputError(f"cannot be opened ({exc})", key="--db", value=target) from None
