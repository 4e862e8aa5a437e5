"""The window's run model, without Qt: growing buffers, the sign convention, the state it
derives from events, the fitted curve it draws (against pvlib and the double-diode
equation solved by bracketing) and the text of the results."""
from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.constants as sc
from scipy.optimize import brentq

from tracer import events as ev
from tracer.gui.results_format import fmt_pm, result_tables, tables_tsv
from tracer.gui.run_model import ColumnBuffer, InstrumentReading, RunModel, SweepTrace

ROOT = Path(__file__).resolve().parents[2]


def test_the_model_and_the_results_text_import_without_qt():
    script = ("import sys, json\n"
              "for name in ('PyQt6', 'pyqtgraph'):\n"
              "    sys.modules[name] = None\n"
              "import tracer.gui, tracer.gui.run_model, tracer.gui.results_format, "
              "tracer.gui.validation, tracer.gui.bench_info, tracer.gui.palette\n"
              "print(json.dumps(sorted(m for m in sys.modules if sys.modules[m] is not None)))\n")
    out = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True, text=True,
                         timeout=60)
    assert out.returncode == 0, out.stderr
    loaded = json.loads(out.stdout.strip().splitlines()[-1])
    assert not [m for m in loaded if m.startswith(("PyQt6", "pyqtgraph", "drivers", "pyvisa"))]


# ----------------------------------------------------------------------------- buffers
def test_column_buffer_doubles_its_capacity_and_hands_out_views():
    buf = ColumnBuffer(("a", "b"), capacity=4)
    for k in range(1000):
        buf.extend(a=k, b=2 * k)
    assert len(buf) == 1000
    assert buf.capacity == 1024                     # 4 doubled eight times
    assert buf.growths == 8                         # log2(1024 / 4): amortised O(1) appends
    a = buf.column("a")
    np.testing.assert_array_equal(a, np.arange(1000))
    np.testing.assert_array_equal(buf.column("b"), 2 * np.arange(1000))
    assert np.shares_memory(a, buf._data)          # a view, not a copy
    assert a.base is buf._data


def test_column_buffer_extends_in_blocks_and_refuses_ragged_columns():
    buf = ColumnBuffer(("a", "b"), capacity=2)
    buf.extend(a=np.arange(5.0), b=np.ones(5))
    buf.extend(a=np.arange(3.0))                    # b not given: NaN
    assert len(buf) == 8 and buf.capacity == 8
    assert np.isnan(buf.column("b")[5:]).all()
    with pytest.raises(ValueError):
        buf.extend(a=np.arange(3.0), b=np.arange(2.0))
    with pytest.raises(KeyError):
        buf.extend(c=1.0)


# ----------------------------------------------------------------------------- events
def _run(area_cm2=0.5, run_uid="r1"):
    return ev.RunStarted(run_uid=run_uid, time=1000.0, protocol_name="p", protocol={},
                         protocol_sha256="", sample={"sample_id": "S", "area_cm2": area_cm2,
                                                     "cells_in_series": 1},
                         operator="t", bench={"name": "b"},
                         limits={"voltage_v": 1.0, "current_a": 0.1, "power_w": 0.1,
                                 "reverse_voltage_v": 0.5}, software_version="0")


def _sweep(uid="s1", light=True, direction="forward", index=0, kind="sweep", run_uid="r1"):
    return ev.SweepStarted(run_uid=run_uid, sweep_uid=uid, sweep_index=index, step_index=1,
                           step_name="light", kind=kind, light=light, direction=direction,
                           pixel=1, source_mode="voltage", acquisition="point", points_planned=3,
                           four_wire=True, nplc=1.0, settle_s=0.0, compliance=0.1, time=1000.5)


def _point(seq, v, i_load, uid="s1", run_uid="r1", t=None):
    return ev.Point(run_uid=run_uid, sweep_uid=uid, seq=seq, run_seq=seq,
                    time=1001.0 + seq if t is None else t, setpoint=v, voltage_v=v,
                    current_a=i_load, in_compliance=False)


def test_points_become_generator_current_density_in_one_batch():
    m = RunModel()
    m.apply_many([_run(area_cm2=0.5), _sweep(),
                  _point(1, 0.0, -0.02), _point(2, 0.3, -0.018), _point(3, 0.6, 0.001)])
    (trace,) = m.sweeps.values()
    np.testing.assert_array_equal(trace.column("voltage_v"), [0.0, 0.3, 0.6])
    # generator convention = minus the load-convention reading (DESIGN "Sign")
    np.testing.assert_allclose(trace.column("current_a"), [0.02, 0.018, -0.001])
    # 0.02 A over 0.5 cm2 = 40 mA/cm2 (unit arithmetic)
    np.testing.assert_allclose(trace.column("y"), [40.0, 36.0, -2.0])
    np.testing.assert_allclose(trace.column("p"), [0.0, 0.3 * 36.0, -0.6 * 2.0])
    assert math.isnan(trace.column("abs_y")[0]) is False and trace.column("abs_y")[2] == 2.0
    assert m.density and m.current_unit == "mA/cm²"
    changes = m.take_changes()
    assert changes.new_run and changes.added == [trace] and changes.points == 3
    assert changes.oldest_point_time == 1002.0
    assert not m.dirty
    assert m.output.on is True                     # points mean the output is on


