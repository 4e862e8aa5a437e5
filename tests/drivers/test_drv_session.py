"""Recorded-exchange tests of the SCPI session: exact messages, error mapping, recovery."""
import pytest

from drivers import (InstrumentCommandError, InstrumentError, LinkLostError, OverRangeError,
                     ResponseError, ScpiSession)
from drivers import replies
from drv_fakes import ADDRESS, IDENTITY, FakeResourceManager, ScriptedInstrument


def test_open_uses_newline_terminations_and_timeout_in_ms(rm, instrument, session):
    address, kwargs = rm.open_calls[0]
    assert address == ADDRESS
    assert kwargs["read_termination"] == "\n" and kwargs["write_termination"] == "\n"
    assert kwargs["timeout"] == 500          # 0.5 s given, pyvisa wants ms
    assert instrument.log == ["*IDN?", "*CLS"]
    assert session.identity == IDENTITY and session.state == "ready"


def test_backend_string_or_object_required():
    with pytest.raises(TypeError):
        ScpiSession(ADDRESS, timeout_s=1, resource_manager=object())
    for bad in (0, -1, float("inf"), float("nan")):
        with pytest.raises(ValueError):
            ScpiSession(ADDRESS, timeout_s=bad, resource_manager=FakeResourceManager(ScriptedInstrument()))


def test_configure_reads_the_error_queue_after_the_command(session, instrument):
    session.configure("SOUR:VOLT 1")
    assert instrument.log[2:] == ["SOUR:VOLT 1", "SYST:ERR?"]


def test_instrument_error_quotes_identity_address_command_and_messages(session, instrument):
    instrument.fail("SOUR:VOLT 300", -222, "Data out of range;VOLT 300")
    instrument.errors.append((-221, "Settings conflict"))   # a second, already queued
    with pytest.raises(InstrumentCommandError) as caught:
        session.configure("SOUR:VOLT 300")
    err = caught.value
    text = str(err)
    for part in (IDENTITY, ADDRESS, "SOUR:VOLT 300", "-222", "Data out of range;VOLT 300", "-221"):
        assert part in text
    assert err.errors == [(-221, "Settings conflict"), (-222, "Data out of range;VOLT 300")]
    assert err.instrument_error is True and err.link_lost is False
    assert instrument.log[-3:] == ["SYST:ERR?", "SYST:ERR?", "SYST:ERR?"]   # read until 0
    assert session.state == "ready"


def test_query_values_appends_the_error_check_in_the_same_message(session, instrument):
    instrument.answer("OUTP?", "1")
    assert session.query_values("OUTP?", (replies.boolean,)) == [True]
    assert instrument.log[-1] == "OUTP?;:SYST:ERR?"


def test_failed_query_raises_the_instrument_error_at_once(session, instrument):
    instrument.fail("READ?", -221, "Settings conflict")
    with pytest.raises(InstrumentCommandError, match="-221"):
        session.query_values("READ?", (replies.readings(2),))
    assert session.state == "ready"


@pytest.mark.parametrize("reply", [
    "1.0.0,2",                 # not a number
    "nan,1",                   # float() would take it, SCPI does not
    "1,2,3",                   # wrong field count
    "+1.0E+00",                # one field missing
    "",                        # empty
])
def test_garbled_reply_raises_response_error_never_a_number(session, instrument, reply):
    instrument.answer("READ?", reply)
    with pytest.raises(ResponseError) as caught:
        session.query_values("READ?", (replies.readings(2),))
    assert ADDRESS in str(caught.value) and "READ?" in str(caught.value)
    assert session.state == "dirty"


def test_wrong_number_of_response_units_is_a_response_error(session, instrument):
    instrument.answer("OUTP?", "1;1")
    with pytest.raises(ResponseError, match="response unit"):
        session.query_values("OUTP?", (replies.boolean,))


def test_non_ascii_reply_is_a_response_error(session, instrument):
    instrument.answer("OUTP?", b"\xff\xfe")
    with pytest.raises(ResponseError, match="ASCII"):
        session.query("OUTP?")


def test_overflow_marker_raises_over_range(session, instrument):
    instrument.answer("READ?", "+1.000000000E+00,+9.900000000E+37")
    with pytest.raises(OverRangeError, match="overflow"):
        session.query_values("READ?", (replies.readings(2),))
    assert session.state == "ready"


def test_timeout_then_late_reply_is_never_taken_as_the_next_answer(session, instrument):
    instrument.answer("MEAS:VOLT?", "+7.000000000E-01")
    instrument.answer("OUTP?", "0")
    instrument.stall()
    with pytest.raises(LinkLostError) as caught:
        session.query_values("MEAS:VOLT?", (replies.real,))
    assert caught.value.link_lost and "no complete reply" in str(caught.value)
    assert session.state == "dirty"
    instrument.release()     # the late reply arrives now
    assert session.query_values("OUTP?", (replies.boolean,)) == [False]
    # drained, resynchronised with *IDN?, status cleared, then the real query
    assert instrument.log[-3:] == ["*IDN?", "*CLS", "OUTP?;:SYST:ERR?"]


def test_late_reply_arriving_after_the_drain_is_discarded_by_the_identity_marker(session, instrument):
    instrument.answer("OUTP?", "1")      # a late "1" that *OPC? could be mistaken for
    instrument.answer("MEAS:VOLT?", "+7.000000000E-01")
    instrument.stall(release_on_next_message=True)
    with pytest.raises(LinkLostError):
        session.query_values("OUTP?", (replies.boolean,))
    instrument.answer("OUTP?", "0")
    assert session.query_values("OUTP?", (replies.boolean,)) == [False]


