"""Two best-effort reaches into a pyvisa-py SOCKET session's private socket object.

pyvisa-py (0.8) offers no public way to set TCP_NODELAY (its attribute setter raises) and
reports a peer that closed the connection only as a read timeout. Both helpers fail
silently (no effect, ``False``) on any other backend or a test transport.
"""
from __future__ import annotations

import socket
from typing import Any


def disable_nagle(resource: Any) -> None:
    """Best effort: TCP_NODELAY on a pyvisa-py SOCKET resource. pyvisa-py has no public
    way (its attribute setter raises), so this reaches into its session object; any
    failure leaves the default, which only costs latency."""
    try:
        interface = resource.visalib.sessions[resource.session].interface
        interface.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    except Exception:
        pass


def peer_closed(resource: Any) -> bool:
    """Best effort: has the instrument closed a pyvisa-py SOCKET connection? pyvisa-py
    reports a closed peer only as a read timeout; peeking at the socket tells at once.
    False whenever it cannot tell (other backends, test transports)."""
    try:
        interface = resource.visalib.sessions[resource.session].interface
        return interface.recv(1, socket.MSG_PEEK | socket.MSG_DONTWAIT) == b""
    except BlockingIOError:
        return False           # open, nothing waiting
    except OSError:
        return True            # reset or otherwise unusable
    except Exception:
        return False
