"""Hostile replies on the wire: garbled and truncated SCPI replies and IEEE 488.2 binary
blocks with wrong lengths, against the real source-measure unit driver over pyvisa-py.

A small TCP proxy (:class:`ReplyTamperer`) sits between the driver and an in-process
simulated bench. For each case hypothesis picks a driver call and a way to spoil the first
reply the instrument sends for it (cut short with or without its terminator, bytes
replaced or inserted, dropped, doubled, a stray line first, the connection closed; for a
binary block: a declared length too short, too long or absurd, a wrong digit count, a
missing ``#``, bytes after the block). The driver must then either return a value of the
documented type or raise an exception of its own family (``drivers.errors``), and the very
next calls must answer correctly again: the session never takes a stray or late reply as
the answer to a later question.
"""
from __future__ import annotations

import math
import select
import socket
import threading
import time
from dataclasses import asdict, dataclass, field
from typing import Any, Callable

DRIVER_TIMEOUT_S = 0.3
SMU_DRIVER = "scpi-smu"          # the registry name a bench profile gives (drivers.DRIVERS)
OPERATIONS = ("output_is_on", "protection_tripped", "interlock_open", "read_compliance",
              "read_overvoltage_protection", "measure", "set_level_and_measure",
              "list_points_done", "fetch_list_binary", "fetch_list_ascii")
LIST_LEVELS = [0.05 * k for k in range(1, 9)]


class ReplyTamperer:
    """Relays one instrument port; :meth:`arm` spoils the next reply relayed."""

    def __init__(self, upstream: tuple[str, int]):
        self.upstream = upstream
        self._listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self._listener.bind(("127.0.0.1", 0))
        self._listener.listen(4)
        self.port = self._listener.getsockname()[1]
        self._mutation: Callable[[bytes], bytes | None] | None = None
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._pairs: list[tuple[socket.socket, socket.socket]] = []
        self.tampered = 0
        t = threading.Thread(target=self._accept, daemon=True, name="tamperer-accept")
        t.start()
        self._threads.append(t)

    @property
    def address(self) -> str:
        return f"TCPIP0::127.0.0.1::{self.port}::SOCKET"

    def arm(self, mutation: Callable[[bytes], bytes | None] | None) -> None:
        with self._lock:
            self._mutation = mutation

    def close(self) -> None:
        self._stop.set()
        self._listener.close()
        for a, b in list(self._pairs):
            for s in (a, b):
                try:
                    s.close()
                except OSError:
                    pass
        for t in self._threads:
            t.join(2.0)

    def __enter__(self) -> "ReplyTamperer":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _accept(self) -> None:
        while not self._stop.is_set():
            try:
                r, _, _ = select.select([self._listener], [], [], 0.1)
                if not r:
                    continue
                client, _ = self._listener.accept()
            except OSError:
                return
            server = socket.create_connection(self.upstream)
            for s in (client, server):
                s.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            self._pairs.append((client, server))
            for target, args in ((self._to_server, (client, server)),
                                 (self._to_client, (server, client))):
                t = threading.Thread(target=target, args=args, daemon=True)
                t.start()
                self._threads.append(t)

    def _to_server(self, client: socket.socket, server: socket.socket) -> None:
        try:
            while not self._stop.is_set():
                r, _, _ = select.select([client], [], [], 0.1)
                if not r:
                    continue
                data = client.recv(65536)
                if not data:
                    break
                server.sendall(data)
        except (OSError, ValueError):     # the other direction closed the sockets
            pass
        finally:
            for s in (client, server):
                try:
                    s.close()
                except OSError:
                    pass

    def _to_client(self, server: socket.socket, client: socket.socket) -> None:
        buffer = b""
        try:
            while not self._stop.is_set():
                reply, buffer = _one_reply(buffer)
                if reply is None:
                    r, _, _ = select.select([server], [], [], 0.1)
                    if not r:
                        continue
                    data = server.recv(65536)
                    if not data:
                        break
                    buffer += data
                    continue
                with self._lock:
                    mutation, self._mutation = self._mutation, None
                if mutation is not None:
                    self.tampered += 1
                    reply = mutation(reply)
                    if reply is None:          # close the connection instead
                        client.close()
                        server.close()
                        return
                if reply:
                    client.sendall(reply)
        except (OSError, ValueError):
            pass


