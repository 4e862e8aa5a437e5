"""``tracer run PROTOCOL`` and ``tracer demo``: run a protocol on a bench from a terminal.

While the run goes: live progress (step, point count, last V and I in the generator
convention, the output state) as one updating line on a terminal, or one plain line per
event and per point otherwise (logs, pipes, CI). Every point line is printed by an
ordinary subscriber, so the point is already in the logbook when it appears (the logbook
writer is the engine's critical subscriber).

Afterwards: a summary per sweep (the figures, fits with uncertainties, STC values and
verdict that the logbook holds), the run exported as CSV with a PNG of the curves next to
it, and where the logbook and the exports are. ``--json`` prints one JSON document on
stdout instead (progress then goes to stderr).

Exit status:
  0    every step completed
  1    the bench or the logbook could not be used, or the run failed in software
  2    bad protocol or bench profile (or a protocol the bench's hard limits refuse)
  3    aborted by an interlock, a limit, an instrument fault or a stop (reason printed)
  130  interrupted (Ctrl-C or SIGTERM), after the output was made safe

Ctrl-C (or SIGTERM) once: graceful stop (the point in progress completes, then level 0,
output off, verified off). Twice: emergency stop at once.
"""
from __future__ import annotations

import argparse
import getpass
import json
import os
import signal
import sys
import threading
import time
import warnings
from pathlib import Path
from typing import Any, TextIO

from tracer import events as ev
from tracer.conventions import generator_current

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_ABORTED = 3
EXIT_INTERRUPTED = 130

DEMO_PROTOCOL = "dark-then-light.yaml"
DEMO_DIR = Path("tracer-demo")
DEMO_TIME_SCALE = 0.02           # the built-in bench runs 50x faster than real time


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "run", help="run a sweep protocol on a bench (the built-in simulated bench by default)",
        description="Run a YAML sweep protocol on the bench of a bench profile, or on the "
                    "built-in simulated bench when no --bench is given. Exit status: 0 completed, "
                    "1 bench/logbook unusable or software failure, 2 bad protocol or bench file, "
                    "3 aborted by an interlock or fault, 130 interrupted (output made safe first).")
    p.add_argument("protocol", metavar="PROTOCOL", type=Path, help="protocol YAML file")
    p.add_argument("--bench", metavar="FILE", type=Path, default=None,
                   help="bench profile YAML (default: start the built-in simulated bench)")
    _common_options(p)
    sim = p.add_argument_group("built-in simulated bench (only without --bench)")
    sim.add_argument("--sim-scenario", metavar="NAME", default=None,
                     help="scenario of the simulated bench (default: its own)")
    sim.add_argument("--sim-time-scale", metavar="X", type=float, default=None,
                     help="simulated time runs 1/X times as fast as real time (0 = instant)")
    sim.add_argument("--sim-seed", metavar="N", type=int, default=None,
                     help="seed of the simulated bench's noise")
    p.set_defaults(func=cmd_run)

    d = subparsers.add_parser(
        "demo", help="run the dark-then-light demo on the built-in simulated bench",
        description=f"Run protocols/{DEMO_PROTOCOL} on the built-in simulated bench; the "
                    f"logbook, the CSV export and a PNG of the curves go to ./{DEMO_DIR}/.")
    d.add_argument("--out", metavar="DIR", type=Path, default=DEMO_DIR,
                   help=f"where everything goes (default: ./{DEMO_DIR})")
    d.add_argument("--time-scale", metavar="X", type=float, default=DEMO_TIME_SCALE,
                   help=f"simulated time runs 1/X times as fast as real time "
                        f"(default {DEMO_TIME_SCALE}; 0 = instant)")
    d.add_argument("--json", action="store_true", help="print one JSON document at the end")
    d.set_defaults(func=cmd_demo)


def _common_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--sample", metavar="ID", default=None,
                   help="sample id to record instead of the protocol's sample.id")
    p.add_argument("--operator", metavar="NAME", default=None,
                   help="who ran it (default: the protocol's metadata.operator, else the login name)")
    from tracer.logbook.backend import logbook_target

    p.add_argument("--logbook", metavar="PATH|URL", type=logbook_target, default=None,
                   help="logbook file or postgresql:// URL (default: the bench profile's logbook, "
                        "else $TRACER_LOGBOOK, else $XDG_DATA_HOME/tracer/logbook.sqlite, else "
                        "~/.local/share/tracer/logbook.sqlite)")
    p.add_argument("--forward-to", metavar="URL", type=logbook_target, default=None,
                   help="shared logbook (postgresql://user@host:port/db) that each ended run is "
                        "copied to in the background; the run is kept locally first, and what "
                        "cannot be sent now is sent later (default: the bench profile's forward_to)")
    p.add_argument("--out", metavar="DIR", type=Path, default=Path("."),
                   help="export the run (CSV per sweep and a PNG of the curves) into DIR/<run uid>/ "
                        "(default: the current folder)")
    p.add_argument("--json", action="store_true",
                   help="print one JSON document instead of the summary (progress goes to stderr)")
    p.add_argument("--sync", choices=("normal", "full"), default="normal",
                   help="logbook durability: normal survives a crash of this program; full also "
                        "a power cut, at a disk sync per point (default: normal)")


