"""One exception family for everything an instrument driver can raise.

The engine recognises the family without importing this module: every class carries
``instrument_error = True``; ``link_lost = True`` marks a connection that is gone or
hung (timeout, closed socket, reset), after which ``reconnect()`` is the way back.

Every message names the instrument (its ``*IDN?`` identity when known), its VISA address
and the command that was being sent, so a log line alone says what failed where.
"""
from __future__ import annotations

_COMMAND_SHOWN_CHARS = 120  # a 10,000-point list is not worth printing in full


def _shorten(command: str | None) -> str | None:
    if command is None or len(command) <= _COMMAND_SHOWN_CHARS:
        return command
    return command[:_COMMAND_SHOWN_CHARS] + f"... ({len(command)} chars)"


class InstrumentError(Exception):
    """Base of the family. Attributes: ``address``, ``identity``, ``command``, ``detail``."""

    instrument_error = True
    link_lost = False

    def __init__(self, detail: str, *, address: str = "", identity: str = "",
                 command: str | None = None) -> None:
        self.detail = detail
        self.address = address
        self.identity = identity
        self.command = command
        who = identity or "unidentified instrument"
        where = f"{who} at {address or 'unknown address'}"
        shown = _shorten(command)
        text = f"{where}: {detail}" if shown is None else f"{where}, command {shown!r}: {detail}"
        super().__init__(text)


class LinkLostError(InstrumentError):
    """No reply in time, socket closed or reset, or the resource could not be opened."""

    link_lost = True


class InstrumentCommandError(InstrumentError):
    """The instrument reported one or more errors in its queue after a command.

    ``errors`` holds the ``(code, message)`` pairs exactly as the instrument gave them.
    """

    def __init__(self, errors: list[tuple[int, str]], *, address: str = "",
                 identity: str = "", command: str | None = None) -> None:
        self.errors = list(errors)
        listed = "; ".join(f'{code},"{text}"' for code, text in self.errors)
        super().__init__(f"instrument reported {listed}", address=address,
                         identity=identity, command=command)


class ResponseError(InstrumentError):
    """A reply that does not parse as the command's documented answer (garbled, wrong
    field count, not a number, truncated block). Never turned into a number."""

    def __init__(self, detail: str, *, reply: str | bytes = "", address: str = "",
                 identity: str = "", command: str | None = None) -> None:
        self.reply = reply
        shown = reply if len(reply) <= 200 else reply[:200]
        super().__init__(f"{detail}; reply was {shown!r}", address=address,
                         identity=identity, command=command)


class OverRangeError(InstrumentError):
    """A reading came back as the SCPI overflow value (+/-9.9E37 or 9.91E37 NaN): the
    quantity is beyond the measure range. Raised rather than returned, so an overflow
    can never be plotted or fitted as if it were a value."""


class NotSettledError(InstrumentError):
    """The instrument did not report settled (light source) within the time allowed."""


class InvalidSettingError(InstrumentError, ValueError):
    """A value refused before anything is sent: NaN, infinite, negative where it cannot
    be, a channel outside the switch, a list too long. Also a ``ValueError``."""