def test_without_an_area_the_display_is_current_in_ma():
    m = RunModel()
    m.apply_many([_run(area_cm2=None), _sweep(), _point(1, 0.0, -0.02)])
    assert not m.density and m.current_unit == "mA"
    np.testing.assert_allclose(next(iter(m.sweeps.values())).column("y"), [20.0])


def test_events_of_another_run_are_ignored_and_a_new_run_resets():
    m = RunModel()
    m.apply_many([_run(), _sweep(), _point(1, 0.0, -0.02),
                  _point(2, 0.1, -0.02, run_uid="other")])
    assert m.points_total == 1
    m.take_changes()
    m.apply_many([_run(run_uid="r2"), _sweep(uid="s2", run_uid="r2")])
    assert list(m.sweeps) == ["s2"] and m.points_total == 0
    assert m.take_changes().new_run


def test_output_interlock_and_alarm_state_follow_the_events():
    m = RunModel()
    m.apply_reading(InstrumentReading(time=1.0, output_on=False, interlock_open=False))
    assert m.output.on is False and m.interlock_open is False and m.link_ok
    m.apply_many([_run(), _sweep(), _point(1, 0.0, -0.02)])
    m.apply_reading(InstrumentReading(time=2.0, output_on=False))     # stale poll: ignored
    assert m.output.on is True
    m.apply(ev.InterlockTripped(run_uid="r1", sweep_uid="s1", cause="interlock-open",
                                message="the safety interlock is open", time=3.0))
    assert m.alarm.cause == "interlock-open" and m.interlock_open is True
    m.apply(ev.RunFinished(run_uid="r1", status=ev.RUN_ABORTED, reason="interlock-open: ...",
                           time=4.0, output_verified_off=True, points=1))
    assert m.output.on is False and not m.output.alarm
    assert m.alarm.cause == "interlock-open" and not m.running


def test_an_output_not_verified_off_is_a_severe_alarm():
    m = RunModel()
    m.apply_many([_run(), _sweep(), _point(1, 0.0, -0.02),
                  ev.RunFinished(run_uid="r1", status=ev.RUN_FAILED, reason="link lost",
                                 time=4.0, output_verified_off=False, points=1)])
    assert m.output.on is None and m.output.alarm
    assert m.alarm.severe and "NOT be verified off" in m.alarm.message
    m.clear_alarm()                                 # a severe alarm cannot be dismissed
    assert m.alarm is not None


def test_a_lost_instrument_shows_as_no_answer():
    m = RunModel()
    m.apply_reading(InstrumentReading(time=1.0, error="TimeoutError: no reply"))
    assert m.link_ok is False and m.output.on is None and "no reply" in m.output.source


# ----------------------------------------------------------------------------- the fit curve
def _trace_with(analysis, v):
    t = SweepTrace(started=_sweep(), order=0)
    t.buffer.extend(voltage_v=v)
    t.analysis = analysis
    return t


def test_single_diode_curve_matches_pvlib():
    from pvlib.pvsystem import i_from_v

    fit = {"model": "single", "photocurrent_a": 0.038, "saturation_current_a": 2.3e-12,
           "ideality": 1.01, "series_resistance_ohm": 0.59, "shunt_resistance_ohm": 1200.0}
    analysis = {"fits": {"single": fit}, "conditions": {"temperature_c": 26.2,
                                                        "cells_in_series": 1}}
    trace = _trace_with(analysis, np.linspace(-0.1, 0.65, 30))
    v, y = trace.model_curve(current_scale=1e3 / 0.5, samples=100)
    vt = sc.k * (26.2 + 273.15) / sc.e          # kT/q, CODATA via scipy.constants
    expected = i_from_v(v, 0.038, 2.3e-12, 0.59, 1200.0, 1.01 * 1 * vt)   # pvlib oracle
    np.testing.assert_allclose(y, expected * 1e3 / 0.5, rtol=1e-9, atol=1e-12)
    assert v[0] == pytest.approx(-0.1) and v[-1] == pytest.approx(0.65)


