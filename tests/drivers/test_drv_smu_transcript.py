"""Recorded-exchange tests of the source-meter driver: the exact messages it sends, and what it
makes of the replies, against a scripted instrument (no network)."""
import math

import numpy as np
import pytest

from drivers import (InstrumentCommandError, InvalidSettingError, LinkLostError, OverRangeError,
                     ResponseError, ScpiSourceMeter, SmuReading)
from drv_fakes import ADDRESS, FakeResourceManager, ScriptedInstrument

SAFE = ["ABOR", "SOUR:VOLT:MODE FIX", "SOUR:CURR:MODE FIX", "SOUR:VOLT 0", "SOUR:CURR 0",
        "OUTP OFF"]


def _configure_steps(log):
    return [m for m in log if m != "SYST:ERR?"]


def test_connect_puts_the_instrument_in_the_safe_state_and_verifies_off():
    instrument = ScriptedInstrument()
    instrument.answer("OUTP?", "0")
    ScpiSourceMeter(ADDRESS, resource_manager=FakeResourceManager(instrument), timeout_s=0.5)
    assert instrument.log == ["*IDN?", "*CLS", *SAFE, "OUTP?", "*CLS"]


def test_connect_refuses_an_output_that_stays_on():
    instrument = ScriptedInstrument()
    instrument.answer("OUTP?", "1")
    with pytest.raises(Exception, match="output still on"):
        ScpiSourceMeter(ADDRESS, resource_manager=FakeResourceManager(instrument), timeout_s=0.5)


def test_configure_voltage_source_each_step_error_checked(smu, instrument):
    smu.configure(source_mode="voltage", compliance=0.05, nplc=1, four_wire=True,
                  source_range=2.0, measure_range=None)
    assert _configure_steps(instrument.log) == [
        "SOUR:FUNC:MODE VOLT", "SOUR:VOLT:MODE FIX", "SENS:CURR:PROT 0.05",
        "SOUR:VOLT:RANG:AUTO OFF", "SOUR:VOLT:RANG 2", "SENS:CURR:RANG:AUTO ON",
        "SENS:CURR:NPLC 1", "SENS:REM ON"]
    # every configuration step is followed by one error-queue read
    assert instrument.log[1::2] == ["SYST:ERR?"] * 8


def test_configure_current_source_clamps_voltage(smu, instrument):
    smu.configure(source_mode="current", compliance=0.8, nplc=0.1, four_wire=False,
                  measure_range=2)
    assert _configure_steps(instrument.log) == [
        "SOUR:FUNC:MODE CURR", "SOUR:CURR:MODE FIX", "SENS:VOLT:PROT 0.8",
        "SOUR:CURR:RANG:AUTO ON", "SENS:VOLT:RANG:AUTO OFF", "SENS:VOLT:RANG 2",
        "SENS:VOLT:NPLC 0.1", "SENS:REM OFF"]
    instrument.answer("SENS:VOLT:PROT?", "+8.000000000E-01")
    assert smu.read_compliance() == 0.8
    instrument.answer("SENS:VOLT:PROT:TRIP?", "0")
    instrument.answer("READ?", "+5.000000000E-01,+1.000000000E-02")
    smu.measure()
    assert instrument.log[-1] == "READ?;:SENS:VOLT:PROT:TRIP?;:SYST:ERR?"


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(source_mode="volts"), "source_mode"),
    (dict(compliance=0.0), "compliance"),
    (dict(compliance=float("nan")), "compliance"),
    (dict(nplc=-1), "nplc"),
    (dict(source_range=float("inf")), "source_range"),
])
def test_configure_refuses_bad_arguments_before_sending_anything(smu, instrument, kwargs, fragment):
    args = dict(source_mode="voltage", compliance=0.05, nplc=1, four_wire=True) | kwargs
    with pytest.raises(InvalidSettingError, match=fragment) as caught:
        smu.configure(**args)
    assert isinstance(caught.value, ValueError) and caught.value.instrument_error
    assert instrument.log == []


def test_configure_stops_at_the_step_the_instrument_refuses(smu, instrument):
    instrument.fail("SOUR:FUNC:MODE CURR", -221, "Settings conflict")
    with pytest.raises(InstrumentCommandError) as caught:
        smu.configure(source_mode="current", compliance=1, nplc=1, four_wire=True)
    assert caught.value.command == "SOUR:FUNC:MODE CURR"
    assert "Settings conflict" in str(caught.value)
    assert _configure_steps(instrument.log) == ["SOUR:FUNC:MODE CURR"]


