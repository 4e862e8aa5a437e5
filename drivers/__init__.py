"""Instrument drivers: SCPI over VISA, one class per bench role.

The composition root builds drivers from a bench profile through ``DRIVERS``::

    smu = DRIVERS["scpi-smu"](address, resource_manager="@py", timeout_s=5.0)
    switch = DRIVERS["scpi-switch"](address, resource_manager="@py", channels=6)

Every method raises only ``InstrumentError`` subclasses (see ``drivers.errors``).
"""
from .errors import (InstrumentCommandError, InstrumentError, InvalidSettingError,
                     LinkLostError, NotSettledError, OverRangeError, ResponseError)
from .light import ScpiLightSource
from .session import ScpiSession
from .smu import ScpiSourceMeter, SmuReading
from .switch import ScpiChannelSwitch
from .thermometer import ScpiThermometer

DRIVERS = {
    "scpi-smu": ScpiSourceMeter,
    "scpi-light": ScpiLightSource,
    "scpi-thermometer": ScpiThermometer,
    "scpi-switch": ScpiChannelSwitch,
}

__all__ = [
    "DRIVERS", "ScpiSession", "ScpiSourceMeter", "SmuReading", "ScpiLightSource",
    "ScpiThermometer", "ScpiChannelSwitch", "InstrumentError", "LinkLostError",
    "InstrumentCommandError", "ResponseError", "OverRangeError", "NotSettledError",
    "InvalidSettingError",
]
