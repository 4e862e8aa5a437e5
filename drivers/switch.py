"""Pixel / channel switch (docs/scpi-dialect.md, "Channel switch")."""
from __future__ import annotations

from typing import Any

from . import replies
from .base import ScpiInstrument
from .errors import InstrumentError


class ScpiChannelSwitch(ScpiInstrument):
    """Channels 1 … ``channels``. ``select`` closes one (the instrument opens the
    others first) and reads the whole bank back: exactly that channel must be closed."""

    OPEN_ALL = "ROUT:OPEN:ALL"   # device-specific header

    def __init__(self, address: str, *, resource_manager: Any, channels: int,
                 timeout_s: float = 5.0) -> None:
        if isinstance(channels, bool) or not isinstance(channels, int) or channels < 1:
            raise ValueError(f"channels must be an int >= 1, got {channels!r}")
        self.channels = channels
        super().__init__(address, resource_manager=resource_manager, timeout_s=timeout_s)

    def select(self, channel: int) -> None:
        """Connect exactly this channel (break before make), verified by read-back."""
        if isinstance(channel, bool) or not isinstance(channel, int) or not 1 <= channel <= self.channels:
            raise self._invalid(f"channel must be an int in 1..{self.channels}, got {channel!r}")
        self._session.configure(f"ROUT:CLOS (@{channel})")
        self._expect(channel, f"ROUT:CLOS (@{channel})")

    def selected(self) -> int | None:
        """The one closed channel, or None if all are open."""
        closed = self._closed()
        if len(closed) > 1:
            raise InstrumentError(f"several channels closed at once: {closed}",
                                  address=self.address, identity=self.identity,
                                  command=self._bank_query())
        return closed[0] if closed else None

    def open_all(self) -> None:
        self._session.configure(self.OPEN_ALL)
        self._expect(None, self.OPEN_ALL)

    def _bank_query(self) -> str:
        return f"ROUT:CLOS? (@{','.join(str(k) for k in range(1, self.channels + 1))})"

    def _closed(self) -> list[int]:
        states = self._ask(self._bank_query(), replies.booleans(self.channels))
        return [k for k, closed in enumerate(states, start=1) if closed]

    def _expect(self, channel: int | None, command: str) -> None:
        closed = self._closed()
        if closed != ([] if channel is None else [channel]):
            raise InstrumentError(f"after the command, closed channels read back as {closed}",
                                  address=self.address, identity=self.identity, command=command)
