"""``tracer logbook list|show|forward`` and ``tracer export``: browse, forward and export
stored runs.

``--logbook`` takes a file (SQLite) or a ``postgresql://`` URL (a store shared by the lab's
benches; the password is best left to ``PGPASSWORD`` or ``~/.pgpass``). ``tracer logbook
forward`` copies the local logbook's ended runs to a shared store (see
:mod:`tracer.logbook.forward`).

Exit status: 0 done; 1 the logbook could not be used or an export could not be written
(``forward``: some runs are still waiting); 2 a bad run reference (unknown or ambiguous)
or bad arguments.
"""
from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import json
import os
import sys
import time
from pathlib import Path

from tracer.logbook import (
    AmbiguousRun, ExportError, Logbook, LogbookError, RunNotFound, default_logbook_path, export_run,
)
from tracer.logbook.backend import is_url, logbook_target, redact_text, secrets_of
from tracer.logbook.report import format_report, run_report

FORWARD_ENV = "TRACER_FORWARD_TO"

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_BAD_REFERENCE = 2


def add_logbook_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--logbook", metavar="PATH|URL", type=logbook_target, default=None,
        help=f"logbook file, or a postgresql://user@host:port/db URL of a shared store "
             f"(default: $TRACER_LOGBOOK, else $XDG_DATA_HOME/tracer/logbook.sqlite, "
             f"else ~/.local/share/tracer/logbook.sqlite; here: {default_logbook_path()})")


def parse_when(text: str) -> float:
    """``YYYY-MM-DD`` or ``YYYY-MM-DD[T ]HH:MM[:SS][+HH:MM|Z]`` to POSIX seconds (local time
    when no offset is given)."""
    try:
        when = dt.datetime.fromisoformat(text.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"{text!r} is not a date: use YYYY-MM-DD or YYYY-MM-DDTHH:MM") from None
    return when.timestamp()


def register(subparsers) -> None:
    lb = subparsers.add_parser("logbook", help="browse the stored runs",
                               description="Browse the runs kept in the logbook.")
    lb_sub = lb.add_subparsers(dest="logbook_command", metavar="ACTION")

    p = lb_sub.add_parser("list", help="list runs, newest first")
    p.add_argument("--sample", metavar="ID", help="only runs of this sample id")
    p.add_argument("--bench", metavar="NAME", help="only runs made on this bench")
    p.add_argument("--since", metavar="DATE", type=parse_when,
                   help="only runs started at or after DATE (YYYY-MM-DD[THH:MM], local time)")
    p.add_argument("--until", metavar="DATE", type=parse_when,
                   help="only runs started before DATE")
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

    p = lb_sub.add_parser(
        "forward", help="copy the ended runs of this bench's logbook to the shared store",
        description="Copy every ended run (completed, aborted, failed, interrupted) of the "
                    "local logbook that the shared store does not have yet, one transaction "
                    "per run; a run already there is not copied again. Runs that failed "
                    "before are retried. Exit status 0 when nothing is left waiting, 1 when "
                    "the store could not be reached or refused a run.")
    p.add_argument("--to", metavar="URL", type=logbook_target, default=None,
                   help=f"the shared store (default: the bench profile's forward_to, else "
                        f"${FORWARD_ENV})")
    p.add_argument("--bench", metavar="FILE", type=Path, default=None,
                   help="bench profile whose logbook and forward_to to use")
    p.add_argument("--timeout", metavar="S", type=float, default=10.0,
                   help="connection timeout in seconds (default 10)")
    p.add_argument("--json", action="store_true", help="print one JSON document")
    add_logbook_option(p)
    p.set_defaults(func=cmd_forward)

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
    if is_url(path):
        from tracer.logbook.postgres import has_logbook

        if not has_logbook(path):   # reading never creates a logbook
            raise LogbookError(f"no logbook at {path}")
        return Logbook(path)
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
        runs = lb.list_runs(sample_id=args.sample, status=args.status, limit=args.limit,
                            bench_name=args.bench, since=args.since, until=args.until)
        if args.json:
            print(json.dumps({"logbook": str(lb.path), "runs": [dataclasses.asdict(r) for r in runs]},
                             indent=1, allow_nan=False))
            return EXIT_OK
        if not runs:
            print(f"no runs in {lb.path}" + (f" for sample {args.sample}" if args.sample else "")
                  + (f" on bench {args.bench}" if args.bench else ""))
            return EXIT_OK
        header = ("run", "started", "sample", "bench", "protocol", "status", "sweeps", "points",
                  "operator")
        rows = [(r.uid[:12], _when(r.started_at), r.sample_id, r.bench_name or "-", r.protocol_name,
                 r.status, str(r.sweeps), str(r.points), r.operator or "-") for r in runs]
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


def forward_target(args) -> tuple[object, object]:
    """(local logbook, shared store) for ``tracer logbook forward``."""
    local = args.logbook
    shared = args.to
    if args.bench is not None:
        from tracer.bench_profile import load_bench_profile

        profile = load_bench_profile(args.bench)
        if local is None and profile.logbook is not None:
            local = profile.logbook
        if shared is None and profile.forward_to is not None:
            shared = profile.forward_to
    if shared is None and os.environ.get(FORWARD_ENV, "").strip():
        shared = logbook_target(os.environ[FORWARD_ENV])
    if local is None:
        local = default_logbook_path()
    return local, shared


def cmd_forward(args) -> int:
    from tracer.bench_profile import BenchProfileError
    from tracer.logbook.forward import forward

    try:
        local, shared = forward_target(args)
    except BenchProfileError as exc:
        print(f"tracer: {exc}", file=sys.stderr)
        return EXIT_BAD_REFERENCE
    if shared is None:
        print(f"tracer: where to? give --to URL, a bench profile with forward_to, or set "
              f"${FORWARD_ENV}", file=sys.stderr)
        return EXIT_BAD_REFERENCE
    if is_url(local):
        print(f"tracer: --logbook must be this bench's local logbook file, not {local}",
              file=sys.stderr)
        return EXIT_BAD_REFERENCE
    if not Path(local).exists():
        print(f"tracer: no logbook at {local}", file=sys.stderr)
        return EXIT_FAILED
    try:
        report = forward(local, shared, connect_timeout_s=args.timeout)
    except LogbookError as exc:
        print(f"tracer: {redact_text(str(exc), secrets_of(shared))}", file=sys.stderr)
        return EXIT_FAILED
    if args.json:
        print(json.dumps(dict(report.to_dict(), logbook=str(local)), indent=1, allow_nan=False))
    else:
        print(f"forwarding {local} -> {report.target}")
        if report.forwarded:
            print(f"  forwarded {len(report.forwarded)} run{'s' if len(report.forwarded) != 1 else ''} "
                  f"({report.points} points): {', '.join(u[:12] for u in report.forwarded)}")
        if report.already_there:
            print(f"  already there: {len(report.already_there)}")
        for uid, why in report.failed.items():
            print(f"  refused {uid}: {why}")
        if report.unreachable:
            print(f"  not reached: {report.unreachable}")
        print(f"  waiting: {report.pending}")
    return EXIT_OK if report.ok and report.pending == 0 else EXIT_FAILED
