"""The generic SCPI engine on a toy instrument (no sockets).

Rules checked here are those of IEEE 488.2 (program-message syntax, suffix multipliers of
Table 7-2, common commands, status byte and ESR bits) and SCPI-1999 (error codes of Vol. 2
section 21.8, the path rule of Vol. 1 section 6.2.4, status registers of Vol. 2 ch. 20); the
codes and texts are the standard's.
"""
from __future__ import annotations

import pytest

from simulated_instrument.scpi_engine import (
    Boolean, Choice, Integer, Numeric, ScpiError, ScpiInstrument, StatusRegister, format_nr3,
    parse_number, split_units,
)


class Toy(ScpiInstrument):
    identity = "Toy Works,T1,0,1.0"

    def build_commands(self, t):
        self.values = {"VOLT": 0.0, "CURR": 0.0, "COUN": 1, "TSOU": "IMM", "OUTP": False,
                       "FREQ": 0.0, "RES": 0.0, "DEL": 0.0}
        self.condition = 0

        def setting(pattern, key, param):
            t.setting(pattern, param, lambda ctx: self.values[key],
                      lambda ctx, v: self.values.__setitem__(key, v))

        setting("[SOURce#2:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", "VOLT", Numeric("V", -10.0, 10.0, 0.0))
        setting("[SOURce#2:]CURRent[:LEVel]", "CURR", Numeric("A", -1.0, 1.0, 0.0))
        setting("TRIGger:COUNt", "COUN", Integer(None, 1, 100, 1))
        setting("TRIGger:SOURce", "TSOU", Choice("IMMediate", "BUS"))
        setting("TRIGger:DELay", "DEL", Numeric("S", 0.0, 10.0, 0.0))
        setting("OUTPut#[:STATe]", "OUTP", Boolean())
        setting("SENSe:FREQuency", "FREQ", Numeric("HZ", 0.0, 1e10, 0.0))
        setting("SENSe:RESistance", "RES", Numeric("OHM", 0.0, 1e10, 0.0))
        t.add("MEASure:VOLTage[:DC]", query=lambda ctx: format_nr3(1.5))

    def update_conditions(self):
        self.status.operation.set_condition(self.condition)


def run(toy: Toy, message: str) -> str | None:
    reply = toy.execute(message)
    return None if reply is None else reply.decode().rstrip("\n")


def errors(toy: Toy) -> list[int]:
    out = []
    while True:
        code = int(run(toy, "SYST:ERR?").split(",")[0])
        if code == 0:
            return out
        out.append(code)


@pytest.fixture
def toy():
    return Toy()


def test_long_short_optional_nodes_and_case(toy):
    for message, expected in [("VOLT 1", 1.0), ("VOLTAGE 2", 2.0), ("volt 3", 3.0),
                              ("SOURCE:VOLTAGE:LEVEL:IMMEDIATE:AMPLITUDE 4", 4.0),
                              ("sour:volt:lev 5", 5.0), (":SOUR:VOLT:AMPL 6", 6.0)]:
        run(toy, message)
        assert toy.values["VOLT"] == expected, message
    assert errors(toy) == []
    # neither the short nor the long form: undefined header (SCPI-99 Vol. 1 6.2.1)
    for bad in ("VOL 1", "VOLTAG 1", "VOLTAGES 1"):
        run(toy, bad)
        assert errors(toy) == [-113], bad


def test_numeric_suffixes(toy):
    run(toy, "SOUR2:VOLT 3")
    run(toy, "SOUR1:VOLT 2")
    assert toy.values["VOLT"] == 2.0 and errors(toy) == []
    run(toy, "SOUR3:VOLT 1")
    run(toy, "OUTP12 ON")
    assert errors(toy) == [-114, -114]


def test_mnemonic_longer_than_12_characters(toy):
    run(toy, "VOLTAGEVOLTAGEX 1")
    assert errors(toy) == [-112]


