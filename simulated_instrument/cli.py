"""Command line of the standalone simulator (``python -m simulated_instrument``, ``tracer sim``)."""
from __future__ import annotations

import argparse
import signal
import sys
import threading

from .bench import DRIVERS, SimulatedBench, parse_fault
from .scenario import DEFAULT_SCENARIO, ScenarioError, list_scenarios
from .world import FAULT_NAMES

DESCRIPTION = "Run the simulated bench (SMU, light source, stage thermometer, channel switch) on loopback TCP."


def epilog() -> str:
    return (f"Scenarios shipped: {', '.join(list_scenarios())}. "
            f"Faults: {', '.join(FAULT_NAMES)}; AFTER counts messages received by the SMU. "
            f"The bench profile written by --bench-file names the drivers "
            f"{', '.join(DRIVERS.values())}.")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1)")
    parser.add_argument("--port-base", type=int, default=5025,
                        help="SMU port; light +1, thermometer +2, switch +3, harness +4 (0 = any free block)")
    parser.add_argument("--scenario", default=DEFAULT_SCENARIO,
                        help=f"scenario name or YAML file (default {DEFAULT_SCENARIO})")
    parser.add_argument("--time-scale", type=float, default=1.0,
                        help="real seconds per simulated second (1 = real time, 0 = instantaneous)")
    parser.add_argument("--seed", type=int, default=None, help="seed of the noise generator (default: random)")
    parser.add_argument("--fault", action="append", default=[], metavar="NAME:AFTER",
                        help="arm a fault after AFTER SMU messages (repeatable)")
    parser.add_argument("--bench-file", metavar="FILE",
                        help="write a bench profile pointing at this simulator (docs/bench-profile.md)")


def run(args: argparse.Namespace, out=None) -> int:
    out = out or sys.stdout
    try:
        faults = [parse_fault(spec) for spec in args.fault]
        if args.time_scale < 0:
            raise ValueError("--time-scale must be >= 0")
        bench = SimulatedBench(args.scenario, time_scale=args.time_scale, seed=args.seed,
                               host=args.host, port_base=args.port_base, faults=faults)
    except (ValueError, ScenarioError, OSError) as exc:
        print(f"simulated bench: {exc}", file=sys.stderr)
        return 2
    stop = threading.Event()
    previous = {}

    def on_signal(signum, frame):
        stop.set()

    for sig in (signal.SIGINT, signal.SIGTERM):
        try:
            previous[sig] = signal.signal(sig, on_signal)
        except ValueError:  # not the main thread
            pass
    try:
        bench.start()
        for role, address in bench.addresses.items():
            print(f"{role:<12} {address}", file=out)
        print(f"{'harness':<12} {bench.harness_address[0]}:{bench.harness_address[1]} (JSON lines)", file=out)
        if args.bench_file:
            path = bench.write_bench_profile(args.bench_file)
            print(f"bench profile written to {path}", file=out)
        print(f"scenario {bench.scenario.name}; time scale {args.time_scale:g}; Ctrl-C to stop", file=out)
        out.flush()
        while not stop.wait(0.2):
            pass
    finally:
        bench.close()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    print("simulated bench stopped", file=out)
    out.flush()
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m simulated_instrument", description=DESCRIPTION,
                                     epilog=epilog())
    add_arguments(parser)
    return run(parser.parse_args(argv))