def _one_reply(buffer: bytes) -> tuple[bytes | None, bytes]:
    """Split one reply (a line, or a line that starts with a definite-length block) off."""
    if buffer.startswith(b"#") and len(buffer) >= 2 and buffer[1:2].isdigit():
        n = int(buffer[1:2])
        if len(buffer) < 2 + n:
            return None, buffer
        try:
            length = int(buffer[2:2 + n])
        except ValueError:
            length = 0
        end = 2 + n + length
        cut = buffer.find(b"\n", end)
        if cut < 0:
            return None, buffer
        return buffer[:cut + 1], buffer[cut + 1:]
    cut = buffer.find(b"\n")
    if cut < 0:
        return None, buffer
    return buffer[:cut + 1], buffer[cut + 1:]


# ----------------------------------------------------------------------------- mutations
def _mutations(st: Any) -> Any:
    unit = st.floats(0.0, 1.0, allow_nan=False)
    junk = st.binary(min_size=1, max_size=24)

    def at(f: float, r: bytes) -> int:
        return min(int(f * len(r)), max(len(r) - 1, 0))

    def block_parts(r: bytes):
        if not (r.startswith(b"#") and r[1:2].isdigit()):
            return None
        n = int(r[1:2])
        return n, int(r[2:2 + n]), r[2 + n:]

    def named(name: str, fn: Callable[[bytes], bytes | None]):
        fn.__name__ = name
        fn.__qualname__ = name
        return fn

    def cut(f):
        return named(f"cut-at-{f:.2f}", lambda r: r[:at(f, r)])

    def cut_terminated(f):
        return named(f"cut-at-{f:.2f}+LF", lambda r: r[:at(f, r)] + b"\n")

    def replace(f, b):
        return named(f"replace-at-{f:.2f}-{b!r}", lambda r: r[:at(f, r)] + b + r[at(f, r) + len(b):])

    def insert(f, b):
        return named(f"insert-at-{f:.2f}-{b!r}", lambda r: r[:at(f, r)] + b + r[at(f, r):])

    def block_length(delta):
        def op(r):
            parts = block_parts(r)
            if parts is None:
                return r[:-1] + b"\n"
            n, length, rest = parts
            new = str(max(0, length + delta)).encode()
            return b"#" + str(len(new)).encode() + new + rest
        return named(f"block-length{delta:+d}", op)

    def block_digits(d):
        def op(r):
            parts = block_parts(r)
            if parts is None:
                return r
            n, length, rest = parts
            return b"#" + str(d).encode() + str(length).encode() + rest
        return named(f"block-digits-{d}", op)

    def strip_hash():
        return named("block-without-#", lambda r: r[1:] if r.startswith(b"#") else b"#" + r)

    fixed = st.sampled_from([
        named("drop", lambda r: b""),
        named("double", lambda r: r + r),
        named("stray-line-first", lambda r: b"+1.00000000E+00\n" + r),
        named("stray-1-first", lambda r: b"1\n" + r),
        named("empty-line", lambda r: b"\n"),
        named("no-terminator", lambda r: r.rstrip(b"\n")),
        named("crlf", lambda r: r.rstrip(b"\n") + b"\r\n"),
        named("close-connection", lambda r: None),
        named("nan-reading", lambda r: r.replace(b"E", b"E9", 1)),
        named("overflow-marker", lambda r: b"+9.9E37" + r[r.find(b","):] if b"," in r else b"+9.9E37\n"),
        named("absurd-block", lambda r: b"#9999999999" + r[r.find(b";"):] if b";" in r else b"#9999999999\n"),
        named("zero-digit-block", lambda r: b"#0" + r[2:] if r.startswith(b"#") else r),
        strip_hash(),
    ])
    return st.one_of(
        fixed,
        st.builds(cut, unit), st.builds(cut_terminated, unit),
        st.builds(replace, unit, junk), st.builds(insert, unit, junk),
        st.builds(block_length, st.integers(-24, 24).filter(lambda d: d != 0)),
        st.builds(block_length, st.sampled_from([-10 ** 6, 10 ** 6, 8 * 10 ** 7])),
        st.builds(block_digits, st.integers(1, 9)),
        st.binary(max_size=64).map(lambda b: named(f"random-{b!r}", lambda r, b=b: b)),
    )


