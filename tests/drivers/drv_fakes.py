"""A scripted instrument behind a fake VISA resource manager: no network, exact transcripts.

``ScriptedInstrument`` records every message it receives (``log``) and answers queries
from a script: ``answer(message, reply)`` for an exact message. A message ending in
``;:SYST:ERR?`` is answered from the script of its first part plus the error queue, so
scripts are written once per query; a compound query ``A?;:B?`` whose units are all
scripted is answered unit by unit. ``SYST:ERR?`` pops the fake's queue; ``fail(message,
code, text)`` queues an error when that message arrives. Unscripted queries get no reply
(as a real instrument that did not understand) and are listed in ``unexpected``.

Faults, as pyvisa-py shows them: ``stall()`` holds replies back (reads time out) until
``release()``; ``drop()`` closes the connection (writes raise ``BrokenPipeError``, reads
time out); ``refuse_connections`` makes ``open_resource`` fail like pyvisa-py does.
"""
from __future__ import annotations

from collections import deque
from typing import Callable

from pyvisa import constants
from pyvisa.errors import VisaIOError

IDENTITY = "Test Works,TW-1,SN42,0.1"
ADDRESS = "TCPIP0::192.0.2.7::5025::SOCKET"   # TEST-NET-1 (RFC 5737): never reachable


def _timeout() -> VisaIOError:
    return VisaIOError(constants.StatusCode.error_timeout)


class ScriptedInstrument:
    def __init__(self, identity: str = IDENTITY) -> None:
        self.identity = identity
        self.log: list[str] = []
        self.unexpected: list[str] = []
        self.errors: deque[tuple[int, str]] = deque()
        self.outbox = bytearray()
        self.held = bytearray()
        self.stalled = False
        self.release_on_next_message = False
        self.connected = True
        self.refuse_connections = False
        self.write_error: Exception | None = None
        self.connections = 0
        self._answers: dict[str, deque] = {}
        self._failures: dict[str, tuple[int, str]] = {}

    # ---- scripting
    def answer(self, message: str, *replies: str | bytes | Callable[[], str | bytes]) -> None:
        """Reply to ``message``; several replies are used in turn, the last one kept."""
        self._answers[message] = deque(replies)

    def fail(self, message: str, code: int, text: str) -> None:
        self._failures[message] = (code, text)

    def stall(self, release_on_next_message: bool = False) -> None:
        self.stalled = True
        self.release_on_next_message = release_on_next_message

    def release(self) -> None:
        self.stalled = False
        self.outbox += self.held
        self.held.clear()

    def drop(self) -> None:
        self.connected = False
        self.outbox.clear()
        self.held.clear()

    def messages_since(self, marker: int) -> list[str]:
        return self.log[marker:]

    # ---- the instrument side
    def receive(self, message: str) -> None:
        if self.release_on_next_message and self.stalled and self.held:
            self.release()            # the late reply goes out before this message's
        self.log.append(message)
        reply = self._reply(message)
        if reply is not None:
            (self.held if self.stalled else self.outbox).extend(reply + b"\n")

    def _reply(self, message: str) -> bytes | None:
        if message in self._failures:
            self.errors.append(self._failures[message])
        if message == "*IDN?":
            return self.identity.encode()
        if message == "*CLS":
            self.errors.clear()
            return None
        if message == "SYST:ERR?":
            return self._pop_error()
        if message in self._answers:      # scripted verbatim, error entry included
            return self._next_answer(message)
        checked = message.endswith(";:SYST:ERR?")
        head = message[: -len(";:SYST:ERR?")] if checked else message
        if head in self._failures and checked:
            self.errors.append(self._failures[head])
        parts = head.split(";:")
        if head in self._answers or all(part in self._answers for part in parts):
            keys = [head] if head in self._answers else parts
            reply = b";".join(self._next_answer(key) for key in keys)
            return reply + b";" + self._pop_error() if checked else reply
        if checked and head in self._failures:
            return self._pop_error()   # the failed query produced no unit of its own
        if "?" in message:
            self.unexpected.append(message)
        return None

    def _next_answer(self, head: str) -> bytes:
        queue = self._answers[head]
        reply = queue.popleft() if len(queue) > 1 else queue[0]
        if callable(reply):
            reply = reply()
        return reply.encode() if isinstance(reply, str) else reply

    def _pop_error(self) -> bytes:
        code, text = self.errors.popleft() if self.errors else (0, "No error")
        return f'{code},"{text}"'.encode()


class FakeResource:
    """The part of a pyvisa MessageBasedResource that the session uses."""

    def __init__(self, instrument: ScriptedInstrument, timeout: int) -> None:
        self.instrument = instrument
        self.timeout = timeout
        self.closed = False

    def write(self, message: str) -> int:
        if self.instrument.write_error is not None:
            error, self.instrument.write_error = self.instrument.write_error, None
            raise error
        if self.closed or not self.instrument.connected:
            raise BrokenPipeError(32, "Broken pipe")
        self.instrument.receive(message)
        return len(message) + 1

    def read_raw(self) -> bytes:
        box = self.instrument.outbox
        if not self.instrument.connected or b"\n" not in box:
            raise _timeout()
        end = box.index(b"\n") + 1
        line = bytes(box[:end])
        del box[:end]
        return line

    def read_bytes(self, count: int) -> bytes:
        box = self.instrument.outbox
        if not self.instrument.connected or len(box) < count:
            raise _timeout()
        data = bytes(box[:count])
        del box[:count]
        return data

    def close(self) -> None:
        self.closed = True


class FakeResourceManager:
    def __init__(self, instrument: ScriptedInstrument) -> None:
        self.instrument = instrument
        self.open_calls: list[tuple[str, dict]] = []
        self.resources: list[FakeResource] = []

    def open_resource(self, address: str, **kwargs) -> FakeResource:
        self.open_calls.append((address, kwargs))
        if self.instrument.refuse_connections:
            raise Exception("could not connect: StatusCode.error_timeout")
        self.instrument.connected = True
        self.instrument.connections += 1
        self.instrument.outbox.clear()   # a new socket starts empty
        self.instrument.held.clear()
        resource = FakeResource(self.instrument, kwargs.get("timeout", 2000))
        self.resources.append(resource)
        return resource