def test_double_diode_curve_solves_the_two_diode_equation():
    fit = {"model": "double", "photocurrent_a": 0.038, "saturation_current_1_a": 1e-12,
           "saturation_current_2_a": 1e-8, "ideality_1": 1.0, "ideality_2": 2.0,
           "series_resistance_ohm": 0.5, "shunt_resistance_ohm": None}     # None = infinite
    analysis = {"fits": {"double": fit}, "conditions": {"temperature_c": 25.0,
                                                        "cells_in_series": 1}}
    trace = _trace_with(analysis, np.linspace(0.0, 0.62, 30))
    v, y = trace.model_curve(current_scale=1e3, samples=25)
    vt = sc.k * 298.15 / sc.e

    def residual(i, volts):          # the double-diode equation (DESIGN "Physics"), Rsh -> inf
        vd = volts + i * 0.5
        return 0.038 - 1e-12 * np.expm1(vd / vt) - 1e-8 * np.expm1(vd / (2 * vt)) - i

    expected = [brentq(residual, -1.0, 0.05, args=(vk,), xtol=1e-15) for vk in v]
    np.testing.assert_allclose(y, np.array(expected) * 1e3, rtol=1e-8, atol=1e-9)


def test_dark_curve_is_drawn_as_magnitude_and_no_fit_means_no_curve():
    fit = {"model": "single", "photocurrent_a": 0.0, "saturation_current_a": 1e-11,
           "ideality": 1.1, "series_resistance_ohm": 0.5, "shunt_resistance_ohm": 1500.0}
    t = SweepTrace(started=_sweep(light=False), order=0)
    t.buffer.extend(voltage_v=np.linspace(-0.3, 0.7, 20))
    t.analysis = {"fits": {"single": fit}, "conditions": {"temperature_c": 25.0}}
    v, y = t.model_curve(1e3)
    assert np.nanmin(y) >= 0
    t2 = _trace_with({"fits": {}, "fit_errors": {"single": "failed"}}, np.linspace(0, 1, 5))
    assert t2.model_curve(1e3) is None


# ----------------------------------------------------------------------------- results text
def test_uncertainties_are_quoted_with_two_significant_digits():
    # JCGM 100:2008 (GUM) 7.2.6: u to at most two significant digits, the value rounded
    # to the same decimal place
    assert fmt_pm(0.0380646, 1.46e-5, 1e3) == "38.065 ± 0.015"
    assert fmt_pm(1285.34, 60.2) == "1285 ± 60"
    assert fmt_pm(0.58901, 0.000921) == "0.58901 ± 0.00092"
    assert fmt_pm(2.69e-12, 1.3e-13, scientific=True) == "(2.69 ± 0.13)e-12"
    assert fmt_pm(0.08, 8.69e14) == "(0.0 ± 8.7)e+14"          # a fit that says nothing
    assert fmt_pm(3e-12, 2e-11, scientific=True) == "(0.3 ± 2.0)e-11"
    assert fmt_pm(None, 1.0) == "–"
    assert fmt_pm(1.5, None) == "1.500"


def test_result_tables_and_tab_separated_copy():
    result = {
        "dark": False, "conditions": {"irradiance_w_m2": 1000.0, "temperature_c": 25.0,
                                      "area_cm2": 1.0, "cells_in_series": 1},
        "data_figures": {"isc_a": 0.038, "voc_v": 0.61, "pmax_w": 0.0183, "ff": 0.787,
                         "vmp_v": 0.51, "imp_a": 0.0359},
        "efficiency": 0.183,
        "fits": {"single": {"model": "single", "photocurrent_a": 0.038,
                            "saturation_current_a": 2e-12, "ideality": 1.0,
                            "series_resistance_ohm": 0.6, "shunt_resistance_ohm": None,
                            "rmse_a": 6e-5, "uncertainty": {"ideality": 0.003}}},
        "stc": {"target": {"irradiance_w_m2": 1000.0, "temperature_c": 25.0},
                "primary": "diode_model",
                "methods": [{"method": "procedure1", "ok": False, "error": "needs coefficients"},
                            {"method": "diode_model", "ok": True,
                             "figures": {"isc_a": 0.038, "voc_v": 0.612, "pmax_w": 0.0184,
                                         "ff": 0.788}}]},
        "verdict": {"verdict": "re-measure",
                    "reasons": [{"code": "compliance", "message": "in compliance at 3 points"}]},
    }
    tables = {t.title: t for t in result_tables(result)}
    assert tables["Verdict"].rows[0] == ("verdict", "RE-MEASURE")
    assert ("reason", "in compliance at 3 points") in tables["Verdict"].rows
    fig = tables["Figures of merit"]
    assert ("Isc (mA)", "38.00", "–", "38.00") in fig.rows
    assert ("Jsc (mA/cm²)", "38.00", "–", "38.00") in fig.rows
    fit = next(t for k, t in tables.items() if k.startswith("Fitted"))
    assert ("Rsh (Ω)", "∞") in fit.rows and ("n", "1.0000 ± 0.0030") in fit.rows
    stc = next(t for k, t in tables.items() if k.startswith("At STC"))
    assert stc.rows[0][0] == "diode model *"
    assert any(n.startswith("* primary: diode-model translation") for n in stc.notes)
    assert any("procedure 1" in n and "needs coefficients" in n for n in stc.notes)
    text = tables_tsv(list(tables.values()), heading="sweep\t1. light")
    assert text.splitlines()[0] == "sweep\t1. light"
    assert "Isc (mA)\t38.00\t–\t38.00" in text.splitlines()
