"""Run every benchmark, one after another, each in a child process, and build the report.

The benchmarks of the simulator, drivers, model, fits, engine, logbook and GUI live in the
source checkout's ``tests/benchmarks/bench_*.py`` (they use test-only oracles such as pvlib,
which the installed package never imports); the analysis-latency benchmark is
:mod:`tracer.perf.analysis_latency`. Each runs in its own child process (same interpreter,
same machine, one at a time, so they never compete for the cores), with a time limit: a
benchmark that raises, crashes, hangs or is missing gives an error text in place of its
figures, and the others still run.
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import platform
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

from .figures import FIGURES, INFO_FIGURES, evaluate

#: (short name, target): a ``bench_*.py`` file name in the benchmark folder, or a module.
BENCHMARKS: tuple[tuple[str, str], ...] = (
    ("model", "bench_model.py"),
    ("fit", "bench_fit.py"),
    ("engine", "bench_engine.py"),
    ("analysis", "tracer.perf.analysis_latency"),
    ("logbook", "bench_logbook.py"),
    ("gui", "bench_gui.py"),
    ("simulator", "bench_simulator.py"),
    ("drivers", "bench_drivers.py"),
)

QUICK_TIMEOUT_S = 90.0
FULL_TIMEOUT_S = 1800.0
LOG_TAIL_LINES = 20


def default_benchmark_dir() -> Path:
    """``tests/benchmarks`` of the checkout this package was installed from (editable)."""
    return Path(__file__).resolve().parents[2] / "tests" / "benchmarks"


@dataclass(frozen=True)
class Size:
    """How big a run is: ``quick`` goes to every benchmark's ``run(quick=...)``."""

    name: str                    # "full" | "quick"
    quick: bool
    timeout_s: float


SIZES = {
    "full": Size("full", False, FULL_TIMEOUT_S),
    "quick": Size("quick", True, QUICK_TIMEOUT_S),
}


def child_environment(base: Mapping[str, str] | None = None) -> dict[str, str]:
    """The environment of a benchmark process: offscreen Qt when no display is there."""
    env = dict(os.environ if base is None else base)
    if not env.get("QT_QPA_PLATFORM") and not (env.get("DISPLAY") or env.get("WAYLAND_DISPLAY")):
        env["QT_QPA_PLATFORM"] = "offscreen"
    env.setdefault("PYTHONUNBUFFERED", "1")
    return env


def _tail(path: Path, lines: int = LOG_TAIL_LINES) -> str:
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError:
        return ""
    return "\n".join(text.rstrip().splitlines()[-lines:])


def _kill_group(proc: subprocess.Popen) -> None:
    """End the benchmark process we started, and anything it started (its own session)."""
    for sig, wait_s in ((signal.SIGTERM, 5.0), (signal.SIGKILL, 5.0)):
        try:
            os.killpg(proc.pid, sig)
        except (ProcessLookupError, PermissionError):
            return
        try:
            proc.wait(wait_s)
            return
        except subprocess.TimeoutExpired:
            continue