@pytest.mark.parametrize("text, unit, expected", [
    # IEEE 488.2 Table 7-2 multipliers; M is mega only for OHM and HZ
    ("100mV", "V", 0.1), ("1500MV", "V", 1.5), ("10MA", "A", 0.01), ("2US", "S", 2e-6),
    ("1MOHM", "OHM", 1e6), ("1MHZ", "HZ", 1e6), ("2 KOHM", "OHM", 2000.0), ("1 V", "V", 1.0),
    ("1MAV", "V", 1e6), (".5", None, 0.5), ("-2.5E-3", None, -2.5e-3), ("1e 3", None, 1000.0),
    ("#H1F", None, 31.0), ("#B101", None, 5.0), ("#Q17", None, 15.0),
])
def test_numbers_with_multipliers_and_units(text, unit, expected):
    assert parse_number(text, unit) == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize("message, code", [
    ("VOLT 1 A", -131), ("TRIG:COUN 5V", -138), ("VOLT 1E40000", -123), ("VOLT " + "1" * 256, -124),
    ("VOLT 1.2.3", -120), ("VOLT ABC", -104), ("VOLT 1 2", -103), ("VOLT 11", -222), ("VOLT", -109),
    ("VOLT 1,2", -108), ("TRIG:SOUR XYZ", -141), ("TRIG:SOUR VERYLONGMNEMONICX", -144),
    ("OUTP MAYBE", -141), ("*ESE", -109), ("*ESE 0,1", -108), ("*ESE 256", -222), ("VOLT,1", -111),
    ("*XYZ", -113), ("VOLT::LEV 1", -102), ('VOLT "1"', -104), ("VOLT 1,,2", -102), ("*IDN", -113),
    ("MEAS:VOLT 1", -113),
])
def test_standard_error_codes(toy, message, code):
    run(toy, message)
    assert errors(toy) == [code]


def test_min_max_def(toy):
    run(toy, "VOLT MAX")
    assert toy.values["VOLT"] == 10.0
    assert run(toy, "VOLT? MIN") == "-1.000000000E+01"
    assert run(toy, "VOLT? DEF") == "+0.000000000E+00"
    run(toy, "TRIG:COUN MAXIMUM")
    assert run(toy, "TRIG:COUN?") == "100"
    assert errors(toy) == []


def test_booleans_and_character_data_replies(toy):
    for value, expected in [("ON", "1"), ("OFF", "0"), ("1", "1"), ("0", "0"), ("2.7", "1")]:
        run(toy, f"OUTP {value}")
        assert run(toy, "OUTP?") == expected
    run(toy, "TRIG:SOUR bus")
    assert run(toy, "TRIG:SOUR?") == "BUS"


def test_path_rule(toy):
    run(toy, "SOUR:VOLT 1;CURR 0.5")          # CURR is SOUR:CURR
    assert toy.values["CURR"] == 0.5
    run(toy, "TRIG:COUN 5;SOUR BUS")          # SOUR is TRIG:SOUR
    assert toy.values["TSOU"] == "BUS"
    run(toy, "TRIG:COUN 6;:VOLT 2")           # ;: back to the root
    assert toy.values["VOLT"] == 2.0
    run(toy, "TRIG:COUN 7;*WAI;SOUR IMM")      # a common command leaves the path alone
    assert toy.values["TSOU"] == "IMM" and toy.values["COUN"] == 7
    assert errors(toy) == []
    run(toy, "SOUR:VOLT 1;SOUR:CURR 0.1")     # the client trap: SOUR:SOUR:CURR
    assert errors(toy) == [-113]


def test_queries_joined_and_errors_do_not_stop_the_message(toy):
    assert run(toy, "VOLT 3;VOLT?;:TRIG:COUN?") == "+3.000000000E+00;1"
    assert run(toy, "FOO;:VOLT 4;:VOLT?;*IDN?") == "+4.000000000E+00;Toy Works,T1,0,1.0"
    assert errors(toy) == [-113]
    assert run(toy, "") is None and run(toy, ";;") is None
    assert run(toy, "VOLT 1\r") is None and toy.values["VOLT"] == 1.0


def test_split_respects_strings_and_blocks():
    assert split_units('A "x;y";B') == ['A "x;y"', "B"]
    assert split_units("A #13a;b;B") == ["A #13a;b", "B"]
    assert split_units("A (@1;2);B") == ["A (@1;2)", "B"]
    with pytest.raises(ScpiError) as info:
        split_units('A "open')
    assert info.value.code == -102


