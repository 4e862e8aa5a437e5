"""``tracer gui``: the live bench window, on the built-in simulated bench by default.

    tracer gui                                   # simulated bench, default logbook
    tracer gui --bench lab-bench.yaml --logbook lab.sqlite
    tracer gui --run protocols/dark-then-light.yaml --screenshot window.png --quit

This module is the window's composition root: it builds the bench with
:func:`tracer.app.build_application` (the only place that names drivers), then gives the
window the engine, a description of the bench and a *probe* that reads the output and
interlock state from the source-measure unit — the window calls the probe only from its
poller thread, and only while no run goes (during a run the run's own events tell the
output state).

Exit status: 0 when the window was closed (or, with ``--run``, the run completed);
3 the run was aborted (interlock, limit, fault, stop); 1 the run failed in software or the
bench could not be built; 2 a bad protocol, bench profile or option.
"""
from __future__ import annotations

import argparse
import os
import signal
import sys
from pathlib import Path
from typing import Any

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_ABORTED = 3

DEFAULT_SIZE = "1600x1000"


def register(subparsers) -> None:
    from tracer.cli.run_cmd import DEMO_TIME_SCALE

    p = subparsers.add_parser(
        "gui", help="open the live bench window (the built-in simulated bench by default)",
        description="Open the bench window: set-up and protocol editor, live I-V plots, "
                    "results with the keep/re-measure verdict, the sample's history, and the "
                    "safety strip with the emergency stop. Without --bench the built-in "
                    "simulated bench is started in this process.")
    p.add_argument("--bench", metavar="FILE", type=Path, default=None,
                   help="bench profile YAML (default: start the built-in simulated bench)")
    p.add_argument("--logbook", metavar="PATH", type=Path, default=None,
                   help="logbook file (default: $TRACER_LOGBOOK, else the per-user logbook)")
    p.add_argument("--protocol", metavar="FILE", type=Path, default=None,
                   help="open this protocol in the editor")
    p.add_argument("--run", metavar="PROTOCOL", type=Path, default=None,
                   help="open PROTOCOL and start it at once")
    p.add_argument("--screenshot", metavar="FILE", type=Path, default=None,
                   help="with --run: save a PNG of the window once the last sweep's analysis "
                        "is shown")
    p.add_argument("--quit", action="store_true",
                   help="with --run: close when the run has ended, exiting with its status "
                        "(0 completed, 3 aborted, 1 failed); works headless "
                        "(QT_QPA_PLATFORM=offscreen)")
    p.add_argument("--operator", metavar="NAME", default=None, help="who runs the bench")
    p.add_argument("--size", metavar="WxH", default=DEFAULT_SIZE,
                   help=f"window size in pixels (default {DEFAULT_SIZE})")
    sim = p.add_argument_group("built-in simulated bench (only without --bench)")
    sim.add_argument("--sim-scenario", metavar="NAME", default=None,
                     help="scenario of the simulated bench (default: its own)")
    sim.add_argument("--sim-time-scale", metavar="X", type=float, default=None,
                     help=f"simulated time runs 1/X times as fast as real time "
                          f"(default {DEMO_TIME_SCALE}; 0 = instant)")
    sim.add_argument("--sim-seed", metavar="N", type=int, default=None,
                     help="seed of the simulated bench's noise")
    p.set_defaults(func=cmd_gui)


# ----------------------------------------------------------------------------- composition
def protocols_folder() -> Path | None:
    """``protocols/`` of this checkout, else of the current folder."""
    for base in (Path(__file__).resolve().parents[2], Path.cwd()):
        candidate = base / "protocols"
        if candidate.is_dir():
            return candidate
    return None


def make_probe(app: Any):
    """Reads the output and interlock state from the SMU; None while a run goes (the
    run's events are the truth then). Called by the window's poller thread only."""
    smu = app.bench.smu
    engine = app.engine

    def probe():
        if engine.running:
            return None
        return {"output_on": bool(smu.output_is_on()), "interlock_open": bool(smu.interlock_open())}

    return probe


def open_window(app: Any, *, operator: str = "", poll_interval_s: float = 1.0,
                protocols_dir: Path | None = None, redraw_ms: int | None = None,
                debounce_ms: int | None = None):
    """A :class:`tracer.gui.BenchWindow` on an assembled :class:`tracer.app.Application`
    (a QApplication must exist)."""
    from tracer.gui import BenchInfo, BenchWindow

    info = BenchInfo.from_description(app.bench.describe(), simulated=app.simulated)
    kwargs: dict[str, Any] = {}
    if redraw_ms is not None:
        kwargs["redraw_ms"] = redraw_ms
    return BenchWindow(app.engine, bench_info=info, bench_profile=app.profile,
                       logbook_path=app.logbook_path, probe=make_probe(app),
                       poll_interval_s=poll_interval_s,
                       protocols_dir=protocols_dir if protocols_dir is not None else protocols_folder(),
                       operator=operator, debounce_ms=debounce_ms, **kwargs)


def _size(text: str) -> tuple[int, int]:
    w, _, h = text.lower().partition("x")
    width, height = int(w), int(h)
    if not (400 <= width <= 10000 and 300 <= height <= 10000):
        raise ValueError(text)
    return width, height


