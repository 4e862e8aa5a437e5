"""Every failure path ends with the output off, verified, and the right events.

The broadest check: run a plan once to log every instrument call it makes, then run it
again once per call index with an exception raised at exactly that call - for several
kinds of exception (instrument error, lost link, software bug, KeyboardInterrupt).
"""
from __future__ import annotations

import functools
import threading
import time

import pytest

from tracer import events as ev
from tracer import plan as pl
from tracer.engine import Engine, PlanRefused

from .conftest import FAST, LIMITS, Recorder, bench_for, dark_sweep, light_sweep, make_plan, run_to_end
from .fakes import FakeInstrumentError, FakeLinkLost, FakeReading, make_fake_bench
from .streams import check_stream, of_type


def assert_safe_end(fake, finished, events, *, status=ev.RUN_ABORTED, cause=None,
                    verified=True):
    """The common ending of every failure: output off (true state), level 0, verified,
    a well-formed stream naming the cause."""
    assert not fake.smu.output_on, "the output was left on"
    assert fake.smu.level == 0.0
    assert finished.output_verified_off is verified
    assert check_stream(events) == finished
    assert finished.status == status, finished.reason
    if cause is not None:
        trips = of_type(events, ev.InterlockTripped)
        assert [t.cause for t in trips] == [cause], finished.reason
        assert finished.reason.startswith(cause)
    for sweep in of_type(events, ev.SweepFinished)[-1:]:
        if finished.status != ev.RUN_COMPLETED and sweep.points and \
                of_type(events, ev.SweepStarted)[-1].sweep_uid == sweep.sweep_uid:
            assert sweep.status in (ev.SWEEP_ABORTED, ev.SWEEP_COMPLETED)


FULL_PLAN_STEPS = (
    pl.WaitTemperature(target_c=25.0, tolerance_c=0.5),
    pl.SetLight(shutter_open=True, irradiance_w_m2=1000.0),
    pl.SelectPixel(1),
    light_sweep(points=6, direction="both"),
    light_sweep(name="list-iv", points=9, acquisition="list", direction="both"),
    pl.HoldStep(name="voc", light=True, mode="voc", duration_s=0.0, interval_s=0.01, compliance=1.5),
    pl.MpptStep(name="mpp", duration_s=0.0004, interval_s=0.0001, start_v=0.4),
    pl.SetLight(shutter_open=False),
    dark_sweep(points=5, settle_s=0.0001),
)


def _full_plan():
    return make_plan(*FULL_PLAN_STEPS, checks=pl.Checks(temperature_window_c=(20.0, 30.0),
                                                        watchdog_s=2.0))


@functools.cache
def _clean_call_log():
    fake = make_fake_bench(list_rate=4)
    engine = Engine(bench_for(fake), **FASTER)
    rec = Recorder()
    engine.subscribe(rec, critical=True)
    finished = engine.run(_full_plan())
    engine.close()
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    calls = []
    for inst in fake.instruments:
        counts: dict[str, int] = {}
        for name in inst.calls:
            counts[name] = counts.get(name, 0) + 1
            calls.append((type(inst).__name__, name, counts[name]))
    return calls


FASTER = {**FAST, "poll_interval_s": 0.0001}
EXCEPTIONS = {
    "instrument-error": lambda: FakeInstrumentError('-113,"Undefined header"'),
    "link-lost": lambda: FakeLinkLost("timeout"),
    "software-error": lambda: RuntimeError("driver bug"),
    "keyboard-interrupt": lambda: KeyboardInterrupt(),
}
_EXPECTED = {"instrument-error": ev.RUN_ABORTED, "link-lost": ev.RUN_ABORTED,
             "software-error": ev.RUN_FAILED, "keyboard-interrupt": ev.RUN_ABORTED}


def _injectable():
    """Every call of the clean run except the closing make_safe (exercised separately)."""
    return [c for c in _clean_call_log() if c[1] not in ("make_safe",)]


