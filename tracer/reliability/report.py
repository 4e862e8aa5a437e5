"""The reliability report: every check at one size, and the figures that prove it.

::

    from tracer.reliability.report import run_report, QUICK, FULL
    report = run_report(QUICK)            # or FULL; parts=("matrix", "kill", "fuzz", "load")
    print(report.format())
    report.passed                         # every cell passed, nothing lost, no fuzz failure

Figures: fault-matrix cells run and passed; kill trials and points lost; fuzz cases tried
and failures (protocol files, bench profiles, CSV curves, spoilt SCPI replies); load
points written and lost (eight benches into their own logbooks, then into one shared
logbook). Target: every cell passed, zero lost, zero failures.
"""
from __future__ import annotations

import platform
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

from . import crash, fuzz_files, fuzz_wire, load, matrix

PARTS = ("matrix", "kill", "fuzz", "load")


@dataclass(frozen=True)
class Sizes:
    name: str
    matrix_cells: tuple[tuple[str, str], ...]
    kill_trials: int
    fuzz_cases: int            # per kind of file
    wire_cases: int
    load_benches: int
    load_points: int           # per point sweep (the list sweep has twice as many)


QUICK = Sizes("quick", tuple(matrix.QUICK_CELLS), crash.QUICK_TRIALS, 100, 40, 8, 40)
FULL = Sizes("full", tuple(matrix.all_cells()), crash.FULL_TRIALS, 2000, 400, 8, 200)


@dataclass
class ReliabilityReport:
    sizes: Sizes
    parts: tuple[str, ...]
    matrix_cells: list[Any] = field(default_factory=list)          # matrix.CellResult
    calibration: dict[str, Any] | None = None
    kill_trials: list[Any] = field(default_factory=list)           # crash.KillTrial
    kill_clean_run_s: float | None = None
    fuzz: list[Any] = field(default_factory=list)                  # FuzzSummary / WireSummary
    load: list[Any] = field(default_factory=list)                  # load.LoadResult
    errors: list[str] = field(default_factory=list)                # a part that could not run
    elapsed_s: float = 0.0

    # ---- figures
    @property
    def cells_run(self) -> int:
        return len(self.matrix_cells)

    @property
    def cells_passed(self) -> int:
        return sum(1 for c in self.matrix_cells if c.passed)

    @property
    def kills(self) -> int:
        return len(self.kill_trials)

    @property
    def kill_points_lost(self) -> int:
        return sum(t.points_lost for t in self.kill_trials)

    @property
    def kills_passed(self) -> int:
        return sum(1 for t in self.kill_trials if t.passed)

    @property
    def fuzz_cases(self) -> int:
        return sum(f.cases for f in self.fuzz)

    @property
    def fuzz_failures(self) -> int:
        return sum(f.failures for f in self.fuzz) + sum(1 for f in self.fuzz if f.skipped)

    @property
    def load_points_written(self) -> int:
        return sum(r.points_written for r in self.load)

    @property
    def load_points_lost(self) -> int:
        return sum(r.points_lost for r in self.load)

    @property
    def passed(self) -> bool:
        return (not self.errors
                and self.cells_passed == self.cells_run
                and self.kills_passed == self.kills and self.kill_points_lost == 0
                and self.fuzz_failures == 0
                and all(r.passed for r in self.load) and self.load_points_lost == 0)

    # ---- output
    def figures(self) -> dict[str, Any]:
        return {
            "matrix_cells_run": self.cells_run, "matrix_cells_passed": self.cells_passed,
            "kill_trials": self.kills, "kill_trials_passed": self.kills_passed,
            "kill_points_lost": self.kill_points_lost,
            "fuzz_cases": self.fuzz_cases, "fuzz_failures": self.fuzz_failures,
            "load_points_written": self.load_points_written,
            "load_points_lost": self.load_points_lost,
            "passed": self.passed,
        }

    def to_dict(self) -> dict[str, Any]:
        return {
            "size": self.sizes.name, "parts": list(self.parts), "figures": self.figures(),
            "elapsed_s": round(self.elapsed_s, 1),
            "machine": {"python": platform.python_version(), "system": platform.system(),
                        "processor": platform.machine()},
            "matrix": {"calibration": self.calibration,
                       "cells": [c.to_dict() for c in self.matrix_cells]},
            "kill": {"clean_run_s": self.kill_clean_run_s,
                     "trials": [t.to_dict() for t in self.kill_trials]},
            "fuzz": [dict(f.to_dict(), kind=getattr(f, "kind", "wire")) for f in self.fuzz],
            "load": [r.to_dict() for r in self.load],
            "errors": list(self.errors),
        }

    def format(self) -> str:
        lines = [f"tracer reliability ({self.sizes.name}; {', '.join(self.parts)}; "
                 f"{self.elapsed_s:.0f} s)", ""]
        if "matrix" in self.parts:
            lines.append(f"fault matrix   {self.cells_passed} of {self.cells_run} cells passed "
                         f"(faults x phases through tracer run)")
            for c in self.matrix_cells:
                if not c.passed:
                    lines.append("  " + c.summary().replace("\n", "\n  "))
        if "kill" in self.parts:
            lines.append(f"SIGKILL        {self.kills_passed} of {self.kills} trials passed, "
                         f"{self.kill_points_lost} printed points lost")
            for t in self.kill_trials:
                if not t.passed:
                    lines.append("  " + t.summary().replace("\n", "\n  "))
        if "fuzz" in self.parts:
            lines.append(f"hostile input  {self.fuzz_cases} cases tried, {self.fuzz_failures} "
                         f"failure(s)")
            for f in self.fuzz:
                lines.append("  " + f.summary().replace("\n", "\n  "))
        if "load" in self.parts:
            lines.append(f"load           {self.load_points_written} points written, "
                         f"{self.load_points_lost} lost")
            for r in self.load:
                lines.append("  " + r.summary().replace("\n", "\n  "))
        for e in self.errors:
            lines.append(f"could not run: {e}")
        lines += ["", "target: every cell passed, zero points lost, zero fuzz failures",
                  f"result: {'MET' if self.passed else 'NOT MET'}"]
        return "\n".join(lines)


