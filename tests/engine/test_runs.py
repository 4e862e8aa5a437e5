"""Normal runs against the fakes: event order, numbering, steps, conditions, analysis."""
from __future__ import annotations

import threading
import time

import numpy as np
import pytest
from pvlib.pvsystem import singlediode

from tracer import events as ev
from tracer import plan as pl
from tracer.engine import SweepRecord
from tracer.ports import ChannelSwitch, LightSource, SourceMeter, Thermometer

from .conftest import LIMITS, dark_sweep, light_sweep, make_plan, run_to_end
from .fakes import CellParams
from .streams import check_stream, of_type


def test_fakes_satisfy_the_ports(fake):
    assert isinstance(fake.smu, SourceMeter)
    assert isinstance(fake.light, LightSource)
    assert isinstance(fake.thermometer, Thermometer)
    assert isinstance(fake.switch, ChannelSwitch)


def test_point_sweep_streams_in_order_and_ends_safe(fake, make_engine):
    engine, critical, other = make_engine(fake)
    plan = make_plan(pl.SetLight(shutter_open=True), light_sweep(points=40))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED and finished.output_verified_off
    assert check_stream(critical.events) == finished
    assert other.events == critical.events           # the same stream, same order
    points = of_type(critical.events, ev.Point)
    assert len(points) == 40
    assert [p.setpoint for p in points] == pytest.approx(np.linspace(-0.1, 0.75, 40))  # numpy oracle
    assert not fake.smu.output_on and fake.smu.level == 0.0
    assert fake.smu.output_history == [True, False]


def test_sweep_currents_are_the_cells(fake, make_engine):
    """The recorded current at each set voltage is pvlib's single-diode current (load
    convention: negated) - the engine records what it measured, unchanged."""
    engine, critical, _ = make_engine(fake)
    run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), light_sweep(points=12)))
    p = fake.smu.cell
    from pvlib.pvsystem import i_from_v
    for point in of_type(critical.events, ev.Point):
        expected = -i_from_v(point.setpoint, p.photocurrent_stc_a, p.saturation_current_a,
                             p.resistance_series_ohm, p.resistance_shunt_ohm, p.n_ns_vth_v)
        if expected > 0.05:    # beyond the 50 mA compliance: clamped and flagged, not a trip
            assert point.in_compliance and point.current_a == 0.05
        else:
            assert point.current_a == pytest.approx(expected, rel=1e-9, abs=1e-15)
            assert not point.in_compliance


@pytest.mark.parametrize("acquisition", ["point", "list"])
@pytest.mark.parametrize("direction,start,stop,expected", [
    ("forward", -0.1, 0.7, ["forward"]),
    ("reverse", -0.1, 0.7, ["reverse"]),
    ("both", -0.1, 0.7, ["forward", "reverse"]),
    ("both", 0.7, -0.1, ["reverse", "forward"]),
])
def test_directions_and_pairs(fake, make_engine, acquisition, direction, start, stop, expected):
    engine, critical, _ = make_engine(fake)
    step = light_sweep(direction=direction, start=start, stop=stop, points=15,
                       acquisition=acquisition, repeats=2)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), step))
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    check_stream(critical.events)
    starts = of_type(critical.events, ev.SweepStarted)
    assert [s.direction for s in starts] == expected * 2
    assert all(s.acquisition == acquisition and s.points_planned == 15 for s in starts)
    by_sweep: dict[str, list[float]] = {}
    for p in of_type(critical.events, ev.Point):
        by_sweep.setdefault(p.sweep_uid, []).append(p.setpoint)
    for s in starts:
        levels = by_sweep[s.sweep_uid]
        assert len(levels) == 15
        assert levels == sorted(levels, reverse=(s.direction == "reverse"))
    if len(expected) == 2:
        for a, b in (starts[0:2], starts[2:4]):
            assert a.pair_sweep_uid == b.sweep_uid and b.pair_sweep_uid == a.sweep_uid
    else:
        assert all(s.pair_sweep_uid is None for s in starts)
    assert not fake.smu.output_on


def test_list_mode_streams_in_chunks_while_running(fake, make_engine):
    """Points arrive while the list is still running: the critical subscriber sees the
    first point before the instrument has finished the list."""
    fake.smu.list_rate = 5
    seen_running = []
    engine, _, _ = make_engine(fake)
    engine.subscribe(lambda e: seen_running.append(fake.smu.list_running)
                     if isinstance(e, ev.Point) else None, critical=True)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True),
                                            light_sweep(points=60, acquisition="list")))
    assert finished.status == ev.RUN_COMPLETED
    assert len(seen_running) == 60 and seen_running[0] is True
    assert fake.smu.calls.count("fetch_list") >= 60 // 5
    assert fake.smu.calls.count("set_level_and_measure") == 0


