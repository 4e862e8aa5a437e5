"""A SCPI message session over VISA that never takes a late reply for the next answer.

Life of a session::

    ready --timeout / garbled reply--> dirty --drain + *IDN? round trip--> ready
                                          \\--that fails--> reconnect --> ready
    ready --OSError / closed socket--> broken --reconnect--> ready

The recovery runs by itself before the next use, so a caller that caught a
``LinkLostError`` may simply carry on (or call ``reconnect()`` explicitly).

Why ``*IDN?`` and not ``*OPC?`` for resynchronising: ``*OPC?`` answers ``1``, which is
also what a late boolean reply (``OUTP?``) looks like. The identity string read at
connect cannot be confused with any other reply, so every line before it is discarded.

Error checking: ``configure`` writes a command, then reads ``SYST:ERR?`` until
``0,...``. Queries append ``;:SYST:ERR?`` to the same message (one round trip; a failed
query then yields an instrument error at once instead of a silent missing reply and a
timeout). pyvisa's ``VisaIOError`` and ``OSError`` (pyvisa-py lets ``BrokenPipeError``
through on write, and reports a closed peer as a read timeout) both become
``LinkLostError``.
"""
from __future__ import annotations

import math
import threading
import time
from typing import Any, Callable, Sequence

import numpy as np
from pyvisa.errors import VisaIOError

from . import replies
from .errors import (InstrumentCommandError, InstrumentError, LinkLostError, OverRangeError,
                     ResponseError)
from .socket_access import disable_nagle, peer_closed

ERROR_QUERY = "SYST:ERR?"
_ERROR_QUEUE_READS = 40          # more than any queue depth (16 in the dialect)
_DRAIN_READ_S = 0.1              # a drain read waits this long for stray bytes
_RESYNC_LINES = 64               # stray lines tolerated before the identity comes back
_READ_SLICE_S = 0.25             # a reply is awaited in slices this long (closed link noticed)
MAX_BLOCK_BYTES = 16 << 20       # largest binary block read (a full 10,000-point list: 240 kB)

ConnectHook = Callable[["ScpiSession"], None]


def _resource_manager(resource_manager: Any) -> Any:
    """A pyvisa ResourceManager, or anything with ``open_resource`` (tests), or a
    backend string such as ``'@py'`` chosen by the composition root."""
    if isinstance(resource_manager, str):
        import pyvisa
        return pyvisa.ResourceManager(resource_manager)
    if not hasattr(resource_manager, "open_resource"):
        raise TypeError("resource_manager must be a VISA backend string or have open_resource()")
    return resource_manager


