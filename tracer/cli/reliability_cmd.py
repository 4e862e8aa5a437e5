"""``tracer reliability [--quick] [--json FILE]``: prove the tracer's reliability with figures.

Runs, against simulated benches in separate programs: the fault matrix (every simulated
fault in every phase of a run, through ``tracer run``), SIGKILL trials, hostile-input
fuzzing (protocol files, bench profiles, CSV curves, spoilt instrument replies) and eight
benches measuring at once. Prints what ran and what held; see docs/reliability.md.

Exit status: 0 target met (every cell passed, nothing lost, no fuzz failure), 1 not met,
2 bad usage.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

EXIT_MET = 0
EXIT_NOT_MET = 1
EXIT_USAGE = 2


def register(subparsers) -> None:
    from tracer.reliability.report import PARTS

    p = subparsers.add_parser(
        "reliability", help="fault matrix, kill trials, fuzzing and load on simulated benches",
        description="Prove the tracer's reliability with figures: every simulated fault in every "
                    "phase of a run, SIGKILL at random moments, hostile files and instrument "
                    "replies, eight benches at once. Full size takes tens of minutes on two "
                    "cores; --quick a few. Exit status: 0 target met, 1 not met.")
    p.add_argument("--quick", action="store_true",
                   help="CI size: a subset of the matrix covering every fault and phase, "
                        "6 kill trials, 100 files of each kind")
    p.add_argument("--json", metavar="FILE", type=Path, default=None,
                   help="also write every figure and every cell's details as JSON to FILE")
    p.add_argument("--only", metavar="PART", action="append", choices=PARTS, default=None,
                   help=f"run only this part ({', '.join(PARTS)}); repeatable")
    p.add_argument("--workers", metavar="N", type=int, default=2,
                   help="matrix cells and kill trials run N at a time (default 2)")
    p.add_argument("--seed", metavar="N", type=int, default=0,
                   help="seed of the kill moments and of the fuzzers (default 0)")
    p.add_argument("--keep", metavar="DIR", type=Path, default=None,
                   help="keep every logbook, export and program output under DIR")
    p.set_defaults(func=cmd_reliability)


def cmd_reliability(args: argparse.Namespace) -> int:
    from tracer.reliability.report import FULL, PARTS, QUICK, run_report

    if args.workers < 1:
        print("tracer reliability: --workers must be at least 1", file=sys.stderr)
        return EXIT_USAGE
    if args.json is not None and args.json.is_dir():
        print(f"tracer reliability: --json {args.json} is a folder", file=sys.stderr)
        return EXIT_USAGE
    sizes = QUICK if args.quick else FULL
    parts = tuple(args.only) if args.only else PARTS

    def progress(line: str) -> None:
        print(line, file=sys.stderr, flush=True)

    report = run_report(sizes, parts=parts, workers=args.workers, seed=args.seed,
                        workdir=args.keep, progress=progress)
    print(report.format())
    if args.json is not None:
        try:
            args.json.parent.mkdir(parents=True, exist_ok=True)
            tmp = args.json.with_name(f".{args.json.name}.tmp")
            tmp.write_text(json.dumps(report.to_dict(), indent=1, allow_nan=False, default=str)
                           + "\n", encoding="utf-8")
            tmp.replace(args.json)
        except (OSError, ValueError) as exc:
            print(f"tracer reliability: cannot write {args.json}: {exc}", file=sys.stderr)
            return EXIT_NOT_MET
        print(f"details: {args.json}")
    return EXIT_MET if report.passed else EXIT_NOT_MET