def test_compliance_and_ovp_read_back(smu, instrument):
    instrument.answer("SENS:CURR:PROT?", "+5.000000000E-02")
    instrument.answer("SOUR:VOLT:PROT?", "+2.000000000E+00")
    smu.set_overvoltage_protection(2.0)
    assert smu.read_compliance() == 0.05
    assert smu.read_overvoltage_protection() == 2.0
    assert _configure_steps(instrument.log) == [
        "SOUR:VOLT:PROT 2", "SOUR:FUNC:MODE?;:SYST:ERR?",
        "SENS:CURR:PROT?;:SYST:ERR?", "SOUR:VOLT:PROT?;:SYST:ERR?"]


def test_measure_is_one_round_trip_with_the_compliance_flag(smu, instrument):
    instrument.answer("READ?", "+6.000000000E-01,-3.500000000E-02")
    instrument.answer("SENS:CURR:PROT:TRIP?", "1")
    reading = smu.measure()
    assert reading == SmuReading(0.6, -0.035, True)
    assert instrument.log[-1] == "READ?;:SENS:CURR:PROT:TRIP?;:SYST:ERR?"
    with pytest.raises(Exception):
        reading.voltage_v = 0.0          # frozen


def test_set_level_and_measure_is_one_message(smu, instrument):
    instrument.answer("SOUR:VOLT 0.45;:READ?;:SENS:CURR:PROT:TRIP?;:SYST:ERR?",
                      '+4.500000000E-01,-3.000000000E-02;0;0,"No error"')
    marker = len(instrument.log)
    assert smu.set_level_and_measure(0.45) == SmuReading(0.45, -0.03, False)
    sent = instrument.messages_since(marker)
    assert sent[-1] == "SOUR:VOLT 0.45;:READ?;:SENS:CURR:PROT:TRIP?;:SYST:ERR?"
    assert sum(1 for m in sent if "READ?" in m) == 1


def test_level_refused_by_the_instrument_raises_even_though_a_reading_came_back(smu, instrument):
    instrument.answer("SOUR:VOLT 300;:READ?;:SENS:CURR:PROT:TRIP?;:SYST:ERR?",
                      '+0.000000000E+00,+0.000000000E+00;0;-222,"Data out of range"')
    with pytest.raises(InstrumentCommandError, match="-222"):
        smu.set_level_and_measure(300)


def test_non_finite_level_is_never_sent(smu, instrument):
    for bad in (float("nan"), float("inf"), "0.5", True):
        with pytest.raises(InvalidSettingError):
            smu.set_level(bad)
    assert not any(m.startswith("SOUR:VOLT ") for m in instrument.log)


def test_overflow_reading_raises_over_range(smu, instrument):
    instrument.answer("READ?", "+6.000000000E-01,+9.900000000E+37")
    instrument.answer("SENS:CURR:PROT:TRIP?", "0")
    with pytest.raises(OverRangeError):
        smu.measure()


def test_garbled_reading_raises_response_error(smu, instrument):
    instrument.answer("READ?", "+6.0000#0E-01,-3.5E-02")
    instrument.answer("SENS:CURR:PROT:TRIP?", "0")
    with pytest.raises(ResponseError):
        smu.measure()


def test_output_state_and_protection_are_queried(smu, instrument):
    instrument.answer("OUTP?", "1")
    instrument.answer("OUTP:PROT:TRIP?", "0")
    instrument.answer("SOUR:VOLT:PROT:TRIP?", "1")
    instrument.answer("OUTP:INT:TRIP?", "0")
    smu.output(True)
    assert smu.output_is_on() is True
    assert smu.protection_tripped() is True
    assert smu.interlock_open() is False
    assert _configure_steps(instrument.log) == [
        "OUTP ON", "OUTP?", "OUTP:PROT:TRIP?;:SOUR:VOLT:PROT:TRIP?", "OUTP:INT:TRIP?"]


def test_state_queries_answer_while_an_event_error_is_queued(smu, instrument):
    """An interlock queues an error by itself; asking whether the interlock is open must
    still answer, and leave the error for the next command to report."""
    instrument.answer("OUTP:INT:TRIP?", "1")
    instrument.answer("OUTP?", "0")
    instrument.errors.append((301, "Interlock open;output forced off"))
    assert smu.interlock_open() is True
    assert smu.output_is_on() is False
    with pytest.raises(InstrumentCommandError, match="301"):
        smu.output(True)