def test_the_full_plan_exercises_every_smu_method():
    names = {name for who, name, _ in _clean_call_log() if who == "FakeSourceMeter"}
    assert names >= {"configure", "read_compliance", "set_overvoltage_protection",
                     "read_overvoltage_protection", "set_level", "measure",
                     "set_level_and_measure", "output", "output_is_on", "protection_tripped",
                     "interlock_open", "load_list", "start_list", "list_points_done",
                     "fetch_list", "make_safe"}
    assert len(_injectable()) > 100


@pytest.mark.parametrize("kind", list(EXCEPTIONS))
def test_an_exception_at_every_call_ends_safe(kind):
    failures = []
    for who, name, nth in _injectable():
        fake = make_fake_bench(list_rate=4)
        target = {type(i).__name__: i for i in fake.instruments}[who]
        target.inject(name, at=nth, exc=EXCEPTIONS[kind]())
        engine = Engine(bench_for(fake), **FASTER)
        rec = Recorder()
        engine.subscribe(rec, critical=True)
        try:
            finished = engine.run(_full_plan())
            cause = kind
            if kind in ("instrument-error", "link-lost"):
                cause = None     # may be refined (e.g. interlock-open); checked below
            assert_safe_end(fake, finished, rec.events, status=_EXPECTED[kind], cause=cause)
            (trip,) = of_type(rec.events, ev.InterlockTripped)
            assert trip.cause == kind
        except AssertionError as exc:
            failures.append(f"{who}.{name}#{nth}: {exc}")
        finally:
            engine.close()
    assert not failures, "\n".join(failures[:10])


def test_refused_plan_touches_no_instrument(fake, make_engine):
    engine, critical, other = make_engine(fake)
    too_far = make_plan(light_sweep(stop=2.5))                      # above limits.voltage_v
    with pytest.raises(PlanRefused, match=r"limits\.voltage_v"):
        engine.start(too_far)
    above_hard = make_plan(light_sweep(), limits=pl.Limits(voltage_v=20.0, current_a=0.1,
                                                           power_w=0.2, reverse_voltage_v=1.0))
    with pytest.raises(PlanRefused, match=r"hard_limits\.voltage_v"):
        engine.check(above_hard)
    with pytest.raises(PlanRefused, match=r"reverse_voltage_v"):
        engine.start(make_plan(dark_sweep(start=-1.5)))
    assert fake.all_calls() == 0 and fake.smu.output_history == []
    assert critical.events == [] and not engine.running and engine.wait(0) is None


def test_compliance_below_the_limit_is_recorded_not_a_trip(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(stop=0.9, compliance=0.01)))
    assert finished.status == ev.RUN_COMPLETED
    flagged = [p for p in of_type(critical.events, ev.Point) if p.in_compliance]
    assert flagged and all(abs(p.current_a) == pytest.approx(0.01) for p in flagged)


def test_compliance_at_the_protection_limit_aborts(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    # compliance = limits.current_a: reaching it means the cell is at the most allowed
    finished = run_to_end(engine, make_plan(dark_sweep(stop=0.95, compliance=LIMITS.current_a)))
    assert_safe_end(fake, finished, critical.events, cause="compliance")
    (trip,) = of_type(critical.events, ev.InterlockTripped)
    assert trip.limit == LIMITS.current_a and trip.value == pytest.approx(LIMITS.current_a)
    last = of_type(critical.events, ev.Point)[-1]
    assert last.in_compliance                       # the offending reading is recorded
    assert trip.sweep_uid == last.sweep_uid


@pytest.mark.parametrize("override,cause", [
    (lambda r: FakeReading(r.voltage_v, 0.2, False), "current-limit"),
    (lambda r: FakeReading(2.5, r.current_a, False), "voltage-limit"),
    (lambda r: FakeReading(-1.2, r.current_a, False), "reverse-bias"),
    (lambda r: FakeReading(1.9, 0.099, False), "power-limit"),
    (lambda r: FakeReading(float("nan"), r.current_a, False), "bad-reading"),
])
@pytest.mark.parametrize("acquisition", ["point", "list"])
def test_limit_breach_on_a_point_aborts(fake, make_engine, override, cause, acquisition):
    count = {"n": 0}

    def late_override(reading):
        count["n"] += 1
        return override(reading) if count["n"] >= 8 else reading

    fake.smu.reading_override = late_override
    engine, critical, other = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(points=30, acquisition=acquisition)))
    assert_safe_end(fake, finished, critical.events, cause=cause)
    assert len(of_type(critical.events, ev.Point)) == 8        # 7 good + the offending one
    assert other.events == critical.events