def test_critical_subscriber_sees_each_point_first(fake, make_engine):
    order: list[tuple[str, int]] = []
    lock = threading.Lock()

    def critical(event):
        if isinstance(event, ev.Point):
            with lock:
                order.append(("critical", event.run_seq))

    def viewer(event):
        if isinstance(event, ev.Point):
            with lock:
                assert ("critical", event.run_seq) in order
                order.append(("viewer", event.run_seq))

    engine, _, _ = make_engine(fake, critical=critical)
    engine.subscribe(viewer)
    run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), light_sweep(points=25)))
    assert [n for who, n in order if who == "viewer"] == list(range(1, 26))


def test_slow_subscriber_cannot_stall_the_sweep(fake, make_engine):
    release = threading.Event()
    got = []

    def slow(event):
        release.wait(10)
        got.append(event)

    engine, critical, _ = make_engine(fake)
    engine.subscribe(slow)
    engine.start(make_plan(pl.SetLight(shutter_open=True), light_sweep(points=30)))
    finished = engine.wait(10)
    assert finished is not None and finished.status == ev.RUN_COMPLETED  # done while blocked
    assert got == []
    release.set()
    assert engine.flush(10)
    assert got == critical.events


def test_batch_subscriber_gets_lists(fake, make_engine):
    batches = []
    engine, critical, _ = make_engine(fake)
    engine.subscribe(batches.append, batch=True)
    run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), light_sweep(points=30)))
    assert all(isinstance(b, list) for b in batches)
    assert [e for b in batches for e in b] == critical.events


def test_failing_non_critical_subscriber_is_not_fatal(fake, make_engine, caplog):
    def broken(event):
        raise RuntimeError("viewer bug")

    engine, critical, _ = make_engine(fake)
    engine.subscribe(broken)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), light_sweep()))
    assert finished.status == ev.RUN_COMPLETED
    assert engine.bus.subscriber_errors() == len(critical.events)
    assert "viewer bug" in caplog.text


def test_analysis_follows_each_completed_sweep(fake, make_engine):
    records: list[SweepRecord] = []

    def analyse(record: SweepRecord):
        records.append(record)
        v = np.array([p.setpoint for p in record.points])
        return {"n": len(record.points), "v_max": v.max(), "array": v[:2],
                "paired": record.pair is not None}

    engine, critical, _ = make_engine(fake, analyse)
    plan = make_plan(pl.SetLight(shutter_open=True), light_sweep(points=10, direction="both"),
                     pl.HoldStep(name="voc", light=True, mode="voc", duration_s=0.0, interval_s=1.0))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED
    check_stream(critical.events)
    analyses = of_type(critical.events, ev.Analysis)
    assert [a.result["paired"] for a in analyses] == [False, True]   # hold is not analysed
    assert all(a.result["n"] == 10 and a.result["v_max"] == pytest.approx(0.75) for a in analyses)
    assert records[1].pair.started.sweep_uid == records[0].started.sweep_uid
    assert records[0].plan is plan and records[0].step is plan.steps[1]
    assert len(records[0].irradiance_w_m2) >= 2


def test_analyser_exception_is_reported_not_fatal(fake, make_engine):
    def broken(record):
        raise ValueError("cannot fit")

    engine, critical, _ = make_engine(fake, broken)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), light_sweep()))
    assert finished.status == ev.RUN_COMPLETED
    (analysis,) = of_type(critical.events, ev.Analysis)
    assert analysis.result["ok"] is False and "cannot fit" in analysis.result["error"]


def test_slow_analysis_times_out_before_run_finished(fake, make_engine):
    release = threading.Event()

    def stuck(record):
        release.wait(10)
        return {"late": True}

    engine, critical, _ = make_engine(fake, stuck, analysis_timeout_s=0.2)
    try:
        finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True), light_sweep()))
    finally:
        release.set()
    check_stream(critical.events)
    (analysis,) = of_type(critical.events, ev.Analysis)
    assert "did not finish" in analysis.result["error"]
    assert finished.status == ev.RUN_COMPLETED


