"""Plan checks (refusals name the limit), level generation, the per-point guard, the tracker."""
from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pvlib.pvsystem import i_from_v, singlediode

from tracer import plan as pl
from tracer.engine import PlanRefused, check_plan, sweep_levels, sweep_segments
from tracer.engine.guard import PointGuard, iec_instability, matches
from tracer.engine.mppt import PerturbObserve

from .conftest import HARD, LIMITS, dark_sweep, light_sweep, make_plan
from .fakes import CellParams


def check(plan, *, light=True, thermometer=True, channels=4, hard=HARD):
    check_plan(plan, hard_limits=hard, has_light=light, has_thermometer=thermometer,
               switch_channels=channels)


def refused(plan, **kw) -> str:
    with pytest.raises(PlanRefused) as info:
        check(plan, **kw)
    return str(info.value)


# --------------------------------------------------------------------------- refusals

@pytest.mark.parametrize("field", ["voltage_v", "current_a", "power_w", "reverse_voltage_v"])
def test_plan_limit_above_the_hard_limit_is_refused(field):
    limits = pl.Limits(**{**LIMITS.__dict__, field: getattr(HARD, field) * 1.01})
    message = refused(make_plan(dark_sweep(), limits=limits))
    assert f"limits.{field}" in message and f"hard_limits.{field}" in message


@pytest.mark.parametrize("bad", [0.0, -1.0, math.nan, math.inf])
def test_nonsense_limits_are_refused(bad):
    limits = pl.Limits(**{**LIMITS.__dict__, "current_a": bad})
    assert "limits.current_a" in refused(make_plan(dark_sweep(), limits=limits))


@pytest.mark.parametrize("step,limit", [
    (dark_sweep(stop=2.1), "limits.voltage_v"),
    (dark_sweep(start=-2.5), "limits.voltage_v"),
    (dark_sweep(start=-1.01), "limits.reverse_voltage_v"),
    (dark_sweep(compliance=0.11), "limits.current_a"),
    (dark_sweep(source_mode="current", start=0.0, stop=0.2), "limits.current_a"),
    (dark_sweep(source_mode="current", start=0.0, stop=0.05, compliance=2.5), "limits.voltage_v"),
    (dark_sweep(source_mode="current", start=-0.01, stop=0.05, compliance=1.5),
     "limits.reverse_voltage_v"),
    (pl.HoldStep(name="h", light=True, mode="bias", level=-1.5, duration_s=1, interval_s=1),
     "limits.reverse_voltage_v"),
    (pl.HoldStep(name="h", light=True, mode="voc", duration_s=1, interval_s=1, compliance=3.0),
     "limits.voltage_v"),
    (pl.HoldStep(name="h", light=True, mode="isc", duration_s=1, interval_s=1, compliance=0.2),
     "limits.current_a"),
    (pl.MpptStep(name="m", duration_s=1, interval_s=0.1, start_v=2.5), "limits.voltage_v"),
    (pl.MpptStep(name="m", duration_s=1, interval_s=0.1, compliance=0.5), "limits.current_a"),
])
def test_step_beyond_the_plan_limits_is_refused(step, limit):
    assert limit in refused(make_plan(step))


def test_levels_at_the_limits_are_accepted():
    check(make_plan(dark_sweep(start=-LIMITS.reverse_voltage_v, stop=LIMITS.voltage_v,
                               compliance=LIMITS.current_a)))


