"""Engine throughput against the simulated bench, beside baselines measured in the same run.

    .venv/bin/python tests/benchmarks/bench_engine.py [--quick]

One simulated bench (time scale 0, NPLC 0: the instrument itself costs nothing but its
reply), one pixel, a dark voltage sweep. Figures, in points per second:

- baseline: a bare pyvisa loop sending the same set-and-measure message the engine's
  driver sends per point (``SOUR:VOLT v;:READ?;:SENS:CURR:PROT:TRIP?``), parsing the reply;
- the driver alone (``ScpiSourceMeter.set_level_and_measure`` in a loop: adds the
  error-queue unit and strict reply parsing);
- the engine in point mode (each set-point checked before the next; a no-op critical
  subscriber and a no-op viewer attached, as a logbook and a GUI would be);
- the engine in list mode (instrument-run list, buffer fetched in chunks while it runs).

Engine figures are points / (first ``configure`` of the step .. its ``SweepFinished``), so
they include arming (compliance and OVP read-back, interlock checks, output on) and the
end-of-sweep checks; for list mode the share of the step the instrument spent running the
list is printed too (at time scale 0 the simulator computes the whole list before it
answers INIT, so that share bounds what any engine could gain). Ratios, taken within each round (same machine load) and then the
median over rounds: engine point mode / bare loop (goal >= 0.8), engine point mode / driver
loop (the engine's own overhead), list mode / point mode (goal >= 5). Nothing here asserts
a time (project rule).
"""
from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

import pyvisa  # noqa: E402

import simulated_instrument  # noqa: E402
from drivers import ScpiChannelSwitch, ScpiSourceMeter  # noqa: E402
from tracer import events as ev  # noqa: E402
from tracer import plan as pl  # noqa: E402
from tracer.engine import Bench, Engine  # noqa: E402

LIMITS = pl.Limits(voltage_v=2.0, current_a=0.1, power_w=0.2, reverse_voltage_v=1.0)
START_V, STOP_V, COMPLIANCE_A = -0.2, 0.5, 0.05


def _levels(n: int) -> list[float]:
    return [START_V + (STOP_V - START_V) * k / (n - 1) for k in range(n)]


def bare_loop(address: str, rm, n: int) -> float:
    """Points per second of a bare pyvisa set-and-measure loop."""
    res = rm.open_resource(address, read_termination="\n", write_termination="\n", timeout=5000)
    try:
        for command in ("*RST", "SOUR:FUNC:MODE VOLT", f"SENS:CURR:PROT {COMPLIANCE_A}",
                        "SENS:CURR:NPLC 0", "SENS:REM ON", "OUTP ON"):
            res.write(command)
        res.query("*OPC?")
        levels = _levels(n)
        start = time.perf_counter()
        for v in levels:
            reply = res.query(f"SOUR:VOLT {v!r};:READ?;:SENS:CURR:PROT:TRIP?")
            voltage, current, clamped = reply.split(";")[0].split(",") + reply.split(";")[1:]
            float(voltage), float(current), clamped == "1"
        took = time.perf_counter() - start
        res.write("SOUR:VOLT 0")
        res.write("OUTP OFF")
        return n / took
    finally:
        res.close()


def driver_loop(address: str, rm, n: int) -> float:
    smu = ScpiSourceMeter(address, resource_manager=rm, timeout_s=5)
    try:
        smu.configure(source_mode="voltage", compliance=COMPLIANCE_A, nplc=0, four_wire=True)
        smu.output(True)
        levels = _levels(n)
        start = time.perf_counter()
        for v in levels:
            smu.set_level_and_measure(v)
        took = time.perf_counter() - start
        smu.make_safe()
        return n / took
    finally:
        smu.close()


class _StampingSourceMeter:
    """Delegates to the driver; notes when each step starts configuring and how long the
    instrument took to run a list (at time scale 0 the simulator computes the whole list
    sweep before it answers INIT) - benchmark only."""

    def __init__(self, inner, stamps: list[float], list_run_s: list[float]):
        self._inner = inner
        self._stamps = stamps
        self._list_run_s = list_run_s

    def configure(self, **kw):
        self._stamps.append(time.perf_counter())
        return self._inner.configure(**kw)

    def start_list(self):
        start = time.perf_counter()
        try:
            return self._inner.start_list()
        finally:
            self._list_run_s.append(time.perf_counter() - start)

    def __getattr__(self, name):
        return getattr(self._inner, name)


