"""Driver speed against the simulated bench, as figures beside a baseline from the same run.

    .venv/bin/python tests/benchmarks/bench_drivers.py [--quick]

Baseline: a bare stdlib socket doing ``*IDN?`` round trips to the same simulated SMU, i.e.
what the wire and the simulator cost without pyvisa or the driver. Figures:
- per-point cost of ``set_level_and_measure`` (one message, one round trip),
- ``configure`` steps (command, then ``SYST:ERR?``) with and without TCP_NODELAY on the
  client socket (Nagle can hold the second small write for a delayed ACK),
- fetching a 2,500-point list sweep in ASCII and in binary blocks.
Nothing here asserts a time: it prints, for a human to compare (project rule).
"""
from __future__ import annotations

import argparse
import socket
import statistics
import sys
import time
from pathlib import Path
from unittest import mock

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import simulated_instrument  # noqa: E402
from drivers import ScpiChannelSwitch, ScpiSourceMeter, session as session_module  # noqa: E402


def _median_us(samples: list[float]) -> float:
    return statistics.median(samples) * 1e6


def _timed(fn, repeats: int) -> list[float]:
    out = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        out.append(time.perf_counter() - start)
    return out


def bare_socket_round_trip(port: int, repeats: int) -> list[float]:
    with socket.create_connection(("127.0.0.1", port)) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        reader = sock.makefile("rb")

        def once():
            sock.sendall(b"*IDN?\n")
            reader.readline()
        return _timed(once, repeats)


def run(quick: bool = False) -> dict[str, float]:
    repeats = 50 if quick else 300
    figures: dict[str, float] = {}
    with simulated_instrument.running_bench(time_scale=0.0, seed=0) as bench:
        port = bench.ports["smu"]
        figures["baseline: bare socket *IDN? round trip [us]"] = _median_us(bare_socket_round_trip(port, repeats))
        ScpiChannelSwitch(bench.addresses["switch"], resource_manager="@py", channels=6).select(1)

        smu = ScpiSourceMeter(bench.addresses["smu"], resource_manager="@py", timeout_s=5)
        smu.configure(source_mode="voltage", compliance=0.05, nplc=0, four_wire=True)
        smu.output(True)
        figures["session *IDN? round trip [us]"] = _median_us(
            _timed(lambda: smu.session.query("*IDN?"), repeats))
        figures["set_level_and_measure, NPLC 0 [us]"] = _median_us(
            _timed(lambda: smu.set_level_and_measure(0.3), repeats))
        figures["configure step (write + SYST:ERR?), TCP_NODELAY [us]"] = _median_us(
            _timed(lambda: smu.set_level(0.3), repeats))
        smu.make_safe()
        smu.close()

        with mock.patch.object(session_module, "disable_nagle", lambda resource: None):
            nagle = ScpiSourceMeter(bench.addresses["smu"], resource_manager="@py", timeout_s=5)
            figures["configure step (write + SYST:ERR?), Nagle on [us]"] = _median_us(
                _timed(lambda: nagle.set_level(0.0), max(10, repeats // 5)))
            nagle.close()

        smu = ScpiSourceMeter(bench.addresses["smu"], resource_manager="@py", timeout_s=10)
        smu.configure(source_mode="voltage", compliance=0.05, nplc=0, four_wire=True)
        smu.output(True)
        levels = [0.6 * k / 2499 for k in range(2500)]
        start = time.perf_counter()
        smu.load_list(levels, settle_s=0.0)
        figures["load_list 2,500 levels [ms]"] = (time.perf_counter() - start) * 1e3
        smu.start_list()
        while smu.list_points_done() < len(levels):
            bench.advance(0.1)
        for binary in (False, True):
            smu.binary_transfer = binary
            took = _timed(lambda: smu.fetch_list(0, len(levels)), 3 if quick else 10)
            figures[f"fetch 2,500 points, {'binary' if binary else 'ASCII'} [ms]"] = statistics.median(took) * 1e3
        smu.make_safe()
        smu.close()
    return figures


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    args = parser.parse_args(argv)
    figures = run(quick=args.quick)
    base = figures["baseline: bare socket *IDN? round trip [us]"]
    width = max(map(len, figures))
    for name, value in figures.items():
        ratio = f"  ({value / base:5.1f} x baseline)" if name.endswith("[us]") else ""
        print(f"{name:<{width}}  {value:10.1f}{ratio}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
