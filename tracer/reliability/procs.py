"""Processes the reliability checks drive: a standalone simulated bench and ``tracer run``.

Both run as separate programs, exactly as an operator would start them, so that what is
checked is the shipped command line, not an in-process shortcut:

- :class:`StandaloneBench` starts ``python -m simulated_instrument --port-base 0
  --bench-file FILE`` (free loopback ports), reads its harness address from its banner,
  and answers for the bench's *true* state over the harness control port
  (``simulated_instrument.harness``), never through the application's drivers.
- :func:`start_tracer` / :class:`TracerProcess` start ``python -m tracer.cli.main run``
  with a bench profile and a logbook, collect what it prints, and can kill it.
- :class:`MessageWatch` polls the harness for the SMU's message count and finds the
  *plateaus* (stretches where the SMU hears nothing while the thermometer or the light is
  being read), which mark the boundaries between the steps of a protocol.

Every process is ended by its own pid, never by name.
"""
from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

from simulated_instrument import harness

#: The folder holding the ``tracer``, ``drivers`` and ``simulated_instrument`` packages.
SOURCE_ROOT = Path(__file__).resolve().parents[2]

#: One printed point of ``tracer run`` (non-terminal output: one line per point).
POINT_LINE = re.compile(
    r"^sweep (?P<sweep>\d+) (?P<step>\S+): point (?P<seq>\d+)(?:/\d+)?\s+V (?P<v>\S+) V\s+"
    r"I (?P<i>\S+) mA(?P<c>\s+COMPLIANCE)?")


def child_env(extra: dict[str, str] | None = None) -> dict[str, str]:
    """The environment of a child program: this source tree first on the import path, no
    terminal, no window system needed."""
    env = dict(os.environ)
    paths = [str(SOURCE_ROOT)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p]
    env["PYTHONPATH"] = os.pathsep.join(dict.fromkeys(paths))
    env.setdefault("QT_QPA_PLATFORM", "offscreen")
    env["PYTHONUNBUFFERED"] = "1"
    env.pop("TRACER_LOGBOOK", None)
    if extra:
        env.update(extra)
    return env


def _stop_process(proc: subprocess.Popen, *, grace_s: float = 5.0) -> None:
    """SIGTERM, then SIGKILL after ``grace_s``; always reaps the child."""
    if proc.poll() is None:
        try:
            proc.send_signal(signal.SIGTERM)
        except ProcessLookupError:
            pass
        try:
            proc.wait(grace_s)
        except subprocess.TimeoutExpired:
            try:
                proc.kill()
            except ProcessLookupError:
                pass
            proc.wait(5.0)


# ----------------------------------------------------------------------------- the bench
class BenchStartError(RuntimeError):
    pass