def test_readback_mismatch_keeps_the_output_off(fake, make_engine):
    fake.smu.compliance_scale = 1.5
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="readback")
    assert fake.smu.output_history == []                        # never switched on


def test_ovp_readback_mismatch_keeps_the_output_off(fake, make_engine):
    fake.smu.ovp_scale = 2.0
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="readback")
    assert fake.smu.output_history == []


def test_interlock_open_before_the_sweep(fake, make_engine):
    fake.smu.interlock = True
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="interlock-open")
    assert fake.smu.output_history == []


@pytest.mark.parametrize("acquisition", ["point", "list"])
def test_interlock_opening_mid_sweep_is_named(fake, make_engine, acquisition):
    name = "set_level_and_measure" if acquisition == "point" else "fetch_list"
    fake.smu.inject(name, at=3, action=lambda smu: smu.open_interlock())
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(points=40, acquisition=acquisition)))
    assert_safe_end(fake, finished, critical.events, cause="interlock-open")


def test_ovp_trip_mid_sweep_is_named(fake, make_engine):
    fake.smu.inject("set_level_and_measure", at=5, action=lambda smu: smu._force_off())
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(points=40)))
    assert_safe_end(fake, finished, critical.events, cause="protection-tripped")


def test_critical_subscriber_failure_at_every_event_ends_safe():
    plan = make_plan(pl.SetLight(shutter_open=True), light_sweep(points=5, direction="both"),
                     pl.HoldStep(name="isc", light=True, mode="isc", duration_s=0.0, interval_s=1.0))
    fake = make_fake_bench()
    engine = Engine(bench_for(fake), lambda r: {"ok": True}, **FAST)
    rec = Recorder()
    engine.subscribe(rec, critical=True)
    engine.run(plan)
    engine.close()
    n_events = len(rec.events)
    for k in range(n_events - 1):        # the last one is RunFinished itself
        fake = make_fake_bench()
        engine = Engine(bench_for(fake), lambda r: {"ok": True}, **FAST)
        seen = {"n": 0}

        def flaky(event, k=k):
            seen["n"] += 1
            if seen["n"] == k + 1:
                raise OSError("disk full")

        viewer = Recorder()
        engine.subscribe(flaky, critical=True)
        engine.subscribe(viewer)
        finished = engine.run(plan)
        assert engine.flush(5)
        engine.close()
        assert not fake.smu.output_on and finished.output_verified_off
        assert finished.status == ev.RUN_FAILED and "disk full" in finished.reason, (k, finished)
        assert isinstance(viewer.events[-1], ev.RunFinished)
        assert viewer.events[-2].cause == "critical-subscriber"
        # the viewer never saw a point the logbook did not take
        failed_event_index = k
        points_seen = {p.run_seq for p in of_type(viewer.events, ev.Point)}
        assert len(points_seen) == len(of_type(viewer.events, ev.Point))


def test_critical_subscriber_failure_withholds_that_point(fake):
    engine = Engine(bench_for(fake), **FAST)
    stored = []

    def logbook(event):
        if isinstance(event, ev.Point) and event.run_seq == 4:
            raise OSError("disk full")
        stored.append(event)

    viewer = Recorder()
    engine.subscribe(logbook, critical=True)
    engine.subscribe(viewer)
    finished = engine.run(make_plan(dark_sweep(points=20)))
    assert engine.flush(5)
    engine.close()
    assert finished.status == ev.RUN_FAILED and finished.output_verified_off
    seen_points = [p.run_seq for p in of_type(viewer.events, ev.Point)]
    assert seen_points == [1, 2, 3]
    assert isinstance(viewer.events[-1], ev.RunFinished)


def test_keyboard_interrupt_in_a_critical_subscriber(fake):
    engine = Engine(bench_for(fake), **FAST)

    def interrupted(event):
        if isinstance(event, ev.Point) and event.run_seq == 2:
            raise KeyboardInterrupt

    engine.subscribe(interrupted, critical=True)
    finished = engine.run(make_plan(dark_sweep()))
    engine.close()
    assert finished.status == ev.RUN_FAILED and not fake.smu.output_on


