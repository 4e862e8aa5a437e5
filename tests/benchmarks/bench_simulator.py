"""Benchmark of the simulated bench: point reads per second over pyvisa-py.

Figures (all measured in the same run, same machine, loopback TCP):
- ``simulator_read_qps``: ``READ?`` queries per second against the simulated SMU over
  pyvisa-py (``@py``, SOCKET resource, ``\\n`` terminations), zero integration time
  (``NPLC 0``, time scale 0), a lit pixel connected, so every query solves the circuit;
- ``simulator_idn_qps``: ``*IDN?`` the same way (parser and transport, no physics);
- ``simulator_raw_read_qps``: ``READ?`` over a plain blocking socket (no pyvisa);
- ``echo_qps``: the baseline, the same pyvisa-py query loop against a bare TCP server that
  echoes each line back (``TCP_NODELAY``, one ``sendall`` per line);
- ``read_vs_echo_ratio``: simulator_read_qps / echo_qps (1.0 = the simulator costs nothing).

Run as a script (``python tests/benchmarks/bench_simulator.py [--quick]``) or call
``run(quick=...)``. Nothing is asserted on time: the figures are printed.
"""
from __future__ import annotations

import argparse
import select
import socket
import threading
import time


class EchoServer:
    """A bare line-echo server on a loopback port: the transport-only baseline."""

    def __init__(self) -> None:
        self.sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(4)
        self.port = self.sock.getsockname()[1]
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        accept = threading.Thread(target=self._accept, name="echo-accept", daemon=True)
        self._threads.append(accept)
        accept.start()

    def _accept(self) -> None:
        while not self._stop.is_set():
            ready, _, _ = select.select([self.sock], [], [], 0.1)
            if not ready:
                continue
            try:
                conn, _ = self.sock.accept()
            except OSError:
                return
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            t = threading.Thread(target=self._serve, args=(conn,), name="echo-conn", daemon=True)
            self._threads.append(t)
            t.start()

    def _serve(self, conn: socket.socket) -> None:
        buffer = b""
        with conn:
            while not self._stop.is_set():
                ready, _, _ = select.select([conn], [], [], 0.1)
                if not ready:
                    continue
                data = conn.recv(65536)
                if not data:
                    return
                buffer += data
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    conn.sendall(line + b"\n")

    def close(self) -> None:
        self._stop.set()
        self.sock.close()
        for t in self._threads:
            t.join(2)


def _rate(fn, n: int) -> float:
    fn()  # warm-up
    t0 = time.perf_counter()
    for _ in range(n):
        fn()
    return n / (time.perf_counter() - t0)


def run(quick: bool = False) -> dict:
    import pyvisa

    import simulated_instrument

    n = 300 if quick else 3000
    rm = pyvisa.ResourceManager("@py")
    kwargs = dict(read_termination="\n", write_termination="\n", timeout=5000)
    out: dict = {"queries": n}
    try:
        with simulated_instrument.running_bench(time_scale=0.0, seed=0) as bench:
            smu = rm.open_resource(bench.addresses["smu"], **kwargs)
            light = rm.open_resource(bench.addresses["light"], **kwargs)
            switch = rm.open_resource(bench.addresses["switch"], **kwargs)
            light.query("OUTP ON;*OPC?")
            switch.query("ROUT:CLOS (@1);*OPC?")
            smu.query("SENS:CURR:PROT 0.1;:SENS:CURR:NPLC 0;:SOUR:VOLT 0.45;:OUTP ON;*OPC?")
            reading = smu.query("READ?")
            assert len(reading.split(",")) == 2, reading
            out["simulator_read_qps"] = _rate(lambda: smu.query("READ?"), n)
            out["simulator_idn_qps"] = _rate(lambda: smu.query("*IDN?"), n)
            with socket.create_connection(("127.0.0.1", bench.ports["smu"])) as raw:
                raw.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)

                def raw_read() -> None:
                    raw.sendall(b"READ?\n")
                    data = b""
                    while not data.endswith(b"\n"):
                        data += raw.recv(4096)

                out["simulator_raw_read_qps"] = _rate(raw_read, n)
            for res in (smu, light, switch):
                res.close()
        echo = EchoServer()
        try:
            res = rm.open_resource(f"TCPIP0::127.0.0.1::{echo.port}::SOCKET", **kwargs)
            assert res.query("READ?") == "READ?"
            out["echo_qps"] = _rate(lambda: res.query("READ?"), n)
            res.close()
        finally:
            echo.close()
    finally:
        rm.close()
    out["read_vs_echo_ratio"] = out["simulator_read_qps"] / out["echo_qps"]
    _print(out)
    return out


def _print(out: dict) -> None:
    print(f"Simulated bench over pyvisa-py, {out['queries']} queries each, loopback")
    print(f"  {'loop':<44}{'queries/s':>12}")
    for label, key in (("READ? on the simulated SMU (NPLC 0)", "simulator_read_qps"),
                       ("*IDN? on the simulated SMU", "simulator_idn_qps"),
                       ("READ? on the simulated SMU, plain socket", "simulator_raw_read_qps"),
                       ("baseline: bare TCP echo server", "echo_qps")):
        print(f"  {label:<44}{out[key]:>12.0f}")
    print(f"  ratio READ? / echo: {out['read_vs_echo_ratio']:.3f}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="300 queries per loop instead of 3000")
    run(quick=parser.parse_args().quick)