def test_resync_fails_then_reconnects(rm, session, instrument):
    instrument.answer("OUTP?", "0")
    instrument.stall()
    with pytest.raises(LinkLostError):
        session.query("OUTP?")
    instrument.stalled = False           # the instrument recovers, the old socket stays silent
    instrument.outbox.clear()
    # make the resync's *IDN? go unanswered once: drop that connection's output
    original = instrument._reply
    calls = {"n": 0}

    def lose_first_idn(message):
        if message == "*IDN?" and calls["n"] == 0:
            calls["n"] += 1
            return None
        return original(message)
    instrument._reply = lose_first_idn
    assert session.query("OUTP?") == "0"
    assert len(rm.open_calls) == 2       # it reconnected
    assert session.state == "ready"


def test_oserror_on_write_becomes_link_lost_and_next_use_reconnects(rm, session, instrument):
    instrument.write_error = ConnectionResetError(104, "Connection reset by peer")
    with pytest.raises(LinkLostError, match="write failed"):
        session.configure("OUTP OFF")
    assert session.state == "broken"
    session.configure("OUTP OFF")        # reconnects first
    assert len(rm.open_calls) == 2
    assert rm.resources[0].closed


def test_closed_connection_raises_link_lost_and_reconnect_restores(rm, session, instrument):
    instrument.answer("OUTP?", "0")
    instrument.drop()
    with pytest.raises(LinkLostError):
        session.query("OUTP?")
    session.reconnect()
    assert session.query("OUTP?") == "0"


def test_unreachable_instrument_raises_link_lost_naming_the_address(rm, session, instrument):
    instrument.drop()
    instrument.refuse_connections = True
    with pytest.raises(LinkLostError) as caught:
        session.reconnect()
    assert ADDRESS in str(caught.value) and "cannot open" in str(caught.value)
    with pytest.raises(LinkLostError, match="could not restore"):
        session.query("OUTP?")


def test_a_different_instrument_at_the_address_is_refused(rm, session, instrument):
    instrument.identity = "Other Maker,OM-9,1,1"
    with pytest.raises(InstrumentError, match="different instrument"):
        session.reconnect()
    assert session.state == "broken"


def test_closed_session_refuses_use_until_reconnected(session, instrument):
    instrument.answer("OUTP?", "0")
    session.close()
    with pytest.raises(InstrumentError, match="closed"):
        session.query("OUTP?")
    session.reconnect()
    assert session.query("OUTP?") == "0"


def test_write_unsynchronised_goes_out_while_dirty(session, instrument):
    instrument.stall()
    with pytest.raises(LinkLostError):
        session.query("OUTP?")
    session.write_unsynchronised("OUTP OFF")
    assert instrument.log[-1] == "OUTP OFF"
    assert session.state == "dirty"


def test_interrupted_exchange_leaves_the_session_dirty(session, instrument):
    """Ctrl-C between write and read must not let the next query take the old reply."""
    class Interrupt(BaseException):
        pass

    instrument.answer("OUTP?", "1")
    resource = session._resource
    original = resource.read_raw

    def interrupted():
        resource.read_raw = original
        raise Interrupt
    resource.read_raw = interrupted
    with pytest.raises(Interrupt):
        session.query("OUTP?")
    assert session.state == "dirty"
    instrument.answer("OUTP?", "0")
    assert session.query("OUTP?") == "0"


def test_read_error_queue_pops_everything(session, instrument):
    instrument.errors.extend([(-113, "Undefined header"), (-350, "Queue overflow")])
    assert session.read_error_queue() == [(-113, "Undefined header"), (-350, "Queue overflow")]
    assert session.read_error_queue() == []


def _block(values, tail=b';0,"No error"'):
    import numpy as np
    payload = np.asarray(values, dtype=">f8").tobytes()
    length = str(len(payload)).encode()
    return b"#" + str(len(length)).encode() + length + payload + tail


def test_binary_block_with_a_newline_byte_inside_is_read_by_length(session, instrument):
    import struct
    value = struct.unpack(">d", b"\x3f\xf0\x0a\x00\x00\x00\x00\x00")[0]   # contains 0x0A
    instrument.answer("TRAC:DATA? 0,1;:SYST:ERR?", _block([value, -2.5e-3, 1.0]))
    values = session.query_binary_floats("TRAC:DATA? 0,1")
    assert list(values) == [value, -2.5e-3, 1.0]
    assert session.state == "ready"


def test_binary_query_that_fails_raises_the_instrument_error(session, instrument):
    instrument.fail("TRAC:DATA? 5,1", -222, "Data out of range")
    with pytest.raises(InstrumentCommandError, match="-222"):
        session.query_binary_floats("TRAC:DATA? 5,1")
    assert session.state == "ready"


@pytest.mark.parametrize("reply", [
    b"#0" + b"\x00" * 8 + b';0,"No error"',       # indefinite length refused
    b"#2x8" + b"\x00" * 8 + b';0,"No error"',     # length not digits
    b"#17" + b"\x00" * 7 + b';0,"No error"',      # not a whole float64
    _block([1.0], tail=b'0,"No error"'),          # missing ';' after the block
    b'1.0,2.0;0,"No error"',                        # ASCII where a block was expected
])
def test_malformed_binary_block_raises_response_error(session, instrument, reply):
    instrument.answer("TRAC:DATA? 0,1;:SYST:ERR?", reply)
    with pytest.raises(ResponseError):
        session.query_binary_floats("TRAC:DATA? 0,1")
    assert session.state == "dirty"


def test_bad_per_call_timeout_is_refused_before_anything_is_sent(session, instrument):
    marker = len(instrument.log)
    for bad in (0, -1, float("nan"), float("inf")):
        with pytest.raises(ValueError):
            session.query("OUTP?", timeout_s=bad)
    assert instrument.log[marker:] == [] and session.state == "ready"
