"""The SMU and the other instruments over real pyvisa-py sockets (docs/scpi-dialect.md).

Standard rules (error codes, path rule, block format) are those of IEEE 488.2 / SCPI-1999
(docs/scpi-dialect.md lists what the bench implements). Physical expectations are checked
against pvlib's single-diode solution where a number is involved.
"""
from __future__ import annotations

import math
import time

import numpy as np
import pytest

import simulated_instrument

from sim_helpers import SCENARIO as SINGLE_DIODE, command, desoto, drain_errors, values

pvsystem = pytest.importorskip("pvlib.pvsystem")


# ----------------------------------------------------------------- common commands, errors


def test_identity_and_undefined_header(bench, open_resource):
    for role in ("smu", "light", "thermometer", "switch"):
        res = open_resource(bench.addresses[role])
        manufacturer, model, serial, firmware = res.query("*IDN?").split(",")
        assert manufacturer and model and serial and firmware
        res.write("BOGUS:HEADER 1")
        assert res.query("SYST:ERR?") == '-113,"Undefined header;BOGUS:HEADER"'
        assert res.query("SYST:ERR?") == '0,"No error"'


def test_error_codes_over_the_wire(smu):
    smu.write("SOUR:VOLT 500")           # beyond the 200 V source range
    smu.write("SOUR:VOLT")               # missing parameter
    smu.write("*CLS 1")                  # parameter not allowed
    smu.write("SOUR:VOLT 1 2")           # invalid separator
    smu.write("SENS:CURR:NPLC 1V")       # suffix not allowed
    smu.write("SOUR:VOLT 1 A")           # wrong unit
    smu.write("MEAS:CURR?")              # output off: settings conflict
    smu.write("SOUR:FUNC:MODE VOLTS")    # invalid character data
    assert [c for c, _ in drain_errors(smu)] == [-222, -109, -108, -103, -138, -131, -221, -141]
    assert smu.query("SYST:ERR:COUN?") == "0"


def test_compound_messages_path_rule_and_joined_replies(smu):
    reply = smu.query("SOUR:VOLT 0.25;:SOUR:VOLT?;:SENS:CURR:PROT 20mA;PROT?;:SYST:VERS?")
    assert reply == "+2.500000000E-01;+2.000000000E-02;1999.0"
    assert smu.query("SENS:CURR:NPLC 2;NPLC?;*OPC?;NPLC?") == "+2.000000000E+00;1;+2.000000000E+00"
    smu.write("SOUR:VOLT 1;SOUR:CURR 0.1")           # SOUR:SOUR:CURR: the client trap
    assert [c for c, _ in drain_errors(smu)] == [-113]
    assert smu.query("VOLT?;:CURR:PROT?") == "+1.000000000E+00;+2.000000000E-02"


def test_default_root_is_source_and_numeric_suffixes(smu):
    smu.write("VOLT:PROT 12")                         # OVP, not the sense compliance
    assert float(smu.query("SOUR:VOLT:PROT?")) == 12.0
    assert float(smu.query("SENS:VOLT:PROT?")) == 20.0
    smu.write("SOUR1:VOLT 0.5;:SENS1:CURR:PROT 0.05;:OUTP1:STAT OFF")
    assert smu.query("SOUR:VOLT?;:SENS:CURR:PROT?") == "+5.000000000E-01;+5.000000000E-02"
    smu.write("SOUR2:VOLT 1")
    assert [c for c, _ in drain_errors(smu)] == [-114]


def test_min_max_and_units(smu):
    assert float(smu.query("SOUR:VOLT:PROT? MAX")) == 210.0
    assert float(smu.query("SENS:CURR:PROT? DEF")) == 0.01
    smu.write("SENS:CURR:PROT 1500UA;:TRIG:DEL 2MS;:SOUR:VOLT 100MV")
    reply = smu.query("SENS:CURR:PROT?;:TRIG:DEL?;:SOUR:VOLT?")
    assert [float(x) for x in reply.split(";")] == pytest.approx([1.5e-3, 2e-3, 0.1], rel=1e-12)
    smu.write("SENS:CURR:NPLC MAX")
    assert float(smu.query("SENS:VOLT:NPLC?")) == 10.0          # one shared setting