def test_output_on_refused_while_interlock_open(smu, instrument):
    instrument.fail("OUTP ON", -221, "Settings conflict;interlock open")
    with pytest.raises(InstrumentCommandError, match="interlock open"):
        smu.output(True)


# ---------------------------------------------------------------- list sweeps
def test_load_list_appends_a_final_zero_and_reads_the_length_back(smu, instrument):
    instrument.answer("SOUR:LIST:VOLT:POIN?", "4")
    smu.load_list([-0.1, 0.2, 0.65], settle_s=0.01)
    assert _configure_steps(instrument.log) == [
        "SOUR:FUNC:MODE?;:SYST:ERR?",
        "SOUR:LIST:VOLT -0.1,0.2,0.65,0", "TRIG:COUN 4", "TRIG:DEL 0.01",
        "SOUR:VOLT:MODE LIST", "SOUR:LIST:VOLT:POIN?;:SYST:ERR?"]


def test_load_list_even_ending_at_zero_gets_its_own_final_zero(smu, instrument):
    instrument.answer("SOUR:LIST:VOLT:POIN?", "3")
    smu.load_list([0.5, 0.0], settle_s=0)
    assert "SOUR:LIST:VOLT 0.5,0,0" in instrument.log


def test_load_list_length_mismatch_raises(smu, instrument):
    instrument.answer("SOUR:LIST:VOLT:POIN?", "3")
    with pytest.raises(Exception, match="3 points, 4 were sent"):
        smu.load_list([0.1, 0.2, 0.3], settle_s=0)


def test_load_list_refuses_bad_lists_before_sending(smu, instrument):
    with pytest.raises(InvalidSettingError):
        smu.load_list([], settle_s=0)
    with pytest.raises(InvalidSettingError):
        smu.load_list([0.1, float("nan")], settle_s=0)
    with pytest.raises(InvalidSettingError):
        smu.load_list([0.1] * 10_000, settle_s=0)       # + final 0 exceeds 10,000
    with pytest.raises(InvalidSettingError):
        smu.load_list([0.1], settle_s=-1)
    assert not any(m.startswith("SOUR:LIST") for m in instrument.log)


def _loaded(smu, instrument, levels):
    instrument.answer("SOUR:LIST:VOLT:POIN?", str(len(levels) + 1))
    smu.load_list(levels, settle_s=0)


def test_points_done_counts_the_last_level_only_once_back_at_zero(smu, instrument):
    _loaded(smu, instrument, [0.1, 0.2, 0.3])
    instrument.answer("TRAC:POIN:ACT?", "0", "2", "3", "4")
    assert [smu.list_points_done() for _ in range(4)] == [0, 2, 2, 3]


def _ascii_triples(rows):
    return ",".join(f"{v:+.9E},{i:+.9E},{c}" for v, i, c in rows)


def test_fetch_ascii_in_chunks(instrument, rm):
    instrument.answer("OUTP?", "0")
    instrument.answer("SOUR:FUNC:MODE?", "VOLT")
    smu = ScpiSourceMeter(ADDRESS, resource_manager=rm, timeout_s=0.5, binary_transfer=False,
                          fetch_chunk_points=2)
    _loaded(smu, instrument, [0.0, 0.1, 0.2, 0.3, 0.4])
    rows = [(0.1 * k, -0.03 + 0.001 * k, 1 if k == 4 else 0) for k in range(5)]
    instrument.answer("FORM:DATA ASC;:TRAC:DATA? 1,2", _ascii_triples(rows[1:3]))
    instrument.answer("FORM:DATA ASC;:TRAC:DATA? 3,2", _ascii_triples(rows[3:5]))
    got = smu.fetch_list(1, 4)
    assert got == [SmuReading(float(f"{v:+.9E}"), float(f"{i:+.9E}"), bool(c)) for v, i, c in rows[1:]]
    fetches = [m for m in instrument.log if "TRAC:DATA?" in m]
    assert fetches == ["FORM:DATA ASC;:TRAC:DATA? 1,2;:SYST:ERR?",
                       "FORM:DATA ASC;:TRAC:DATA? 3,2;:SYST:ERR?"]


def _block(values):
    payload = np.asarray(values, dtype=">f8").tobytes()
    size = str(len(payload))
    return b"#" + str(len(size)).encode() + size.encode() + payload


