"""Stage thermometer with set-point (docs/scpi-dialect.md, "Stage thermometer")."""
from __future__ import annotations

from . import replies
from .base import ScpiInstrument

# Celsius is defined as kelvin minus 273.15 (SI Brochure, 9th ed., section 2.3.1).
_ZERO_CELSIUS_K = 273.15


class ScpiThermometer(ScpiInstrument):
    """Reads the stage temperature in whatever ``UNIT:TEMP`` the instrument is set to
    (asked in the same message) and returns degrees Celsius."""

    SETPOINT = "SOUR:TEMP"      # device-specific header

    def temperature(self) -> float:
        """Stage temperature [C]."""
        unit, value = self._session.query_values(
            "UNIT:TEMP?;:MEAS:TEMP?", (replies.word("C", "CEL", "K"), replies.reading))
        return value - _ZERO_CELSIUS_K if unit == "K" else value

    def set_target(self, temperature_c: float) -> None:
        self._session.configure(f"{self.SETPOINT} {self._number('temperature_c', temperature_c)}")

    def read_target(self) -> float:
        """The stage set-point [C] as the instrument reports it."""
        return self._ask(f"{self.SETPOINT}?", replies.real)