def test_rst_values_and_status(smu):
    smu.write("SOUR:VOLT 1;:SENS:REM ON;:FORM REAL;:OUTP ON")
    smu.write("*RST")
    assert smu.query("OUTP?;:SOUR:FUNC?;:SOUR:VOLT?;:SENS:CURR:PROT?;:SOUR:VOLT:PROT?;:SENS:CURR:NPLC?") == \
        "0;VOLT;+0.000000000E+00;+1.000000000E-02;+2.100000000E+02;+1.000000000E+00"
    assert smu.query("SENS:CURR:RANG:AUTO?;:SENS:REM?;:FORM?;:SOUR:LIST:VOLT:POIN?;:SYST:LFR?") == \
        "1;0;ASC;0;+5.000000000E+01"
    smu.write("*ESE 60;*SRE 32")
    smu.write("BAD")
    assert int(smu.query("*STB?")) & (4 | 32 | 64)
    assert int(smu.query("*ESR?")) & 32
    assert smu.query("*TST?") == "0"


# ----------------------------------------------------------------- source, compliance, sense


def _single_diode_bench():
    return simulated_instrument.running_bench(SINGLE_DIODE, time_scale=0.0, seed=3)


def _lit(bench, open_resource, g=1000.0):
    light = open_resource(bench.addresses["light"])
    switch = open_resource(bench.addresses["switch"])
    light.write(f"SOUR:IRR {g};:OUTP ON")
    assert light.query("*OPC?") == "1"
    command(switch, "ROUT:CLOS (@1)")
    state = bench.state()
    return state["light"]["irradiance_w_m2"], state["stage"]["temperature_c"]


def test_compliance_clamps_physically_and_raises_flags(open_resource):
    with _single_diode_bench() as bench:
        smu = open_resource(bench.addresses["smu"])
        g, t_c = _lit(bench, open_resource)
        smu.write("SENS:REM ON;:SENS:CURR:PROT 0.01;:SENS:CURR:NPLC 10;:SOUR:VOLT 1.0;:OUTP ON")
        v, i = values(smu.query("READ?"))
        assert smu.query("SENS:CURR:PROT:TRIP?") == "1"
        assert int(smu.query("STAT:QUES:COND?")) & 2             # QUES bit 1 CURRent
        assert i == pytest.approx(0.01, abs=6 * 2e-5 * 0.1 / math.sqrt(10))
        # the output left its programmed 1 V: the cell voltage where it takes +10 mA (pvlib)
        il, i0, rs, rsh, a = desoto(g, t_c)
        v_expected = float(pvsystem.v_from_i(-0.01, il, i0, rs, rsh, a))
        assert v == pytest.approx(v_expected, abs=6 * 2e-5 * 2.0 / math.sqrt(10))
        assert bench.state()["smu"]["in_compliance"] is True
        smu.write("SENS:CURR:PROT 0.1;:SOUR:VOLT 0.3")
        smu.query("READ?")
        assert smu.query("SENS:CURR:PROT:TRIP?") == "0"
        assert int(smu.query("STAT:QUES:COND?")) & 2 == 0
        assert int(smu.query("STAT:QUES?")) & 2                  # the event stayed latched


def test_current_source_into_open_circuit_hits_voltage_compliance(smu):
    smu.write("SOUR:FUNC CURR;:SOUR:CURR 1e-3;:SENS:VOLT:PROT 5;:OUTP ON")
    v, i = values(smu.query("READ?"))
    assert v == pytest.approx(5.0, abs=1e-3) and abs(i) < 1e-6
    # with both roots optional, VOLT:PROT:TRIP? would be the OVP latch: SENS: is explicit
    assert smu.query("SENS:VOLT:PROT:TRIP?;:SOUR:VOLT:PROT:TRIP?") == "1;0"
    assert int(smu.query("STAT:QUES:COND?")) & 1
    smu.write("SOUR:FUNC VOLT")
    assert [c for c, _ in drain_errors(smu)] == [-221]          # mode change with the output on