def test_analysis_does_not_hold_up_the_next_sweep(fake, make_engine):
    """The reverse sweep of a pair starts while the forward one is still being analysed."""
    release = threading.Event()
    second_started = threading.Event()

    def analyse(record):
        if record.pair is None:
            assert second_started.wait(10), "the next sweep waited for the analysis"
        return {}

    def watch(event):
        if isinstance(event, ev.SweepStarted) and event.direction == "reverse":
            second_started.set()

    engine, critical, _ = make_engine(fake, analyse)
    engine.subscribe(watch, critical=True)
    finished = run_to_end(engine, make_plan(pl.SetLight(shutter_open=True),
                                            light_sweep(direction="both", points=10)))
    release.set()
    assert finished.status == ev.RUN_COMPLETED
    assert [a.result for a in of_type(critical.events, ev.Analysis)] == [{}, {}]


def test_hold_steps(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    plan = make_plan(
        pl.SetLight(shutter_open=True),
        pl.HoldStep(name="voc", light=True, mode="voc", duration_s=0.02, interval_s=0.005,
                    compliance=1.5),
        pl.HoldStep(name="isc", light=True, mode="isc", duration_s=0.0, interval_s=0.01),
        pl.HoldStep(name="bias", light=False, mode="bias", level=0.3, duration_s=0.0,
                    interval_s=0.01))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    check_stream(critical.events)
    starts = of_type(critical.events, ev.SweepStarted)
    assert [(s.kind, s.source_mode, s.direction, s.points_planned) for s in starts] == [
        ("hold", "current", "none", 0), ("hold", "voltage", "none", 0), ("hold", "voltage", "none", 0)]
    points = of_type(critical.events, ev.Point)
    voc_points = [p for p in points if p.sweep_uid == starts[0].sweep_uid]
    assert 4 <= len(voc_points) <= 5
    # pvlib oracle: Voc of the fake cell at 1000 W/m2
    p = fake.smu.cell
    ref = singlediode(p.photocurrent_stc_a, p.saturation_current_a, p.resistance_series_ohm,
                      p.resistance_shunt_ohm, p.n_ns_vth_v)
    assert voc_points[0].voltage_v == pytest.approx(float(ref["v_oc"]), rel=1e-6)
    isc_point = next(x for x in points if x.sweep_uid == starts[1].sweep_uid)
    assert -isc_point.current_a == pytest.approx(float(ref["i_sc"]), rel=1e-6)
    bias_point = next(x for x in points if x.sweep_uid == starts[2].sweep_uid)
    assert bias_point.setpoint == 0.3 and not fake.light.open   # dark hold closed the shutter


def test_mppt_finds_pvlibs_maximum_power_point(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    plan = make_plan(pl.SetLight(shutter_open=True),
                     pl.MpptStep(name="mpp", duration_s=0.3, interval_s=0.002, step_v=0.01))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    check_stream(critical.events)
    starts = of_type(critical.events, ev.SweepStarted)
    assert [s.kind for s in starts] == ["sweep", "mpp"]      # the coarse search, then tracking
    assert starts[1].conditions["search_sweep_uid"] == starts[0].sweep_uid
    p = fake.smu.cell
    ref = singlediode(p.photocurrent_stc_a, p.saturation_current_a, p.resistance_series_ohm,
                      p.resistance_shunt_ohm, p.n_ns_vth_v)          # pvlib oracle
    tracked = [x for x in of_type(critical.events, ev.Point) if x.sweep_uid == starts[1].sweep_uid]
    assert len(tracked) > 50
    late = tracked[len(tracked) // 2:]
    power = np.array([-x.voltage_v * x.current_a for x in late])
    assert power.mean() == pytest.approx(float(ref["p_mp"]), rel=2e-3)
    assert np.mean([x.voltage_v for x in late]) == pytest.approx(float(ref["v_mp"]), abs=0.02)


def test_mppt_with_given_start_has_no_search(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    plan = make_plan(pl.SetLight(shutter_open=True),
                     pl.MpptStep(name="mpp", duration_s=0.05, interval_s=0.002, start_v=0.3))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED
    assert [s.kind for s in of_type(critical.events, ev.SweepStarted)] == ["mpp"]
    assert of_type(critical.events, ev.Point)[0].setpoint == 0.3


def test_pixels_conditions_and_temperature(fake, make_engine):
    fake.thermometer.value_c = 20.0
    engine, critical, _ = make_engine(fake)
    plan = make_plan(pl.WaitTemperature(target_c=25.0, tolerance_c=0.1),
                     pl.SetLight(shutter_open=True, irradiance_w_m2=800.0),
                     pl.SelectPixel(2), light_sweep(points=5),
                     pl.SelectPixel(3), light_sweep(points=5),
                     checks=pl.Checks(temperature_window_c=(24.0, 26.0), watchdog_s=2.0))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    starts = of_type(critical.events, ev.SweepStarted)
    assert [s.pixel for s in starts] == [2, 3]
    assert starts[0].conditions["irradiance_w_m2"] == pytest.approx(800.0)
    assert abs(starts[0].conditions["temperature_c"] - 25.0) <= 0.1
    fin = of_type(critical.events, ev.SweepFinished)[0]
    assert fin.conditions["light_instability_rel"] == 0.0
    assert of_type(critical.events, ev.Point)[0].irradiance_w_m2 == pytest.approx(800.0)
    started = critical.events[0]
    assert started.bench["instruments"]["smu"]["address"] == "FAKE::SMU"
    assert started.bench["note"] == "fake" and started.limits["voltage_v"] == LIMITS.voltage_v
    assert len(started.protocol_sha256) == 64 and started.protocol["steps"][0]["type"] == "WaitTemperature"


def test_dense_near_voc_probes_voc_when_not_given(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    plan = make_plan(pl.SetLight(shutter_open=True),
                     light_sweep(spacing="dense-near-voc", start=0.0, stop=0.8, points=41))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_COMPLETED, finished.reason
    (start,) = of_type(critical.events, ev.SweepStarted)
    p = fake.smu.cell
    voc = float(singlediode(p.photocurrent_stc_a, p.saturation_current_a, p.resistance_series_ohm,
                            p.resistance_shunt_ohm, p.n_ns_vth_v)["v_oc"])   # pvlib oracle
    assert start.conditions["voc_probe_v"] == pytest.approx(voc, rel=1e-6)
    levels = np.array([x.setpoint for x in of_type(critical.events, ev.Point)])
    gaps = np.diff(levels)
    near = gaps[np.abs(levels[:-1] - voc) < 0.03]
    assert near.max() < gaps.max() / 3


def test_stop_finishes_the_point_and_switches_off(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    stopped = threading.Event()

    def stop_at_ten(event):
        if isinstance(event, ev.Point) and event.run_seq == 10 and not stopped.is_set():
            stopped.set()
            threading.Thread(target=engine.stop).start()

    engine.subscribe(stop_at_ten, critical=True)
    plan = make_plan(pl.SetLight(shutter_open=True),
                     light_sweep(points=200, settle_s=0.002))
    finished = run_to_end(engine, plan)
    assert finished.status == ev.RUN_ABORTED and "stopped by the operator" in finished.reason
    assert finished.output_verified_off and not fake.smu.output_on and fake.smu.level == 0.0
    check_stream(critical.events)
    assert not of_type(critical.events, ev.InterlockTripped)
    assert of_type(critical.events, ev.SweepFinished)[0].status == ev.SWEEP_ABORTED
    assert len(of_type(critical.events, ev.Point)) < 200


def test_run_convenience_and_restart(fake, make_engine):
    engine, critical, _ = make_engine(fake)
    plan = make_plan(dark_sweep(points=5))
    assert engine.run(plan).status == ev.RUN_COMPLETED
    assert not engine.running
    assert engine.run(plan).status == ev.RUN_COMPLETED
    runs = {e.run_uid for e in critical.events}
    assert len(runs) == 2


def test_start_while_running_is_refused(fake, make_engine):
    engine, _, _ = make_engine(fake)
    engine.start(make_plan(pl.SetLight(shutter_open=True), light_sweep(points=100, settle_s=0.002)))
    with pytest.raises(RuntimeError, match="in progress"):
        engine.start(make_plan(dark_sweep()))
    engine.stop()
    assert engine.wait(10) is not None


def test_output_found_on_at_start_is_switched_off_first(fake, make_engine):
    fake.smu.output_on = True
    fake.smu.level = 0.4
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(points=3)))
    assert finished.status == ev.RUN_COMPLETED
    assert fake.smu.calls[:4] == ["output_is_on", "set_level", "output", "output_is_on"]


def test_no_switch_bench_records_no_pixel(make_engine):
    from .fakes import make_fake_bench
    fake = make_fake_bench(switch=False, thermometer=False, light=False)
    engine, critical, _ = make_engine(fake)
    finished = run_to_end(engine, make_plan(dark_sweep(points=4), light_sweep(points=4)))
    assert finished.status == ev.RUN_COMPLETED
    assert [s.pixel for s in of_type(critical.events, ev.SweepStarted)] == [None, None]
