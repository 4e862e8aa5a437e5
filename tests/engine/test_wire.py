"""The engine over the wire: real drivers, pyvisa-py sockets, the simulated bench.

Every failure must end with the *simulator's own* record of the output (``sim.state()``,
the physical truth, not the driver's belief) showing it off, and an event naming the cause.
"""
from __future__ import annotations

import threading

import numpy as np
import pytest

pyvisa = pytest.importorskip("pyvisa")
drivers = pytest.importorskip("drivers")
simulated_instrument = pytest.importorskip("simulated_instrument")

from tracer import events as ev  # noqa: E402
from tracer import plan as pl  # noqa: E402
from tracer.engine import Bench, Engine, PlanRefused  # noqa: E402

from .conftest import Recorder  # noqa: E402
from .streams import check_stream, of_type  # noqa: E402

DRIVER_TIMEOUT_S = 0.5
OPTIONS = dict(poll_interval_s=0.001, conditions_interval_s=0.05, list_poll_interval_s=0.001,
               analysis_timeout_s=10.0)
LIMITS = pl.Limits(voltage_v=2.0, current_a=0.1, power_w=0.2, reverse_voltage_v=1.0)
CHECKS = pl.Checks(temperature_window_c=(15.0, 35.0), light_stability_rel=0.05, watchdog_s=2.0)


class WireBench:
    """Drivers connected to a running simulated bench, and an engine on them."""

    def __init__(self, sim, *, analyzer=None, **options):
        self.sim = sim
        self.rm = pyvisa.ResourceManager("@py")
        kw = dict(resource_manager=self.rm, timeout_s=DRIVER_TIMEOUT_S)
        a = sim.addresses
        self.smu = drivers.ScpiSourceMeter(a["smu"], **kw)
        self.light = drivers.ScpiLightSource(a["light"], **kw)
        self.thermometer = drivers.ScpiThermometer(a["thermometer"], **kw)
        self.switch = drivers.ScpiChannelSwitch(a["switch"], channels=len(sim.scenario.pixels), **kw)
        profile = sim.bench_profile()["bench"]
        calibration = profile["reference_cell"]["calibration_isc_a"]
        self.bench = Bench(
            name=profile["name"], smu=self.smu, light=self.light, thermometer=self.thermometer,
            switch=self.switch, hard_limits=pl.Limits(**profile["hard_limits"]),
            # G = 1000 W/m2 * Isc / Isc_cal: the reference-cell relation of IEC 60904-2
            # (temperature term left out; the reference cell stays near 25 C here)
            irradiance_from_reference=lambda isc_a, t_c: 1000.0 * abs(isc_a) / calibration,
            snapshot={"simulated": True})
        self.engine = Engine(self.bench, analyzer, **{**OPTIONS, **options})
        self.events = Recorder()
        self.engine.subscribe(self.events, critical=True)

    def output_on(self) -> bool:
        return self.sim.state()["smu"]["output_on"]

    def close(self):
        self.engine.close()
        for inst in (self.smu, self.light, self.thermometer, self.switch):
            try:
                inst.close()
            except Exception:
                pass
        # the "@py" resource manager is shared process-wide (pyvisa keeps one per library):
        # closing it would close every other test's resources too


@pytest.fixture
def sim():
    with simulated_instrument.running_bench(time_scale=0.0, seed=0) as bench:
        yield bench


@pytest.fixture
def wire(sim):
    made = []

    def build(**kw):
        w = WireBench(sim, **kw)
        made.append(w)
        return w

    yield build
    for w in made:
        w.close()


def light_iv(**kw):
    base = dict(name="light-iv", light=True, start=-0.1, stop=0.65, points=40, compliance=0.05,
                nplc=0.1)
    base.update(kw)
    return pl.SweepStep(**base)


def plan_of(*steps, limits=LIMITS, checks=CHECKS):
    return pl.Plan(name="wire", steps=(pl.SelectPixel(1),
                                       pl.SetLight(shutter_open=True, irradiance_w_m2=1000.0)) + steps,
                   limits=limits, sample=pl.Sample("sim-pixel-1", area_cm2=1.0), checks=checks)


def finish(w: WireBench, plan, timeout=30.0):
    w.engine.start(plan)
    finished = w.engine.wait(timeout)
    assert finished is not None, "the run did not end"
    return finished


def assert_ended_safe(w: WireBench, finished, causes, *, status=ev.RUN_ABORTED):
    assert not w.output_on(), "the simulator's output is still ON"
    assert w.sim.state()["smu"]["level"] == 0.0
    assert finished.output_verified_off
    assert check_stream(w.events.events) == finished
    assert finished.status == status, finished.reason
    trips = of_type(w.events.events, ev.InterlockTripped)
    assert [t.cause for t in trips] and trips[0].cause in causes, (trips, finished.reason)


# --------------------------------------------------------------------------- normal runs