def run_one(name: str, target: str, *, quick: bool, timeout_s: float,
            env: Mapping[str, str], log: Callable[[str], None] | None = None,
            stream_output: bool = False) -> dict[str, Any]:
    """Run one benchmark in a child process; returns its outcome (never raises)."""
    started = time.perf_counter()
    outcome: dict[str, Any] = {"target": target, "status": "failed", "result": None,
                               "error": None, "traceback": None, "seconds": None,
                               "log_tail": ""}
    with tempfile.TemporaryDirectory(prefix=f"tracer-bench-{name}-") as tmp:
        out_json = Path(tmp) / "outcome.json"
        log_path = Path(tmp) / "output.log"
        cmd = [sys.executable, "-m", "tracer.perf._child", target, str(out_json)]
        if quick:
            cmd.append("--quick")
        with open(log_path, "wb") as log_file:
            sink: Any = log_file
            if stream_output:           # show the benchmark's own print-out as it comes
                try:
                    sink = sys.stderr.fileno()
                except (AttributeError, OSError, ValueError):
                    sink = log_file
            try:
                proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=sink,
                                        stderr=subprocess.STDOUT, env=dict(env),
                                        start_new_session=True)
            except OSError as exc:
                outcome["error"] = f"could not start the benchmark process: {exc}"
                return outcome
            timed_out = False
            try:
                proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                timed_out = True
                _kill_group(proc)
            except BaseException:
                _kill_group(proc)          # Ctrl-C: leave nothing running behind us
                raise
        outcome["seconds"] = time.perf_counter() - started
        outcome["log_tail"] = _tail(log_path)
        payload = None
        if out_json.is_file():
            try:
                payload = json.loads(out_json.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                outcome["error"] = f"unreadable outcome: {exc}"
        if payload is not None:
            outcome["result"] = payload.get("result")
            outcome["error"] = payload.get("error")
            outcome["traceback"] = payload.get("traceback")
            outcome["run_s"] = payload.get("seconds")
            outcome["status"] = "ok" if outcome["error"] is None else "failed"
            if timed_out:       # the figures came, but the process would not end by itself
                outcome["warning"] = (f"the benchmark process did not exit within "
                                      f"{timeout_s:g} s after its run; it was ended")
        elif timed_out:
            outcome["status"] = "timeout"
            outcome["error"] = f"no result within {timeout_s:g} s; the benchmark was ended"
        elif outcome["error"] is None:
            last = outcome["log_tail"].splitlines()[-1:] or ["no output"]
            outcome["error"] = (f"the benchmark process ended with status {proc.returncode} "
                                f"without a result: {last[0]}")
    if log is not None:
        state = ("ok" if outcome["status"] == "ok"
                 else f"{outcome['status'].upper()}: {outcome['error']}")
        log(f"  {name:<10} {outcome['seconds']:6.1f} s  {state}")
    return outcome


def machine() -> dict[str, Any]:
    """What the figures were measured on."""
    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text(encoding="utf-8").splitlines():
            if line.lower().startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        usable = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        usable = os.cpu_count()
    info: dict[str, Any] = {"cores": os.cpu_count(), "usable_cores": usable, "cpu": cpu,
                            "system": f"{platform.system()} {platform.release()}",
                            "python": platform.python_version()}
    try:
        pages, size = os.sysconf("SC_PHYS_PAGES"), os.sysconf("SC_PAGE_SIZE")
        info["memory_gib"] = round(pages * size / 2**30, 1)
    except (AttributeError, ValueError, OSError):
        pass
    try:
        info["load_average_1min_at_start"] = round(os.getloadavg()[0], 2)
    except (AttributeError, OSError):
        pass
    return info


def run_report(size: str = "quick", *, benchmark_dir: Path | None = None,
               only: Sequence[str] | None = None, timeout_s: float | None = None,
               command: str = "tracer bench", log: Callable[[str], None] | None = None,
               stream_output: bool = False,
               benchmarks: Sequence[tuple[str, str]] = BENCHMARKS) -> dict[str, Any]:
    """Run the benchmarks and return the report (a JSON-safe dict; see ``tracer bench``).

    ``only``: the short names to run (the others are reported as not run). Never raises for a
    benchmark's failure: it is written into the report."""
    chosen = SIZES[size]
    timeout = chosen.timeout_s if timeout_s is None else float(timeout_s)
    folder = Path(benchmark_dir) if benchmark_dir is not None else default_benchmark_dir()
    env = child_environment()
    started_wall = _dt.datetime.now(_dt.timezone.utc)
    info = machine()
    started = time.perf_counter()
    outcomes: dict[str, dict[str, Any]] = {}
    for name, target in benchmarks:
        if only is not None and name not in only:
            outcomes[name] = {"target": target, "status": "skipped", "result": None,
                              "error": f"not run (this run asked only for {', '.join(only)})"}
            continue
        if target.endswith(".py"):
            path = folder / target
            if not path.is_file():
                why = ("the benchmark folder is missing" if not folder.is_dir()
                       else f"{target} is not there (yet)")
                outcomes[name] = {
                    "target": str(path), "status": "missing", "result": None,
                    "error": f"{path} not found: {why}. `tracer bench` runs the benchmarks of a "
                             f"source checkout (tests/benchmarks); give another with --bench-dir"}
                if log is not None:
                    log(f"  {name:<10}    -    MISSING: {path}")
                continue
            target = str(path)
        outcomes[name] = run_one(name, target, quick=chosen.quick, timeout_s=timeout, env=env,
                                 log=log, stream_output=stream_output)
    rows = [evaluate(f, outcomes.get(f.benchmark)) for f in FIGURES]
    info_rows = [evaluate(f, outcomes.get(f.benchmark)) for f in INFO_FIGURES]
    report: dict[str, Any] = {
        "report": "tracer bench",
        "command": command,
        "size": chosen.name,
        "date_utc": started_wall.isoformat(timespec="seconds"),
        "machine": info,
        "benchmark_dir": str(folder),
        "total_s": None,
    }
    errors: dict[str, str] = {}
    for row in rows + info_rows:
        report[row.figure.key] = row.value
        if row.value is None:
            errors[row.figure.key] = row.error or "no value"
    report["errors"] = errors
    report["goals_met"] = sum(1 for r in rows if r.met)
    report["goals_measured"] = sum(1 for r in rows if r.value is not None)
    report["goals_total"] = len(rows)
    report["figures"] = [r.to_dict() for r in rows]
    report["info_figures"] = [r.to_dict() for r in info_rows]
    report["benchmarks"] = outcomes
    report["total_s"] = time.perf_counter() - started
    return report
