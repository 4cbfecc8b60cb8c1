"""What `batch` shows: JUnit XML, one line per structure, the progress bar.

A structure that passed with warnings is marked everywhere: its JUnit test
case gets one ``<property name="warning">`` per warning, the warnings in
``<system-err>`` and a ``<system-out>`` saying "passed with N warning(s)";
its line reads ``passed with N warning(s): ...``.
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import Sequence

from .errors import InputError
from .outcomes import Outcome, sort_outcomes


def junit_xml(outcomes: Sequence[Outcome]) -> bytes:
    """A JUnit XML report: one test case per structure, ``<failure>`` for failed
    checks, ``<error>`` for structures that could not be built, properties and
    ``<system-err>`` for warnings."""
    import xml.etree.ElementTree as ET

    failures = sum(o.status == "failed" for o in outcomes)
    errors = sum(o.status == "error" for o in outcomes)
    total = sum(o.seconds for o in outcomes)
    suite = ET.Element("testsuite", name="cellbuild", tests=str(len(outcomes)),
                       failures=str(failures), errors=str(errors), skipped="0",
                       time=f"{total:.3f}")
    for o in sort_outcomes(outcomes):
        case = ET.SubElement(suite, "testcase", classname=o.source.display, name=o.name,
                             time=f"{o.seconds:.3f}")
        if o.warnings:  # JUnit schema: properties come first in a test case
            props = ET.SubElement(case, "properties")
            for warning in o.warnings:
                ET.SubElement(props, "property", name="warning", value=warning)
        if o.status == "error":
            node = ET.SubElement(case, "error", message=o.display_error or "",
                                 type="InputError")
            node.text = o.display_error
        elif o.status == "failed":
            names = ", ".join(c["name"] for c in o.failed_checks)
            node = ET.SubElement(case, "failure", message=f"failed checks: {names}",
                                 type="CheckFailed")
            node.text = "\n".join(f"{c['name']}: {c['detail']}" for c in o.failed_checks)
        elif o.warnings:
            ET.SubElement(case, "system-out").text = (
                f"{o.n_atoms} atoms, all checks passed with {len(o.warnings)} warning(s)")
        else:
            ET.SubElement(case, "system-out").text = f"{o.n_atoms} atoms, all checks passed"
        if o.warnings:
            ET.SubElement(case, "system-err").text = "\n".join(f"warning: {w}"
                                                               for w in o.warnings)
    ET.indent(suite)
    return ET.tostring(suite, encoding="utf-8", xml_declaration=True) + b"\n"


def write_junit(path: str | os.PathLike, outcomes: Sequence[Outcome]) -> None:
    """Write :func:`junit_xml` to ``path`` atomically (creating its folder)."""
    from .fileio import write_bytes_atomic

    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        write_bytes_atomic(path, junit_xml(outcomes))
    except OSError as exc:
        raise InputError(f"cannot be written ({exc.strerror or exc})", key="--junit",
                         value=str(path)) from None


def outcome_line(o: Outcome) -> str:
    """One plain line per structure: name, atoms, passed/FAILED/ERROR, warnings."""
    if o.status == "error":
        return f"{o.name}  ERROR  {o.display_error}"
    warned = f"; {len(o.warnings)} warning(s): {'; '.join(o.warnings)}" if o.warnings else ""
    if o.status == "failed":
        names = ", ".join(c["name"] for c in o.failed_checks)
        return f"{o.name}  {o.n_atoms:,} atoms  FAILED ({names}){warned}"
    return f"{o.name}  {o.n_atoms:,} atoms  passed{warned}"


class ProgressBar:
    """A one-line text progress bar redrawn with carriage returns (for a terminal)."""

    WIDTH = 30

    def __init__(self, stream=None, label: str = "building") -> None:
        self.stream = stream or sys.stderr
        self.label = label
        self.total = 0
        self.done = 0
        self.problems = 0
        self.start = time.perf_counter()

    def planned(self, total: int) -> None:
        self.total = total
        self._draw("")

    def update(self, outcome: Outcome) -> None:
        self.done += 1
        self.problems += outcome.status != "passed"
        self._draw(outcome.name)

    def close(self) -> None:
        self.stream.write("\r\033[K")
        self.stream.flush()

    def _draw(self, name: str) -> None:
        filled = int(self.WIDTH * self.done / self.total) if self.total else 0
        rate = self.done / max(time.perf_counter() - self.start, 1e-9)
        bad = f", {self.problems} not passed" if self.problems else ""
        text = (f"\r{self.label} [{'#' * filled}{'.' * (self.WIDTH - filled)}] "
                f"{self.done}/{self.total} ({rate:.1f}/s{bad}) {name[:40]}")
        self.stream.write(text + "\033[K")
        self.stream.flush()