def test_make_safe_failing_falls_back_to_explicit_off(fake, make_engine):
    fake.smu.make_safe_works = False
    fake.smu.inject("set_level_and_measure", at=3, exc=FakeInstrumentError("boom"))
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="instrument-error")


def test_unverifiable_output_is_reported(fake, make_engine):
    """The link never comes back: the run still ends, saying the output is NOT verified off."""
    fake.smu.make_safe_works = False
    fake.smu.inject("set_level_and_measure", at=3, exc=FakeLinkLost("socket closed"))
    fake.smu.reconnect = lambda: (_ for _ in ()).throw(FakeLinkLost("no route"))
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert finished.status == ev.RUN_ABORTED and finished.output_verified_off is False
    assert of_type(critical.events, ev.InterlockTripped)[0].cause == "link-lost"
    check_stream(critical.events)


def test_make_safe_raising_keyboard_interrupt_is_retried(fake, make_engine):
    fake.smu.inject("make_safe", at=1, exc=KeyboardInterrupt())
    fake.smu.inject("set_level_and_measure", at=2, exc=FakeInstrumentError("boom"))
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="instrument-error")


def test_link_lost_reconnects_and_verifies(fake, make_engine):
    fake.smu.inject("set_level_and_measure", at=3, exc=FakeLinkLost("timeout"))
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="link-lost")
    assert not fake.smu.link_down


def test_watchdog_catches_a_silent_instrument(fake, make_engine):
    """A call that hangs past the watchdog: the output is switched off from the watchdog
    thread while the call is still stuck, and the run ends naming the watchdog."""
    off_while_stuck = []

    def hang_check(smu):
        deadline = time.monotonic() + 3.0
        while smu.output_on and time.monotonic() < deadline:
            time.sleep(0.005)
        off_while_stuck.append(not smu.output_on)

    fake.smu.inject("set_level_and_measure", at=4, action=hang_check,
                    exc=FakeLinkLost("timeout"))
    engine, critical, _ = make_engine(fake)
    plan = make_plan(dark_sweep(points=20), checks=pl.Checks(watchdog_s=0.1))
    finished = run_to_end(engine, plan)
    assert off_while_stuck == [True]
    assert_safe_end(fake, finished, critical.events, cause="watchdog")


def test_watchdog_closes_the_run_if_the_worker_never_returns(fake, make_engine):
    release = threading.Event()
    fake.smu.inject("set_level_and_measure", at=4, action=lambda smu: release.wait(10))
    engine, critical, other = make_engine(fake)
    plan = make_plan(dark_sweep(points=20), checks=pl.Checks(watchdog_s=0.1))
    engine.start(plan)
    finished = engine.wait(5)
    try:
        assert finished is not None and finished.status == ev.RUN_ABORTED
        assert finished.reason.startswith("watchdog") and finished.output_verified_off
        assert not fake.smu.output_on
        with pytest.raises(RuntimeError, match="still inside an instrument call"):
            engine.start(plan)
    finally:
        release.set()
    time.sleep(0.2)
    assert engine.flush(5)
    check_stream(critical.events)            # nothing published after RunFinished
    assert other.events == critical.events
    assert not fake.smu.output_on


def test_watchdog_covers_a_stalled_critical_subscriber(fake):
    """A logbook that stops answering with the output on: the watchdog switches the output
    off while it is still stuck; when it returns the run ends naming the watchdog."""
    off_while_stuck = []

    def stalling_logbook(event):
        if isinstance(event, ev.Point) and event.run_seq == 3:
            deadline = time.monotonic() + 3.0
            while fake.smu.output_on and time.monotonic() < deadline:
                time.sleep(0.005)
            off_while_stuck.append(not fake.smu.output_on)

    engine = Engine(bench_for(fake), **FAST)
    rec = Recorder()
    engine.subscribe(stalling_logbook, critical=True)
    engine.subscribe(rec, critical=True)
    finished = engine.run(make_plan(dark_sweep(points=20), checks=pl.Checks(watchdog_s=0.1)))
    engine.close()
    assert off_while_stuck == [True]
    assert_safe_end(fake, finished, rec.events, cause="watchdog")
    assert "critical subscriber" in finished.reason