def test_error_queue_overflow_keeps_oldest_and_marks_last(toy):
    for _ in range(20):
        run(toy, "VOLT 99")
    assert run(toy, "SYST:ERR:COUN?") == "16"
    codes = errors(toy)
    # SCPI-99 Vol. 2 21.8: FIFO, on overflow the last entry becomes -350
    assert codes == [-222] * 15 + [-350]
    assert run(toy, "SYST:ERR?") == '0,"No error"'
    assert run(toy, "SYST:ERR:NEXT?") == '0,"No error"'


def test_error_text_and_detail(toy):
    run(toy, "FOO:BAR")
    assert run(toy, "SYST:ERR?") == '-113,"Undefined header;FOO:BAR"'


def test_esr_bits_by_error_class(toy):
    # IEEE 488.2 11.5.1: CME bit 5 (32), EXE bit 4 (16), DDE bit 3 (8), QYE bit 2 (4); PON at power-on
    assert int(run(toy, "*ESR?")) == 128
    assert int(run(toy, "*ESR?")) == 0            # reading clears
    run(toy, "FOO")
    assert int(run(toy, "*ESR?")) == 32
    run(toy, "VOLT 99")
    assert int(run(toy, "*ESR?")) == 16
    toy.push_error(-350)
    toy.push_error(-410)
    assert int(run(toy, "*ESR?")) == 8 | 4


def test_status_byte_ese_sre(toy):
    run(toy, "*CLS")
    assert run(toy, "*STB?") == "0"
    run(toy, "FOO")
    assert int(run(toy, "*STB?")) & 4                # error queue not empty (SCPI)
    run(toy, "*ESE 32;*SRE 32")
    stb = int(run(toy, "*STB?"))
    assert stb & 32 and stb & 64                     # ESB and MSS
    assert run(toy, "*ESE?;*SRE?") == "32;32"
    assert int(run(toy, "*IDN?;*STB?").split(";")[1]) & 16   # MAV: a reply is pending
    run(toy, "*CLS")
    assert int(run(toy, "*STB?")) == 0
    assert run(toy, "*ESE?") == "32"                 # *CLS keeps the enable registers


def test_operation_register_transitions_and_preset(toy):
    run(toy, "STAT:OPER:ENAB 8")
    toy.condition = 8
    assert run(toy, "STAT:OPER:COND?") == "8"
    assert int(run(toy, "*STB?")) & 128              # OPERation summary
    assert run(toy, "STAT:OPER?") == "8"
    assert run(toy, "STAT:OPER:EVEN?") == "0"        # reading clears
    run(toy, "STAT:OPER:NTR 8;PTR 0")
    toy.condition = 0
    assert run(toy, "STAT:OPER:EVEN?") == "8"        # falling edge latched through NTR
    run(toy, "STAT:PRES")
    assert run(toy, "STAT:OPER:ENAB?;PTR?;NTR?") == "0;32767;0"
    assert run(toy, "STAT:QUES:ENAB #H10;ENAB?") == "16"


def test_status_register_unit():
    reg = StatusRegister()
    reg.set_condition(0b101)
    assert reg.event == 0b101
    reg.read_event()
    reg.set_condition(0b100)
    assert reg.event == 0                            # falling edges not latched by default
    reg.enable = 0b100
    reg.set_condition(0)
    reg.set_condition(0b100)
    assert reg.summary


def test_common_commands(toy):
    assert run(toy, "*IDN?") == "Toy Works,T1,0,1.0"
    assert run(toy, "*TST?") == "0"
    assert run(toy, "*OPC?") == "1"
    run(toy, "*ESR?")
    run(toy, "*OPC")
    assert int(run(toy, "*ESR?")) & 1
    assert run(toy, "SYST:VERS?") == "1999.0"


def test_nr3_format():
    assert format_nr3(0.0123) == "+1.230000000E-02"
    assert format_nr3(float("inf")) == "+9.90000000E+37"
    assert format_nr3(float("nan")) == "+9.91000000E+37"
