"""The fault matrix: every simulated fault in every phase of a run, through ``tracer run``.

Each cell starts a fresh standalone simulated bench and ``tracer run`` (two processes),
arms one fault so that it fires in one phase, and then checks, from outside the program:

1. the bench's own state (harness port, not the drivers): the SMU output is off;
2. the logbook: the run is ``aborted`` with the fault's cause among its interlock records
   (or ``completed`` where the phase makes the fault harmless: a fault during the closing
   make-safe, after every point was measured), its output recorded as verified off, no
   sweep left open, stored points = points the run reported;
3. every point the program printed is in the logbook, with the printed values;
4. no measuring step after the faulty one has any point (the run stopped where it was);
5. the fault really fired, at the message it was aimed at;
6. the exit status is the documented one (0 completed, 3 aborted), nothing on stderr
   looks like a traceback, and the program ended within :data:`TIME_BOUND_S` of a clean
   run's duration.

Aiming. A clean run of the same protocol (:func:`calibrate`) is watched through the
harness: the SMU's message count stands still during the protocol's quiet steps
(:mod:`tracer.reliability.protocols`), which gives the count at four step boundaries
(*anchors*) and the total. A phase is a stretch between two anchors; the fault is armed
over the harness while the faulty run sits on the phase's starting anchor, to fire a
measured number of SMU messages later (the middle of the phase's stretch in the clean
run; for *configuring*, a quarter of the step's non-point messages, which come before
its first point). Anchoring on the live run, not on absolute counts, keeps the aim
exact although the number of list-progress polls varies from run to run.
"""
from __future__ import annotations

import concurrent.futures
import math
import shutil
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

from simulated_instrument import FAULT_NAMES

from tracer.conventions import generator_current

from . import protocols
from .procs import MessageWatch, StandaloneBench, TracerProcess, TracerResult

PHASES = ("configuring", "point-sweep", "mpp", "list-fetch", "teardown")
FAULTS = tuple(FAULT_NAMES)

#: The step whose measurement each phase interrupts (teardown: none, all are done).
PHASE_STEP = {"configuring": protocols.POINT_STEP, "point-sweep": protocols.POINT_STEP,
              "mpp": protocols.MPP_STEP, "list-fetch": protocols.LIST_STEP, "teardown": None}
MEASURING_STEPS = (protocols.POINT_STEP, protocols.MPP_STEP, protocols.LIST_STEP)

#: Interlock causes that name each fault (tracer.engine's cause codes).
EXPECTED_CAUSES = {
    "disconnect": {"link-lost"},
    "stall": {"watchdog", "link-lost"},
    "garble": {"instrument-error"},
    "instrument-error": {"instrument-error"},
    "interlock": {"interlock-open"},
    "compliance": {"compliance"},
    "overtemp": {"temperature-window", "temperature-timeout"},
    "light-failure": {"light-failure", "light-unstable"},
}

#: A fault in the closing make-safe, once every point is in, leaves nothing to abort:
#: the run is complete; what must hold is that the output still ends verified off.
HARMLESS_PHASES = {"teardown"}

EXIT_COMPLETED = 0
EXIT_ABORTED = 3
TIME_SCALE = 0.05
#: A faulty run may take this much longer than the clean run: a stalled instrument costs
#: the watchdog (3 s here) plus a driver time-out (5 s) before the reconnect, and the
#: close-time make-safe may meet the same once more.
TIME_BOUND_S = 30.0
HARD_TIMEOUT_S = 120.0

#: Every fault at least once and every phase at least once (CI size).
QUICK_CELLS = (
    ("instrument-error", "configuring"),
    ("light-failure", "configuring"),
    ("stall", "point-sweep"),
    ("overtemp", "point-sweep"),
    ("interlock", "list-fetch"),
    ("compliance", "mpp"),
    ("disconnect", "list-fetch"),
    ("garble", "teardown"),
)


def all_cells() -> list[tuple[str, str]]:
    return [(f, p) for f in FAULTS for p in PHASES]


