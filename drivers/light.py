"""Light source with shutter and reference cell (docs/scpi-dialect.md, "Light source")."""
from __future__ import annotations

import time

from . import replies
from .base import ScpiInstrument
from .errors import NotSettledError

_SETTLING_BIT = 1 << 1        # STATus:OPERation bit 1, SETTling (SCPI-99 ch. 20)
_POLL_S = 0.05


class ScpiLightSource(ScpiInstrument):
    """Shutter = ``OUTPut``; the lamp set-point is device-specific (``IRRADIANCE``).
    Readings of the reference cell: short-circuit current [A], temperature [C]."""

    IRRADIANCE = "SOUR:IRR"          # device-specific header
    MAX_IRRADIANCE_W_M2 = 1500.0     # dialect's set-point range

    def shutter(self, open_: bool) -> None:
        self._session.configure(f"OUTP {'ON' if open_ else 'OFF'}")

    def shutter_is_open(self) -> bool:
        return self._ask("OUTP?", replies.boolean)

    def set_irradiance(self, irradiance_w_m2: float) -> None:
        value = self._number("irradiance_w_m2", irradiance_w_m2, minimum=0,
                             maximum=self.MAX_IRRADIANCE_W_M2)
        self._session.configure(f"{self.IRRADIANCE} {value}")

    def read_irradiance_setpoint(self) -> float:
        return self._ask(f"{self.IRRADIANCE}?", replies.real)

    def wait_settled(self, timeout_s: float) -> None:
        """Poll the SETTling condition bit until clear; ``NotSettledError`` after
        ``timeout_s``. Polling keeps every exchange short, so a slow lamp is never
        mistaken for a lost link."""
        self._number("timeout_s", timeout_s, minimum=0)
        deadline = time.monotonic() + timeout_s
        while True:
            condition = self._ask("STAT:OPER:COND?", replies.integer)
            if not condition & _SETTLING_BIT:
                return
            if time.monotonic() >= deadline:
                raise NotSettledError(f"lamp still settling after {timeout_s:g} s",
                                      address=self.address, identity=self.identity,
                                      command="STAT:OPER:COND?")
            time.sleep(_POLL_S)

    def reference_current(self) -> float:
        """Reference cell short-circuit current [A]."""
        return self._ask("MEAS:CURR?", replies.reading)

    def reference_temperature(self) -> float:
        """Reference cell temperature [C]."""
        return self._ask("MEAS:TEMP?", replies.reading)