@pytest.mark.parametrize("step,words", [
    (pl.SelectPixel(5), "outside the switch's channels 1..4"),
    (pl.SelectPixel(0), "outside the switch's channels"),
    (dark_sweep(spacing="log", start=-0.1, stop=0.5), "log spacing"),
    (dark_sweep(spacing="spiral"), "spacing"),
    (dark_sweep(direction="sideways"), "direction"),
    (dark_sweep(acquisition="burst"), "acquisition"),
    (dark_sweep(points=0), "points"),
    (dark_sweep(repeats=0), "repeats"),
    (dark_sweep(nplc=-1.0), "nplc"),
    (dark_sweep(settle_s=-1.0), "settle_s"),
    (dark_sweep(source_mode="power"), "source_mode"),
    (pl.HoldStep(name="h", light=True, mode="voc", duration_s=1, interval_s=0), "interval_s"),
    (pl.HoldStep(name="h", light=True, mode="float", duration_s=1, interval_s=1), "mode"),
    (pl.SetLight(shutter_open=True, irradiance_w_m2=-5.0), "irradiance_w_m2"),
    (pl.WaitTemperature(target_c=25.0, tolerance_c=0.0), "tolerance_c"),
    ("not a step", "unknown step type"),
])
def test_malformed_steps_are_refused(step, words):
    assert words in refused(make_plan(step))


def test_steps_need_their_instruments():
    message = refused(make_plan(pl.SelectPixel(1), pl.SetLight(shutter_open=True),
                                pl.WaitTemperature(target_c=25.0)),
                      light=False, thermometer=False, channels=None)
    assert "no channel switch" in message and "no light source" in message
    assert "no thermometer" in message
    assert "no thermometer" in refused(make_plan(dark_sweep(), checks=pl.Checks(
        temperature_window_c=(20.0, 30.0))), thermometer=False)


def test_temperature_target_outside_the_window_is_refused():
    plan = make_plan(pl.WaitTemperature(target_c=60.0),
                     checks=pl.Checks(temperature_window_c=(20.0, 30.0)))
    assert "checks.temperature_window_c" in refused(plan)


def test_every_problem_is_listed():
    with pytest.raises(PlanRefused) as info:
        check(make_plan(dark_sweep(stop=5.0), dark_sweep(compliance=1.0), pl.SelectPixel(9)))
    assert len(info.value.problems) == 3


# --------------------------------------------------------------------------- levels

def test_linear_levels_match_numpy():
    step = dark_sweep(start=-0.3, stop=0.9, points=61)
    assert sweep_levels(step) == pytest.approx(np.linspace(-0.3, 0.9, 61), abs=1e-15)


def test_log_levels_match_numpy():
    step = dark_sweep(start=1e-3, stop=1.0, points=31, spacing="log")
    levels = sweep_levels(step)
    assert levels == pytest.approx(np.geomspace(1e-3, 1.0, 31), rel=1e-12)
    assert levels[0] == 1e-3 and levels[-1] == 1.0
    negative = sweep_levels(dark_sweep(start=-1e-3, stop=-0.5, points=5, spacing="log"))
    assert negative == pytest.approx(np.geomspace(-1e-3, -0.5, 5), rel=1e-12)


@given(start=st.floats(-1.0, 0.2), span=st.floats(0.05, 1.5), n=st.integers(3, 200),
       where=st.floats(0.0, 1.0))
@settings(max_examples=60, deadline=None)
def test_dense_near_voc_levels_are_ordered_and_crowd_near_voc(start, span, n, where):
    stop = start + span
    voc = start + where * span
    levels = sweep_levels(dark_sweep(start=start, stop=stop, points=n, spacing="dense-near-voc",
                                     voc_estimate_v=voc))
    assert len(levels) == n and levels[0] == start and levels[-1] == stop
    gaps = np.diff(levels)
    assert np.all(gaps > 0)
    # the gap at Voc is smaller than the largest gap (density 1 + 4 at the centre)
    at_voc = gaps[min(int(np.searchsorted(levels, voc)), n - 2)]
    if n >= 20:
        assert at_voc < 0.5 * gaps.max()


def test_dense_near_voc_for_a_current_source_crowds_near_zero_amps():
    levels = sweep_levels(dark_sweep(source_mode="current", start=-0.04, stop=0.04, points=41,
                                     spacing="dense-near-voc"))
    gaps = np.diff(levels)
    assert gaps[19] < gaps[0] / 3