class ScpiSession:
    """One VISA message-based connection speaking SCPI, with recovery.

    ``resource_manager``: a pyvisa ``ResourceManager``, an object with the same
    ``open_resource`` (a test transport), or a VISA backend string (``'@py'``).
    ``on_connect`` runs after every (re)connection once the session is usable, e.g. to
    switch an output off. The session is thread-safe: one lock serialises every exchange
    (``session.lock`` may be held around a sequence that must not interleave).
    """

    def __init__(self, address: str, *, timeout_s: float, resource_manager: Any,
                 on_connect: ConnectHook | None = None) -> None:
        if not (isinstance(timeout_s, (int, float)) and math.isfinite(timeout_s) and timeout_s > 0):
            raise ValueError(f"timeout_s must be a finite positive number of seconds, got {timeout_s!r}")
        self.address = address
        self.timeout_s = float(timeout_s)
        self.identity = ""
        self.lock = threading.RLock()
        self._rm = _resource_manager(resource_manager)
        self._on_connect = on_connect
        self._resource: Any = None
        self._state = "closed"           # ready | dirty | broken | closed
        self._first_identity: str | None = None
        with self.lock:
            self._connect()

    # ------------------------------------------------------------------ public API
    @property
    def state(self) -> str:
        """``ready``, ``dirty`` (resync pending), ``broken`` (reconnect pending) or ``closed``."""
        return self._state

    def write(self, command: str) -> None:
        """Send one program message; no reply expected, errors not read."""
        with self.lock:
            self._ensure_ready(command)
            self._write(command)

    def write_unsynchronised(self, command: str) -> None:
        """Send a message even while a resync is pending (the instrument reads its input
        regardless of what we have not read yet). For safety commands that must go out
        before anything else. Raises ``LinkLostError`` if the connection is broken."""
        with self.lock:
            if self._state in ("broken", "closed"):
                raise self._link_lost(command, f"connection is {self._state}")
            self._write(command)

    def query(self, command: str, *, timeout_s: float | None = None) -> str:
        """Send a query and return its raw reply line (terminator removed), unchecked."""
        self._check_timeout(timeout_s)
        with self.lock:
            return self._exchange_line(command, command, timeout_s)

    def query_values(self, command: str, parsers: Sequence[Callable[[str], Any]], *,
                     timeout_s: float | None = None, check_errors: bool = True) -> list[Any]:
        """Send a query and return one parsed value per response unit.

        With ``check_errors`` (the default) the message is ``command;:SYST:ERR?`` and any
        queued error raises ``InstrumentCommandError``. Without it, queued errors are left
        for the next checked exchange: for state queries (output, interlock, protection)
        that must answer even while an asynchronous event such as an interlock error sits
        in the queue. ``ResponseError`` if the reply has the wrong number of units or a
        unit does not parse, ``OverRangeError`` for an overflow marker where a reading
        was expected.
        """
        self._check_timeout(timeout_s)
        message = f"{command};:{ERROR_QUERY}" if check_errors else command
        with self.lock:
            reply = self._exchange_line(command, message, timeout_s)
            units = self._split(command, reply)
            if check_errors:
                self._check_error_unit(command, reply, units.pop())
            if len(units) != len(parsers):
                self._garbled(command, reply, f"expected {len(parsers)} response unit(s)"
                                              f"{' before the error entry' if check_errors else ''}, "
                                              f"got {len(units)}")
            return [self.parse_reply(command, reply, parse, unit)
                    for parse, unit in zip(parsers, units)]

    def query_binary_floats(self, command: str, *, big_endian: bool = True,
                            timeout_s: float | None = None) -> np.ndarray:
        """Send ``command;:SYST:ERR?`` where ``command`` answers one IEEE 488.2
        definite-length block of float64; return the values.

        The block is read by its declared length, so a 0x0A byte inside the data cannot
        cut it short; what follows must be ``;<error entry>`` and the line terminator.
        """
        self._check_timeout(timeout_s)
        full = f"{command};:{ERROR_QUERY}"
        with self.lock:
            self._ensure_ready(command)
            self._check_link(command)
            self._state = "dirty"        # until the whole reply has been read
            self._write(full)
            start = self._read_block_start(command, timeout_s)
            if start[:1] != b"#":
                # No block: an error entry alone (the query failed) or garbage.
                line = start if start.endswith(b"\n") else start + self._read_raw(command, timeout_s)
                self._state = "ready"
                reply = self._decode(command, line)
                self._check_error_unit(command, reply, self._split(command, reply)[-1])
                self._garbled(command, reply, "expected a definite-length binary block")
            digits = start[1:2]
            if not digits.isdigit() or digits == b"0":
                self._garbled(command, start, "block header '#' not followed by a digit 1-9")
            length_text = self._read_bytes(command, int(digits), timeout_s)
            if not length_text.isdigit():
                self._garbled(command, start + length_text, "block length is not decimal digits")
            length = int(length_text)
            if length > MAX_BLOCK_BYTES:
                self._garbled(command, start + length_text,
                              f"block of {length} bytes announced; at most {MAX_BLOCK_BYTES} "
                              f"are accepted")
            payload = self._read_bytes(command, length, timeout_s) if length else b""
            tail = self._decode(command, self._read_raw(command, timeout_s))
            self._state = "ready"
            if not tail.startswith(";"):
                self._garbled(command, tail, "expected ';' and the error entry after the block")
            self._check_error_unit(command, tail, tail[1:])
            if length % 8:
                self._garbled(command, start + length_text,
                              f"block of {length} bytes is not a whole number of float64")
            return np.frombuffer(payload, dtype=">f8" if big_endian else "<f8").astype(float)

    def configure(self, command: str) -> None:
        """Write a setting, then read ``SYST:ERR?`` until ``0,...``; any error raises
        ``InstrumentCommandError`` quoting the instrument's message(s)."""
        with self.lock:
            self.write(command)
            errors = self._drain_error_queue(command)
            if errors:
                raise self._command_error(command, errors)

    def reconnect(self) -> None:
        """Close and reopen the resource, read ``*IDN?``, clear status (``*CLS``), run
        the connect hook. Raises ``LinkLostError`` if the instrument cannot be reached."""
        with self.lock:
            self._connect()

    def close(self) -> None:
        """Close the resource (never the resource manager, which others may share)."""
        with self.lock:
            self._state = "closed"
            self._discard_resource()

    # ------------------------------------------------------------------ connection
    def _connect(self) -> None:
        self._discard_resource()
        self._state = "broken"
        timeout_ms = int(self.timeout_s * 1000)
        try:
            self._resource = self._rm.open_resource(
                self.address, read_termination="\n", write_termination="\n",
                timeout=timeout_ms, open_timeout=timeout_ms)
        except Exception as exc:  # pyvisa-py raises a bare Exception when it cannot connect
            raise self._link_lost(None, f"cannot open the resource ({exc})") from exc
        disable_nagle(self._resource)
        try:
            # pyvisa-py "connects" even to a closed port: only a reply proves the link.
            self._write("*IDN?")
            identity = self._read_line("*IDN?", None)
            if not identity:
                self._garbled("*IDN?", identity, "empty identity")
            if self._first_identity is not None and identity != self._first_identity:
                raise InstrumentError(
                    f"a different instrument answers: expected {self._first_identity!r}, "
                    f"got {identity!r}", address=self.address, identity=identity, command="*IDN?")
            self.identity = identity
            self._first_identity = identity
            self._write("*CLS")
            self._state = "ready"
            if self._on_connect is not None:
                self._on_connect(self)
        except BaseException:
            self._state = "broken"
            self._discard_resource()
            raise

    def _discard_resource(self) -> None:
        resource, self._resource = self._resource, None
        if resource is not None:
            try:
                resource.close()
            except Exception:
                pass  # already gone; nothing left to release

    def _ensure_ready(self, command: str) -> None:
        if self._state == "ready":
            return
        if self._state == "closed":
            raise InstrumentError("session is closed; call reconnect() to reopen",
                                  address=self.address, identity=self.identity, command=command)
        if self._state == "dirty" and not peer_closed(self._resource) and self._resync():
            return
        try:
            self._connect()
        except InstrumentError as exc:
            raise self._link_lost(command, f"could not restore the connection before this "
                                           f"command ({exc.detail})") from exc

    def _resync(self) -> bool:
        """Discard stray input, then send ``*IDN?`` and discard every line until the
        identity comes back. True if the session is in step again."""
        try:
            self._drain_input()
            self._write("*IDN?")
            for _ in range(_RESYNC_LINES):
                if self._read_line("*IDN?", None) == self.identity:
                    self._write("*CLS")
                    self._state = "ready"
                    return True
        except (InstrumentError, VisaIOError, OSError):
            pass
        return False

    def _drain_input(self) -> None:
        """Read and drop whatever is already waiting. (Not ``resource.clear()``: on a
        peer-closed socket pyvisa-py's clear loops forever on empty ``recv``.)"""
        deadline = time.monotonic() + self.timeout_s
        previous = self._resource.timeout
        self._resource.timeout = int(_DRAIN_READ_S * 1000)
        try:
            while time.monotonic() < deadline:
                try:
                    self._resource.read_raw()
                except (VisaIOError, UnicodeDecodeError):
                    break
        finally:
            self._resource.timeout = previous

    def _exchange_line(self, command: str, message: str, timeout_s: float | None) -> str:
        """Write ``message`` and read one reply line. The session counts as dirty from
        the write until the reply is in, so an interruption (a timeout, Ctrl-C) can never
        leave a reply waiting to be taken as the answer to the next query."""
        self._ensure_ready(command)
        self._check_link(command)
        self._state = "dirty"
        self._write(message)
        line = self._read_line(command, timeout_s)
        self._state = "ready"
        return line

    def _check_link(self, command: str) -> None:
        """Notice a connection the instrument has closed before sending a query: pyvisa-py
        would wait out the whole time-out on the closed socket (and a run's watchdog would
        report a silent instrument instead of a lost link)."""
        if peer_closed(self._resource):
            self._state = "broken"
            raise self._link_lost(command, "connection closed by the instrument")

    # ------------------------------------------------------------------ raw I/O
    def _write(self, command: str) -> None:
        try:
            self._resource.write(command)
        except (VisaIOError, OSError) as exc:
            self._state = "broken"
            raise self._link_lost(command, f"write failed ({exc})") from exc

    @staticmethod
    def _check_timeout(timeout_s: float | None) -> None:
        if timeout_s is not None and not (isinstance(timeout_s, (int, float))
                                          and math.isfinite(timeout_s) and timeout_s > 0):
            raise ValueError(f"timeout_s must be finite and positive, got {timeout_s!r}")

    def _with_timeout(self, timeout_s: float | None, read: Callable[[], bytes]) -> bytes:
        if timeout_s is None:
            return read()
        previous = self._resource.timeout
        self._resource.timeout = int(timeout_s * 1000)
        try:
            return read()
        finally:
            try:
                self._resource.timeout = previous
            except Exception:
                pass  # resource gone; the state already says so

    def _read_raw(self, command: str, timeout_s: float | None) -> bytes:
        """One reply line. Read in slices of at most ``_READ_SLICE_S`` up to the time-out, so
        that a connection the instrument closes while we wait is noticed within a slice
        (pyvisa-py itself would wait out the whole time-out on a closed socket)."""
        waited = self.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + waited
        data = b""
        while True:
            started = time.monotonic()
            slice_s = min(_READ_SLICE_S, max(deadline - started, 0.001))
            try:
                data += self._with_timeout(slice_s, self._resource.read_raw)
            except VisaIOError as exc:
                if peer_closed(self._resource):
                    self._state = "broken"
                    raise self._link_lost(command, "connection closed by the instrument") from exc
                now = time.monotonic()
                if now < deadline and now - started >= 0.5 * slice_s:
                    continue     # only this slice ran out; wait on until the time-out
                if data:
                    self._garbled(command, data, "reply not terminated by a newline")
                self._state = "dirty"
                raise self._link_lost(command, f"no complete reply within {waited:g} s "
                                               f"({exc.abbreviation})") from exc
            except OSError as exc:
                self._state = "broken"
                raise self._link_lost(command, f"read failed ({exc})") from exc
            if data.endswith(b"\n"):
                return data
            if time.monotonic() >= deadline:
                self._garbled(command, data, "reply not terminated by a newline")

    def _read_block_start(self, command: str, timeout_s: float | None) -> bytes:
        """The first two bytes of a reply that may be a binary block, awaited in slices like
        ``_read_raw`` so that a connection closed meanwhile is noticed within a slice."""
        waited = self.timeout_s if timeout_s is None else timeout_s
        deadline = time.monotonic() + waited
        while True:
            started = time.monotonic()
            slice_s = min(_READ_SLICE_S, max(deadline - started, 0.001))
            try:
                return self._read_bytes(command, 2, slice_s)
            except LinkLostError:
                if peer_closed(self._resource):
                    self._state = "broken"
                    raise self._link_lost(command, "connection closed by the instrument") from None
                now = time.monotonic()
                if now < deadline and now - started >= 0.5 * slice_s and self._state == "dirty":
                    continue     # only this slice ran out; wait on until the time-out
                raise

    def _read_bytes(self, command: str, count: int, timeout_s: float | None) -> bytes:
        try:
            data = self._with_timeout(timeout_s, lambda: self._resource.read_bytes(count))
        except VisaIOError as exc:
            self._state = "dirty"
            raise self._link_lost(command, f"binary block incomplete ({exc.abbreviation})") from exc
        except OSError as exc:
            self._state = "broken"
            raise self._link_lost(command, f"read failed ({exc})") from exc
        if len(data) != count:
            self._garbled(command, data, f"expected {count} bytes, got {len(data)}")
        return data

    def _read_line(self, command: str, timeout_s: float | None) -> str:
        return self._decode(command, self._read_raw(command, timeout_s))

    def _decode(self, command: str, data: bytes) -> str:
        try:
            text = data.decode("ascii")
        except UnicodeDecodeError:
            self._garbled(command, data, "reply is not ASCII")
        return text.rstrip("\r\n")

    # ------------------------------------------------------------------ replies
    def _split(self, command: str, reply: str) -> list[str]:
        try:
            return replies.split_units(reply)
        except replies.MalformedReply as exc:
            self._garbled(command, reply, str(exc))

    def parse_reply(self, command: str, reply: Any, parse: Callable[[Any], Any], unit: Any) -> Any:
        """Apply a ``drivers.replies`` parser to ``unit`` (part of ``reply``); a
        malformed unit raises ``ResponseError``, an overflow marker ``OverRangeError``."""
        try:
            return parse(unit)
        except replies.OverflowReading as exc:
            raise OverRangeError(str(exc), address=self.address, identity=self.identity,
                                 command=command) from None
        except replies.MalformedReply as exc:
            self._garbled(command, reply, str(exc))

    def _check_error_unit(self, command: str, reply: str, unit: str) -> None:
        """``unit`` is the reply to the appended ``SYST:ERR?``: raise if it is an error."""
        entry = self.parse_reply(command, reply, replies.error_entry, unit)
        if entry[0] != 0:
            raise self._command_error(command, [entry] + self._drain_error_queue(command))

    def read_error_queue(self) -> list[tuple[int, str]]:
        """Pop every entry of the instrument's error queue; ``[]`` if it was empty."""
        with self.lock:
            return self._drain_error_queue(ERROR_QUERY)

    def _drain_error_queue(self, command: str) -> list[tuple[int, str]]:
        errors = []
        for _ in range(_ERROR_QUEUE_READS):
            reply = self._exchange_line(command, ERROR_QUERY, None)
            code, text = self.parse_reply(command, reply, replies.error_entry, reply)
            if code == 0:
                return errors
            errors.append((code, text))
        raise self._command_error(command, errors + [(0, "error queue did not empty")])

    # ------------------------------------------------------------------ error building
    def _link_lost(self, command: str | None, detail: str) -> LinkLostError:
        return LinkLostError(detail, address=self.address, identity=self.identity, command=command)

    def _command_error(self, command: str, errors: list[tuple[int, str]]) -> InstrumentCommandError:
        return InstrumentCommandError(errors, address=self.address, identity=self.identity,
                                      command=command)

    def _garbled(self, command: str, reply: str | bytes, detail: str):
        self._state = "dirty"  # whatever produced it may have shifted the framing
        raise ResponseError(detail, reply=reply, address=self.address, identity=self.identity,
                            command=command)