def test_four_wire_and_two_wire_readings(open_resource):
    with _single_diode_bench() as bench:
        smu = open_resource(bench.addresses["smu"])
        g, t_c = _lit(bench, open_resource)
        il, i0, rs, rsh, a = desoto(g, t_c)
        lead_total = 2 * 0.15                                   # scenario: 0.15 ohm per lead
        nplc = 10
        sigma_i = 2e-5 * 0.1 / math.sqrt(nplc)
        smu.write(f"SENS:CURR:PROT 0.1;:SENS:CURR:RANG 0.1;:SENS:CURR:NPLC {nplc};:SOUR:VOLT 0.4;:OUTP ON")
        smu.write("SENS:REM ON")
        v4, i4 = values(smu.query("READ?"))
        assert v4 == pytest.approx(0.4, abs=1e-4)
        assert i4 == pytest.approx(-float(pvsystem.i_from_v(0.4, il, i0, rs, rsh, a)), abs=6 * sigma_i)
        smu.write("SENS:REM OFF")
        v2, i2 = values(smu.query("READ?"))
        # two-wire: the SMU holds its terminals at 0.4 V; the cell sees 0.4 V - I * leads
        assert v2 == pytest.approx(0.4, abs=1e-4)
        v_cell = 0.4 - i2 * lead_total
        assert v_cell > 0.41                                    # a generating cell lifts its contacts
        assert i2 == pytest.approx(-float(pvsystem.i_from_v(v_cell, il, i0, rs, rsh, a)), abs=6 * sigma_i)
        assert abs(i2) < abs(i4)


def test_noise_grows_with_measure_range(smu):
    # no pixel connected: the true current is exactly 0, what is read is the noise
    smu.write("SOUR:VOLT 0;:SENS:CURR:NPLC 1;:SENS:CURR:RANG 1e-3;:OUTP ON")
    low = np.array([values(smu.query("READ?"))[1] for _ in range(200)])
    smu.write("SENS:CURR:RANG 1")
    high = np.array([values(smu.query("READ?"))[1] for _ in range(200)])
    # scenario: 1-sigma noise = 2e-5 of the range at NPLC 1; chi-square bounds for n = 200
    for sample, rng_ in ((low, 1e-3), (high, 1.0)):
        assert 0.8 < np.std(sample) / (2e-5 * rng_) < 1.2
    assert float(smu.query("SENS:CURR:RANG?")) == 1.0


def test_fixed_range_overflow_reads_9_9e37(open_resource):
    with _single_diode_bench() as bench:
        smu = open_resource(bench.addresses["smu"])
        _lit(bench, open_resource)
        smu.write("SENS:CURR:RANG:AUTO OFF;:SENS:CURR:RANG 1e-3;:SENS:CURR:PROT 0.1;:SOUR:VOLT 0;:OUTP ON")
        v, i = values(smu.query("READ?"))
        assert i == 9.9e37 and abs(v) < 1e-3
        smu.write("SENS:CURR:RANG:AUTO ON")
        assert values(smu.query("READ?"))[1] < -0.03
        assert float(smu.query("SENS:CURR:RANG?")) == 0.1      # autorange picked the 100 mA range


def test_ovp_trips_output_off_and_latches(smu):
    smu.write("SOUR:VOLT:PROT 5;:SOUR:VOLT 4;:OUTP ON")
    assert smu.query("OUTP?") == "1"
    smu.write("SOUR:VOLT 6")                                 # into an open circuit: 6 V at the terminals
    assert smu.query("OUTP?;:SOUR:VOLT:PROT:TRIP?;:OUTP:PROT:TRIP?") == "0;1;1"
    assert [c for c, _ in drain_errors(smu)] == [302]
    smu.write("SOUR:VOLT 0;:OUTP ON")
    assert [c for c, _ in drain_errors(smu)] == [-221]      # latched until cleared
    smu.write("*RST")
    assert smu.query("OUTP:PROT:TRIP?") == "1"               # *RST does not clear the latch
    smu.write("OUTP:PROT:CLE;:OUTP ON")
    assert smu.query("OUTP?;:OUTP:PROT:TRIP?") == "1;0"


# ----------------------------------------------------------------- list sweeps and the buffer


def _load_list(smu, levels, delay=0.0):
    smu.write(f"SOUR:LIST:VOLT {','.join(f'{x:.6g}' for x in levels)};:TRIG:COUN {len(levels)};"
              f":TRIG:DEL {delay};:SOUR:VOLT:MODE LIST")