@pytest.mark.parametrize("direction,start,stop,expected", [
    ("forward", 0.8, -0.2, ["forward"]),
    ("reverse", -0.2, 0.8, ["reverse"]),
    ("both", -0.2, 0.8, ["forward", "reverse"]),
    ("both", 0.8, -0.2, ["reverse", "forward"]),
])
def test_segments(direction, start, stop, expected):
    segments = sweep_segments(dark_sweep(direction=direction, start=start, stop=stop, points=5))
    assert [d for d, _ in segments] == expected
    for d, levels in segments:
        assert levels == pytest.approx(np.linspace(-0.2, 0.8, 5)[::1 if d == "forward" else -1])


# --------------------------------------------------------------------------- guard

def test_guard_limits_and_order():
    g = PointGuard(LIMITS, source_mode="voltage", compliance=0.05)
    assert g.check(0.5, -0.03, False) is None
    assert g.check(0.5, 0.05, True) is None                      # clamped below the limit
    assert g.check(-1.1, 0.0, False).cause == "reverse-bias"
    assert g.check(2.1, 0.0, False).cause == "voltage-limit"
    assert g.check(0.1, 0.11, False).cause == "current-limit"
    assert g.check(1.9, 0.09, False).cause == "power-limit"
    assert g.check(math.nan, 0.0, False).cause == "bad-reading"
    assert g.check(0.0, math.inf, False).cause == "bad-reading"
    # within the rounding allowance of a limit: not a trip
    assert g.check(LIMITS.voltage_v * (1 + 5e-4), 0.0, False) is None
    at_limit = PointGuard(LIMITS, source_mode="voltage", compliance=LIMITS.current_a)
    trip = at_limit.check(0.9, 0.1, True)
    assert trip.cause == "compliance" and trip.limit == LIMITS.current_a
    current = PointGuard(LIMITS, source_mode="current", compliance=LIMITS.voltage_v)
    assert current.check(2.0, 0.01, True).cause == "compliance"
    assert PointGuard(LIMITS, source_mode="current", compliance=1.0).check(1.0, 0.01, True) is None


def test_readback_matching():
    assert matches(0.1, 0.1) and matches(0.1, 0.10005) and not matches(0.1, 0.1002)
    assert not matches(0.1, float("nan")) and not matches(0.1, "garbage")


def test_iec_60904_9_instability():
    # IEC 60904-9 temporal instability: (Gmax - Gmin) / (Gmax + Gmin)
    assert iec_instability([1000.0, 980.0, 1020.0]) == pytest.approx(40.0 / 2000.0)
    assert iec_instability([5.0]) == 0.0
    assert math.isinf(iec_instability([0.0, 0.0]))


# --------------------------------------------------------------------------- tracker

def test_tracker_converges_on_pvlibs_mpp():
    p = CellParams()
    ref = singlediode(p.photocurrent_stc_a, p.saturation_current_a, p.resistance_series_ohm,
                      p.resistance_shunt_ohm, p.n_ns_vth_v)            # pvlib oracle

    def power(v):
        return v * float(i_from_v(v, p.photocurrent_stc_a, p.saturation_current_a,
                                  p.resistance_series_ohm, p.resistance_shunt_ohm, p.n_ns_vth_v))

    for start in (0.05, 0.3, 0.62):
        tracker = PerturbObserve(step_v=0.01, v_min=0.0, v_max=1.5)
        v = start
        history = []
        for _ in range(150):
            history.append(v)
            v = tracker.next_voltage(v, power(v))
        late = history[-40:]
        assert np.mean(late) == pytest.approx(float(ref["v_mp"]), abs=0.01)
        assert max(late) - min(late) <= 0.02            # a small dither, not a cycle
        assert np.mean([power(x) for x in late]) == pytest.approx(float(ref["p_mp"]), rel=1e-3)


def test_tracker_turns_round_at_its_bounds():
    tracker = PerturbObserve(step_v=0.1, v_min=0.0, v_max=1.0)
    v = 1.0
    for _ in range(5):
        v = tracker.next_voltage(v, v)   # power rising with voltage: pinned at the top
        assert 0.0 <= v <= 1.0