# ----------------------------------------------------------------------------- progress
def _num(x: Any, fmt: str) -> str:
    try:
        return format(float(x), fmt)
    except (TypeError, ValueError):
        return "-"


class Progress:
    """Non-critical subscriber (batch mode) that shows the run as it goes."""

    def __init__(self, stream: TextIO, *, live_line: bool | None = None, min_interval_s: float = 0.1):
        self.stream = stream
        self.live = stream.isatty() if live_line is None else live_line
        self.min_interval_s = min_interval_s
        self._lock = threading.Lock()
        self._last_draw = 0.0
        self._line_open = False
        self.step = ""
        self.sweep_index: int | None = None
        self.sweep_uid_to_index: dict[str, int] = {}
        self.sweep_count = 0
        self.planned = 0
        self.points = 0
        self.last_v: float | None = None
        self.last_i_gen: float | None = None
        self.output_on = False
        self.finished: ev.RunFinished | None = None

    # the engine calls this with lists of events (batch=True)
    def __call__(self, batch) -> None:
        if not isinstance(batch, list):
            batch = [batch]
        with self._lock:
            last_point = None
            for event in batch:
                if isinstance(event, ev.Point):
                    self.points = event.seq
                    self.last_v = event.voltage_v
                    self.last_i_gen = generator_current(float(event.current_a))
                    if self.live:
                        last_point = event
                    else:
                        self._line(self._point_text(event))
                else:
                    self._event(event)
            if self.live and last_point is not None:
                now = time.monotonic()
                if now - self._last_draw >= self.min_interval_s:
                    self._draw()
            self.stream.flush()

    def _point_text(self, p: ev.Point) -> str:
        of = f"/{self.planned}" if self.planned else ""
        idx = self.sweep_uid_to_index.get(p.sweep_uid, -1)
        return (f"sweep {idx} {self.step}: point {p.seq}{of}  V {_num(p.voltage_v, '+.6f')} V  "
                f"I {_num(self.last_i_gen * 1e3 if self.last_i_gen is not None else None, '+.6f')} mA"
                f"{'  COMPLIANCE' if p.in_compliance else ''}  output {'on' if self.output_on else 'off'}")

    def _draw(self) -> None:
        of = f"/{self.planned}" if self.planned else ""
        i_ma = None if self.last_i_gen is None else self.last_i_gen * 1e3
        text = (f"[sweep {self.sweep_index} {self.step}] point {self.points}{of}  "
                f"V {_num(self.last_v, '+.4f')} V  I {_num(i_ma, '+.4f')} mA  "
                f"output {'ON' if self.output_on else 'off'}")
        self.stream.write("\r" + text + "\x1b[K")
        self._line_open = True
        self._last_draw = time.monotonic()

    def _line(self, text: str) -> None:
        if self._line_open:
            self.stream.write("\r\x1b[K")
            self._line_open = False
        self.stream.write(text + "\n")

    def _event(self, e: Any) -> None:
        if isinstance(e, ev.RunStarted):
            self._line(f"run {e.run_uid} started: protocol {e.protocol_name}, sample "
                       f"{(e.sample or {}).get('id', (e.sample or {}).get('sample_id', '?'))}, bench "
                       f"{(e.bench or {}).get('name', '?')}")
        elif isinstance(e, ev.SweepStarted):
            self.step = e.step_name
            self.sweep_index = e.sweep_index
            self.sweep_uid_to_index[e.sweep_uid] = e.sweep_index
            self.planned = e.points_planned
            self.points = 0
            self.output_on = True
            what = f"{'light' if e.light else 'dark'} {e.kind}"
            if e.direction != "none":
                what += f", {e.direction}"
            if e.pixel is not None:
                what += f", pixel {e.pixel}"
            planned = f", {e.points_planned} points" if e.points_planned else ""
            self._line(f"sweep {e.sweep_index} {e.step_name} ({what}{planned}) started")
        elif isinstance(e, ev.SweepFinished):
            self.output_on = False
            idx = self.sweep_uid_to_index.get(e.sweep_uid, "?")
            tail = f": {e.reason}" if e.reason else ""
            self._line(f"sweep {idx} {e.status} with {e.points} points{tail}")
        elif isinstance(e, ev.Analysis):
            from tracer.logbook.report import sweep_summary

            s = sweep_summary(e.result)
            idx = self.sweep_uid_to_index.get(e.sweep_uid, "?")
            parts = []
            if s.get("isc_a") is not None:
                parts.append(f"Isc {s['isc_a'] * 1e3:.4g} mA, Voc {_num(s.get('voc_v'), '.4g')} V, "
                             f"FF {_num((s.get('ff') or 0) * 100, '.4g')} %")
            if s.get("verdict"):
                parts.append(f"verdict {s['verdict']}")
            if not parts and e.result.get("error"):
                parts.append(f"failed: {e.result['error']}")
            self._line(f"analysis of sweep {idx}: " + ("; ".join(parts) or "done"))
        elif isinstance(e, ev.InterlockTripped):
            self.output_on = False
            self._line(f"STOP {e.cause}: {e.message}")
        elif isinstance(e, ev.RunFinished):
            self.output_on = False
            self.finished = e
            tail = f": {e.reason}" if e.reason else ""
            off = "verified off" if e.output_verified_off else "NOT VERIFIED OFF - check the instrument"
            self._line(f"run {e.status}{tail} ({e.points} points; output {off})")

    def close(self) -> None:
        with self._lock:
            if self._line_open:
                self.stream.write("\n")
                self._line_open = False
            self.stream.flush()