def test_list_sweep_and_chunked_fetch_ascii_and_binary(open_resource):
    with _single_diode_bench() as bench:
        smu = open_resource(bench.addresses["smu"])
        _lit(bench, open_resource)
        levels = list(np.round(np.linspace(-0.2, 0.6, 100), 6)) + [0.0]
        smu.write("SENS:REM ON;:SENS:CURR:PROT 0.1")
        _load_list(smu, levels, delay=0.001)
        assert smu.query("SOUR:LIST:VOLT:POIN?") == "101"
        smu.write("OUTP ON;:INIT")
        assert smu.query("*OPC?") == "1"
        assert smu.query("TRAC:POIN:ACT?") == "101"
        assert float(smu.query("SOUR:VOLT?")) == 0.0            # stays at the last list level
        ascii_rows = []
        for start in range(0, 101, 25):
            count = min(25, 101 - start)
            chunk = values(smu.query(f"TRAC:DATA? {start},{count}"))
            assert len(chunk) == 3 * count
            ascii_rows += chunk
        smu.write("FORM REAL,64;:FORM:BORD NORM")
        binary = smu.query_binary_values("FETC?", datatype="d", is_big_endian=True)
        assert len(binary) == 303
        assert np.allclose(binary, ascii_rows, rtol=1e-9, atol=0)
        smu.write("FORM:BORD SWAP")
        swapped = smu.query_binary_values("TRAC:DATA? 10,5", datatype="d", is_big_endian=False)
        assert swapped == binary[30:45]
        assert np.allclose(np.array(binary).reshape(-1, 3)[:, 0], levels, atol=1e-3)
        smu.write("TRAC:DATA? 100,2")
        assert [c for c, _ in drain_errors(smu)] == [-222]
        assert smu.query("FORM:BORD?;:FORM?") == "SWAP;REAL,64"


def test_fetch_after_reconfiguration_is_stale_and_count_mismatch(smu):
    smu.write("FETC?")
    assert [c for c, _ in drain_errors(smu)] == [-230]
    _load_list(smu, [0.1, 0.2, 0.0])
    smu.write("TRIG:COUN 2;:OUTP ON;:INIT")
    assert [c for c, _ in drain_errors(smu)] == [-226]
    smu.write("TRIG:COUN 3;:INIT")
    assert smu.query("*OPC?;TRAC:POIN:ACT?") == "1;3"
    smu.write("SOUR:LIST:VOLT 0.3,0")                       # a new list makes the data stale
    smu.write("TRAC:DATA? 0,1")
    assert [c for c, _ in drain_errors(smu)] == [-230]


def test_sweep_runs_in_simulated_time_and_chunks_can_be_read_while_it_runs(open_resource):
    # time scale 0.01: 100 x faster than real time; 150 points of 40 ms -> 6 s simulated, ~60 ms real
    with simulated_instrument.running_bench(time_scale=0.01, seed=0) as bench:
        smu = open_resource(bench.addresses["smu"])
        levels = [0.1] * 149 + [0.0]
        smu.write("SENS:CURR:NPLC 1")
        _load_list(smu, levels, delay=0.0195)
        smu.write("OUTP ON;:INIT")
        seen = [int(smu.query("TRAC:POIN:ACT?"))]
        assert int(smu.query("STAT:OPER:COND?")) & 8           # SWEeping
        partial = None
        deadline = time.monotonic() + 10
        while seen[-1] < 150 and time.monotonic() < deadline:
            n = int(smu.query("TRAC:POIN:ACT?"))
            if 3 <= n < 150 and partial is None:
                partial = values(smu.query(f"TRAC:DATA? 0,{n}"))
            seen.append(n)
        assert seen == sorted(seen) and seen[-1] == 150
        assert partial is not None and len(set(seen)) > 3      # the buffer grew while we read it
        final = values(smu.query("FETC?"))
        assert final[:len(partial)] == partial
        assert int(smu.query("STAT:OPER:COND?")) & 8 == 0
        assert bench.state()["time_s"] >= 150 * 0.04 * 0.99