def test_list_sweep_that_stops_progressing_trips(fake, make_engine):
    fake.smu.list_rate = 0
    engine, critical, _ = make_engine(fake)
    plan = make_plan(dark_sweep(acquisition="list"), checks=pl.Checks(watchdog_s=0.1))
    finished = run_to_end(engine, plan)
    assert_safe_end(fake, finished, critical.events, cause="watchdog")


def test_emergency_stop_from_another_thread(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    results = []

    def panic(event):
        if isinstance(event, ev.Point) and event.run_seq == 5:
            t = threading.Thread(target=lambda: results.append(engine.emergency_stop()))
            t.start()
            t.join()          # the emergency path does not wait for this (worker) thread
            assert not fake.smu.output_on

    engine.subscribe(panic, critical=True)
    finished = run_to_end(engine, make_plan(dark_sweep(points=100)))
    assert results == [True]
    assert_safe_end(fake, finished, critical.events, cause="emergency-stop")
    assert len(of_type(critical.events, ev.Point)) == 5


def test_emergency_stop_cannot_be_undone_by_arming(fake, make_engine):
    """An emergency stop arriving just before the output goes on wins."""
    engine, critical, _ = make_engine(fake)
    fake.smu.inject("set_level", at=1, action=lambda smu: engine.emergency_stop())
    finished = run_to_end(engine, make_plan(dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="emergency-stop")
    assert fake.smu.output_history == []


def test_emergency_stop_without_a_run(fake):
    engine = Engine(bench_for(fake), **FAST)
    fake.smu.output_on = True
    fake.smu.level = 0.5
    assert engine.emergency_stop() is True
    assert not fake.smu.output_on and fake.smu.level == 0.0
    engine.close()


def test_keyboard_interrupt_during_run_wait(fake, make_engine, monkeypatch):
    engine, critical, _ = make_engine(fake)
    calls = {"n": 0}
    real_wait = engine.wait

    def wait(timeout=None):
        calls["n"] += 1
        if calls["n"] == 1:
            raise KeyboardInterrupt
        return real_wait(timeout)

    monkeypatch.setattr(engine, "wait", wait)
    finished = engine.run(make_plan(dark_sweep(points=200, settle_s=0.002)))
    assert_safe_end(fake, finished, critical.events, cause="keyboard-interrupt")


@pytest.mark.parametrize("acquisition", ["point", "list"])
def test_light_failure_during_a_sweep(fake, make_engine, acquisition):
    fake.smu.inject("list_points_done" if acquisition == "list" else "set_level_and_measure", at=2,
                    action=lambda smu: setattr(smu.light, "failed", True))
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True),
                                            light_sweep(points=20, acquisition=acquisition)))
    assert_safe_end(fake, finished, critical.events, cause="light-failure")
    assert not fake.light.open                 # closed after the fault


def test_dim_lamp_is_a_light_failure(fake, make_engine):
    """Stable, but at 30 % of the irradiance asked for: caught before the output goes on."""
    fake.light.drift = lambda k: 0.3
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True, irradiance_w_m2=1000.0),
                                            light_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="light-failure")
    assert fake.smu.output_history == []


def test_overheated_stage_is_named_behind_its_symptom(fake, make_engine):
    """A point trips first (compliance at the limit), but the stage is out of its window:
    the event names the temperature and quotes the symptom."""
    def overheat(smu):
        fake.thermometer.value_c = fake.thermometer.target_c = 70.0

    fake.smu.inject("set_level_and_measure", at=3, action=overheat)
    fake.smu.reading_override = lambda r: FakeReading(r.voltage_v, LIMITS.current_a, True) \
        if fake.thermometer.value_c > 50 else r
    engine, critical, _ = make_engine(fake)
    plan = make_plan(dark_sweep(compliance=LIMITS.current_a),
                     checks=pl.Checks(temperature_window_c=(20.0, 30.0), watchdog_s=2.0))
    finished = run_to_end(engine, plan)
    assert_safe_end(fake, finished, critical.events, cause="temperature-window")
    assert "first symptom: compliance" in finished.reason