# ----------------------------------------------------------------------------- calibration
@dataclass
class Calibration:
    anchors: tuple[int, int, int, int]   # SMU count at the four quiet stretches
    total: int                           # SMU messages of the whole clean run
    list_running: tuple[int, int]        # first and last SMU count seen while the list ran
    points: dict[str, int]               # points per measuring step
    elapsed_s: float
    protocol: Path
    workdir: Path

    @property
    def windows(self) -> dict[str, tuple[int, int]]:
        c, p1, p2, p3 = self.anchors
        return {"point-step": (c, p1), "mpp": (p1, p2), "list": (p2, p3), "teardown": (p3, self.total)}

    def aim(self, phase: str) -> tuple[int, int]:
        """(anchor index, messages after the anchor) at which a fault in ``phase`` fires."""
        c, p1, p2, p3 = self.anchors
        if phase == "configuring":
            overhead = (p1 - c) - self.points[protocols.POINT_STEP]
            return 0, max(2, overhead // 4)
        if phase == "point-sweep":
            return 0, (p1 - c) // 2
        if phase == "mpp":
            return 1, (p2 - p1) // 2
        if phase == "list-fetch":
            # A fifth of the way into the stretch in which the list ran and was fetched: the
            # number of progress polls varies from run to run, so not its middle.
            first, last = self.list_running
            return 2, (first - p2) + max(2, (last - first) // 5)
        if phase == "teardown":
            return 3, max(1, (self.total - p3) // 2)
        raise ValueError(f"unknown phase {phase!r}")

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d["protocol"] = str(self.protocol)
        d["workdir"] = str(self.workdir)
        return d


class CalibrationError(RuntimeError):
    pass


def calibrate(workdir: Path, *, seed: int = 0) -> Calibration:
    """One clean run of the matrix protocol, watched; raises CalibrationError if it is not
    clean or its quiet stretches cannot be told apart."""
    workdir = Path(workdir)
    protocol = protocols.write_protocol(protocols.matrix_protocol(), workdir / "matrix.yaml")
    with StandaloneBench(workdir / "clean-sim", time_scale=TIME_SCALE, seed=seed) as bench:
        with MessageWatch(bench) as watch:
            tracer = TracerProcess(protocol, bench.bench_file, workdir / "clean.sqlite",
                                   workdir / "clean-out").start()
            result = tracer.wait(HARD_TIMEOUT_S)
        state = bench.state()
    if result.returncode != EXIT_COMPLETED:
        raise CalibrationError(f"the clean run ended with status {result.returncode}: "
                               f"{result.stderr.strip()[-500:]}")
    plateaus = watch.plateaus()
    if len(plateaus) < 4:
        raise CalibrationError(f"expected four quiet stretches in the clean run, saw {plateaus}")
    anchors = tuple(plateaus[-4:])
    total = int(state["messages"]["smu"])
    running = watch.sweeping_counts(after=anchors[2])
    if len(running) < 3:
        raise CalibrationError(f"the list sweep was seen running in only {len(running)} polls")
    per_step: dict[str, int] = {}
    for p in result.points:
        per_step[p.step] = per_step.get(p.step, 0) + 1
    expected = {protocols.POINT_STEP: protocols.POINT_SWEEP_POINTS,
                protocols.LIST_STEP: protocols.LIST_SWEEP_POINTS}
    for step, n in expected.items():
        if per_step.get(step) != n:
            raise CalibrationError(f"the clean run printed {per_step.get(step)} points of "
                                   f"step {step!r}, not {n}")
    c, p1, p2, p3 = anchors
    mpp_readings = int(protocols.MPP_DURATION_S / protocols.MPP_INTERVAL_S)
    if not (p1 - c > protocols.POINT_SWEEP_POINTS and p2 - p1 > mpp_readings and p3 > p2
            and total > p3 + 1):
        raise CalibrationError(f"implausible anchors {anchors} (total {total})")
    return Calibration(anchors=anchors, total=total, list_running=(min(running), max(running)),
                       points=per_step, elapsed_s=result.elapsed_s,
                       protocol=protocol, workdir=workdir)


# ----------------------------------------------------------------------------- one cell
@dataclass
class CellResult:
    fault: str
    phase: str
    passed: bool
    problems: list[str] = field(default_factory=list)
    exit_status: int | None = None
    run_status: str | None = None
    causes: list[str] = field(default_factory=list)
    reason: str = ""
    elapsed_s: float = 0.0
    points_printed: int = 0
    points_stored: int = 0
    points_missing: int = 0
    fired_at_message: int | None = None
    aimed_at_message: int | None = None
    output_on_after: bool | None = None
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def summary(self) -> str:
        head = (f"{self.fault:<16} {self.phase:<12} {'PASS' if self.passed else 'FAIL'}  "
                f"exit {self.exit_status}, {self.run_status}"
                f"{' (' + ', '.join(self.causes) + ')' if self.causes else ''}, "
                f"{self.points_stored} points, {self.elapsed_s:.1f} s")
        if self.problems:
            head += "\n    " + "\n    ".join(self.problems)
        return head


def expected_outcome(fault: str, phase: str) -> tuple[str, set[str]]:
    """(run status, acceptable interlock causes) a cell must end with."""
    if phase in HARMLESS_PHASES:
        return "completed", set()
    return "aborted", set(EXPECTED_CAUSES[fault])


def _wait_anchor(watch: MessageWatch, tracer: TracerProcess, cal: Calibration,
                 index: int) -> tuple[int | None, str]:
    """Follow the live run through the anchors up to ``index``; the live count there."""
    live: int | None = None
    for k in range(index + 1):
        # the first anchor comes after the same connect-and-prepare messages in every run;
        # each later one is the next quiet stretch (the SMU is never silent that long
        # within a measuring step)
        at_least = cal.anchors[0] if live is None else live + 1
        found = watch.wait_for_plateau(at_least, timeout_s=60.0, alive=tracer.running)
        if found is None:
            return None, f"the run never reached quiet stretch {k} (SMU count >= {at_least})"
        live = found
    return live, ""


def run_cell(cal: Calibration, fault: str, phase: str, workdir: Path, *, seed: int = 0
             ) -> CellResult:
    workdir = Path(workdir)
    cell = CellResult(fault, phase, passed=False)
    anchor_index, offset = cal.aim(phase)
    with StandaloneBench(workdir / "sim", time_scale=TIME_SCALE, seed=seed) as bench:
        with MessageWatch(bench) as watch:
            tracer = TracerProcess(cal.protocol, bench.bench_file, workdir / "logbook.sqlite",
                                   workdir / "out").start()
            try:
                anchor, why = _wait_anchor(watch, tracer, cal, anchor_index)
                if anchor is None:
                    cell.problems.append(why)
                else:
                    entry = bench.inject(fault, offset)
                    cell.aimed_at_message = anchor + offset
                    if int(entry["armed_at_message"]) != anchor:
                        cell.problems.append(
                            f"the fault was armed at SMU message {entry['armed_at_message']}, "
                            f"not on the quiet stretch at {anchor} (aim missed)")
                result = tracer.wait(cal.elapsed_s + TIME_BOUND_S + HARD_TIMEOUT_S)
                (workdir / "stdout.txt").write_text(result.stdout, encoding="utf-8")
                (workdir / "stderr.txt").write_text(result.stderr, encoding="utf-8")
            finally:
                if tracer.running():
                    tracer.kill()
        try:
            state = bench.state()
        except Exception as exc:  # noqa: BLE001 - reported as a problem of the cell
            state = None
            cell.problems.append(f"the simulated bench does not answer its harness: {exc}")
    _judge(cell, cal, result, state, workdir / "logbook.sqlite")
    return cell


def _judge(cell: CellResult, cal: Calibration, result: TracerResult, state: dict | None,
           logbook_path: Path) -> None:
    from tracer.logbook import Logbook

    problems = cell.problems
    cell.exit_status = result.returncode
    cell.elapsed_s = result.elapsed_s
    cell.points_printed = len(result.points)
    if result.timed_out:
        problems.append(f"tracer run did not end within {HARD_TIMEOUT_S:g} s; killed")
    bound = cal.elapsed_s + TIME_BOUND_S
    if result.elapsed_s > bound:
        problems.append(f"tracer run took {result.elapsed_s:.1f} s, more than the bound "
                        f"{bound:.1f} s (clean run {cal.elapsed_s:.1f} s + {TIME_BOUND_S:g} s)")
    if "Traceback" in result.stderr or "Traceback" in result.stdout:
        last = (result.stderr.strip().splitlines() or [""])[-1][:300]
        problems.append(f"a Python traceback was printed: {last}")

    # 1. the bench's own word on the output
    if state is not None:
        smu = state["smu"]
        cell.output_on_after = bool(smu["output_on"])
        if smu["output_on"]:
            problems.append(f"the SMU output is ON after the run (level {smu['level']!r}, "
                            f"function {smu['function']})")
        if state["light"]["shutter_open"]:
            problems.append("the light's shutter is left open after the run")
        fired = [f for f in state["faults"]["history"] if f.get("name") == cell.fault and f.get("fired")]
        if not fired:
            problems.append("the fault never fired (the run ended before the aimed message)")
        else:
            cell.fired_at_message = int(fired[0]["fired_at_message"])
            if cell.aimed_at_message is not None and cell.fired_at_message != cell.aimed_at_message:
                problems.append(f"the fault fired at SMU message {cell.fired_at_message}, aimed "
                                f"at {cell.aimed_at_message}")

    # 2. the logbook
    want_status, want_causes = expected_outcome(cell.fault, cell.phase)
    try:
        with Logbook(logbook_path) as lb:
            runs = lb.list_runs()
            if len(runs) != 1:
                problems.append(f"the logbook holds {len(runs)} runs, expected 1")
                _finish(cell)
                return
            run = lb.run(runs[0].uid)
            sweeps = lb.sweeps(run.uid)
            stored = lb.run_points(run.uid)
            trips = lb.interlocks(run.uid)
    except Exception as exc:  # noqa: BLE001
        problems.append(f"the logbook cannot be read: {type(exc).__name__}: {exc}")
        _finish(cell)
        return
    cell.run_status = run.status
    cell.reason = run.reason
    cell.causes = [t.cause for t in trips]
    cell.points_stored = len(stored)
    if run.status != want_status:
        problems.append(f"the run is {run.status!r} ({run.reason}), expected {want_status!r}")
    if want_causes and not (set(cell.causes) & want_causes):
        problems.append(f"no interlock record names the fault: causes {cell.causes}, expected "
                        f"one of {sorted(want_causes)}")
    if not want_causes and cell.causes and run.status == "completed":
        problems.append(f"a completed run carries interlock records {cell.causes}")
    if run.output_verified_off is not True:
        problems.append("the logbook does not record the output as verified off")
    if run.points_reported is not None and run.points_reported != len(stored):
        problems.append(f"the run reported {run.points_reported} points, the logbook holds {len(stored)}")
    open_sweeps = [s.step_name for s in sweeps if s.status == "running"]
    if open_sweeps:
        problems.append(f"sweeps left running: {open_sweeps}")
    if run.status == "completed" and len(stored) != sum(cal.points.values()):
        problems.append(f"a completed run holds {len(stored)} points, the clean run "
                        f"{sum(cal.points.values())}")

    # 3. every printed point is stored, with the printed values
    by_index = {s.sweep_index: s for s in sweeps}
    stored_by_key = {(p.sweep_uid, p.seq): p for p in stored}
    missing = []
    for printed in result.points:
        sweep = by_index.get(printed.sweep_index)
        point = None if sweep is None else stored_by_key.get((sweep.uid, printed.seq))
        if point is None or not _same(printed, point):
            missing.append(f"{printed.step}#{printed.seq}")
    cell.points_missing = len(missing)
    if missing:
        problems.append(f"{len(missing)} printed point(s) missing or different in the logbook: "
                        f"{', '.join(missing[:5])}")

    # 4. nothing measured after the faulty step
    step = PHASE_STEP[cell.phase]
    if step is not None and run.status != "completed":
        later = MEASURING_STEPS[MEASURING_STEPS.index(step) + 1:]
        measured_later = sorted({s.step_name for s in sweeps
                                 if s.step_name in later and (s.points_stored or 0) > 0})
        if measured_later:
            problems.append(f"the run went on measuring after the fault: {measured_later}")

    # 6. exit status
    want_exit = EXIT_COMPLETED if run.status == "completed" else EXIT_ABORTED
    if result.returncode != want_exit:
        problems.append(f"exit status {result.returncode}, documented {want_exit} for a "
                        f"{run.status} run")
    _finish(cell)


def _same(printed: Any, point: Any) -> bool:
    """The printed line (V to 1 uV, generator current to 1 nA in mA) matches the point."""
    v = float(point.voltage_v)
    i_ma = float(generator_current(float(point.current_a))) * 1e3
    return (math.isclose(v, printed.voltage_v, abs_tol=6e-7)
            and math.isclose(i_ma, printed.current_ma_generator, abs_tol=6e-7)
            and bool(point.in_compliance) == printed.in_compliance)


def _finish(cell: CellResult) -> None:
    cell.passed = not cell.problems


# ----------------------------------------------------------------------------- the matrix
def run_matrix(cells: Sequence[tuple[str, str]], *, workdir: Path | None = None,
               workers: int = 2, calibration: Calibration | None = None,
               progress: Any = None) -> tuple[Calibration, list[CellResult]]:
    """Calibrate (unless given), then run ``cells`` on ``workers`` parallel slots."""
    own = workdir is None
    root = Path(tempfile.mkdtemp(prefix="tracer-matrix-")) if own else Path(workdir)
    try:
        cal = calibration or calibrate(root / "calibration")
        results: list[CellResult] = []

        def one(k: int, fault: str, phase: str) -> CellResult:
            try:
                r = run_cell(cal, fault, phase, root / f"cell-{k:02d}-{fault}-{phase}", seed=k)
            except Exception as exc:  # noqa: BLE001 - a broken harness is a failed cell
                r = CellResult(fault, phase, passed=False,
                               problems=[f"the cell could not run: {type(exc).__name__}: {exc}"])
            if progress is not None:
                progress(r)
            return r

        with concurrent.futures.ThreadPoolExecutor(max_workers=max(1, workers)) as pool:
            futures = [pool.submit(one, k, f, p) for k, (f, p) in enumerate(cells)]
            results = [f.result() for f in futures]
        return cal, results
    finally:
        if own:
            shutil.rmtree(root, ignore_errors=True)


def select_cells(quick: bool) -> list[tuple[str, str]]:
    return list(QUICK_CELLS) if quick else all_cells()


def covers_every_fault_and_phase(cells: Iterable[tuple[str, str]]) -> bool:
    cells = list(cells)
    return {f for f, _ in cells} == set(FAULTS) and {p for _, p in cells} == set(PHASES)