def test_fetch_binary_in_chunks_keeps_full_precision(instrument, rm):
    instrument.answer("OUTP?", "0")
    instrument.answer("SOUR:FUNC:MODE?", "VOLT")
    smu = ScpiSourceMeter(ADDRESS, resource_manager=rm, timeout_s=0.5, fetch_chunk_points=3)
    _loaded(smu, instrument, [0.1] * 4)
    rows = [(math.pi / 10 * k, -1 / 3 * 1e-2, float(k % 2)) for k in range(4)]
    flat = [x for row in rows for x in row]
    instrument.answer("FORM:DATA REAL,64;:FORM:BORD NORM;:TRAC:DATA? 0,3", _block(flat[:9]))
    instrument.answer("FORM:DATA REAL,64;:FORM:BORD NORM;:TRAC:DATA? 3,1", _block(flat[9:]))
    got = smu.fetch_list(0, 4)
    assert got == [SmuReading(v, i, bool(c)) for v, i, c in rows]   # bit-exact


def test_fetch_beyond_the_list_is_refused(smu, instrument):
    _loaded(smu, instrument, [0.1, 0.2])
    with pytest.raises(InvalidSettingError):
        smu.fetch_list(1, 2)        # the appended zero point is not the caller's


@pytest.mark.parametrize("values, error", [
    ([0.1, 9.9e37, 0.0], OverRangeError),
    ([0.1, -0.02, 0.5], ResponseError),       # compliance flag neither 0 nor 1
    ([0.1, -0.02], ResponseError),            # short
    ([0.1, float("nan"), 0.0], ResponseError),
])
def test_fetch_binary_refuses_bad_values(smu, instrument, values, error):
    _loaded(smu, instrument, [0.1])
    instrument.answer("FORM:DATA REAL,64;:FORM:BORD NORM;:TRAC:DATA? 0,1", _block(values))
    with pytest.raises(error):
        smu.fetch_list(0, 1)


def test_start_and_abort(smu, instrument):
    smu.start_list()
    smu.abort()
    assert _configure_steps(instrument.log) == ["INIT", "ABOR"]


# ---------------------------------------------------------------- make_safe
def test_make_safe_sequence_and_verification(smu, instrument):
    assert smu.make_safe() is True
    assert instrument.log == [*SAFE, "OUTP?", "SYST:ERR?"]


def test_make_safe_reports_false_when_output_reads_back_on(smu, instrument):
    instrument.answer("OUTP?", "1")
    assert smu.make_safe() is False
    assert any("read back ON" in note for note in smu.last_safe_notes)


def test_make_safe_after_a_timeout_sends_the_safety_writes_before_resynchronising(smu, instrument):
    instrument.stall()
    instrument.answer("READ?", "+6.0E-01,-3.0E-02")
    instrument.answer("SENS:CURR:PROT:TRIP?", "0")
    with pytest.raises(LinkLostError):
        smu.measure()
    instrument.release()
    marker = len(instrument.log)
    assert smu.make_safe() is True
    assert instrument.messages_since(marker)[:7] == [*SAFE, "*IDN?"]


def test_make_safe_after_the_link_dropped_reconnects_once(smu, instrument, rm):
    instrument.drop()
    with pytest.raises(LinkLostError):
        smu.output(True)
    assert smu.make_safe() is True
    assert len(rm.open_calls) == 2


def test_make_safe_never_raises_when_the_instrument_is_gone(smu, instrument):
    instrument.drop()
    instrument.refuse_connections = True
    assert smu.make_safe() is False
    assert len(smu.last_safe_notes) == 2 and "cannot open" in smu.last_safe_notes[-1]


def test_make_safe_on_garbled_verification_retries_and_reports(smu, instrument):
    instrument.answer("OUTP?", "0#", "0")
    assert smu.make_safe() is True
    assert any("expected 1 or 0" in note for note in smu.last_safe_notes)


def test_reconnect_switches_the_output_off_and_forgets_the_cached_mode(smu, instrument):
    smu.configure(source_mode="current", compliance=1, nplc=1, four_wire=True)
    smu.reconnect()
    assert instrument.log[-len(SAFE) - 2:] == [*SAFE, "OUTP?", "*CLS"]
    instrument.answer("SOUR:FUNC:MODE?", "CURR")
    smu.set_level(0.01)
    assert instrument.log[-3:] == ["SOUR:FUNC:MODE?;:SYST:ERR?", "SOUR:CURR 0.01", "SYST:ERR?"]


def test_close_makes_safe_first(smu, instrument, rm):
    smu.close()
    assert instrument.log == [*SAFE, "OUTP?", "SYST:ERR?"]
    assert rm.resources[-1].closed
    smu.close()                          # twice is harmless and sends nothing
    assert len(instrument.log) == len(SAFE) + 2
