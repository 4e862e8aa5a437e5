"""``tracer bench [--quick] [--json FILE]``: the performance report.

Runs every benchmark (single-diode model vs pvlib, diode-model fits vs pvlib's Sandia fit,
engine vs a bare pyvisa loop and list vs point sweeps, end-of-sweep analysis latency,
durable logbook writes, live-plot frame times, simulated bench and drivers), one after
another in child processes of this one, and prints one table: figure, ours, baseline
(measured in the same run), ratio, goal, met. ``--json FILE`` writes the same figures as
JSON (``-`` for standard output): every goal figure is a top-level key, a number or null
with its error text under ``errors``; details of every benchmark under ``benchmarks``.

A benchmark that fails, hangs or is missing is reported (its figures null, the reason
given); the command still exits 0. Exit status: 0 report made, 1 the JSON file could not be
written, 2 bad arguments, 130 interrupted (the running benchmark is ended first).
Sizes: full (the default; several minutes) and ``--quick`` (every benchmark's quick size:
under two minutes on two cores).

The benchmarks other than the analysis latency live in the source checkout's
``tests/benchmarks`` (they use test-only reference libraries); ``--bench-dir`` points
elsewhere. Without a display, Qt is told to draw offscreen (``QT_QPA_PLATFORM=offscreen``).
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TextIO

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_INTERRUPTED = 130


def register(subparsers: argparse._SubParsersAction) -> None:
    from tracer.perf import BENCHMARKS

    names = [name for name, _ in BENCHMARKS]
    p = subparsers.add_parser(
        "bench", help="run every benchmark and print the performance report",
        description="Run every benchmark in one run and print figure, ours, baseline (measured "
                    "in the same run), ratio, goal and whether it is met. A failing benchmark "
                    "is reported, not fatal. Exit status: 0 report made, 1 JSON not written, "
                    "2 bad arguments, 130 interrupted.")
    p.add_argument("--quick", action="store_true",
                   help="every benchmark at its quick size: under two minutes on two cores")
    p.add_argument("--json", metavar="FILE", default=None,
                   help="also write the report as JSON to FILE ('-' = standard output, "
                        "the table then goes to standard error)")
    p.add_argument("--only", metavar="NAMES", default=None,
                   help=f"comma-separated benchmarks to run ({', '.join(names)}); "
                        "the others are reported as not run")
    p.add_argument("--bench-dir", metavar="DIR", type=Path, default=None,
                   help="folder of the bench_*.py benchmarks (default: tests/benchmarks of "
                        "this checkout)")
    p.add_argument("--timeout", metavar="S", type=float, default=None,
                   help="longest time one benchmark may take before it is ended "
                        "(default 90 s quick, 1800 s full)")
    p.add_argument("-v", "--verbose", action="store_true",
                   help="show each benchmark's own print-out as it runs (on standard error)")
    p.set_defaults(func=run, _bench_names=names)


def _command(args: argparse.Namespace) -> str:
    parts = ["tracer", "bench"]
    if args.quick:
        parts.append("--quick")
    if args.only:
        parts += ["--only", args.only]
    if args.json:
        parts += ["--json", str(args.json)]
    return " ".join(parts)


def run(args: argparse.Namespace, out: TextIO | None = None, err: TextIO | None = None) -> int:
    from tracer.perf import format_report, run_report

    out = out or sys.stdout
    err = err or sys.stderr
    size = "quick" if args.quick else "full"
    only = None
    if args.only:
        only = [n.strip() for n in args.only.split(",") if n.strip()]
        unknown = sorted(set(only) - set(args._bench_names))
        if unknown:
            print(f"tracer bench: unknown benchmark(s) {', '.join(unknown)}; known: "
                  f"{', '.join(args._bench_names)}", file=err)
            return 2
    if args.timeout is not None and not args.timeout > 0:
        print("tracer bench: --timeout must be a positive number of seconds", file=err)
        return 2
    table_out = err if args.json == "-" else out

    def log(line: str) -> None:
        print(line, file=err, flush=True)

    log(f"tracer bench: {size} run, one benchmark at a time")
    try:
        report = run_report(size, benchmark_dir=args.bench_dir, only=only,
                            timeout_s=args.timeout, command=_command(args), log=log,
                            stream_output=args.verbose)
    except KeyboardInterrupt:          # the running benchmark was ended by run_report
        print("tracer bench: interrupted; no report", file=err)
        return EXIT_INTERRUPTED
    print(format_report(report), file=table_out, flush=True)
    if args.json:
        text = json.dumps(report, indent=2, allow_nan=False)
        if args.json == "-":
            print(text, file=out)
        else:
            try:
                Path(args.json).write_text(text + "\n", encoding="utf-8")
            except OSError as exc:
                print(f"tracer bench: cannot write {args.json}: {exc}", file=err)
                return EXIT_FAILED
            print(f"JSON written to {args.json}", file=err)
    return EXIT_OK
