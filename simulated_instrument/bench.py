"""The simulated bench as a whole: virtual world + SCPI instruments + TCP ports + harness."""
from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Any, Iterable, Iterator

import yaml

from .instruments import build_instruments
from .harness import HarnessEndpoint
from .scenario import Scenario, load_scenario
from .server import Connection, TcpServer, bind_listeners
from .server import _listen as listen_on
from .world import FAULT_NAMES, VirtualBench

ROLES = ("smu", "light", "thermometer", "switch")
LOOPBACK = "127.0.0.1"
DRIVERS = {"smu": "scpi-smu", "light": "scpi-light", "thermometer": "scpi-thermometer", "switch": "scpi-switch"}


def visa_address(host: str, port: int) -> str:
    return f"TCPIP0::{host}::{port}::SOCKET"


def parse_fault(spec: str) -> tuple[str, int]:
    """``NAME:AFTER`` (AFTER optional, default 0) -> (name, after)."""
    name, _, after = spec.partition(":")
    if name not in FAULT_NAMES:
        raise ValueError(f"unknown fault '{name}' (known: {', '.join(FAULT_NAMES)})")
    try:
        count = int(after) if after else 0
    except ValueError:
        raise ValueError(f"fault '{spec}': AFTER must be a whole number of messages") from None
    if count < 0:
        raise ValueError(f"fault '{spec}': AFTER must be >= 0")
    return name, count


def _garble(reply: bytes) -> bytes:
    body = bytearray(reply[:-1])
    for i in range(0, len(body), 3):
        body[i] = ord("~")
    return bytes(body) + b"\n"


class ScpiEndpoint:
    """Feeds the lines of one instrument port to its SCPI engine; applies the faults."""

    def __init__(self, world: VirtualBench, role: str):
        self.world = world
        self.role = role
        self.instrument = world.instruments[role]

    def overrun(self, conn: Connection) -> None:
        with self.world.lock:
            self.instrument.push_error(-363, "line longer than 1 MiB discarded")

    def handle(self, conn: Connection, line: bytes) -> None:
        """Execute one message.  An unexpected exception anywhere in here (bringing the world
        up to date, a fault firing) is queued as ``-300`` on this instrument and the message
        gets no reply; the connection keeps being served."""
        try:
            self._handle(conn, line)
        except Exception as exc:  # noqa: BLE001 - a fault of the simulator itself
            with self.world.lock:
                self.instrument.push_internal_error(exc)

    def _handle(self, conn: Connection, line: bytes) -> None:
        w = self.world
        smu = self.role == "smu"
        with w.lock:
            w.messages[self.role] += 1
            if smu:
                if w.stall_next_connection and not conn.stalled:
                    conn.stalled = True
                    w.stall_next_connection = False
                if conn.stalled:
                    w.fire_due_faults()
                    return
                w.last_smu_connection = conn
            w.advance_to_now()
            reply = self.instrument.execute(line.decode("latin-1"), conn)
            if reply is not None and conn.message_waiting():
                # IEEE 488.2 6.3.2.3: a new message arrived before the reply was sent
                self.instrument.push_error(-410, "reply discarded")
                reply = None
            if reply is not None and smu and w.pending_garble:
                reply = _garble(reply)
                w.pending_garble = False
        if reply is not None:
            conn.send(reply)
        if smu:
            with w.lock:
                w.fire_due_faults()


