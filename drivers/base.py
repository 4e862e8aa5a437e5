"""What every role driver shares: its session, identity, reconnect/close, argument checks."""
from __future__ import annotations

import math
import numbers
from typing import Any

from . import replies
from .errors import InvalidSettingError
from .session import ScpiSession


class ScpiInstrument:
    """Base of the role drivers. ``resource_manager`` is a pyvisa ResourceManager, a
    test transport with ``open_resource``, or a backend string such as ``'@py'``; it has
    no default here: the composition root chooses it."""

    def __init__(self, address: str, *, resource_manager: Any, timeout_s: float = 5.0) -> None:
        self._session = ScpiSession(address, timeout_s=timeout_s,
                                    resource_manager=resource_manager,
                                    on_connect=self._after_connect)

    @property
    def address(self) -> str:
        return self._session.address

    @property
    def identity(self) -> str:
        """The raw ``*IDN?`` reply read at connect."""
        return self._session.identity

    @property
    def session(self) -> ScpiSession:
        return self._session

    def reconnect(self) -> None:
        self._session.reconnect()

    def close(self) -> None:
        self._session.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.address!r}, identity={self.identity!r})"

    def _after_connect(self, session: ScpiSession) -> None:
        """Runs after every (re)connection, with the session ready. Override."""

    def _ask(self, command: str, parse) -> Any:
        """One query with its error check; ``parse`` is a ``drivers.replies`` parser."""
        return self._session.query_values(command, (parse,))[0]

    def _number(self, name: str, value: Any, *, minimum: float | None = None,
                maximum: float | None = None, positive: bool = False) -> str:
        """Check a numeric argument and format it for the wire; refuse before sending."""
        if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value):
            raise self._invalid(f"{name} must be a finite number, got {value!r}")
        if positive and not value > 0:
            raise self._invalid(f"{name} must be > 0, got {value!r}")
        if minimum is not None and value < minimum:
            raise self._invalid(f"{name} must be >= {minimum:g}, got {value!r}")
        if maximum is not None and value > maximum:
            raise self._invalid(f"{name} must be <= {maximum:g}, got {value!r}")
        return replies.nrf(float(value))

    def _invalid(self, detail: str) -> InvalidSettingError:
        return InvalidSettingError(detail, address=self.address, identity=self.identity)
