"""Crash safety: ``tracer run`` killed with SIGKILL at random (seeded) moments.

SIGKILL runs no handler: nothing is flushed, closed or switched off by the program. Each
trial starts ``tracer run`` against a standalone simulated bench, kills it at a moment
drawn uniformly over a clean run's duration (start-up and report included), then checks:

Four trials in five are timed from the moment the program printed that its run started
(a moment drawn over the clean run's remaining time); the fifth from the launch (drawn
over the clean run's whole time), so start-up and the closing report are killed too.

After the kill:

- the logbook opens (and SQLite's own ``integrity_check`` says ``ok``);
- every point the program printed before it died is in the logbook, with its values;
- the run is no longer ``running`` after that open: ``interrupted``, or ``completed`` /
  ``aborted`` if it had already ended when the kill came;
- what the bench itself was left with (harness state, not the drivers): if the output is
  still on, the compliance and over-voltage protection the run set are in force; a list
  sweep that was running ends on its own at 0 V.

The trials of one worker share one bench and one logbook, as an operator's would: each run
starts on an instrument the previous, killed run left on.
"""
from __future__ import annotations

import concurrent.futures
import math
import random
import re
import shutil
import sqlite3
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from tracer.conventions import generator_current

from . import protocols
from .procs import StandaloneBench, TracerProcess

TIME_SCALE = 0.05
RUN_STARTED = re.compile(r"^run (?P<uid>[0-9a-f]{32}) started", re.M)
FULL_TRIALS = 50
QUICK_TRIALS = 6


@dataclass
class KillTrial:
    index: int
    kill_after_s: float
    anchor: str = "launch"          # "launch" | "run-start": what kill_after_s counts from
    passed: bool = False
    problems: list[str] = field(default_factory=list)
    run_uid: str | None = None
    exited_before_kill: bool = False
    points_printed: int = 0
    points_lost: int = 0
    run_status: str | None = None
    output_on_after_kill: bool | None = None
    list_sweep_running_at_kill: bool = False
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def summary(self) -> str:
        head = (f"trial {self.index:3d} kill {self.kill_after_s:5.2f} s after {self.anchor:<9}  "
                f"{'PASS' if self.passed else 'FAIL'}  run {self.run_status}, "
                f"{self.points_printed} printed, {self.points_lost} lost, output "
                f"{'ON' if self.output_on_after_kill else 'off'} after the kill"
                f"{' (list running)' if self.list_sweep_running_at_kill else ''}")
        if self.problems:
            head += "\n    " + "\n    ".join(self.problems)
        return head


def _compliances(doc: dict[str, Any]) -> set[float]:
    out = set()
    for step in doc["steps"]:
        for key in ("compliance_a",):
            if key in step:
                out.add(float(step[key]))
    return out


def _judge_bench(trial: KillTrial, bench: StandaloneBench, doc: dict[str, Any]) -> None:
    state = bench.state()
    smu = state["smu"]
    trial.output_on_after_kill = bool(smu["output_on"])
    trial.list_sweep_running_at_kill = bool(smu["sweeping"])
    if not smu["output_on"]:
        return
    limits = doc["limits"]
    # what protects the cell once the host is gone: limits set on the instrument
    if not math.isclose(float(smu["ovp_v"]), float(limits["voltage_v"]), rel_tol=1e-9):
        trial.problems.append(f"output left on with OVP {smu['ovp_v']} V, not the protocol's "
                              f"{limits['voltage_v']} V")
    if smu["function"] == "VOLT":
        compliance = float(smu["current_compliance_a"])
        if not any(math.isclose(compliance, c, rel_tol=1e-9) for c in _compliances(doc)):
            trial.problems.append(f"output left on with a current compliance of {compliance} A, "
                                  f"none of the protocol's {sorted(_compliances(doc))}")
        if abs(float(smu["level"])) > float(limits["voltage_v"]) + 1e-12:
            trial.problems.append(f"output left on at {smu['level']} V, beyond the limit")
    if smu["sweeping"]:
        deadline = time.monotonic() + 20.0
        while time.monotonic() < deadline and state["smu"]["sweeping"]:
            time.sleep(0.05)
            state = bench.state()
        if state["smu"]["sweeping"]:
            trial.problems.append("the list sweep left running never ended")
        elif state["smu"]["output_on"] and state["smu"]["voltage_level_v"] != 0.0:
            trial.problems.append(f"the unattended list sweep ended at "
                                  f"{state['smu']['voltage_level_v']} V, not 0 V")