def engine_rate(sim, rm, n: int, acquisition: str) -> tuple[float, float]:
    """(points per second, share of the step spent inside the instrument's list run)."""
    smu = ScpiSourceMeter(sim.addresses["smu"], resource_manager=rm, timeout_s=5)
    switch = ScpiChannelSwitch(sim.addresses["switch"], resource_manager=rm, channels=len(sim.scenario.pixels))
    configured: list[float] = []
    finished: list[float] = []
    list_run_s: list[float] = []
    try:
        bench = Bench(name="bench", smu=_StampingSourceMeter(smu, configured, list_run_s),
                      switch=switch,
                      hard_limits=pl.Limits(**sim.bench_profile()["bench"]["hard_limits"]))
        engine = Engine(bench)

        def logbook_stand_in(event):
            if isinstance(event, ev.SweepFinished):
                finished.append(time.perf_counter())

        engine.subscribe(logbook_stand_in, critical=True)
        engine.subscribe(lambda event: None)
        plan = pl.Plan(name="bench", limits=LIMITS, sample=pl.Sample("bench"), steps=(
            pl.SelectPixel(1),
            pl.SweepStep(name="iv", light=False, start=START_V, stop=STOP_V, points=n,
                         compliance=COMPLIANCE_A, nplc=0.0, acquisition=acquisition)))
        result = engine.run(plan)
        engine.close()
        if result.status != ev.RUN_COMPLETED:
            raise RuntimeError(f"benchmark run did not complete: {result.reason}")
        step_s = finished[-1] - configured[-1]
        return n / step_s, sum(list_run_s) / step_s
    finally:
        smu.close()
        switch.close()


def run(quick: bool = False) -> dict[str, float]:
    n = 300 if quick else 1000
    rounds = 1 if quick else 5
    samples: dict[str, list[float]] = {"bare": [], "driver": [], "point": [], "list": [],
                                       "list_instrument_share": []}
    with simulated_instrument.running_bench(time_scale=0.0, seed=0) as sim:
        rm = pyvisa.ResourceManager("@py")    # shared process-wide by pyvisa: not closed here
        selector = ScpiChannelSwitch(sim.addresses["switch"], resource_manager=rm, channels=6)
        selector.select(1)
        for _ in range(rounds):           # interleaved, so drifting machine load hits all alike
            samples["bare"].append(bare_loop(sim.addresses["smu"], rm, n))
            samples["driver"].append(driver_loop(sim.addresses["smu"], rm, n))
            samples["point"].append(engine_rate(sim, rm, n, "point")[0])
            list_rate, share = engine_rate(sim, rm, n, "list")
            samples["list"].append(list_rate)
            samples["list_instrument_share"].append(share)
        selector.close()
    rate = {k: statistics.median(v) for k, v in samples.items()}
    # ratios within each round (same machine load), then the median over rounds
    def paired(a: str, b: str) -> float:
        return statistics.median(x / y for x, y in zip(samples[a], samples[b]))

    return {
        "points": float(n),
        "rounds": float(rounds),
        "bare_points_per_s": rate["bare"],
        "driver_points_per_s": rate["driver"],
        "engine_point_points_per_s": rate["point"],
        "engine_list_points_per_s": rate["list"],
        "engine_vs_bare_ratio": paired("point", "bare"),
        "engine_vs_driver_ratio": paired("point", "driver"),
        "list_vs_point_ratio": paired("list", "point"),
        "list_instrument_share": rate["list_instrument_share"],
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer points, one round")
    args = parser.parse_args(argv)
    f = run(quick=args.quick)
    print(f"sweep of {f['points']:.0f} points, simulated bench at time scale 0, NPLC 0, "
          f"median of {f['rounds']:.0f} interleaved rounds")
    print(f"baseline: bare pyvisa set-and-measure loop {f['bare_points_per_s']:9.0f} points/s")
    print(f"driver set_level_and_measure loop          {f['driver_points_per_s']:9.0f} points/s")
    print(f"engine, point mode                         {f['engine_point_points_per_s']:9.0f} points/s")
    print(f"engine, list mode                          {f['engine_list_points_per_s']:9.0f} points/s")
    print(f"engine point mode / bare loop  {f['engine_vs_bare_ratio']:6.2f}   (goal >= 0.8)")
    print(f"engine point mode / driver loop {f['engine_vs_driver_ratio']:5.2f}   (the engine's own share)")
    print(f"engine list mode / point mode  {f['list_vs_point_ratio']:6.2f}   (goal >= 5)")
    print(f"list mode: {f['list_instrument_share']:.0%} of the step is the instrument running "
          f"the list (INIT)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
