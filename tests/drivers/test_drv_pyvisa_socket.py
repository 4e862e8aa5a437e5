"""The session over real pyvisa-py sockets against a minimal loopback line server, for the
transport pitfalls that a fake cannot show: a peer that closes, a port with no listener,
a reply that arrives after the timeout, a binary block containing 0x0A."""
import socket
import threading
import time

import numpy as np
import pytest

from drivers import LinkLostError, ScpiSession, replies

IDENTITY = b"Loopback Test,LT-1,0,0"


class LineServer:
    """Answers each received line with ``script(line) -> bytes | None`` (no newline added);
    ``delay_s`` postpones a reply; ``close_after`` closes the connection after that line."""

    def __init__(self, script):
        self.script = script
        self.delay_s = 0.0
        self.close_after: str | None = None
        self.received: list[str] = []
        self.listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.listener.bind(("127.0.0.1", 0))
        self.listener.listen(4)
        self.port = self.listener.getsockname()[1]
        self.address = f"TCPIP0::127.0.0.1::{self.port}::SOCKET"
        self._stop = False
        self._thread = threading.Thread(target=self._serve, daemon=True)
        self._thread.start()

    def _serve(self):
        self.listener.settimeout(0.1)
        while not self._stop:
            try:
                conn, _ = self.listener.accept()
            except (socket.timeout, OSError):
                continue
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._handle(conn)

    def _handle(self, conn):
        buffer = b""
        conn.settimeout(0.1)
        with conn:
            while not self._stop:
                try:
                    chunk = conn.recv(65536)
                except socket.timeout:
                    continue
                except OSError:
                    return
                if not chunk:
                    return
                buffer += chunk
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    text = line.decode()
                    self.received.append(text)
                    if text == self.close_after:
                        return
                    reply = IDENTITY if text == "*IDN?" else self.script(text)
                    if reply is not None:
                        if self.delay_s and text != "*IDN?":
                            time.sleep(self.delay_s)
                        conn.sendall(reply + b"\n")

    def stop(self):
        self._stop = True
        self.listener.close()
        self._thread.join(2)


@pytest.fixture
def server():
    answers = {"OUTP?;:SYST:ERR?": b'0;0,"No error"', "MEAS:VOLT?;:SYST:ERR?": b'+7.0E-01;0,"No error"'}
    srv = LineServer(lambda line: answers.get(line))
    srv.answers = answers
    yield srv
    srv.stop()


@pytest.fixture(scope="module")
def visa():
    import pyvisa
    return pyvisa.ResourceManager("@py")


def test_round_trip_over_pyvisa_py(server, visa):
    session = ScpiSession(server.address, timeout_s=1.0, resource_manager=visa)
    assert session.identity == IDENTITY.decode()
    assert session.query_values("OUTP?", (replies.boolean,)) == [False]
    session.close()


def test_late_reply_over_a_real_socket_is_discarded(server, visa):
    session = ScpiSession(server.address, timeout_s=0.3, resource_manager=visa)
    server.delay_s = 0.5
    with pytest.raises(LinkLostError):
        session.query_values("MEAS:VOLT?", (replies.real,))
    server.delay_s = 0.0
    time.sleep(0.4)     # the late reply is now in the socket
    assert session.query_values("OUTP?", (replies.boolean,)) == [False]
    session.close()


def test_peer_close_is_reported_as_closed_and_reconnect_works(server, visa):
    session = ScpiSession(server.address, timeout_s=0.5, resource_manager=visa)
    server.close_after = "OUTP?;:SYST:ERR?"
    started = time.monotonic()
    with pytest.raises(LinkLostError, match="closed by the instrument"):
        session.query_values("OUTP?", (replies.boolean,))
    # pyvisa-py only notices at its timeout; the peek names the cause
    assert session.state == "broken"
    server.close_after = None
    assert session.query_values("OUTP?", (replies.boolean,)) == [False]   # reconnected
    assert time.monotonic() - started < 5.0
    session.close()


def test_write_to_a_closed_peer_raises_link_lost_not_oserror(server, visa):
    session = ScpiSession(server.address, timeout_s=0.5, resource_manager=visa)
    server.close_after = "SOUR:VOLT 1"
    session.write("SOUR:VOLT 1")
    time.sleep(0.2)
    server.stop()                       # nobody to reconnect to either
    with pytest.raises(LinkLostError):
        for _ in range(5):              # the first send after a close may still succeed
            session.write("SOUR:VOLT 1")
            time.sleep(0.05)


def test_no_listener_raises_link_lost(visa):
    probe = socket.socket()
    probe.bind(("127.0.0.1", 0))
    port = probe.getsockname()[1]
    probe.close()                       # a port with nobody listening
    with pytest.raises(LinkLostError) as caught:
        ScpiSession(f"TCPIP0::127.0.0.1::{port}::SOCKET", timeout_s=0.3, resource_manager=visa)
    assert str(port) in str(caught.value)


def test_binary_block_with_newline_bytes_over_a_real_socket(server, visa):
    values = np.array([1.0000000000000007, 2.0 ** -1022, -0.0, 10.0], dtype=">f8")
    payload = np.frombuffer(b"\x0a" * 8 + values.tobytes(), dtype=">f8")   # forces 0x0A bytes
    block = payload.tobytes()
    server.answers["TRAC:DATA? 0,5;:SYST:ERR?"] = (
        b"#2" + str(len(block)).encode() + block + b';0,"No error"')
    session = ScpiSession(server.address, timeout_s=1.0, resource_manager=visa)
    got = session.query_binary_floats("TRAC:DATA? 0,5")
    assert got.tobytes() == payload.astype(float).tobytes()
    session.close()


def test_nagle_is_off_on_the_pinned_pyvisa_py(server, visa):
    """The session reaches into pyvisa-py's private socket to set TCP_NODELAY. Measured in
    tests/benchmarks/bench_drivers.py: a configure step (write, then SYST:ERR?) takes
    ~0.5 ms with it and ~44 ms without (delayed ACK). If a pyvisa-py upgrade moves the
    socket, this test says so instead of the bench silently slowing down 100-fold."""
    session = ScpiSession(server.address, timeout_s=1.0, resource_manager=visa)
    resource = session._resource
    interface = resource.visalib.sessions[resource.session].interface
    assert interface.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0
    session.close()