class StandaloneBench:
    """A simulated bench in its own process. Use as a context manager.

    ``faults``: ``NAME:AFTER`` strings passed as ``--fault``. ``state()`` is the bench's
    true state; ``inject(name, after)`` arms a fault counted from *now*."""

    def __init__(self, workdir: Path, *, time_scale: float = 0.05, seed: int = 0,
                 scenario: str | None = None, faults: Sequence[str] = (),
                 startup_timeout_s: float = 30.0):
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.bench_file = self.workdir / "bench.yaml"
        self.time_scale = time_scale
        cmd = [sys.executable, "-m", "simulated_instrument", "--port-base", "0",
               "--bench-file", str(self.bench_file), "--time-scale", repr(float(time_scale)),
               "--seed", str(int(seed))]
        if scenario:
            cmd += ["--scenario", scenario]
        for spec in faults:
            cmd += ["--fault", spec]
        self.command = cmd
        self.startup_timeout_s = startup_timeout_s
        self.proc: subprocess.Popen | None = None
        self.banner: list[str] = []
        self.harness_address: tuple[str, int] | None = None

    def start(self) -> "StandaloneBench":
        self.proc = subprocess.Popen(self.command, cwd=self.workdir, env=child_env(),
                                     stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True)
        lines: list[str] = []
        done = threading.Event()

        def read_banner() -> None:
            assert self.proc is not None and self.proc.stdout is not None
            for line in self.proc.stdout:
                lines.append(line.rstrip("\n"))
                if line.startswith("scenario "):
                    done.set()
                    break
            done.set()

        reader = threading.Thread(target=read_banner, daemon=True)
        reader.start()
        if not done.wait(self.startup_timeout_s) or not any(l.startswith("scenario ") for l in lines):
            err = ""
            self.close()
            if self.proc is not None and self.proc.stderr is not None:
                try:
                    err = self.proc.stderr.read()[-2000:]
                except (OSError, ValueError):
                    err = ""
            raise BenchStartError(f"the simulated bench did not start: {' | '.join(lines)} {err}")
        self.banner = lines
        for line in lines:
            if line.startswith("harness"):
                host, _, port = line.split()[1].rpartition(":")
                self.harness_address = (host, int(port))
        if self.harness_address is None or not self.bench_file.is_file():
            self.close()
            raise BenchStartError(f"no harness address or bench file: {lines}")
        # drain the rest of its output so that the pipe never fills
        threading.Thread(target=self._drain, daemon=True).start()
        return self

    def _drain(self) -> None:
        proc = self.proc
        if proc is None:
            return
        for stream in (proc.stdout, proc.stderr):
            if stream is None:
                continue
            try:
                for _ in stream:
                    pass
            except (OSError, ValueError):
                pass

    @property
    def pid(self) -> int | None:
        return None if self.proc is None else self.proc.pid

    def state(self, timeout: float = 5.0) -> dict[str, Any]:
        assert self.harness_address is not None
        return harness.query_state(*self.harness_address, timeout=timeout)

    def inject(self, name: str, after: int) -> dict[str, Any]:
        assert self.harness_address is not None
        return harness.inject_fault(*self.harness_address, name, after)

    def close(self) -> None:
        if self.proc is not None:
            _stop_process(self.proc)

    def __enter__(self) -> "StandaloneBench":
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.close()


# ----------------------------------------------------------------------------- tracer run
@dataclass
class PrintedPoint:
    sweep_index: int
    step: str
    seq: int
    voltage_v: float
    current_ma_generator: float
    in_compliance: bool


def parse_points(text: str) -> list[PrintedPoint]:
    """The point lines ``tracer run`` printed (its non-terminal progress format)."""
    out = []
    for line in text.splitlines():
        m = POINT_LINE.match(line)
        if m is None:
            continue
        try:
            out.append(PrintedPoint(int(m["sweep"]), m["step"], int(m["seq"]), float(m["v"]),
                                    float(m["i"]), bool(m["c"])))
        except ValueError:
            continue
    return out


@dataclass
class TracerResult:
    returncode: int | None
    stdout: str
    stderr: str
    elapsed_s: float
    killed: bool = False
    timed_out: bool = False
    points: list[PrintedPoint] = field(default_factory=list)


class TracerProcess:
    """``tracer run PROTOCOL --bench FILE --logbook PATH --out DIR`` in its own process."""

    def __init__(self, protocol: Path, bench_file: Path, logbook: Path, out_dir: Path,
                 *, extra_args: Sequence[str] = (), cwd: Path | None = None):
        self.command = [sys.executable, "-m", "tracer.cli.main", "run", str(protocol),
                        "--bench", str(bench_file), "--logbook", str(logbook),
                        "--out", str(out_dir), *extra_args]
        self.cwd = cwd or out_dir
        self.proc: subprocess.Popen | None = None
        self.t0 = 0.0
        self._out: list[str] = []
        self._err: list[str] = []
        self._readers: list[threading.Thread] = []
        self.killed = False

    def start(self) -> "TracerProcess":
        Path(self.cwd).mkdir(parents=True, exist_ok=True)
        self.t0 = time.monotonic()
        self.proc = subprocess.Popen(self.command, cwd=self.cwd, env=child_env(),
                                     stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True, errors="replace")
        for stream, sink in ((self.proc.stdout, self._out), (self.proc.stderr, self._err)):
            t = threading.Thread(target=self._pump, args=(stream, sink), daemon=True)
            t.start()
            self._readers.append(t)
        return self

    @staticmethod
    def _pump(stream, sink: list[str]) -> None:
        try:
            for line in stream:
                sink.append(line)
        except (OSError, ValueError):
            pass

    @property
    def pid(self) -> int | None:
        return None if self.proc is None else self.proc.pid

    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def stdout_so_far(self) -> str:
        return "".join(self._out)

    def kill(self) -> None:
        """SIGKILL: no handler runs, nothing is flushed or closed by the program."""
        if self.proc is not None and self.proc.poll() is None:
            try:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.killed = True
            except ProcessLookupError:
                pass

    def wait(self, timeout_s: float) -> TracerResult:
        assert self.proc is not None
        timed_out = False
        try:
            self.proc.wait(timeout_s)
        except subprocess.TimeoutExpired:
            timed_out = True
            self.kill()
            self.proc.wait(10.0)
        elapsed = time.monotonic() - self.t0
        for t in self._readers:
            t.join(10.0)
        out = "".join(self._out)
        return TracerResult(self.proc.returncode, out, "".join(self._err), elapsed,
                            killed=self.killed, timed_out=timed_out, points=parse_points(out))

    def __enter__(self) -> "TracerProcess":
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        if self.running():
            self.kill()
            assert self.proc is not None
            self.proc.wait(10.0)