def test_abort_stops_at_the_level_reached(open_resource):
    with simulated_instrument.running_bench(time_scale=0.01, seed=0) as bench:
        smu = open_resource(bench.addresses["smu"])
        levels = [0.001 * k for k in range(1, 1000)] + [0.0]
        _load_list(smu, levels, delay=0.05)
        smu.write("OUTP ON;:INIT")
        while int(smu.query("TRAC:POIN:ACT?")) < 5:
            pass
        smu.write("ABOR")
        n = int(smu.query("TRAC:POIN:ACT?"))
        assert 5 <= n < 1000
        level = float(smu.query("SOUR:VOLT?"))
        assert level == pytest.approx(levels[n], abs=1e-12) or level == pytest.approx(levels[n - 1], abs=1e-12)
        time.sleep(0.05)
        assert int(smu.query("TRAC:POIN:ACT?")) == n
        assert bench.state()["smu"]["sweeping"] is False


def test_fixed_mode_initiate_takes_count_readings(smu):
    smu.write("SOUR:VOLT 0.2;:TRIG:COUN 7;:OUTP ON;:INIT")
    assert smu.query("*OPC?;:TRAC:POIN:ACT?") == "1;7"
    data = np.array(values(smu.query("FETC?"))).reshape(-1, 3)
    assert np.allclose(data[:, 0], 0.2, atol=1e-3)


# ----------------------------------------------------------------- light, thermometer, switch


def test_light_reference_cell_and_stage(bench, open_resource):
    light = open_resource(bench.addresses["light"])
    thermo = open_resource(bench.addresses["thermometer"])
    bench.set(flicker_rel=0.0, warmup_drift_rel=0.0, reference_noise_rel=0.0)
    assert abs(float(light.query("MEAS:CURR?"))) < 1e-12      # shutter closed
    light.write("SOUR:IRR 500;:OUTP ON")
    assert int(light.query("STAT:OPER:COND?")) & 2            # SETTling
    assert light.query("*OPC?") == "1"
    assert int(light.query("STAT:OPER:COND?")) & 2 == 0
    bench.advance(10.0)                                       # 30 lamp time constants
    isc = float(light.query("MEAS:CURR?"))
    state = bench.state()
    t_ref = float(light.query("MEAS:TEMP?"))
    # the reference cell's own calibration: Isc = cal * G/1000 * (1 + alpha (T - 25))
    expected = 0.12 * state["light"]["irradiance_w_m2"] / 1000 * (1 + 0.0005 * (t_ref - 25))
    assert isc == pytest.approx(expected, rel=1e-9)
    assert state["light"]["irradiance_w_m2"] == pytest.approx(500, rel=0.003)
    # the light heats the stage; the stage follows its set-point with a time constant
    t0 = float(thermo.query("MEAS:TEMP?"))
    bench.advance(300)
    # scenario: 1.5 K per 1000 W/m2 on a 25 C set-point, 30 s time constant
    assert float(thermo.query("MEAS:TEMP?")) == pytest.approx(25 + 1.5 * 0.5, abs=0.05) and t0 < 25.5
    thermo.write("SOUR:TEMP 40")
    assert int(thermo.query("STAT:QUES:COND?")) & 16          # more than 2 K off
    bench.advance(600)
    assert float(thermo.query("READ?")) == pytest.approx(40 + 1.5 * 0.5, abs=0.1)
    assert int(thermo.query("STAT:QUES:COND?")) & 16 == 0
    thermo.write("UNIT:TEMP K")
    assert thermo.query("UNIT:TEMP?") == "K"
    assert float(thermo.query("MEAS:TEMP?")) == pytest.approx(313.15 + 0.75, abs=0.1)
    light.write("SOUR:IRR 2000")
    assert [c for c, _ in drain_errors(light)] == [-222]


