"""Load: eight benches measuring at once, first each into its own logbook, then all into one
shared logbook (created by the runs themselves, so eight programs race to create it).

Each bench is a simulated bench (SMU, light, thermometer, switch on their own loopback
ports) hosted in this process; each run is a separate ``tracer run`` program. For every
run the check compares what the program printed, what the run reported and what the
logbook holds: no point lost, none stored twice, every run completed with exit status 0,
and nothing said "database is locked" (or any other lock error) to the user.
"""
from __future__ import annotations

import re
import shutil
import tempfile
import time
from contextlib import ExitStack
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from . import protocols
from .procs import TracerProcess, TracerResult

RUN_STARTED = re.compile(r"^run (?P<uid>[0-9a-f]{32}) started", re.M)
LOCK_WORDS = ("database is locked", "database table is locked", "SQLITE_BUSY", "OperationalError")
BENCHES = 8


@dataclass
class LoadRun:
    bench: int
    logbook: str
    exit_status: int | None = None
    run_uid: str | None = None
    status: str | None = None
    printed: int = 0
    reported: int | None = None
    stored: int = 0
    duplicates: int = 0
    lost: int = 0
    elapsed_s: float = 0.0
    problems: list[str] = field(default_factory=list)


@dataclass
class LoadResult:
    mode: str                       # "own logbooks" | "shared logbook"
    runs: list[LoadRun] = field(default_factory=list)
    elapsed_s: float = 0.0

    @property
    def points_written(self) -> int:
        return sum(r.stored for r in self.runs)

    @property
    def points_lost(self) -> int:
        return sum(r.lost for r in self.runs)

    @property
    def passed(self) -> bool:
        return all(not r.problems for r in self.runs)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        d.update(points_written=self.points_written, points_lost=self.points_lost,
                 passed=self.passed)
        return d

    def summary(self) -> str:
        head = (f"{self.mode:<15} {len(self.runs)} runs, {self.points_written} points written, "
                f"{self.points_lost} lost, {'PASS' if self.passed else 'FAIL'}, "
                f"{self.elapsed_s:.1f} s")
        for r in self.runs:
            for p in r.problems:
                head += f"\n    bench {r.bench}: {p}"
        return head


def _judge(run: LoadRun, result: TracerResult, logbook: Path) -> None:
    from tracer.logbook import Logbook

    run.exit_status = result.returncode
    run.elapsed_s = result.elapsed_s
    run.printed = len(result.points)
    text = result.stdout + result.stderr
    said = [w for w in LOCK_WORDS if w.lower() in text.lower()]
    if said:
        run.problems.append(f"the program said {said[0]!r} to the user")
    if "Traceback (most recent call last)" in text:
        run.problems.append("a traceback was printed")
    if result.timed_out:
        run.problems.append("the run did not end in time; killed")
    if result.returncode != 0:
        run.problems.append(f"exit status {result.returncode}: {result.stderr.strip()[-300:]}")
    uids = RUN_STARTED.findall(result.stdout)
    if not uids:
        run.problems.append("no run start line printed")
        run.lost = run.printed
        return
    run.run_uid = uids[-1]
    try:
        with Logbook(logbook) as lb:
            stored_run = lb.run(run.run_uid)
            run.status = stored_run.status
            run.reported = stored_run.points_reported
            sweeps = {s.sweep_index: s.uid for s in lb.sweeps(run.run_uid)}
            rows = lb.connection.execute(
                "SELECT sweep_uid, seq, COUNT(*) FROM points WHERE run_uid = ? "
                "GROUP BY sweep_uid, seq", (run.run_uid,)).fetchall()
    except Exception as exc:  # noqa: BLE001 - the logbook must be readable
        run.problems.append(f"the logbook cannot be read: {type(exc).__name__}: {exc}")
        run.lost = run.printed
        return
    run.stored = sum(n for _, _, n in rows)
    run.duplicates = sum(n - 1 for _, _, n in rows if n > 1)
    keys = {(u, s) for u, s, _ in rows}
    missing = [p for p in result.points if (sweeps.get(p.sweep_index), p.seq) not in keys]
    run.lost = len(missing)
    if run.reported is not None and run.reported > len(keys):
        run.lost = max(run.lost, run.reported - len(keys))
    if run.status != "completed":
        run.problems.append(f"the run is {run.status!r}")
    if run.lost:
        run.problems.append(f"{run.lost} point(s) printed or reported but not stored")
    if run.duplicates:
        run.problems.append(f"{run.duplicates} point(s) stored twice")
    if run.reported != run.stored:
        run.problems.append(f"reported {run.reported} points, stored {run.stored}")
    if run.printed != run.stored:
        run.problems.append(f"printed {run.printed} points, stored {run.stored}")


def run_load(*, benches: int = BENCHES, points: int = 60, shared: bool,
             workdir: Path | None = None, time_scale: float = 0.02) -> LoadResult:
    """``benches`` simultaneous runs of the load protocol (``points`` per point sweep)."""
    import simulated_instrument

    own = workdir is None
    root = Path(tempfile.mkdtemp(prefix="tracer-load-")) if own else Path(workdir)
    root.mkdir(parents=True, exist_ok=True)
    result = LoadResult("shared logbook" if shared else "own logbooks")
    try:
        protocol = protocols.write_protocol(protocols.load_protocol(points), root / "load.yaml")
        with ExitStack() as stack:
            procs = []
            for k in range(benches):
                bench = stack.enter_context(simulated_instrument.running_bench(
                    time_scale=time_scale, seed=100 + k))
                bench_file = bench.write_bench_profile(root / f"bench-{k}.yaml")
                logbook = root / ("shared.sqlite" if shared else f"bench-{k}.sqlite")
                procs.append((k, logbook, TracerProcess(protocol, bench_file, logbook,
                                                        root / f"out-{k}")))
            t0 = time.monotonic()
            for _, _, proc in procs:
                proc.start()
            outcomes = [(k, logbook, proc.wait(300.0)) for k, logbook, proc in procs]
            result.elapsed_s = time.monotonic() - t0
        for k, logbook, outcome in outcomes:
            run = LoadRun(k, str(logbook))
            _judge(run, outcome, logbook)
            result.runs.append(run)
        return result
    finally:
        if own:
            shutil.rmtree(root, ignore_errors=True)