def start_tracer(protocol: Path, bench_file: Path, logbook: Path, out_dir: Path,
                 **kwargs: Any) -> TracerProcess:
    return TracerProcess(protocol, bench_file, logbook, out_dir, **kwargs).start()


# ----------------------------------------------------------------------------- message counts
@dataclass(frozen=True)
class Sample:
    t: float
    smu: int
    others: int          # light + thermometer messages
    sweeping: bool       # the SMU is running a list sweep


class MessageWatch:
    """Polls a bench's harness for its message counts on a thread.

    A *plateau* is a stretch of at least ``min_plateau_s`` in which the SMU received no
    message while the other instruments received at least ``min_other_messages`` (the
    engine is in a step that only reads the stage or the light). :meth:`plateaus` lists
    the SMU count of each plateau seen, in order, once each."""

    def __init__(self, bench: StandaloneBench, *, interval_s: float = 0.015,
                 min_plateau_s: float = 0.3, min_other_messages: int = 3):
        self.bench = bench
        self.interval_s = interval_s
        self.min_plateau_s = min_plateau_s
        self.min_other_messages = min_other_messages
        self.samples: list[Sample] = []
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._loop, daemon=True, name="message-watch")
        self.errors = 0

    def start(self) -> "MessageWatch":
        self._thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(5.0)

    def __enter__(self) -> "MessageWatch":
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()

    def _loop(self) -> None:
        while not self._stop.is_set():
            try:
                state = self.bench.state(timeout=2.0)
                m = state["messages"]
                s = Sample(time.monotonic(), int(m["smu"]), int(m["light"]) + int(m["thermometer"]),
                           bool(state["smu"]["sweeping"]))
                with self._lock:
                    self.samples.append(s)
            except (OSError, harness.HarnessError, KeyError, ValueError):
                self.errors += 1
            self._stop.wait(self.interval_s)

    def latest(self) -> Sample | None:
        with self._lock:
            return self.samples[-1] if self.samples else None

    def plateaus(self) -> list[int]:
        with self._lock:
            samples = list(self.samples)
        found: list[int] = []
        start = 0
        for k in range(1, len(samples) + 1):
            if k == len(samples) or samples[k].smu != samples[start].smu:
                first, last = samples[start], samples[k - 1]
                if (last.t - first.t >= self.min_plateau_s
                        and last.others - first.others >= self.min_other_messages
                        and (not found or found[-1] != first.smu)):
                    found.append(first.smu)
                start = k
        return found

    def sweeping_counts(self, after: int) -> list[int]:
        """SMU counts seen while a list sweep ran, beyond count ``after``."""
        with self._lock:
            return [s.smu for s in self.samples if s.sweeping and s.smu > after]

    def wait_for_plateau(self, at_least: int, *, timeout_s: float,
                         alive: Any = None) -> int | None:
        """Wait for a plateau at an SMU count >= ``at_least``; its count, or None when
        ``timeout_s`` passed or ``alive()`` turned false first."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            for count in self.plateaus():
                if count >= at_least:
                    return count
            if alive is not None and not alive():
                return None
            time.sleep(self.interval_s)
        return None