def test_switch_is_exclusive_and_open_circuit_without_pixel(bench, open_resource):
    switch = open_resource(bench.addresses["switch"])
    smu = open_resource(bench.addresses["smu"])
    light = open_resource(bench.addresses["light"])
    command(light, "OUTP ON")
    smu.write("SOUR:VOLT 0;:SENS:CURR:PROT 0.1;:OUTP ON")
    assert abs(values(smu.query("READ?"))[1]) < 1e-5          # nothing connected
    command(switch, "ROUT:CLOS (@2)")
    assert values(smu.query("READ?"))[1] < -0.03              # a lit pixel at short circuit
    command(switch, "ROUT:CLOS (@4)")
    assert switch.query("ROUT:CLOS? (@1:6)") == "0,0,0,1,0,0"
    switch.write("ROUT:CLOS (@1,2)")
    switch.write("ROUT:CLOS (@7)")
    assert [c for c, _ in drain_errors(switch)] == [-221, -222]
    switch.write("ROUT:OPEN (@4)")
    assert switch.query("ROUT:CLOS? (@4)") == "0"
    command(switch, "ROUT:CLOS (@5);:ROUT:OPEN:ALL")
    assert bench.state()["switch"]["closed_pixel"] is None


def test_pilot_substrate_pixels_differ_as_described(bench, open_resource):
    """Poor contact (pixel 3) and shunt (pixel 5) show in the curves as expected physically."""
    switch = open_resource(bench.addresses["switch"])
    smu = open_resource(bench.addresses["smu"])
    light = open_resource(bench.addresses["light"])
    command(light, "OUTP ON")
    smu.write("SENS:REM ON;:SENS:CURR:PROT 0.1;:SENS:CURR:NPLC 10;:OUTP ON")

    def current_at(pixel, v):
        command(switch, f"ROUT:CLOS (@{pixel})")
        smu.write(f"SOUR:VOLT {v}")
        return -values(smu.query("READ?"))[1]

    # a large series resistance costs current near the maximum power point ...
    assert current_at(3, 0.5) < 0.8 * current_at(1, 0.5)
    # ... a shunt costs current that grows with reverse bias (slope ~ 1/Rsh = 1/40 ohm)
    slope_shunted = (current_at(5, -0.5) - current_at(5, 0.0)) / 0.5
    slope_good = (current_at(1, -0.5) - current_at(1, 0.0)) / 0.5
    assert slope_shunted == pytest.approx(1 / 40, rel=0.05) and slope_good < 2e-3


def test_hysteretic_cell_forward_and_reverse_sweeps_differ(open_resource):
    with simulated_instrument.running_bench("hysteretic-cell", time_scale=0.0, seed=0) as bench:
        smu = open_resource(bench.addresses["smu"])
        _lit(bench, open_resource)
        v = list(np.round(np.linspace(0.0, 1.1, 56), 4))
        command(smu, "SENS:REM ON;:SENS:CURR:PROT 0.1;:SOUR:VOLT 0;:OUTP ON")
        bench.advance(10)
        curves = {}
        for name, levels in (("forward", v), ("reverse", v[::-1])):
            command(smu, f"SOUR:VOLT {levels[0]}")
            bench.advance(10)                                   # 10 time constants at the start level
            _load_list(smu, levels, delay=0.01)
            smu.write("INIT")
            data = np.array(values(smu.query("FETC?"))).reshape(-1, 3)
            smu.write("SOUR:VOLT:MODE FIX")
            order = np.argsort(data[:, 0])
            curves[name] = np.interp(0.8, data[order, 0], -data[order, 1])
        # a reverse scan (from Voc down) delivers more current at 0.8 V than a forward scan
        assert curves["reverse"] > curves["forward"] + 1e-3


def test_list_sweep_at_time_scale_zero_always_stores_every_point(smu):
    # Regression: after a few fixed-level readings the simulated clock sits at a value where
    # one jump by the "remaining" time fell a rounding error short of the last point's end,
    # leaving the sweep running forever with n-1 points stored.
    smu.write(":SENS:CURR:PROT 0.1")
    smu.write("OUTP ON")
    for v in (0.1, 0.2, 0.3):
        smu.query(f"VOLT {v};:READ?")
    for n in range(3, 40):
        levels = ",".join(repr(0.013 * k + 0.001) for k in range(n))
        smu.write(f"VOLT:MODE LIST;:LIST:VOLT {levels};:TRIG:COUN {n};:TRIG:DEL 0.001")
        smu.write("INIT")
        assert int(smu.query("TRAC:POIN:ACT?")) == n
        assert int(smu.query("STAT:OPER:COND?")) & 8 == 0  # not sweeping any more
        smu.write("VOLT:MODE FIX")
    smu.write("OUTP OFF")