def _judge_logbook(trial: KillTrial, logbook: Path, stdout: str, printed: list) -> None:
    from tracer.logbook import Logbook

    uids = RUN_STARTED.findall(stdout)
    trial.run_uid = uids[-1] if uids else None
    trial.points_printed = len(printed)
    if logbook.exists():
        try:
            with sqlite3.connect(logbook) as raw:
                verdict = raw.execute("PRAGMA integrity_check").fetchone()[0]
            if verdict != "ok":
                trial.problems.append(f"SQLite integrity_check: {verdict}")
        except sqlite3.Error as exc:
            trial.problems.append(f"SQLite cannot check the file: {exc}")
    try:
        with Logbook(logbook) as lb:
            still_running = [r.uid for r in lb.list_runs() if r.status == "running"]
            if still_running:
                trial.problems.append(f"runs still 'running' after the open: {still_running}")
            if trial.run_uid is None:
                if printed:
                    trial.problems.append("points were printed but no run start line")
                return
            run = lb.run(trial.run_uid)
            trial.run_status = run.status
            sweeps = {s.sweep_index: s for s in lb.sweeps(run.uid)}
            stored = {(p.sweep_uid, p.seq): p for p in lb.run_points(run.uid)}
    except Exception as exc:  # noqa: BLE001 - the logbook must open; anything else is a finding
        trial.problems.append(f"the logbook does not open: {type(exc).__name__}: {exc}")
        trial.points_lost = len(printed)
        return
    if run.status not in ("interrupted", "completed", "aborted"):
        trial.problems.append(f"the killed run is {run.status!r}")
    lost = []
    for p in printed:
        sweep = sweeps.get(p.sweep_index)
        point = None if sweep is None else stored.get((sweep.uid, p.seq))
        if point is None or not (
                math.isclose(float(point.voltage_v), p.voltage_v, abs_tol=6e-7)
                and math.isclose(float(generator_current(float(point.current_a))) * 1e3,
                                 p.current_ma_generator, abs_tol=6e-7)):
            lost.append(f"{p.step}#{p.seq}")
    trial.points_lost = len(lost)
    if lost:
        trial.problems.append(f"{len(lost)} printed point(s) not in the logbook: {', '.join(lost[:5])}")


def _wait_run_start(tracer: TracerProcess, timeout_s: float) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if RUN_STARTED.search(tracer.stdout_so_far()):
            return True
        if not tracer.running():
            return False
        time.sleep(0.005)
    return False


def clean_duration(workdir: Path, protocol: Path, *, seed: int = 0) -> tuple[float, float]:
    """(whole wall time, time after the run-started line) of one complete ``tracer run``."""
    with StandaloneBench(workdir / "clean-sim", time_scale=TIME_SCALE, seed=seed) as bench:
        tracer = TracerProcess(protocol, bench.bench_file, workdir / "clean.sqlite",
                               workdir / "clean-out").start()
        started = _wait_run_start(tracer, 60.0)
        t_started = time.monotonic() - tracer.t0
        result = tracer.wait(120.0)
    if result.returncode != 0 or not started:
        raise RuntimeError(f"the clean run ended with status {result.returncode}: "
                           f"{result.stderr.strip()[-400:]}")
    return result.elapsed_s, result.elapsed_s - t_started


def _worker(trials: list[tuple[int, str, float]], workdir: Path, protocol: Path,
            doc: dict[str, Any], seed: int, progress: Any) -> list[KillTrial]:
    out: list[KillTrial] = []
    logbook = workdir / "logbook.sqlite"
    with StandaloneBench(workdir / "sim", time_scale=TIME_SCALE, seed=seed) as bench:
        for index, anchor, delay in trials:
            trial = KillTrial(index, delay, anchor)
            tracer = TracerProcess(protocol, bench.bench_file, logbook, workdir / f"out-{index}")
            try:
                tracer.start()
                if anchor == "run-start" and not _wait_run_start(tracer, 60.0):
                    trial.note = "the run never printed its start; killed at once"
                    delay = 0.0
                time.sleep(delay)
                if tracer.running():
                    tracer.kill()
                else:
                    trial.exited_before_kill = True
                result = tracer.wait(30.0)
                _judge_bench(trial, bench, doc)
                _judge_logbook(trial, logbook, result.stdout, result.points)
            except Exception as exc:  # noqa: BLE001 - a broken trial is a failed trial
                trial.problems.append(f"the trial could not run: {type(exc).__name__}: {exc}")
            finally:
                if tracer.running():
                    tracer.kill()
            trial.passed = not trial.problems
            out.append(trial)
            if progress is not None:
                progress(trial)
    return out


def run_kill_trials(count: int, *, seed: int = 20240611, workdir: Path | None = None,
                    workers: int = 2, progress: Any = None) -> tuple[float, list[KillTrial]]:
    """``count`` kill trials on ``workers`` benches; returns (clean run's duration, trials)."""
    own = workdir is None
    root = Path(tempfile.mkdtemp(prefix="tracer-kill-")) if own else Path(workdir)
    try:
        doc = protocols.crash_protocol()
        protocol = protocols.write_protocol(doc, root / "crash.yaml")
        duration, running = clean_duration(root / "clean", protocol)
        rng = random.Random(seed)
        moments = []
        for k in range(count):
            if k % 5 == 4:
                moments.append((k, "launch", round(rng.uniform(0.0, duration), 3)))
            else:
                moments.append((k, "run-start", round(rng.uniform(0.0, running), 3)))
        workers = max(1, min(workers, count))
        shares = [moments[w::workers] for w in range(workers)]
        with concurrent.futures.ThreadPoolExecutor(max_workers=workers) as pool:
            futures = [pool.submit(_worker, share, root / f"worker-{w}", protocol, doc, seed + w,
                                   progress)
                       for w, share in enumerate(shares) if share]
            trials = [t for f in futures for t in f.result()]
        trials.sort(key=lambda t: t.index)
        return duration, trials
    finally:
        if own:
            shutil.rmtree(root, ignore_errors=True)
