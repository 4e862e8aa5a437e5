"""The TCP side: framing, limits, concurrency, clean shutdown, the command line."""
from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
import yaml

import simulated_instrument
from simulated_instrument import harness
from simulated_instrument.server import MAX_LINE_BYTES
from sim_helpers import command, drain_errors, values

ROOT = Path(__file__).resolve().parents[2]


def _raw(bench, role="smu"):
    sock = socket.create_connection(("127.0.0.1", bench.ports[role]), timeout=5)
    sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    return sock


def _read_line(sock) -> bytes:
    data = b""
    while not data.endswith(b"\n"):
        chunk = sock.recv(65536)
        assert chunk, "connection closed"
        data += chunk
    return data


def test_ports_are_consecutive_and_addresses_are_visa_socket_resources(bench):
    base = bench.port_base
    assert [bench.ports[r] for r in ("smu", "light", "thermometer", "switch", "harness")] == \
        list(range(base, base + 5))
    assert bench.addresses["smu"] == f"TCPIP0::127.0.0.1::{base}::SOCKET"
    assert bench.addresses["switch"] == f"TCPIP0::127.0.0.1::{base + 3}::SOCKET"


def test_fragmented_and_crlf_input_one_newline_per_reply(bench):
    with _raw(bench) as sock:
        sock.sendall(b"*ID")
        time.sleep(0.05)
        sock.sendall(b"N?\r\n")
        reply = _read_line(sock)
        assert reply.startswith(b"Kestrel") and reply.endswith(b"0\n") and b"\r" not in reply
        sock.sendall(b"SOUR:VOLT 1.5\nSOUR:VOLT?\n")              # coalesced, only one query
        assert _read_line(sock) == b"+1.500000000E+00\n"


def test_new_message_before_the_reply_interrupts_the_query(bench):
    # IEEE 488.2 6.3.2.3: the unsent reply is discarded and -410 queued
    with _raw(bench) as sock:
        sock.sendall(b"*IDN?\n*OPC?\n")
        assert _read_line(sock) == b"1\n"
        sock.sendall(b"SYST:ERR?\n")
        assert _read_line(sock) == b'-410,"Query INTERRUPTED;reply discarded"\n'


def test_line_longer_than_one_mib_is_discarded_with_363(bench):
    with _raw(bench) as sock:
        chunk = b"A" * 65536
        for _ in range(MAX_LINE_BYTES // len(chunk) + 2):
            sock.sendall(chunk)
        sock.sendall(b"B\n*OPC?\n")
        assert _read_line(sock) == b"1\n"
        conn = bench.connections("smu")[0]
        assert len(conn.buffer) < 1024                           # nothing kept of the long line
        sock.sendall(b"SYST:ERR?\n")
        assert _read_line(sock).startswith(b"-363,")
        sock.sendall(b"SYST:ERR?\n")
        assert _read_line(sock) == b'0,"No error"\n'


def test_a_long_list_fits_in_one_line(smu):
    levels = ",".join(f"{0.0002 * k:.4f}" for k in range(2500))
    assert smu.query(f"SOUR:LIST:VOLT {levels};:SOUR:LIST:VOLT:POIN?") == "2500"
    smu.write("SOUR:LIST:VOLT " + ",".join(["0.1"] * 10001))
    assert [c for c, _ in drain_errors(smu)] == [-223]


def test_server_sets_tcp_nodelay(bench, smu):
    smu.query("*OPC?")
    conn = bench.connections("smu")[0]
    assert conn.sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) != 0


def test_clients_share_one_instrument(bench, open_resource):
    first = open_resource(bench.addresses["smu"])
    second = open_resource(bench.addresses["smu"])
    command(first, "SOUR:VOLT 0.7")
    assert float(second.query("SOUR:VOLT?")) == 0.7
    command(second, "BOGUS")
    assert [c for c, _ in drain_errors(first)] == [-113]          # one error queue