# ----------------------------------------------------------------------------- signals
class _Interrupts:
    """SIGINT/SIGTERM while a run goes: first a graceful stop, then an emergency stop."""

    def __init__(self, engine: Any, err: TextIO):
        self.engine = engine
        self.err = err
        self.count = 0
        self._saved: dict[int, Any] = {}

    def install(self) -> None:
        if threading.current_thread() is not threading.main_thread():
            return
        for sig in (signal.SIGINT, signal.SIGTERM):
            self._saved[sig] = signal.signal(sig, self._handle)

    def restore(self) -> None:
        for sig, handler in self._saved.items():
            signal.signal(sig, handler)
        self._saved.clear()

    def _handle(self, signum, frame) -> None:
        self.count += 1
        name = "Ctrl-C" if signum == signal.SIGINT else signal.Signals(signum).name
        if not self.engine.running:
            # between runs (the output is already off): once = finish quietly with 130,
            # twice = stop reporting at once
            if self.count >= 2:
                raise KeyboardInterrupt
            self.err.write(f"\n{name}: the run is over and the output is off; finishing the "
                           f"report (again to skip it)\n")
            self.err.flush()
            return
        if self.count == 1:
            self.err.write(f"\n{name}: stopping - the output goes to 0 and off "
                           f"(again for an emergency stop)\n")
            self.err.flush()
            self.engine.stop()
        else:
            self.err.write(f"\n{name} again: emergency stop\n")
            self.err.flush()
            self.engine.emergency_stop("interrupted", f"emergency stop: {name} twice")


# ----------------------------------------------------------------------------- the run
def _problems(exc: Exception, err: TextIO) -> None:
    problems = getattr(exc, "problems", None)
    if problems:
        n = len(problems)
        print(f"{n} problem{'s' if n != 1 else ''}:", file=err)
        for p in problems:
            print(f"  {p}", file=err)
    else:
        print(f"tracer: {exc}", file=err)