class SimulatedBench:
    """A running (after :meth:`start`) simulated bench.

    ``addresses`` maps role -> VISA address; ``state()`` is the true-state side channel;
    ``inject(name, after=0)`` arms or fires a fault.  Use :func:`running_bench` in tests.
    """

    def __init__(self, scenario: str | Path | dict | Scenario | None = None, *, time_scale: float = 0.0,
                 seed: int | None = 0, host: str = "127.0.0.1", port_base: int = 0,
                 faults: Iterable[str | tuple[str, int]] = (), harness: bool = True):
        self.scenario = load_scenario(scenario)
        self.world = VirtualBench(self.scenario, time_scale=time_scale, seed=seed)
        build_instruments(self.world)
        self.host = host
        self._sockets = bind_listeners(host, port_base, len(ROLES) + 1)
        if self._sockets[-1].getsockname()[0] != LOOPBACK:
            # the harness port injects faults and reads the true state: loopback only,
            # whatever address the instruments are offered on (docs/scpi-dialect.md)
            port = self._sockets[-1].getsockname()[1]
            self._sockets[-1].close()
            try:
                self._sockets[-1] = listen_on(LOOPBACK, port)
            except OSError:
                for sock in self._sockets[:-1]:
                    sock.close()
                raise
        self.ports = {role: s.getsockname()[1] for role, s in zip(ROLES + ("harness",), self._sockets)}
        self.port_base = self.ports["smu"]
        self.addresses = {role: visa_address(host, self.ports[role]) for role in ROLES}
        self.harness_address = (LOOPBACK, self.ports["harness"])
        self.server = TcpServer()
        for role, sock in zip(ROLES, self._sockets):
            self.server.add_listener(role, sock, ScpiEndpoint(self.world, role))
        if harness:
            self.server.add_listener("harness", self._sockets[-1], HarnessEndpoint(self.world))
        else:
            self._sockets[-1].close()
        self.world.connection_hooks["disconnect"] = lambda: self.server.drop_connections(lambda r: r != "harness")
        self._started = False
        self._closed = False
        for spec in faults:
            name, after = parse_fault(spec) if isinstance(spec, str) else spec
            with self.world.lock:
                self.world.inject(name, after, source="cli")

    # ---- lifecycle
    def start(self) -> "SimulatedBench":
        if not self._started:
            self.server.start()
            self._started = True
        return self

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self.world.stop_event.set()
        if self._started:
            self.server.stop()
        else:
            for s in self._sockets:
                s.close()

    def __enter__(self) -> "SimulatedBench":
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # ---- harness API (never over SCPI)
    def state(self) -> dict[str, Any]:
        with self.world.lock:
            return self.world.state()

    def inject(self, name: str, after: int = 0) -> dict[str, Any]:
        """Arm a fault to fire after ``after`` more SMU messages (0 = now)."""
        with self.world.lock:
            return dict(self.world.inject(name, after))

    def clear_faults(self) -> None:
        with self.world.lock:
            self.world.clear_faults()

    def set(self, **knobs: float) -> None:
        with self.world.lock:
            self.world.set_knobs(**knobs)

    def advance(self, seconds: float) -> None:
        with self.world.lock:
            self.world.advance(seconds)

    def connections(self, role: str | None = None) -> list[Connection]:
        return self.server.connections(role)

    def instrument(self, role: str):
        return self.world.instruments[role]

    # ---- bench profile (docs/bench-profile.md)
    def bench_profile(self) -> dict[str, Any]:
        cfg = self.scenario.settings
        ref = cfg["reference_cell"]
        instruments: dict[str, Any] = {}
        for role in ROLES:
            entry: dict[str, Any] = {"address": self.addresses[role], "driver": DRIVERS[role]}
            if role == "smu":
                entry["timeout_s"] = 5
            if role == "switch":
                entry["channels"] = len(self.scenario.pixels)
            instruments[role] = entry
        bench = cfg["bench"]
        return {"bench": {
            "name": bench["name"],
            "instruments": instruments,
            "hard_limits": dict(bench["hard_limits"]),
            "reference_cell": {
                "calibration_isc_a": ref["calibration_isc_a"],
                "calibration_uncertainty_rel": ref["calibration_uncertainty_rel"],
                "temperature_coefficient_per_k": ref["temperature_coefficient_per_k"],
            },
            "instability_class": bench["instability_class"],
            "usual_series_resistance_ohm": bench["usual_series_resistance_ohm"],
            "simulator_control": f"{self.harness_address[0]}:{self.harness_address[1]}",
        }}

    def write_bench_profile(self, path: str | Path) -> Path:
        path = Path(path)
        header = (f"# Bench profile of the simulated bench (scenario '{self.scenario.name}'),\n"
                  "# written by the simulator; see docs/bench-profile.md.\n")
        path.write_text(header + yaml.safe_dump(self.bench_profile(), sort_keys=False), encoding="utf-8")
        return path


@contextlib.contextmanager
def running_bench(scenario: str | Path | dict | Scenario | None = None, *, time_scale: float = 0.0,
                  seed: int | None = 0, host: str = "127.0.0.1", port_base: int = 0,
                  faults: Iterable[str | tuple[str, int]] = (), harness: bool = True) -> Iterator[SimulatedBench]:
    """Start a simulated bench on free loopback ports for the duration of a ``with`` block."""
    bench = SimulatedBench(scenario, time_scale=time_scale, seed=seed, host=host, port_base=port_base,
                           faults=faults, harness=harness)
    try:
        bench.start()
        yield bench
    finally:
        bench.close()
