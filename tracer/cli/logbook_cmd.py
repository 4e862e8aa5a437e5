"""``tracer logbook list|show`` and ``tracer export``: browse and export stored runs.

Exit status: 0 done; 1 the logbook could not be used or an export could not be written;
2 a bad run reference (unknown or ambiguous) or bad arguments.
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from pathlib import Path

from tracer.logbook import (
    AmbiguousRun, ExportError, Logbook, LogbookError, RunNotFound, default_logbook_path, export_run,
)
from tracer.logbook.report import format_report, run_report

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_REFERENCE = 2


def add_logbook_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--logbook", metavar="PATH", type=Path, default=None,
        help=f"logbook file (default: $TRACER_LOGBOOK, else $XDG_DATA_HOME/tracer/logbook.sqlite, "
             f"else ~/.local/share/tracer/logbook.sqlite; here: {default_logbook_path()})")


def register(subparsers) -> None:
    lb = subparsers.add_parser("logbook", help="browse the stored runs",
                               description="Browse the runs kept in the logbook.")
    lb_sub = lb.add_subparsers(dest="logbook_command", metavar="ACTION")

    p = lb_sub.add_parser("list", help="list runs, newest first")
    p.add_argument("--sample", metavar="ID", help="only runs of this sample id")
    p.add_argument("--status", choices=("running", "completed", "aborted", "failed", "interrupted"),
                   help="only runs with this status")
    p.add_argument("--limit", type=int, metavar="N", help="at most N runs")
    p.add_argument("--json", action="store_true", help="print one JSON document")
    add_logbook_option(p)
    p.set_defaults(func=cmd_list)

    p = lb_sub.add_parser("show", help="one run: conditions, instruments, figures per sweep")
    p.add_argument("run", metavar="RUN", help="run uid, a unique prefix of one, or 'latest'")
    p.add_argument("--json", action="store_true", help="print one JSON document (with analyses)")
    add_logbook_option(p)
    p.set_defaults(func=cmd_show)

    def no_action(args) -> int:
        lb.print_help()
        return EXIT_BAD_REFERENCE

    lb.set_defaults(func=no_action)

    p = subparsers.add_parser(
        "export", help="export a run as CSV (one file per sweep) or JSON",
        description="Export a stored run into OUT/<run uid>/. CSV: one file per sweep with a "
                    "'# key: value' metadata header; voltage_v,current_a in the generator "
                    "convention plus the raw columns. Values read back bit for bit.")
    p.add_argument("run", metavar="RUN", help="run uid, a unique prefix of one, or 'latest'")
    p.add_argument("--format", choices=("csv", "json"), default="csv", help="export format (csv)")
    p.add_argument("--out", metavar="DIR", type=Path, default=Path("."),
                   help="folder to export into (default: the current folder); nothing is "
                        "written outside it")
    add_logbook_option(p)
    p.set_defaults(func=cmd_export)


def _open(args) -> Logbook:
    path = args.logbook if args.logbook is not None else default_logbook_path()
    if not Path(path).exists():     # reading never creates a logbook
        raise LogbookError(f"no logbook at {path}")
    return Logbook(path)


def _when(t) -> str:
    return "-" if t is None else time.strftime("%Y-%m-%d %H:%M", time.localtime(t))


def _guard(fn):
    def wrapped(args) -> int:
        try:
            return fn(args)
        except (RunNotFound, AmbiguousRun) as exc:
            print(f"tracer: {exc}", file=sys.stderr)
            return EXIT_BAD_REFERENCE
        except (LogbookError, OSError) as exc:
            print(f"tracer: {exc}", file=sys.stderr)
            return EXIT_FAILED
    wrapped.__name__ = fn.__name__
    wrapped.__doc__ = fn.__doc__
    return wrapped


@_guard
def cmd_list(args) -> int:
    with _open(args) as lb:
        runs = lb.list_runs(sample_id=args.sample, status=args.status, limit=args.limit)
        if args.json:
            print(json.dumps({"logbook": str(lb.path), "runs": [dataclasses.asdict(r) for r in runs]},
                             indent=1, allow_nan=False))
            return EXIT_OK
        if not runs:
            print(f"no runs in {lb.path}" + (f" for sample {args.sample}" if args.sample else ""))
            return EXIT_OK
        header = ("run", "started", "sample", "protocol", "status", "sweeps", "points", "operator")
        rows = [(r.uid[:12], _when(r.started_at), r.sample_id, r.protocol_name, r.status,
                 str(r.sweeps), str(r.points), r.operator or "-") for r in runs]
        widths = [max(len(h), *(len(row[k]) for row in rows)) for k, h in enumerate(header)]
        print("  ".join(h.ljust(w) for h, w in zip(header, widths)).rstrip())
        for row in rows:
            print("  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
        print(f"({len(runs)} run{'s' if len(runs) != 1 else ''} in {lb.path})")
    return EXIT_OK


@_guard
def cmd_show(args) -> int:
    with _open(args) as lb:
        report = run_report(lb, args.run, include_analysis=args.json)
    if args.json:
        print(json.dumps(report, indent=1, allow_nan=False))
    else:
        print(format_report(report))
    return EXIT_OK


@_guard
def cmd_export(args) -> int:
    with _open(args) as lb:
        try:
            result = export_run(lb, args.run, args.out, fmt=args.format)
        except ExportError as exc:
            print(f"tracer: {exc}", file=sys.stderr)
            return EXIT_FAILED
    print(f"exported run {result.run_uid} ({result.format}, {len(result.files)} file"
          f"{'s' if len(result.files) != 1 else ''}) to {result.directory}")
    for f in result.files:
        print(f"  {f.name}")
    return EXIT_OK
