"""Recorded-exchange tests of the light source, thermometer and channel switch drivers."""
import pytest

from drivers import (InstrumentCommandError, InstrumentError, InvalidSettingError,
                     NotSettledError, OverRangeError, ScpiChannelSwitch, ScpiLightSource,
                     ScpiThermometer)
from drv_fakes import ADDRESS


def _steps(log):
    return [m for m in log if m not in ("SYST:ERR?", "*IDN?", "*CLS")]


# ---------------------------------------------------------------- light source
def test_light_shutter_irradiance_and_reference_cell(rm, instrument):
    light = ScpiLightSource(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("OUTP?", "1")
    instrument.answer("MEAS:CURR?", "+1.190000000E-01")
    instrument.answer("MEAS:TEMP?", "+2.510000000E+01")
    light.set_irradiance(1000)
    light.shutter(True)
    assert light.shutter_is_open() is True
    assert light.reference_current() == 0.119
    assert light.reference_temperature() == 25.1
    assert _steps(instrument.log) == ["SOUR:IRR 1000", "OUTP ON", "OUTP?;:SYST:ERR?",
                                      "MEAS:CURR?;:SYST:ERR?", "MEAS:TEMP?;:SYST:ERR?"]


def test_light_refuses_setpoints_outside_its_range(rm, instrument):
    light = ScpiLightSource(ADDRESS, resource_manager=rm, timeout_s=0.5)
    for bad in (-1, 1500.5, float("nan")):
        with pytest.raises(InvalidSettingError):
            light.set_irradiance(bad)
    assert not any(m.startswith("SOUR:IRR") for m in instrument.log)


def test_light_wait_settled_uses_operation_complete(rm, instrument):
    light = ScpiLightSource(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("*OPC?", "1")
    light.wait_settled(5.0)
    assert instrument.log[-1] == "*OPC?;:SYST:ERR?"
    assert rm.resources[-1].timeout == 500          # the session timeout is restored


def test_light_not_settled_in_time_is_not_a_lost_link(rm, instrument):
    light = ScpiLightSource(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("*OPC?", "1")
    instrument.answer("OUTP?", "0")
    instrument.stall()                   # the lamp takes longer than allowed
    with pytest.raises(NotSettledError) as caught:
        light.wait_settled(0.1)
    assert caught.value.link_lost is False and "0.1 s" in str(caught.value)
    instrument.release()                 # the late "1" must not answer the next query
    assert light.shutter_is_open() is False


def test_light_reference_overflow(rm, instrument):
    light = ScpiLightSource(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("MEAS:CURR?", "+9.900000000E+37")
    with pytest.raises(OverRangeError):
        light.reference_current()


# ---------------------------------------------------------------- thermometer
@pytest.mark.parametrize("unit, reply, celsius", [
    ("C", "+2.500000000E+01", 25.0),
    ("K", "+2.981500000E+02", 25.0),   # 298.15 K = 25 C by the definition of the Celsius scale
])
def test_thermometer_returns_celsius_whatever_the_unit(rm, instrument, unit, reply, celsius):
    thermometer = ScpiThermometer(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("UNIT:TEMP?", unit)
    instrument.answer("MEAS:TEMP?", reply)
    assert thermometer.temperature() == pytest.approx(celsius, abs=1e-9)
    assert instrument.log[-1] == "UNIT:TEMP?;:MEAS:TEMP?;:SYST:ERR?"


def test_thermometer_setpoint(rm, instrument):
    thermometer = ScpiThermometer(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("SOUR:TEMP?", "+2.500000000E+01")
    thermometer.set_target(25)
    assert thermometer.read_target() == 25.0
    assert _steps(instrument.log) == ["SOUR:TEMP 25", "SOUR:TEMP?;:SYST:ERR?"]


def test_thermometer_unknown_unit_is_a_response_error(rm, instrument):
    from drivers import ResponseError
    thermometer = ScpiThermometer(ADDRESS, resource_manager=rm, timeout_s=0.5)
    instrument.answer("UNIT:TEMP?", "FAR")
    instrument.answer("MEAS:TEMP?", "+7.700000000E+01")
    with pytest.raises(ResponseError):
        thermometer.temperature()


# ---------------------------------------------------------------- channel switch
def test_switch_select_is_verified_by_reading_the_bank(rm, instrument):
    switch = ScpiChannelSwitch(ADDRESS, resource_manager=rm, channels=4, timeout_s=0.5)
    instrument.answer("ROUT:CLOS? (@1,2,3,4)", "0,0,1,0")
    switch.select(3)
    assert switch.selected() == 3
    assert _steps(instrument.log) == ["ROUT:CLOS (@3)", "ROUT:CLOS? (@1,2,3,4);:SYST:ERR?",
                                      "ROUT:CLOS? (@1,2,3,4);:SYST:ERR?"]


def test_switch_select_that_did_not_take_raises(rm, instrument):
    switch = ScpiChannelSwitch(ADDRESS, resource_manager=rm, channels=4, timeout_s=0.5)
    instrument.answer("ROUT:CLOS? (@1,2,3,4)", "1,0,0,0")
    with pytest.raises(InstrumentError, match=r"\[1\]"):
        switch.select(2)


def test_switch_open_all_and_none_selected(rm, instrument):
    switch = ScpiChannelSwitch(ADDRESS, resource_manager=rm, channels=2, timeout_s=0.5)
    instrument.answer("ROUT:CLOS? (@1,2)", "0,0")
    switch.open_all()
    assert switch.selected() is None
    assert _steps(instrument.log)[0] == "ROUT:OPEN:ALL"


def test_switch_two_closed_is_an_error(rm, instrument):
    switch = ScpiChannelSwitch(ADDRESS, resource_manager=rm, channels=2, timeout_s=0.5)
    instrument.answer("ROUT:CLOS? (@1,2)", "1,1")
    with pytest.raises(InstrumentError, match="several"):
        switch.selected()


def test_switch_channel_range_checked_locally_and_by_instrument(rm, instrument):
    switch = ScpiChannelSwitch(ADDRESS, resource_manager=rm, channels=2, timeout_s=0.5)
    for bad in (0, 3, 1.0, True):
        with pytest.raises(InvalidSettingError):
            switch.select(bad)
    instrument.fail("ROUT:CLOS (@2)", -222, "Data out of range")
    with pytest.raises(InstrumentCommandError):
        switch.select(2)
    with pytest.raises(ValueError):
        ScpiChannelSwitch(ADDRESS, resource_manager=rm, channels=0)