def execute(protocol_path: Path, *, bench_file: Path | None = None, sample: str | None = None,
            operator: str | None = None, logbook: Path | None = None, out_dir: Path = Path("."),
            as_json: bool = False, sync: str = "normal", scenario: str | None = None,
            time_scale: float | None = None, seed: int | None = None,
            stdout: TextIO | None = None, stderr: TextIO | None = None,
            live_line: bool | None = None, engine_options: Any = None,
            on_started: Any = None, forward_to: Any = None,
            forward_options: Any = None) -> int:
    """Run ``protocol_path`` and report; returns the exit status (see the module docstring).

    ``on_started(app, run_uid)`` is called once the run has started (tests use it to reach
    the simulated bench)."""
    out = stdout or sys.stdout
    err = stderr or sys.stderr
    from tracer.bench_profile import BenchProfileError, load_bench_profile
    from tracer.logbook import LogbookError
    from tracer.protocol import ProtocolError, compile_plan, load_protocol

    # 1. files first: nothing is touched if they are wrong
    profile = None
    try:
        if bench_file is not None:
            profile = load_bench_profile(bench_file)
        protocol = load_protocol(protocol_path, bench=profile)
        overrides = {"id": sample} if sample else None
        compile_plan(protocol, bench=profile, sample_overrides=overrides)
    except (ProtocolError, BenchProfileError) as exc:
        _problems(exc, err)
        return EXIT_BAD_INPUT
    except OSError as exc:
        print(f"tracer: {exc}", file=err)
        return EXIT_BAD_INPUT

    from tracer.app import ApplicationError, build_application
    from tracer.engine import PlanRefused

    try:
        app = build_application(bench_file, logbook_path=logbook, synchronous=sync.upper(),
                                scenario=scenario, time_scale=time_scale, seed=seed,
                                engine_options=engine_options, forward_to=forward_to,
                                forward_options=forward_options)
    except (BenchProfileError, ProtocolError) as exc:
        _problems(exc, err)
        return EXIT_BAD_INPUT
    except (ApplicationError, LogbookError) as exc:
        print(f"tracer: {exc}", file=err)
        return EXIT_FAILED
    except KeyboardInterrupt:
        print("\ninterrupted before the run started; nothing was switched on", file=err)
        return EXIT_INTERRUPTED

    interrupts = _Interrupts(app.engine, err)
    progress = Progress(err if as_json else out, live_line=live_line)
    try:
        with app:
            try:
                protocol = load_protocol(protocol_path, bench=app.profile)
                plan = compile_plan(protocol, bench=app.profile, sample_overrides=overrides)
                app.engine.check(plan)
            except ProtocolError as exc:
                _problems(exc, err)
                return EXIT_BAD_INPUT
            except PlanRefused as exc:
                print(f"the bench {app.profile.name!r} refuses this protocol:", file=err)
                for problem in exc.problems:
                    print(f"  {problem}", file=err)
                return EXIT_BAD_INPUT
            who = operator or str((plan.metadata or {}).get("operator") or "") or _login()
            metadata = {"protocol_file": str(protocol_path), "command": "tracer run",
                        "simulated_bench": app.simulated}
            token = app.engine.subscribe(progress, batch=True)
            interrupts.install()
            run_uid = app.engine.start(plan, operator=who, metadata=metadata)
            if on_started is not None:
                on_started(app, run_uid)
            finished = None
            while finished is None:
                finished = app.engine.wait(0.1)
            app.engine.flush(5.0)
            app.engine.unsubscribe(token)
            progress.close()
        code = _exit_code(finished, interrupts.count)
        code = _report(app.logbook_path, run_uid, out_dir, code, finished, as_json, out, err)
        if app.forwarder is not None:
            _forwarding_note(app.forwarder, run_uid, err if as_json else out)
        return EXIT_INTERRUPTED if interrupts.count and code == EXIT_OK else code
    except KeyboardInterrupt:
        # a second signal after the run ended, or one before it started: the engine was
        # closed (emergency stop if anything ran) when the ``with`` block unwound
        progress.close()
        print("interrupted", file=err)
        return EXIT_INTERRUPTED
    finally:
        interrupts.restore()


def _forwarding_note(forwarder: Any, run_uid: str, stream: TextIO) -> None:
    """One line: was the run copied to the shared logbook (the forwarder has closed)."""
    sent = any(run_uid in r.forwarded or run_uid in r.already_there for r in forwarder.reports)
    if sent:
        print(f"shared logbook: run {run_uid} forwarded to {forwarder.key}", file=stream)
        return
    last = forwarder.last_report
    why = (last.unreachable or last.failed.get(run_uid)) if last is not None else None
    print(f"shared logbook: run {run_uid} not forwarded yet"
          + (f" ({why})" if why else "")
          + f"; it is kept in the local logbook and goes with the next forwarding "
            f"(or now: tracer logbook forward --to {forwarder.key})", file=stream)


def _login() -> str:
    try:
        return getpass.getuser()
    except Exception:  # noqa: BLE001 - no login name in some containers
        return ""


def _exit_code(finished: ev.RunFinished, interrupts: int) -> int:
    if finished.status == ev.RUN_COMPLETED:
        return EXIT_OK
    if interrupts:
        return EXIT_INTERRUPTED
    if finished.status == ev.RUN_FAILED:
        return EXIT_FAILED
    return EXIT_ABORTED


