"""The harness control port (base+4): JSON lines, loopback only, never SCPI.

Requests, one JSON object per line; one JSON object per line comes back::

    {"cmd": "state"}                               -> {"ok": true, "state": {...}}
    {"cmd": "fault", "name": "stall", "after": 3}  -> {"ok": true, "fault": {...}}
    {"cmd": "clear-faults"}                        -> {"ok": true}
    {"cmd": "set", "flicker_rel": 0.0, ...}        -> {"ok": true}
    {"cmd": "advance", "seconds": 10.0}            -> {"ok": true, "time_s": ...}

Errors come back as ``{"ok": false, "error": "..."}``.  The client functions below are what a
test or a script in another process uses against a standalone simulator.
"""
from __future__ import annotations

import json
import socket
from typing import Any

from .server import Connection
from .world import VirtualBench


class HarnessError(RuntimeError):
    pass


class HarnessEndpoint:
    """Server side of the control port."""

    def __init__(self, world: VirtualBench):
        self.world = world

    def handle(self, conn: Connection, line: bytes) -> None:
        conn.send((json.dumps(self.answer(line)) + "\n").encode("utf-8"))

    def overrun(self, conn: Connection) -> None:
        conn.send(b'{"ok": false, "error": "line too long"}\n')

    def answer(self, line: bytes) -> dict[str, Any]:
        try:
            request = json.loads(line.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            return {"ok": False, "error": f"not JSON: {exc}"}
        if not isinstance(request, dict) or "cmd" not in request:
            return {"ok": False, "error": "expected an object with 'cmd'"}
        w = self.world
        cmd = request["cmd"]
        try:
            with w.lock:
                if cmd == "state":
                    return {"ok": True, "state": w.state()}
                if cmd == "fault":
                    entry = w.inject(str(request.get("name")), int(request.get("after", 0)), source="harness")
                    return {"ok": True, "fault": entry}
                if cmd == "clear-faults":
                    w.clear_faults()
                    return {"ok": True}
                if cmd == "set":
                    w.set_knobs(**{k: v for k, v in request.items() if k != "cmd"})
                    return {"ok": True}
                if cmd == "advance":
                    w.advance(float(request.get("seconds", 0.0)))
                    return {"ok": True, "time_s": w.t}
        except (ValueError, TypeError) as exc:
            return {"ok": False, "error": str(exc)}
        return {"ok": False, "error": f"unknown cmd '{cmd}' (state, fault, clear-faults, set, advance)"}


# --------------------------------------------------------------------------- client side


def request(host: str, port: int, payload: dict[str, Any], timeout: float = 5.0) -> dict[str, Any]:
    """Send one request to a simulator's control port and return its answer."""
    with socket.create_connection((host, int(port)), timeout=timeout) as sock:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.sendall((json.dumps(payload) + "\n").encode("utf-8"))
        data = b""
        while not data.endswith(b"\n"):
            chunk = sock.recv(65536)
            if not chunk:
                raise HarnessError("control port closed the connection")
            data += chunk
    answer = json.loads(data.decode("utf-8"))
    if not answer.get("ok"):
        raise HarnessError(answer.get("error", "request failed"))
    return answer


def query_state(host: str, port: int, timeout: float = 5.0) -> dict[str, Any]:
    """The true state of a simulated bench running in another process."""
    return request(host, port, {"cmd": "state"}, timeout)["state"]


def inject_fault(host: str, port: int, name: str, after: int = 0, timeout: float = 5.0) -> dict[str, Any]:
    return request(host, port, {"cmd": "fault", "name": name, "after": after}, timeout)["fault"]


def clear_faults(host: str, port: int, timeout: float = 5.0) -> None:
    request(host, port, {"cmd": "clear-faults"}, timeout)


def set_knobs(host: str, port: int, timeout: float = 5.0, **knobs: float) -> None:
    request(host, port, {"cmd": "set", **knobs}, timeout)


def advance(host: str, port: int, seconds: float, timeout: float = 5.0) -> float:
    return request(host, port, {"cmd": "advance", "seconds": seconds}, timeout)["time_s"]
