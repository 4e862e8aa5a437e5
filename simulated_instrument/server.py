"""Loopback TCP servers: one listening port per instrument, one thread per connection.

Line protocol: messages end with ``\\n`` (a trailing ``\\r`` is whitespace); replies are
sent in one ``sendall`` with ``TCP_NODELAY`` set.  A line longer than
:data:`MAX_LINE_BYTES` is discarded up to its terminator and reported (``-363``) instead of
being buffered.  Everything shuts down cleanly: :meth:`TcpServer.stop` closes the listening
sockets and the connections and joins every thread it started.
"""
from __future__ import annotations

import logging
import select
import socket
import threading
from typing import Callable, Protocol

log = logging.getLogger(__name__)

MAX_LINE_BYTES = 1 << 20
RECV_BYTES = 1 << 16
POLL_S = 0.1


class Connection:
    """One client connection (server side)."""

    def __init__(self, sock: socket.socket, role: str, peer: tuple):
        self.sock = sock
        self.role = role
        self.peer = peer
        self.buffer = bytearray()
        self.discarding = False
        self.stalled = False
        self.closed = False
        self._send_lock = threading.Lock()

    def send(self, data: bytes) -> bool:
        if self.closed:
            return False
        try:
            with self._send_lock:
                self.sock.sendall(data)
            return True
        except OSError:
            self.close()
            return False

    def message_waiting(self) -> bool:
        """True if a complete further message has already arrived (used for -410)."""
        if b"\n" in self.buffer:
            return True
        try:
            peeked = self.sock.recv(RECV_BYTES, socket.MSG_PEEK | socket.MSG_DONTWAIT)
        except (BlockingIOError, InterruptedError):
            return False
        except OSError:
            return False
        return b"\n" in peeked

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        try:
            self.sock.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass


class LineHandler(Protocol):
    def handle(self, conn: Connection, line: bytes) -> None: ...

    def overrun(self, conn: Connection) -> None: ...


def bind_listeners(host: str, port_base: int, count: int, attempts: int = 64) -> list[socket.socket]:
    """Bind ``count`` consecutive ports from ``port_base`` (0: find a free block)."""
    if port_base:
        socks = []
        try:
            for offset in range(count):
                socks.append(_listen(host, port_base + offset))
        except OSError:
            for s in socks:
                s.close()
            raise
        return socks
    last_error: OSError | None = None
    for _ in range(attempts):
        first = _listen(host, 0)
        base = first.getsockname()[1]
        socks = [first]
        try:
            if base + count - 1 > 65535:
                raise OSError("block would pass port 65535")
            for offset in range(1, count):
                socks.append(_listen(host, base + offset))
            return socks
        except OSError as exc:
            last_error = exc
            for s in socks:
                s.close()
    raise OSError(f"no block of {count} free consecutive ports found: {last_error}")


def _listen(host: str, port: int) -> socket.socket:
    s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        s.bind((host, port))
        s.listen(16)
    except OSError:
        s.close()
        raise
    return s


class TcpServer:
    def __init__(self) -> None:
        self.stop_event = threading.Event()
        self._listeners: list[tuple[str, socket.socket, LineHandler]] = []
        self._threads: list[threading.Thread] = []
        self._connections: list[Connection] = []
        self._lock = threading.Lock()

    def add_listener(self, role: str, sock: socket.socket, handler: LineHandler) -> None:
        self._listeners.append((role, sock, handler))

    def start(self) -> None:
        for role, sock, handler in self._listeners:
            thread = threading.Thread(target=self._accept_loop, args=(role, sock, handler),
                                      name=f"sim-accept-{role}", daemon=True)
            self._threads.append(thread)
            thread.start()

    def connections(self, role: str | None = None) -> list[Connection]:
        with self._lock:
            return [c for c in self._connections if not c.closed and (role is None or c.role == role)]

    def drop_connections(self, roles: Callable[[str], bool] | None = None) -> int:
        dropped = 0
        for conn in self.connections():
            if roles is None or roles(conn.role):
                conn.close()
                dropped += 1
        return dropped

    def stop(self, timeout: float = 5.0) -> None:
        self.stop_event.set()
        for _, sock, _ in self._listeners:
            try:
                sock.close()
            except OSError:
                pass
        for conn in self.connections():
            conn.close()
        for thread in list(self._threads):
            if thread is not threading.current_thread():
                thread.join(timeout)

    # ---- threads
    def _accept_loop(self, role: str, lsock: socket.socket, handler: LineHandler) -> None:
        while not self.stop_event.is_set():
            try:
                ready, _, _ = select.select([lsock], [], [], POLL_S)
            except (OSError, ValueError):
                break
            if not ready:
                continue
            try:
                sock, peer = lsock.accept()
            except OSError:
                if self.stop_event.is_set():
                    break
                continue
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            conn = Connection(sock, role, peer)
            thread = threading.Thread(target=self._serve, args=(conn, handler),
                                      name=f"sim-conn-{role}", daemon=True)
            with self._lock:
                self._connections = [c for c in self._connections if not c.closed]
                self._connections.append(conn)
                self._threads = [t for t in self._threads if t.is_alive()]
                self._threads.append(thread)
            thread.start()

    def _serve(self, conn: Connection, handler: LineHandler) -> None:
        try:
            while not self.stop_event.is_set() and not conn.closed:
                try:
                    ready, _, _ = select.select([conn.sock], [], [], POLL_S)
                except (OSError, ValueError):
                    break
                if not ready:
                    continue
                try:
                    data = conn.sock.recv(RECV_BYTES)
                except OSError:
                    break
                if not data:
                    break
                self._feed(conn, handler, data)
        finally:
            conn.closed = True
            try:
                conn.sock.close()
            except OSError:
                pass

    def _feed(self, conn: Connection, handler: LineHandler, data: bytes) -> None:
        if conn.discarding:
            idx = data.find(b"\n")
            if idx < 0:
                return
            data = data[idx + 1:]
            conn.discarding = False
        conn.buffer += data
        while not conn.closed:
            idx = conn.buffer.find(b"\n")
            if idx < 0:
                break
            line = bytes(conn.buffer[:idx])
            del conn.buffer[:idx + 1]
            if len(line) > MAX_LINE_BYTES:
                self._call(conn, handler.overrun, conn)
                continue
            self._call(conn, handler.handle, conn, line)
        if len(conn.buffer) > MAX_LINE_BYTES:
            conn.buffer.clear()
            conn.discarding = True
            self._call(conn, handler.overrun, conn)

    @staticmethod
    def _call(conn: Connection, method: Callable, *args) -> None:
        """Last line of defence: a handler's exception is logged and the connection thread
        goes on serving (the SCPI handler already turns its own into a queued error)."""
        try:
            method(*args)
        except Exception:  # noqa: BLE001
            log.exception("simulated %s instrument: unexpected error handling a message from %s",
                          conn.role, conn.peer)