def _report(logbook_path: Path, run_uid: str, out_dir: Path, code: int, finished: ev.RunFinished,
            as_json: bool, out: TextIO, err: TextIO) -> int:
    from tracer.logbook import Logbook, LogbookError, export_run
    from tracer.logbook.report import format_report, run_report

    exports = None
    picture = None
    notes = []
    try:
        with Logbook(logbook_path) as lb:
            report = run_report(lb, run_uid, include_analysis=as_json)
            try:
                exports = export_run(lb, run_uid, out_dir, fmt="csv")
            except (LogbookError, OSError) as exc:
                notes.append(f"export failed: {exc}")
            if exports is not None:
                try:
                    from tracer.report_plot import render_run_png

                    picture = render_run_png(lb, run_uid, exports.directory / "curves.png")
                except Exception as exc:  # noqa: BLE001 - a picture is a convenience
                    notes.append(f"no picture of the curves: {exc}")
    except (LogbookError, OSError) as exc:
        print(f"tracer: the run ended ({finished.status}) but the logbook cannot be read: {exc}",
              file=err)
        return code if code != EXIT_OK else EXIT_FAILED

    if as_json:
        doc = dict(report)
        doc["exit_status"] = code
        doc["exports"] = None if exports is None else {
            "directory": str(exports.directory), "format": exports.format,
            "files": [str(f) for f in exports.files]}
        doc["picture"] = None if picture is None else str(picture)
        doc["notes"] = notes
        print(json.dumps(doc, indent=1, allow_nan=False), file=out)
    else:
        print("", file=out)
        print(format_report(report), file=out)
        print("", file=out)
        print(f"logbook: {logbook_path}", file=out)
        if exports is not None:
            print(f"exports: {exports.directory} ({len(exports.files)} CSV file"
                  f"{'s' if len(exports.files) != 1 else ''})", file=out)
        if picture is not None:
            print(f"curves:  {picture}", file=out)
        for note in notes:
            print(f"note: {note}", file=out)
    if not finished.output_verified_off:
        print("WARNING: the source-measure unit's output could NOT be verified off. Check the "
              "instrument before touching the sample.", file=err)
    if code == EXIT_ABORTED:
        print(f"run aborted: {finished.reason}", file=err)
    elif code == EXIT_FAILED:
        print(f"run failed: {finished.reason}", file=err)
    elif code == EXIT_INTERRUPTED:
        print("run interrupted; the output is "
              + ("off (verified)" if finished.output_verified_off else "NOT verified off"), file=err)
    return code


# ----------------------------------------------------------------------------- commands
def _quiet_numerical_warnings() -> None:
    """Overflow and similar warnings inside the fits are part of their search (whatever
    fails is reported in the analysis result); on a terminal they are only noise."""
    warnings.filterwarnings("ignore", category=RuntimeWarning,
                            module=r"tracer\.(fit|model|stc|quality|analysis)")


def cmd_run(args: argparse.Namespace) -> int:
    _quiet_numerical_warnings()
    if args.bench is not None and (args.sim_scenario or args.sim_time_scale is not None
                                   or args.sim_seed is not None):
        print("tracer: --sim-* options apply only to the built-in simulated bench (no --bench)",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    return execute(args.protocol, bench_file=args.bench, sample=args.sample,
                   operator=args.operator, logbook=args.logbook, out_dir=args.out,
                   as_json=args.json, sync=args.sync, scenario=args.sim_scenario,
                   time_scale=args.sim_time_scale, seed=args.sim_seed,
                   forward_to=args.forward_to)


def demo_protocol_path() -> Path:
    """``protocols/dark-then-light.yaml`` of this checkout (or of the current folder)."""
    for base in (Path(__file__).resolve().parents[2], Path.cwd()):
        candidate = base / "protocols" / DEMO_PROTOCOL
        if candidate.is_file():
            return candidate
    raise FileNotFoundError(f"protocols/{DEMO_PROTOCOL} not found next to the package or here")


def cmd_demo(args: argparse.Namespace) -> int:
    _quiet_numerical_warnings()
    try:
        protocol = demo_protocol_path()
    except FileNotFoundError as exc:
        print(f"tracer: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    out_dir: Path = args.out
    out_dir.mkdir(parents=True, exist_ok=True)
    print(f"demo: {protocol.name} on the built-in simulated bench "
          f"(time runs {1 / args.time_scale:g}x faster)" if args.time_scale else
          f"demo: {protocol.name} on the built-in simulated bench (instant time)")
    code = execute(protocol, logbook=out_dir / "logbook.sqlite", out_dir=out_dir,
                   as_json=args.json, time_scale=args.time_scale, operator="demo")
    if not args.json:
        print(f"\ndemo finished (exit status {code}); everything is in {out_dir.resolve()}{os.sep}:"
              f" logbook.sqlite, <run uid>/*.csv and <run uid>/curves.png")
        print(f"browse it with: tracer logbook list --logbook {out_dir / 'logbook.sqlite'}")
    return code