def test_two_instruments_used_at_once(bench, open_resource):
    smu = open_resource(bench.addresses["smu"])
    thermo = open_resource(bench.addresses["thermometer"])
    light = open_resource(bench.addresses["light"])
    command(open_resource(bench.addresses["switch"]), "ROUT:CLOS (@1)")
    command(light, "OUTP ON")
    smu.write("SENS:CURR:PROT 0.1;:SENS:CURR:NPLC 0;:OUTP ON")
    results: dict[str, list] = {"smu": [], "thermometer": [], "light": []}
    failures: list[BaseException] = []

    def loop(name, res, message):
        try:
            for _ in range(150):
                results[name].append(values(res.query(message)))
        except BaseException as exc:  # reported below
            failures.append(exc)

    threads = [threading.Thread(target=loop, args=("smu", smu, "READ?")),
               threading.Thread(target=loop, args=("thermometer", thermo, "MEAS:TEMP?")),
               threading.Thread(target=loop, args=("light", light, "MEAS:CURR?"))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert not failures
    assert all(len(r) == 150 for r in results.values())
    assert all(len(r) == 2 and r[1] < -0.03 for r in results["smu"])
    assert all(20 < r[0] < 30 for r in results["thermometer"])
    assert all(r[0] > 0.1 for r in results["light"])
    for res in (smu, thermo, light):
        assert drain_errors(res) == []


def test_clean_shutdown_leaves_no_threads_and_closes_ports(open_resource):
    before = set(threading.enumerate())
    with simulated_instrument.running_bench() as bench:
        smu = open_resource(bench.addresses["smu"])
        assert smu.query("*OPC?") == "1"
        port = bench.port_base
    leftover = [t for t in threading.enumerate() if t not in before and t.name.startswith("sim-")]
    assert leftover == []
    with pytest.raises(OSError):
        socket.create_connection(("127.0.0.1", port), timeout=1).close()


def test_explicit_port_base_and_busy_port(bench):
    with pytest.raises(OSError):
        simulated_instrument.running_bench(port_base=bench.port_base).__enter__()


def test_bench_profile_matches_the_documented_format(bench, tmp_path):
    path = bench.write_bench_profile(tmp_path / "bench.yaml")
    data = yaml.safe_load(path.read_text())["bench"]
    assert data["instruments"]["smu"] == {"address": bench.addresses["smu"], "driver": "scpi-smu",
                                          "timeout_s": 5}
    assert data["instruments"]["switch"]["channels"] == 6
    assert set(data["hard_limits"]) == {"voltage_v", "current_a", "power_w", "reverse_voltage_v"}
    assert data["reference_cell"]["calibration_isc_a"] == 0.12
    assert data["simulator_control"] == f"127.0.0.1:{bench.ports['harness']}"
    bench_profile = pytest.importorskip("tracer.bench_profile")
    profile = bench_profile.load_bench_profile(path, known_drivers=simulated_instrument.DRIVERS.values())
    assert profile.name == "sim-bench-1"


def test_scenario_errors_name_the_file_and_key(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("substrate: {cell: {photocurrent_a: 0.03, colour: blue}}\n")
    with pytest.raises(simulated_instrument.ScenarioError, match=r"bad\.yaml.*colour"):
        simulated_instrument.load_scenario(bad)
    bad.write_text("substrate: {pixels: [{}]}\nlight: {lamp_watts: 3}\n")
    with pytest.raises(simulated_instrument.ScenarioError, match=r"bad\.yaml.*lamp_watts"):
        simulated_instrument.load_scenario(bad)
    assert simulated_instrument.list_scenarios() == ["hysteretic-cell", "mini-module-36", "pilot-substrate"]


def test_command_line_runs_until_sigterm(tmp_path, open_resource):
    bench_file = tmp_path / "sim.yaml"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(
        [sys.executable, "-m", "simulated_instrument", "--port-base", "0", "--time-scale", "0",
         "--seed", "1", "--bench-file", str(bench_file), "--fault", "instrument-error:1"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=ROOT, env=env)
    try:
        lines = {}
        while "harness" not in lines:
            line = proc.stdout.readline()
            assert line, proc.stderr.read()
            role, _, address = line.strip().partition(" ")
            lines[role] = address.strip()
        assert lines["smu"].startswith("TCPIP0::127.0.0.1::") and lines["smu"].endswith("::SOCKET")
        assert proc.stdout.readline().startswith("bench profile written")
        smu = open_resource(lines["smu"])
        assert smu.query("*IDN?").startswith("Kestrel")           # message 1: the fault fires
        assert smu.query("SYST:ERR?").startswith("-240")
        host, port = lines["harness"].split()[0].split(":")
        assert harness.query_state(host, int(port))["messages"]["smu"] == 2
        profile = yaml.safe_load(bench_file.read_text())["bench"]
        assert profile["instruments"]["smu"]["address"] == lines["smu"]
        smu.close()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=10) == 0
        assert "stopped" in proc.stdout.read()
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_tracer_sim_subcommand_has_the_same_options():
    main = pytest.importorskip("tracer.cli.main")
    args = main.build_parser().parse_args(["sim", "--port-base", "0", "--time-scale", "0",
                                           "--fault", "stall:3", "--scenario", "mini-module-36"])
    assert args.port_base == 0 and args.fault == ["stall:3"] and callable(args.func)
