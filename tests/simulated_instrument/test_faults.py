"""Every harness fault, observed over real pyvisa-py sockets (docs/scpi-dialect.md, Harness)."""
from __future__ import annotations

import pytest
from pyvisa.errors import VisaIOError

import simulated_instrument
from simulated_instrument import harness
from sim_helpers import command, drain_errors, values

LINK_LOST = (VisaIOError, OSError)


def _lit_pixel(bench, open_resource, pixel=1):
    light = open_resource(bench.addresses["light"])
    command(light, "OUTP ON")
    command(open_resource(bench.addresses["switch"]), f"ROUT:CLOS (@{pixel})")
    return light


def test_disconnect_keeps_the_output_as_it_was(bench, open_resource):
    smu = open_resource(bench.addresses["smu"], timeout_ms=500)
    smu.write("SOUR:VOLT 0.5;:OUTP ON")
    assert smu.query("OUTP?") == "1"
    bench.inject("disconnect")
    with pytest.raises(LINK_LOST):
        smu.query("*IDN?")
    assert bench.state()["smu"]["output_on"] is True          # worst case: still on
    fresh = open_resource(bench.addresses["smu"])
    assert fresh.query("OUTP?;:SOUR:VOLT?") == "1;+5.000000000E-01"
    fresh.write("SOUR:VOLT 0;:OUTP OFF")
    assert fresh.query("OUTP?") == "0"
    assert [f["name"] for f in bench.state()["faults"]["history"]] == ["disconnect"]


def test_stall_until_the_client_reconnects(bench, open_resource):
    smu = open_resource(bench.addresses["smu"], timeout_ms=300)
    assert smu.query("*OPC?") == "1"
    bench.inject("stall", after=2)
    assert smu.query("*IDN?").startswith("Kestrel")
    assert smu.query("OUTP?") == "0"
    with pytest.raises(VisaIOError):
        smu.query("*IDN?")
    smu.clear()                                   # on a raw socket this only drains
    with pytest.raises(VisaIOError):
        smu.query("*IDN?")
    fresh = open_resource(bench.addresses["smu"])
    assert fresh.query("*IDN?").startswith("Kestrel")
    history = bench.state()["faults"]["history"]
    assert history[0]["name"] == "stall" and history[0]["fired_at_message"] == 3


def test_garble_corrupts_exactly_one_reply(bench, smu):
    command(smu, "OUTP ON")
    bench.inject("garble")
    bad = smu.query("READ?")
    assert "~" in bad
    with pytest.raises(ValueError):
        values(bad)
    good = values(smu.query("READ?"))
    assert len(good) == 2


def test_instrument_error_is_queued(bench, smu):
    bench.inject("instrument-error")
    assert smu.query("SYST:ERR?") == '-240,"Hardware error;output stage fault"'
    assert int(smu.query("*ESR?")) & 16                         # execution error class


def test_interlock_forces_the_output_off(bench, open_resource):
    smu = open_resource(bench.addresses["smu"])
    command(smu, "SOUR:VOLT 0.2;:OUTP ON")
    bench.inject("interlock")
    assert smu.query("OUTP?;:OUTP:INT:TRIP?;:OUTP:PROT:TRIP?") == "0;1;1"
    assert int(smu.query("STAT:QUES:COND?")) & (1 << 9)
    smu.write("OUTP ON")
    smu.write("OUTP:PROT:CLE")
    assert [c for c, _ in drain_errors(smu)] == [301, -221, -221]
    state = bench.state()["smu"]
    assert state["output_on"] is False and state["interlock_open"] is True
    bench.clear_faults()
    smu.write("OUTP:PROT:CLE;:OUTP ON")
    assert smu.query("OUTP?;:OUTP:INT:TRIP?") == "1;0"