# ----------------------------------------------------------------------------- the checks
@dataclass
class WireSummary:
    cases: int = 0
    failures: int = 0
    tampered: int = 0
    elapsed_s: float = 0.0
    example: str = ""
    problems: list[str] = field(default_factory=list)
    skipped: str = ""

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def summary(self) -> str:
        if self.skipped:
            return f"wire      skipped: {self.skipped}"
        head = (f"wire      {self.cases} cases ({self.tampered} replies spoilt), "
                f"{self.failures} failure(s), {self.elapsed_s:.1f} s")
        if self.failures:
            head += f"\n    example: {self.example}\n    " + "\n    ".join(self.problems)
        return head


def _call(smu: Any, op: str) -> Any:
    if op == "fetch_list_binary":
        smu.binary_transfer = True
        return smu.fetch_list(0, len(LIST_LEVELS))
    if op == "fetch_list_ascii":
        smu.binary_transfer = False
        try:
            return smu.fetch_list(0, len(LIST_LEVELS))
        finally:
            smu.binary_transfer = True
    if op == "set_level_and_measure":
        return smu.set_level_and_measure(0.0)
    return getattr(smu, op)()


def _well_typed(op: str, value: Any) -> str:
    if op in ("output_is_on", "protection_tripped", "interlock_open"):
        return "" if isinstance(value, bool) else f"{op} returned {value!r}, not a bool"
    if op in ("read_compliance", "read_overvoltage_protection"):
        return "" if isinstance(value, float) and math.isfinite(value) else f"{op} returned {value!r}"
    if op == "list_points_done":
        return "" if isinstance(value, int) and 0 <= value <= len(LIST_LEVELS) else f"{op} returned {value!r}"
    if op in ("measure", "set_level_and_measure"):
        ok = all(math.isfinite(x) for x in (value.voltage_v, value.current_a))
        return "" if ok and isinstance(value.in_compliance, bool) else f"{op} returned {value!r}"
    if op.startswith("fetch_list"):
        if len(value) != len(LIST_LEVELS):
            return f"{op} returned {len(value)} readings, asked for {len(LIST_LEVELS)}"
        if not all(math.isfinite(r.voltage_v) and math.isfinite(r.current_a) for r in value):
            return f"{op} returned a non-finite reading"
    return ""


def _truth(bench: Any) -> dict[str, Any]:
    s = bench.state()["smu"]
    return {"output_on": s["output_on"], "compliance": s["current_compliance_a"], "ovp": s["ovp_v"]}


def _recovered(smu: Any, bench: Any) -> str:
    """The next calls answer correctly (a failed first try is allowed: the session may
    need that call to notice it is out of step)."""
    from drivers.errors import InstrumentError

    for attempt in (1, 2, 3):
        try:
            compliance = smu.read_compliance()
            on = smu.output_is_on()
            ovp = smu.read_overvoltage_protection()
            readings = smu.fetch_list(0, 3)
        except InstrumentError:
            continue
        truth = _truth(bench)       # after the calls: a reconnect switches the output off
        if (compliance, on, ovp) != (truth["compliance"], truth["output_on"], truth["ovp"]):
            return (f"after the spoilt reply the driver answers compliance {compliance}, output "
                    f"{on}, OVP {ovp}; the instrument has {truth['compliance']}, "
                    f"{truth['output_on']}, {truth['ovp']}")
        if len(readings) != 3:
            return "after the spoilt reply fetch_list(0, 3) gave a wrong count"
        return ""
    return "the driver did not recover within three calls after the spoilt reply"