def test_light_drift_during_a_sweep(fake, make_engine):
    fake.light.drift = lambda k: 1.0 if k < 8 else 0.85
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True),
                                            light_sweep(points=20)))
    assert_safe_end(fake, finished, critical.events, cause="light-unstable")
    (trip,) = of_type(critical.events, ev.InterlockTripped)
    # IEC 60904-9 instability of readings 1.0 and 0.85: (1 - 0.85) / (1 + 0.85)
    assert trip.value == pytest.approx(0.15 / 1.85)


def test_light_that_never_settles(fake, make_engine):
    fake.light.drift = lambda k: 1.0 + 0.1 * (k % 2)
    engine, critical, _ = make_engine(fake)
    plan = make_plan(pl.SetLight(shutter_open=True, settle_timeout_s=0.05), light_sweep())
    finished = run_to_end(engine, plan)
    assert_safe_end(fake, finished, critical.events, cause="light-unstable")
    assert fake.smu.output_history == []


def test_overtemperature_during_a_sweep(fake, make_engine):
    def runaway(smu):
        fake.thermometer.value_c = 60.0
        fake.thermometer.target_c = 60.0

    fake.smu.inject("set_level_and_measure", at=4, action=runaway)
    engine, critical, _ = make_engine(fake)
    plan = make_plan(dark_sweep(points=30),
                     checks=pl.Checks(temperature_window_c=(20.0, 30.0), watchdog_s=2.0))
    finished = run_to_end(engine, plan)
    assert_safe_end(fake, finished, critical.events, cause="temperature-window")
    (trip,) = of_type(critical.events, ev.InterlockTripped)
    assert trip.value == 60.0 and trip.limit == 30.0


def test_temperature_outside_the_window_keeps_the_output_off(fake, make_engine):
    fake.thermometer.value_c = fake.thermometer.target_c = 40.0
    engine, critical, _ = make_engine(fake)
    plan = make_plan(dark_sweep(), checks=pl.Checks(temperature_window_c=(20.0, 30.0)))
    finished = run_to_end(engine, plan)
    assert_safe_end(fake, finished, critical.events, cause="temperature-window")
    assert fake.smu.output_history == []


def test_temperature_never_reached(fake, make_engine):
    fake.thermometer.approach = 0.0
    engine, critical, _ = make_engine(fake)
    plan = make_plan(pl.WaitTemperature(target_c=30.0, timeout_s=0.05), dark_sweep())
    finished = run_to_end(engine, plan)
    assert_safe_end(fake, finished, critical.events, cause="temperature-timeout")


def test_switch_reporting_the_wrong_pixel(fake, make_engine):
    fake.switch.misroute = True
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(pl.SelectPixel(2), dark_sweep()))
    assert_safe_end(fake, finished, critical.events, cause="switch")
    assert fake.smu.output_history == []


def test_output_that_will_not_switch_off_is_caught(fake, make_engine):
    fake.smu.inject("output", at=2, action=lambda smu: None,
                    exc=None)
    # make the second output() call (the off at the end of the step) a no-op
    real_output = fake.smu.output

    def sticky(on, state={"n": 0}):
        state["n"] += 1
        if state["n"] == 2:
            fake.smu._enter("output")
            return                   # relay welded: stays on
        real_output(on)

    fake.smu.output = sticky
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(points=5)))
    assert_safe_end(fake, finished, critical.events, cause="output-stuck-on")


def test_analysis_of_completed_sweeps_still_published_after_a_trip(fake, make_engine):
    fake.smu.inject("set_level_and_measure", at=12, exc=FakeInstrumentError("boom"))
    engine, critical, _ = make_engine(fake, lambda r: {"n": len(r.points)})
    finished = run_to_end(engine, make_plan(dark_sweep(points=8, direction="both")))
    assert_safe_end(fake, finished, critical.events, cause="instrument-error")
    analyses = of_type(critical.events, ev.Analysis)
    assert [a.result["n"] for a in analyses] == [8]          # the completed forward sweep only
