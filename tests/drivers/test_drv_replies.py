"""Strict reply parsing: what is a number, what is not (IEEE 488.2 section 8.7 response
forms: NR1 integers, NR2 fixed point, NR3 exponent; SCPI-99 Vol. 1 section 7.2.1.5 for the
9.9E37 / 9.91E37 markers)."""
import math

import pytest
from hypothesis import given, strategies as st

from drivers import replies


@pytest.mark.parametrize("text, value", [
    ("1", 1.0), ("-1.5", -1.5), ("+2.5E-03", 2.5e-3), (".5", 0.5), ("5.", 5.0),
    ("+1.234500000E-03", 1.2345e-3), ("-0", -0.0),
])
def test_real_accepts_the_488_2_numeric_forms(text, value):
    assert replies.real(text) == value


@pytest.mark.parametrize("text", ["", " 1", "1 ", "nan", "NAN", "inf", "1_000", "0x10",
                                  "1e", "E5", "1.2.3", "--1", "1,2", "1e999"])
def test_real_refuses_what_float_would_take_or_nonsense(text):
    with pytest.raises(replies.MalformedReply):
        replies.real(text)


@pytest.mark.parametrize("text", ["+9.900000000E+37", "-9.900000000E+37", "+9.910000000E+37"])
def test_reading_refuses_the_overflow_markers(text):
    assert replies.real(text) == float(text)       # a setting read-back keeps it
    with pytest.raises(replies.OverflowReading):
        replies.reading(text)


def test_just_below_the_marker_is_a_value():
    assert replies.reading("9.8E37") == 9.8e37


@given(st.floats(allow_nan=False, allow_infinity=False, min_value=-9.8e37, max_value=9.8e37))
def test_nr3_as_the_simulator_formats_it_round_trips(value):
    text = f"{value:+.9E}"              # dialect: <NR3> reals as %+.9E
    assert replies.reading(text) == float(text)


@given(st.floats(allow_nan=False, allow_infinity=False))
def test_nrf_formatting_parses_back_exactly_enough(value):
    text = replies.nrf(value)
    assert math.isclose(replies.real(text), value, rel_tol=1e-11, abs_tol=0.0) or value == 0


def test_nrf_refuses_non_finite():
    for bad in (float("nan"), float("inf"), -float("inf")):
        with pytest.raises(ValueError):
            replies.nrf(bad)


def test_booleans_and_integers_are_exact():
    assert replies.boolean("1") is True and replies.boolean("0") is False
    for bad in ("ON", "2", "", " 1", "1.0", "+1"):
        with pytest.raises(replies.MalformedReply):
            replies.boolean(bad)
    assert replies.integer("-42") == -42
    for bad in ("4.2", "", "1e3"):
        with pytest.raises(replies.MalformedReply):
            replies.integer(bad)


def test_error_entries_with_semicolons_and_doubled_quotes():
    assert replies.error_entry('-222,"Data out of range;VOLT 300"') == (-222, "Data out of range;VOLT 300")
    assert replies.error_entry('0,"No error"') == (0, "No error")
    assert replies.error_entry('-100,"say ""hi"""') == (-100, 'say "hi"')
    for bad in ('-222', '"x"', '-222,x', '-222,"x'):
        with pytest.raises(replies.MalformedReply):
            replies.error_entry(bad)


def test_split_units_ignores_semicolons_inside_strings():
    assert replies.split_units('1;0,"a;b"') == ["1", '0,"a;b"']
    assert replies.split_units("x") == ["x"]
    with pytest.raises(replies.MalformedReply):
        replies.split_units('1;0,"open')


def test_word_and_fixed_length_lists():
    assert replies.word("VOLT", "CURR")("CURR") == "CURR"
    with pytest.raises(replies.MalformedReply):
        replies.word("VOLT", "CURR")("volt")
    assert replies.booleans(3)("1,0,0") == [True, False, False]
    with pytest.raises(replies.MalformedReply):
        replies.booleans(3)("1,0")


def test_reading_triples_checks_every_field():
    parse = replies.reading_triples(2)
    assert parse("1,2,0,3,4,1") == [(1.0, 2.0, False), (3.0, 4.0, True)]
    assert parse([1.0, 2.0, 0.0, 3.0, 4.0, 1.0]) == [(1.0, 2.0, False), (3.0, 4.0, True)]
    with pytest.raises(replies.MalformedReply):
        parse("1,2,0,3,4")
    with pytest.raises(replies.MalformedReply):
        parse("1,2,0,3,4,2")
    with pytest.raises(replies.OverflowReading):
        parse("1,2,0,3,-9.9E37,0")