def fuzz_wire(count: int, *, seed: int = 0) -> WireSummary:
    summary = WireSummary()
    try:
        import hypothesis  # noqa: F401
    except ImportError:
        summary.skipped = "hypothesis is not installed (pip install -e '.[test]')"
        return summary
    import logging

    import pyvisa
    from hypothesis import HealthCheck, given, settings
    from hypothesis import seed as fixed_seed
    from hypothesis import strategies as st

    import simulated_instrument
    from drivers import DRIVERS
    from drivers.errors import InstrumentError
    from tracer.app import VISA_BACKEND      # the composition root's choice of VISA backend

    state = {"n": 0, "last": None}
    t0 = time.monotonic()
    with simulated_instrument.running_bench(time_scale=0.0, seed=seed) as bench:
        upstream = ("127.0.0.1", bench.ports["smu"])
        with ReplyTamperer(upstream) as tamperer:
            rm = pyvisa.ResourceManager(VISA_BACKEND)
            smu = DRIVERS[SMU_DRIVER](tamperer.address, resource_manager=rm,
                                      timeout_s=DRIVER_TIMEOUT_S)
            try:
                smu.configure(source_mode="voltage", compliance=0.05, nplc=0.1, four_wire=True)
                smu.set_overvoltage_protection(1.0)
                smu.load_list(LIST_LEVELS, settle_s=0.0)
                smu.output(True)
                smu.start_list()
                while smu.list_points_done() < len(LIST_LEVELS):
                    time.sleep(0.01)
                baseline = {op: _well_typed(op, _call(smu, op)) for op in OPERATIONS}
                broken = {op: why for op, why in baseline.items() if why}
                if broken:
                    raise RuntimeError(f"untouched calls already misbehave: {broken}")

                @fixed_seed(seed)
                @settings(max_examples=count, deadline=None, database=None,
                          suppress_health_check=list(HealthCheck), print_blob=False)
                @given(st.sampled_from(OPERATIONS), _mutations(st))
                def one(op: str, mutation: Callable) -> None:
                    state["n"] += 1
                    problems = []
                    if not smu.output_is_on():      # a reconnect made the instrument safe
                        smu.output(True)
                    tamperer.arm(mutation)
                    try:
                        value = _call(smu, op)
                    except InstrumentError:
                        value = None
                    except Exception as exc:  # noqa: BLE001 - what this check looks for
                        problems.append(f"{op}: {type(exc).__name__} escaped the driver: {exc}")
                        value = None
                    finally:
                        tamperer.arm(None)
                    if value is not None:
                        why = _well_typed(op, value)
                        if why:
                            problems.append(why)
                    why = _recovered(smu, bench)
                    if why:
                        problems.append(why)
                    if problems:
                        state["last"] = (op, mutation.__name__, problems)
                        raise AssertionError("; ".join(problems))

                quiet = logging.getLogger("hypothesis")
                level = quiet.level
                quiet.setLevel(logging.ERROR)
                try:
                    one()
                except AssertionError:
                    summary.failures = 1
                except BaseExceptionGroup as group:     # several distinct failures
                    summary.failures = len(group.exceptions)
                    summary.problems = [str(e)[:400] for e in group.exceptions]
                finally:
                    quiet.setLevel(level)
            except RuntimeError as exc:
                summary.failures = 1
                summary.problems = [str(exc)]
            finally:
                summary.tampered = tamperer.tampered
                try:
                    smu.close()
                finally:
                    rm.close()
    summary.cases = state["n"]
    summary.elapsed_s = time.monotonic() - t0
    if state["last"] is not None:
        op, name, problems = state["last"]
        summary.example = f"{op} with its reply spoilt by {name}"
        summary.problems = summary.problems or problems
    return summary