def run_report(sizes: Sizes = QUICK, *, parts: Sequence[str] = PARTS, workers: int = 2,
               seed: int = 0, workdir: Path | None = None,
               progress: Callable[[str], None] | None = None) -> ReliabilityReport:
    """Run the chosen ``parts`` at ``sizes``; ``progress`` gets one line per finished item."""
    parts = tuple(p for p in PARTS if p in parts)
    report = ReliabilityReport(sizes, parts)
    say = progress or (lambda text: None)
    t0 = time.monotonic()

    def sub(name: str) -> Path | None:
        return None if workdir is None else Path(workdir) / name

    if "matrix" in parts:
        try:
            cal, cells = matrix.run_matrix(sizes.matrix_cells, workdir=sub("matrix"),
                                           workers=workers,
                                           progress=lambda c: say("matrix  " + c.summary()))
            report.calibration = cal.to_dict()
            report.matrix_cells = cells
        except Exception as exc:  # noqa: BLE001 - reported, the other parts still run
            report.errors.append(f"fault matrix: {type(exc).__name__}: {exc}")
    if "kill" in parts:
        try:
            clean, trials = crash.run_kill_trials(sizes.kill_trials, seed=seed + 20240611,
                                                  workdir=sub("kill"), workers=workers,
                                                  progress=lambda t: say("kill    " + t.summary()))
            report.kill_clean_run_s = clean
            report.kill_trials = trials
        except Exception as exc:  # noqa: BLE001
            report.errors.append(f"kill trials: {type(exc).__name__}: {exc}")
    if "fuzz" in parts:
        for kind in fuzz_files.KINDS:
            try:
                s = fuzz_files.fuzz(kind, sizes.fuzz_cases, seed=seed,
                                    workdir=None if workdir is None else sub(f"fuzz-{kind}"))
            except Exception as exc:  # noqa: BLE001
                report.errors.append(f"fuzz {kind}: {type(exc).__name__}: {exc}")
                continue
            report.fuzz.append(s)
            say("fuzz    " + s.summary())
        try:
            w = fuzz_wire.fuzz_wire(sizes.wire_cases, seed=seed)
            report.fuzz.append(w)
            say("fuzz    " + w.summary())
        except Exception as exc:  # noqa: BLE001
            report.errors.append(f"fuzz wire: {type(exc).__name__}: {exc}")
    if "load" in parts:
        for shared in (False, True):
            try:
                r = load.run_load(benches=sizes.load_benches, points=sizes.load_points,
                                  shared=shared, workdir=sub(f"load-{'shared' if shared else 'own'}"))
            except Exception as exc:  # noqa: BLE001
                report.errors.append(f"load ({'shared' if shared else 'own'} logbook): "
                                     f"{type(exc).__name__}: {exc}")
                continue
            report.load.append(r)
            say("load    " + r.summary())
    report.elapsed_s = time.monotonic() - t0
    return report