def test_compliance_fault_shorts_the_cell(bench, open_resource):
    _lit_pixel(bench, open_resource)
    smu = open_resource(bench.addresses["smu"])
    smu.write("SENS:REM ON;:SENS:CURR:PROT 0.05;:SOUR:VOLT 0.3;:OUTP ON")
    v, i = values(smu.query("READ?"))
    assert smu.query("SENS:CURR:PROT:TRIP?") == "0" and i < 0
    bench.inject("compliance")
    v, i = values(smu.query("READ?"))
    assert i == pytest.approx(0.05, abs=1e-4) and abs(v) < 0.01
    assert smu.query("SENS:CURR:PROT:TRIP?") == "1"
    assert int(smu.query("STAT:QUES:COND?")) & 2


def test_overtemp_runs_the_stage_away(bench, open_resource):
    thermo = open_resource(bench.addresses["thermometer"])
    t0 = float(thermo.query("MEAS:TEMP?"))
    assert int(thermo.query("STAT:QUES:COND?")) & 16 == 0
    bench.inject("overtemp")
    bench.advance(5.0)
    assert float(thermo.query("MEAS:TEMP?")) > t0 + 10
    assert int(thermo.query("STAT:QUES:COND?")) & 16
    assert bench.state()["stage"]["runaway"] is True


def test_light_failure_collapses_the_irradiance(bench, open_resource):
    light = _lit_pixel(bench, open_resource)
    before = float(light.query("MEAS:CURR?"))
    bench.inject("light-failure", after=0)
    after = float(light.query("MEAS:CURR?"))
    assert before > 0.11 and after < 0.1 * before
    bench.clear_faults()
    assert float(light.query("MEAS:CURR?")) > 0.11


def test_faults_armed_from_the_command_line_count_smu_messages(open_resource):
    with simulated_instrument.running_bench(faults=["garble:3", ("instrument-error", 1)]) as bench:
        smu = open_resource(bench.addresses["smu"])
        light = open_resource(bench.addresses["light"])
        assert bench.state()["faults"]["armed"][0]["name"] == "garble"
        assert smu.query("*OPC?") == "1"                      # message 1; instrument-error fires
        light.query("*IDN?")                                  # not an SMU message
        assert smu.query("SYST:ERR?").startswith("-240")      # message 2
        assert smu.query("*OPC?") == "1"                      # message 3; garble fires after it
        assert "~" in smu.query("*IDN?")
        assert smu.query("*IDN?").startswith("Kestrel")
        names = [f["name"] for f in bench.state()["faults"]["history"]]
        assert names == ["instrument-error", "garble"]
    with pytest.raises(ValueError):
        simulated_instrument.parse_fault("meteor:1")
    with pytest.raises(ValueError):
        simulated_instrument.parse_fault("stall:-1")


def test_faults_are_never_reachable_over_scpi(smu):
    for attempt in ("SYST:FAULT INTERLOCK", "FAULT:INJECT STALL", "DIAG:FAULT 1"):
        smu.write(attempt)
    assert [c for c, _ in drain_errors(smu)] == [-113, -113, -113]


def test_harness_control_port(bench, open_resource):
    host, port = bench.harness_address
    smu = open_resource(bench.addresses["smu"])
    command(smu, "SOUR:VOLT 0.1;:OUTP ON")
    state = harness.query_state(host, port)
    assert state["smu"]["output_on"] is True and state["smu"]["level"] == 0.1
    assert state["messages"]["smu"] == 1
    entry = harness.inject_fault(host, port, "interlock", after=1)
    assert entry["fires_after_message"] == 2
    smu.query("*OPC?")
    assert harness.query_state(host, port)["smu"]["interlock_open"] is True
    harness.clear_faults(host, port)
    harness.set_knobs(host, port, flicker_rel=0.0)
    assert harness.advance(host, port, 2.5) >= 2.5
    with pytest.raises(harness.HarnessError):
        harness.inject_fault(host, port, "meteor")
    with pytest.raises(harness.HarnessError):
        harness.set_knobs(host, port, no_such_knob=1)
    with pytest.raises(harness.HarnessError):
        harness.request(host, port, {"cmd": "explode"})
