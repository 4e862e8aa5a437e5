"""`tracer check FILE [--bench FILE]`: validate a protocol without touching any instrument.

Prints ``OK: <name>, ...`` with what the plan will do and exits 0, or prints every problem
(file:line: key: message) and exits 2. Never prints a traceback.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TextIO

EXIT_OK = 0
EXIT_INVALID = 2
EXIT_INTERNAL = 1


def register(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "check",
        help="validate a protocol (and a bench profile) without touching hardware",
        description="Validate a YAML sweep protocol, optionally against a bench profile's hard "
        "limits and instruments, compile it to a plan and summarise it. Exit status: 0 valid, "
        "2 problems found.",
    )
    parser.add_argument("protocol", metavar="FILE", help="protocol YAML file")
    parser.add_argument("--bench", metavar="FILE", default=None,
                        help="bench profile YAML: check the protocol against its hard limits, "
                        "switch channels and instruments")
    parser.add_argument("--sample", metavar="ID", default=None,
                        help="sample id to use instead of the protocol's sample.id")
    parser.add_argument("--steps", action="store_true",
                        help="also list the compiled plan, one step a line")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace, out: TextIO | None = None, err: TextIO | None = None) -> int:
    out = out or sys.stdout
    err = err or sys.stderr
    try:
        return _check(args, out, err)
    except Exception as exc:  # never a traceback for the user; say it is ours
        print(f"internal error while checking {args.protocol}: {type(exc).__name__}: {exc}",
              file=err)
        return EXIT_INTERNAL


def _check(args: argparse.Namespace, out: TextIO, err: TextIO) -> int:
    from tracer.bench_profile import BenchProfileError, load_bench_profile
    from tracer.protocol import (ProtocolError, compile_plan, format_duration, load_protocol,
                                 summarize)

    bench = None
    if args.bench is not None:
        try:
            bench = load_bench_profile(Path(args.bench), source_name=args.bench)
        except BenchProfileError as exc:
            _print_problems(exc, err)
            return EXIT_INVALID
    try:
        protocol = load_protocol(Path(args.protocol), bench=bench, source_name=args.protocol)
        overrides = {"id": args.sample} if args.sample else None
        plan = compile_plan(protocol, bench=bench, sample_overrides=overrides)
    except ProtocolError as exc:
        _print_problems(exc, err)
        return EXIT_INVALID
    s = summarize(plan)
    kinds = [_count(n, word) for n, word in ((s.sweeps, "sweep"), (s.holds, "hold"),
                                              (s.mpp_tracks, "MPP track")) if n]
    parts = [_count(s.steps, "step") + (f" ({', '.join(kinds)})" if kinds else "")]
    if s.pixels:
        parts.append(f"{len(s.pixels)} pixels ({', '.join(str(p) for p in s.pixels)})")
    parts.append(f"{s.planned_points} planned points")
    duration = f"about {format_duration(s.duration_s)}"
    if s.temperature_wait_max_s:
        duration += f" + up to {format_duration(s.temperature_wait_max_s)} waiting for " \
                    "temperature"
    parts.append(duration)
    lim = plan.limits
    parts.append(f"limits {lim.voltage_v:g} V, {lim.current_a:g} A, {lim.power_w:g} W, "
                 f"reverse {lim.reverse_voltage_v:g} V")
    parts.append(f"sample {plan.sample.sample_id}")
    parts.append(f"bench {bench.name}" if bench is not None else "no bench profile given "
                 "(hard limits not checked)")
    print(f"OK: {plan.name}, " + ", ".join(parts), file=out)
    print(f"protocol sha256 {plan.protocol_sha256}", file=out)
    if args.steps:
        for i, step in enumerate(plan.steps, start=1):
            print(f"  {i:3d}. {_describe(step)}", file=out)
    return EXIT_OK


def _count(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


def _print_problems(exc: Exception, err: TextIO) -> None:
    problems = getattr(exc, "problems", [])
    n = len(problems)
    print(f"{n} problem{'s' if n != 1 else ''}:", file=err)
    for p in problems:
        print(f"  {p}", file=err)


def _describe(step: object) -> str:
    from tracer import plan as P

    if isinstance(step, P.SweepStep):
        unit = "V" if step.source_mode == "voltage" else "A"
        light = "light" if step.light else "dark"
        return (f"{light} sweep {step.name!r}: {step.start:g} → {step.stop:g} {unit}, "
                f"{step.points} points {step.spacing}, {step.direction}"
                + (f", ×{step.repeats}" if step.repeats > 1 else ""))
    if isinstance(step, P.HoldStep):
        extra = f" at {step.level:g} V" if step.mode == "bias" else ""
        return (f"{'light' if step.light else 'dark'} {step.mode} hold {step.name!r}{extra}: "
                f"{step.duration_s:g} s every {step.interval_s:g} s")
    if isinstance(step, P.MpptStep):
        return f"MPP tracking {step.name!r}: {step.duration_s:g} s every {step.interval_s:g} s"
    if isinstance(step, P.SelectPixel):
        return f"select pixel {step.pixel}"
    if isinstance(step, P.SetLight):
        level = f" at {step.irradiance_w_m2:g} W/m2" if step.irradiance_w_m2 is not None else ""
        return f"shutter {'open' if step.shutter_open else 'closed'}{level}"
    if isinstance(step, P.WaitTemperature):
        return f"wait for stage {step.target_c:g} ± {step.tolerance_c:g} °C"
    return repr(step)