@pytest.mark.parametrize("acquisition", ["point", "list"])
def test_points_stream_in_order_over_the_wire(wire, acquisition):
    w = wire()
    arrivals: list[int] = []
    w.engine.subscribe(lambda e: arrivals.append(e.run_seq) if isinstance(e, ev.Point) else None)
    plan = plan_of(light_iv(acquisition=acquisition, direction="both", repeats=2))
    finished = finish(w, plan)
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    assert finished.output_verified_off and not w.output_on()
    check_stream(w.events.events)
    assert w.engine.flush(5)
    assert arrivals == list(range(1, 161))
    points = of_type(w.events.events, ev.Point)
    # an illuminated cell at 0 V delivers current: negative in the load convention
    near_zero = min(points, key=lambda p: abs(p.setpoint))
    assert near_zero.current_a < 0
    starts = of_type(w.events.events, ev.SweepStarted)
    assert [s.direction for s in starts] == ["forward", "reverse"] * 2
    assert all(s.conditions["irradiance_w_m2"] > 900 for s in starts)


def test_list_mode_streams_while_the_instrument_runs():
    """With a running clock the list takes real time; points reach the subscriber before
    the instrument has finished the list."""
    with simulated_instrument.running_bench(time_scale=0.1, seed=1) as sim:   # ~0.4 s of list
        w = WireBench(sim)
        sweeping_when_seen = []

        def watch(event):
            if isinstance(event, ev.Point) and len(sweeping_when_seen) < 3:
                sweeping_when_seen.append(sim.state()["smu"]["sweeping"])

        w.engine.subscribe(watch, critical=True)
        try:
            finished = finish(w, plan_of(light_iv(acquisition="list", points=200, nplc=1.0)))
            assert finished.status == ev.RUN_COMPLETED, finished.reason
            assert sweeping_when_seen[0] is True
            assert len(of_type(w.events.events, ev.Point)) == 200
            assert not w.output_on()
        finally:
            w.close()


def test_forward_and_reverse_differ_on_the_hysteretic_cell():
    """The hysteretic virtual cell gives different forward and reverse curves; the same
    sweeps on a cell without memory agree to within the reading noise (the control)."""
    def max_gap(scenario):
        with simulated_instrument.running_bench(scenario, time_scale=0.0, seed=2) as sim:
            w = WireBench(sim)
            try:
                plan = pl.Plan(name="hysteresis", steps=(
                    pl.SelectPixel(1), pl.SetLight(shutter_open=True),
                    light_iv(start=0.0, stop=0.6, points=31, nplc=1.0, settle_s=0.0,
                             direction="both")),
                    limits=LIMITS, sample=pl.Sample("x"), checks=CHECKS)
                finished = finish(w, plan)
                assert finished.status == ev.RUN_COMPLETED, finished.reason
                fwd, rev = of_type(w.events.events, ev.SweepStarted)
                curves = {}
                for s in (fwd, rev):
                    pts = [p for p in of_type(w.events.events, ev.Point) if p.sweep_uid == s.sweep_uid]
                    curves[s.direction] = {round(p.setpoint, 6): p.current_a for p in pts}
                assert set(curves["forward"]) == set(curves["reverse"])
                return max(abs(curves["forward"][v] - curves["reverse"][v]) for v in curves["forward"])
            finally:
                w.close()

    hysteretic = max_gap("hysteretic-cell")
    control = max_gap("pilot-substrate")
    assert hysteretic > 20 * control, (hysteretic, control)


# --------------------------------------------------------------------------- interlocks

def test_refused_plan_sends_nothing_to_the_smu(wire, sim):
    w = wire()
    before = sim.state()["messages"]["smu"]
    with pytest.raises(PlanRefused, match=r"limits\.current_a"):
        w.engine.start(plan_of(light_iv(compliance=0.5)))
    with pytest.raises(PlanRefused, match=r"hard_limits\.voltage_v"):
        w.engine.start(plan_of(light_iv(), limits=pl.Limits(voltage_v=100.0, current_a=0.1,
                                                              power_w=0.2, reverse_voltage_v=1.0)))
    assert sim.state()["messages"]["smu"] == before
    assert w.events.events == []


def test_compliance_at_the_limit_aborts(wire):
    w = wire()
    plan = plan_of(light_iv(start=0.0, stop=1.0, points=40, compliance=LIMITS.current_a))
    finished = finish(w, plan)
    assert_ended_safe(w, finished, {"compliance"})
    assert of_type(w.events.events, ev.Point)[-1].in_compliance


def test_compliance_below_the_limit_is_flagged(wire):
    w = wire()
    finished = finish(w, plan_of(light_iv(start=0.0, stop=0.8, points=20, compliance=0.04)))
    assert finished.status == ev.RUN_COMPLETED and not w.output_on()
    assert any(p.in_compliance for p in of_type(w.events.events, ev.Point))


def test_power_limit_trips(wire):
    w = wire()
    # the pilot cell delivers about 38 mA near 0.5 V, i.e. more than 5 mW
    limits = pl.Limits(voltage_v=2.0, current_a=0.1, power_w=0.005, reverse_voltage_v=1.0)
    finished = finish(w, plan_of(light_iv(start=0.0, stop=0.6), limits=limits))
    assert_ended_safe(w, finished, {"power-limit"})