def _print_problems(problems, err) -> None:
    n = len(problems)
    print(f"{n} problem{'s' if n != 1 else ''}:", file=err)
    for p in problems:
        print(f"  {p}", file=err)


# ----------------------------------------------------------------------------- command
def cmd_gui(args: argparse.Namespace) -> int:
    err = sys.stderr
    if args.bench is not None and (args.sim_scenario or args.sim_time_scale is not None
                                   or args.sim_seed is not None):
        print("tracer: --sim-* options apply only to the built-in simulated bench (no --bench)",
              file=err)
        return EXIT_BAD_INPUT
    if (args.quit or args.screenshot) and args.run is None:
        print("tracer: --quit and --screenshot go with --run PROTOCOL", file=err)
        return EXIT_BAD_INPUT
    try:
        width, height = _size(args.size)
    except ValueError:
        print(f"tracer: --size {args.size!r}: give WIDTHxHEIGHT in pixels, e.g. {DEFAULT_SIZE}",
              file=err)
        return EXIT_BAD_INPUT

    # files first: nothing is built or switched if they are wrong
    from tracer.bench_profile import BenchProfileError, load_bench_profile
    from tracer.protocol import ProtocolError, load_protocol

    first = args.run or args.protocol
    try:
        profile = load_bench_profile(args.bench) if args.bench is not None else None
        if first is not None:
            load_protocol(first, bench=profile)
    except (ProtocolError, BenchProfileError) as exc:
        _print_problems(exc.problems, err)
        return EXIT_BAD_INPUT
    except OSError as exc:
        print(f"tracer: {exc}", file=err)
        return EXIT_BAD_INPUT

    has_display = bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY")
                       or os.environ.get("QT_QPA_PLATFORM") or not sys.platform.startswith("linux"))
    if not has_display:
        if not args.quit:
            print("tracer: no display to open the window on (DISPLAY is not set). For a headless "
                  "run use --run PROTOCOL --screenshot FILE --quit, or set "
                  "QT_QPA_PLATFORM=offscreen.", file=err)
            return EXIT_FAILED
        os.environ["QT_QPA_PLATFORM"] = "offscreen"
    from PyQt6.QtCore import QTimer
    from PyQt6.QtWidgets import QApplication

    from tracer.app import ApplicationError, build_application
    from tracer.cli.run_cmd import DEMO_TIME_SCALE
    from tracer.logbook import LogbookError

    qapp = QApplication.instance() or QApplication(["tracer gui"])
    qapp.setApplicationName("tracer")
    time_scale = args.sim_time_scale
    if args.bench is None and time_scale is None:
        time_scale = DEMO_TIME_SCALE
    try:
        app = build_application(args.bench, logbook_path=args.logbook, scenario=args.sim_scenario,
                                time_scale=time_scale, seed=args.sim_seed)
    except (BenchProfileError, ProtocolError) as exc:
        _print_problems(exc.problems, err)
        return EXIT_BAD_INPUT
    except (ApplicationError, LogbookError) as exc:
        print(f"tracer: {exc}", file=err)
        return EXIT_FAILED

    with app:
        from tracer.cli.run_cmd import _login

        window = open_window(app, operator=args.operator or _login())
        window.resize(width, height)
        outcome: dict[str, int] = {}

        if first is not None:
            window.load_protocol(first)

        def finished(fin) -> None:
            code = {"completed": EXIT_OK, "aborted": EXIT_ABORTED}.get(fin.status, EXIT_FAILED)
            outcome["code"] = code

            def after() -> None:
                if args.screenshot is not None:
                    try:
                        path = window.save_screenshot(args.screenshot)
                        print(f"screenshot: {path}")
                    except OSError as exc:
                        print(f"tracer: {exc}", file=err)
                        outcome["code"] = EXIT_FAILED
                if args.quit:
                    window.close()
                    qapp.exit(outcome["code"])

            QTimer.singleShot(400, after)        # let the result tables lay out and paint

        if args.run is not None:
            window.run_finished_shown.connect(finished)

            def start() -> None:
                if window.start_run() is None:
                    _print_problems(list(window.setup.validation.problems)
                                    or [window.status_label.text()], err)
                    outcome["code"] = EXIT_BAD_INPUT
                    if args.quit:
                        window.close()
                        qapp.exit(EXIT_BAD_INPUT)

            QTimer.singleShot(200, start)

        # Ctrl-C in the terminal closes the window (which makes the output safe first)
        previous = signal.signal(signal.SIGINT, lambda *a: window.close())
        ticker = QTimer()
        ticker.timeout.connect(lambda: None)     # lets Python see the signal
        ticker.start(200)
        window.show()
        try:
            code = qapp.exec()
        finally:
            signal.signal(signal.SIGINT, previous)
            ticker.stop()
            if window.isVisible():
                window.close()
        if args.run is not None and "code" not in outcome:
            # the window was closed (or Ctrl-C) before the run's end was shown
            fin = app.engine.wait(5.0)
            if fin is not None:
                outcome["code"] = {"completed": EXIT_OK, "aborted": EXIT_ABORTED}.get(
                    fin.status, EXIT_FAILED)
        return outcome.get("code", code)
