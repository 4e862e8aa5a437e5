"""Light source with shutter and reference cell (docs/scpi-dialect.md, "Light source")."""
from __future__ import annotations

from . import replies
from .base import ScpiInstrument
from .errors import LinkLostError, NotSettledError

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
        """Wait for ``*OPC?`` (the dialect: answered once the lamp has settled), at most
        ``timeout_s``. ``NotSettledError`` if no answer came in time: the lamp is still
        settling (or the link is gone; the next call finds out). The late ``1`` is never
        taken for another answer: the session resynchronises first."""
        self._number("timeout_s", timeout_s, positive=True)
        try:
            done = self._session.query_values("*OPC?", (replies.boolean,), timeout_s=timeout_s)[0]
        except LinkLostError as exc:
            raise NotSettledError(f"no operation-complete within {timeout_s:g} s ({exc.detail})",
                                  address=self.address, identity=self.identity,
                                  command="*OPC?") from exc
        if not done:
            raise NotSettledError("operation-complete answered 0", address=self.address,
                                  identity=self.identity, command="*OPC?")

    def reference_current(self) -> float:
        """Reference cell short-circuit current [A]."""
        return self._ask("MEAS:CURR?", replies.reading)

    def reference_temperature(self) -> float:
        """Reference cell temperature [C]."""
        return self._ask("MEAS:TEMP?", replies.reading)