def test_over_voltage_protection_trips_over_the_wire(wire):
    """OVP is set to limits.voltage_v at the output terminals. Sweeping a four-wire
    voltage source right up to that limit while current flows puts the terminals above it
    by the lead drop: the instrument's protection switches the output off and the run
    names it."""
    w = wire()
    limits = pl.Limits(voltage_v=0.6, current_a=0.1, power_w=0.2, reverse_voltage_v=0.5)
    # dark: the forward-biased cell draws current, so the terminals sit above the sense point
    finished = finish(w, plan_of(light_iv(light=False, start=0.3, stop=0.6, points=31,
                                          four_wire=True), limits=limits))
    assert_ended_safe(w, finished, {"protection-tripped"})
    assert w.sim.state()["smu"]["ovp_tripped"]


def test_graceful_and_emergency_stop_over_the_wire(wire):
    w = wire()
    hit = threading.Event()

    def stop_at_five(event):
        if isinstance(event, ev.Point) and event.run_seq == 5 and not hit.is_set():
            hit.set()
            threading.Thread(target=w.engine.stop).start()

    w.engine.subscribe(stop_at_five, critical=True)
    finished = finish(w, plan_of(light_iv(points=300)))
    assert finished.status == ev.RUN_ABORTED and finished.output_verified_off
    assert not w.output_on()

    w2 = wire()
    verified = []

    def panic(event):
        if isinstance(event, ev.Point) and event.run_seq == 5 and not verified:
            t = threading.Thread(target=lambda: verified.append(w2.engine.emergency_stop()))
            t.start()
            t.join(10)
            assert not w2.output_on()

    w2.engine.subscribe(panic, critical=True)
    finished = finish(w2, plan_of(light_iv(points=300)))
    assert verified == [True]
    assert_ended_safe(w2, finished, {"emergency-stop"})


# --------------------------------------------------------------------------- simulator faults

FAULT_CAUSES = {
    "disconnect": {"link-lost", "watchdog"},   # pyvisa-py sees a closed peer as a time-out
    "stall": {"watchdog", "link-lost"},
    "garble": {"instrument-error", "link-lost"},
    "instrument-error": {"instrument-error"},
    "interlock": {"interlock-open"},
    "compliance": {"compliance"},
    "overtemp": {"temperature-window"},
    "light-failure": {"light-unstable", "light-failure"},
}


def _fault_plan(acquisition: str, points: int, nplc: float = 0.1):
    # compliance at the protection limit, so a forced compliance trip is an interlock
    # the stage sits near 26.5 C under the lamp (scenario: 25 C + 1.5 K per kW/m2)
    return plan_of(light_iv(acquisition=acquisition, points=points, compliance=LIMITS.current_a,
                            nplc=nplc),
                   checks=pl.Checks(temperature_window_c=(20.0, 29.0), light_stability_rel=0.05,
                                    watchdog_s=0.3))


def _fire(sim, name):
    sim.inject(name)
    if name == "overtemp":
        sim.advance(10.0)        # the harness lets the runaway stage heat for 10 s


@pytest.mark.parametrize("name", sorted(FAULT_CAUSES))
def test_fault_armed_before_the_run(wire, sim, name):
    w = wire()
    _fire(sim, name)
    finished = finish(w, _fault_plan("point", 40))
    assert_ended_safe(w, finished, FAULT_CAUSES[name])


@pytest.mark.parametrize("name", sorted(FAULT_CAUSES))
def test_fault_during_a_point_sweep(wire, sim, name):
    w = wire()
    fired = threading.Event()

    def fire_at_five(event):
        if isinstance(event, ev.Point) and event.run_seq == 5 and not fired.is_set():
            fired.set()
            _fire(sim, name)

    w.engine.subscribe(fire_at_five, critical=True)
    finished = finish(w, _fault_plan("point", 60))
    assert fired.is_set()
    assert_ended_safe(w, finished, FAULT_CAUSES[name])
    if name not in ("light-failure", "overtemp"):   # these are read on a timer
        assert len(of_type(w.events.events, ev.Point)) < 60


@pytest.mark.parametrize("name", sorted(FAULT_CAUSES))
def test_fault_during_a_list_sweep(name):
    """The fault fires with the message that starts the list, while it runs (200 points of
    20.5 ms simulated, about 0.2 s of real time at this time scale)."""
    with simulated_instrument.running_bench(time_scale=0.05, seed=3) as sim:
        w = WireBench(sim)
        armed = threading.Event()

        def arm_at_list_start(event):
            if isinstance(event, ev.SweepStarted) and event.acquisition == "list" and not armed.is_set():
                armed.set()
                sim.inject(name, after=1)

        w.engine.subscribe(arm_at_list_start, critical=True)
        try:
            finished = finish(w, _fault_plan("list", 200, nplc=1.0))
            assert armed.is_set()
            assert_ended_safe(w, finished, FAULT_CAUSES[name])
            if name not in ("light-failure", "overtemp"):   # these are read between fetches
                assert len(of_type(w.events.events, ev.Point)) < 200
        finally:
            w.close()
