"""Security: what the program exposes, accepts and writes.

- the simulated bench listens on loopback unless told otherwise, and its harness port
  (which can inject faults) never leaves loopback;
- sizes are bounded: simulator input lines, protocol and bench files, CSV imports, binary
  blocks a driver will read;
- no ``yaml.load`` without a safe loader, ``eval``, ``exec``, ``pickle`` and friends in the
  product (an AST scan);
- an export cannot write outside the folder it was given (hostile names in a logbook,
  planted symbolic links);
- a protocol cannot name an instrument, and a run opens only the addresses its bench
  profile lists.
"""
from __future__ import annotations

import ast
import io
import json
import os
import socket
import textwrap
import time
from pathlib import Path

import pytest
import pyvisa
import yaml

import simulated_instrument
from drivers import DRIVERS
from drivers.errors import ResponseError
from simulated_instrument.server import MAX_LINE_BYTES
from tracer import events as ev
from tracer.cli import run_cmd
from tracer.fit import FitError
from tracer.fit.csvio import MAX_FILE_BYTES as CSV_MAX_BYTES
from tracer.fit.csvio import read_iv_csv
from tracer.logbook import ExportError, Logbook, LogbookWriter, export_run
from tracer.protocol import MAX_FILE_BYTES as YAML_MAX_BYTES
from tracer.reliability import fuzz_files, fuzz_wire, protocols

ROOT = Path(__file__).resolve().parents[2]
PRODUCT = ("tracer", "drivers", "simulated_instrument")


# ----------------------------------------------------------------------------- listening
def test_the_simulated_bench_listens_on_loopback_by_default():
    with simulated_instrument.running_bench() as bench:
        hosts = {role: s.getsockname()[0] for role, s in zip(bench.ports, bench._sockets)}
        assert set(hosts.values()) == {"127.0.0.1"}, hosts
        assert bench.harness_address[0] == "127.0.0.1"
        assert all("::127.0.0.1::" in a for a in bench.addresses.values())
    import argparse

    from simulated_instrument import cli

    parser = argparse.ArgumentParser()
    cli.add_arguments(parser)
    assert parser.parse_args([]).host == "127.0.0.1"


def test_the_harness_port_stays_on_loopback_when_the_instruments_are_exposed():
    # found by this check: with --host 0.0.0.0 the harness port (fault injection, true
    # state) was opened on every interface too
    from simulated_instrument.harness import query_state

    bench = simulated_instrument.SimulatedBench(host="0.0.0.0").start()
    try:
        assert bench._sockets[-1].getsockname()[0] == "127.0.0.1"
        assert bench.harness_address[0] == "127.0.0.1"
        assert {s.getsockname()[0] for s in bench._sockets[:-1]} == {"0.0.0.0"}
        assert query_state(*bench.harness_address)["messages"]["smu"] == 0
        assert bench.bench_profile()["bench"]["simulator_control"].startswith("127.0.0.1:")
    finally:
        bench.close()


# ----------------------------------------------------------------------------- sizes
def _send_and_read_line(address: tuple[str, int], payload: bytes, timeout: float = 10.0) -> bytes:
    with socket.create_connection(address, timeout=timeout) as s:
        s.sendall(payload)
        data = b""
        while not data.endswith(b"\n"):
            chunk = s.recv(65536)
            if not chunk:
                break
            data += chunk
        return data


def test_simulator_input_lines_are_bounded():
    with simulated_instrument.running_bench() as bench:
        # harness: an over-long line is answered, not buffered, and the port still works
        reply = _send_and_read_line(bench.harness_address,
                                    b"x" * (MAX_LINE_BYTES + 10) + b"\n" + b'{"cmd": "state"}\n')
        assert json.loads(reply.splitlines()[0]) == {"ok": False, "error": "line too long"}
        # SMU: the over-long line is discarded and reported as -363, then the port answers
        host = "127.0.0.1"
        reply = _send_and_read_line((host, bench.ports["smu"]),
                                    b"A" * (MAX_LINE_BYTES + 10) + b"\nSYST:ERR?\n")
        assert reply.startswith(b"-363,")


def test_protocol_and_bench_files_over_one_mib_are_refused(tmp_path):
    big_protocol = tmp_path / "big.yaml"
    big_protocol.write_bytes(yaml.safe_dump(protocols.load_protocol()).encode()
                             + b"# " + b"x" * YAML_MAX_BYTES + b"\n")
    outcome = fuzz_files.run_cli(["check", str(big_protocol)])
    assert outcome.code == 2 and "too large" in outcome.err, outcome.err
    assert fuzz_files.judge_refusal(outcome, allowed=(2,), file_name="big.yaml") == []
    small = protocols.write_protocol(protocols.load_protocol(), tmp_path / "p.yaml")
    big_bench = tmp_path / "bench.yaml"
    big_bench.write_bytes(yaml.safe_dump(fuzz_files.bench_document()).encode()
                          + b"# " + b"x" * YAML_MAX_BYTES + b"\n")
    outcome = fuzz_files.run_cli(["check", str(small), "--bench", str(big_bench)])
    assert outcome.code == 2 and "too large" in outcome.err, outcome.err


def test_csv_imports_read_at_most_their_bound(tmp_path):
    started = time.monotonic()
    with pytest.raises(FitError, match="too large"):
        read_iv_csv("/dev/zero")                      # endless: must not be read whole
    sparse = tmp_path / "huge.csv"
    with open(sparse, "wb") as fh:
        fh.write(b"voltage_v,current_a\n")
        fh.truncate(CSV_MAX_BYTES + 1)                # a hole: no disk used
    with pytest.raises(FitError, match="too large"):
        read_iv_csv(sparse)
    assert time.monotonic() - started < 30
    outcome = fuzz_files.run_cli(["fit", "/dev/zero"])
    assert outcome.code == 2
    assert len(outcome.err.strip().splitlines()) == 1 and "too large" in outcome.err


def test_a_driver_refuses_an_absurd_binary_block_without_reading_it():
    with simulated_instrument.running_bench(time_scale=0.0) as bench:
        with fuzz_wire.ReplyTamperer(("127.0.0.1", bench.ports["smu"])) as tamperer:
            rm = pyvisa.ResourceManager("@py")
            smu = DRIVERS["scpi-smu"](tamperer.address, resource_manager=rm, timeout_s=2.0)
            try:
                smu.configure(source_mode="voltage", compliance=0.05, nplc=0.1, four_wire=True)
                smu.load_list([0.1, 0.2], settle_s=0.0)
                smu.output(True)
                smu.start_list()
                # a block announcing 1 GB: refused from its header, not waited for
                tamperer.arm(lambda r: b"#9999999999" + r[r.find(b";"):])
                t0 = time.monotonic()
                with pytest.raises(ResponseError, match="at most"):
                    smu.fetch_list(0, 2)
                assert time.monotonic() - t0 < 1.0
                assert len(smu.fetch_list(0, 2)) == 2
            finally:
                smu.close()
                rm.close()


# ----------------------------------------------------------------------------- dangerous calls
_DANGEROUS_MODULES = {"pickle", "cPickle", "_pickle", "marshal", "shelve", "dill", "cloudpickle"}
_DANGEROUS_BUILTINS = {"eval", "exec", "compile", "__import__"}
_YAML_UNSAFE = {"unsafe_load", "full_load", "unsafe_load_all", "full_load_all", "load_all"}


def dangerous_calls(source: str) -> list[str]:
    """Lines that deserialise or execute data: ``yaml.load`` without a safe loader,
    ``yaml.unsafe_load``/``full_load``, ``eval``/``exec``/``compile``/``__import__``,
    ``os.system``/``os.popen``, ``shell=True``, any use of pickle-like modules."""
    found = []
    tree = ast.parse(source)
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in _DANGEROUS_MODULES:
                    found.append(f"{node.lineno}: import {alias.name}")
        elif isinstance(node, ast.ImportFrom) and node.module:
            if node.module.split(".")[0] in _DANGEROUS_MODULES:
                found.append(f"{node.lineno}: from {node.module} import ...")
        elif isinstance(node, ast.Call):
            func = node.func
            name = func.id if isinstance(func, ast.Name) else func.attr if isinstance(func, ast.Attribute) else ""
            owner = func.value.id if isinstance(func, ast.Attribute) and isinstance(func.value, ast.Name) else ""
            if isinstance(func, ast.Name) and name in _DANGEROUS_BUILTINS:
                found.append(f"{node.lineno}: {name}()")
            elif owner == "yaml" and name in _YAML_UNSAFE:
                found.append(f"{node.lineno}: yaml.{name}()")
            elif owner == "yaml" and name == "load":
                loader = [k.value for k in node.keywords if k.arg == "Loader"]
                if len(node.args) > 1:
                    loader.append(node.args[1])
                text = ast.unparse(loader[0]) if loader else ""
                if "Safe" not in text:
                    found.append(f"{node.lineno}: yaml.load() with Loader={text or 'default'}")
            elif owner == "os" and name in ("system", "popen", "execv", "execvp", "execl"):
                found.append(f"{node.lineno}: os.{name}()")
            if any(k.arg == "shell" and isinstance(k.value, ast.Constant) and k.value.value
                   for k in node.keywords):
                found.append(f"{node.lineno}: shell=True")
    return found


def test_the_scan_sees_each_dangerous_form():
    source = textwrap.dedent("""
        import pickle, yaml, os, subprocess
        from marshal import loads
        yaml.load(text)
        yaml.load(text, Loader=yaml.Loader)
        yaml.load(text, Loader=yaml.CSafeLoader)
        yaml.unsafe_load(text)
        yaml.safe_load(text)
        eval("1")
        exec("x = 1")
        os.system("true")
        subprocess.run("true", shell=True)
        obj.eval()
    """)
    found = dangerous_calls(source)
    assert len(found) == 9, found          # everything but the safe loader, safe_load, obj.eval
    assert not any("CSafeLoader" in f for f in found)


def test_the_product_never_deserialises_or_executes_data():
    offenders = []
    for package in PRODUCT:
        for path in sorted((ROOT / package).rglob("*.py")):
            for hit in dangerous_calls(path.read_text(encoding="utf-8")):
                offenders.append(f"{path.relative_to(ROOT)}:{hit}")
    assert offenders == []


# ----------------------------------------------------------------------------- exports
HOSTILE_UID = "../../../escaped-run"


def _hostile_logbook(path: Path) -> None:
    t = time.time()
    with LogbookWriter(path) as writer:
        writer(ev.RunStarted(run_uid=HOSTILE_UID, time=t, protocol_name="../../p", protocol={},
                             protocol_sha256="0" * 64, sample={"id": "../../../etc/passwd"},
                             operator="x", bench={"name": "/tmp/bench"}, limits={},
                             software_version="0"))
        for k, (name, direction) in enumerate((("../../../../tmp/evil", "../.."),
                                               ("/absolute/evil", "forward"),
                                               ("..", "/"))):
            uid = f"sweep-{k}"
            writer(ev.SweepStarted(run_uid=HOSTILE_UID, sweep_uid=uid, sweep_index=k,
                                   step_index=k, step_name=name, kind="sweep", light=True,
                                   direction=direction, pixel=None, source_mode="voltage",
                                   acquisition="point", points_planned=1, four_wire=True,
                                   nplc=1.0, settle_s=0.0, compliance=0.1, time=t))
            writer(ev.Point(run_uid=HOSTILE_UID, sweep_uid=uid, seq=1, run_seq=k + 1, time=t,
                            setpoint=0.1, voltage_v=0.1, current_a=-0.01, in_compliance=False))
            writer(ev.SweepFinished(run_uid=HOSTILE_UID, sweep_uid=uid, status="completed",
                                    reason="", points=1, time=t))
        writer(ev.RunFinished(run_uid=HOSTILE_UID, status="completed", reason="", time=t,
                              output_verified_off=True, points=3))


def _files_under(folder: Path) -> set[Path]:
    return {p for p in folder.rglob("*")}


def test_hostile_names_in_a_logbook_cannot_steer_an_export(tmp_path):
    area = tmp_path / "area"
    out = area / "a" / "b" / "c" / "out"
    out.mkdir(parents=True)
    logbook = tmp_path / "hostile.sqlite"
    _hostile_logbook(logbook)
    before = _files_under(tmp_path)
    for fmt in ("csv", "json"):
        with Logbook(logbook) as lb:
            result = export_run(lb, HOSTILE_UID, out, fmt=fmt)
        assert result.files
        for f in result.files:
            assert f.resolve().is_relative_to(out.resolve()), f
    new = _files_under(tmp_path) - before
    assert new and all(p.resolve().is_relative_to(out.resolve()) for p in new), sorted(new)
    # the same through the command line
    outcome = fuzz_files.run_cli(["export", HOSTILE_UID, "--logbook", str(logbook), "--out",
                                  str(out)])
    assert outcome.code == 0, outcome.err
    new = _files_under(tmp_path) - before
    assert all(p.resolve().is_relative_to(out.resolve()) for p in new), sorted(new)


def test_planted_symbolic_links_are_refused(tmp_path):
    logbook = tmp_path / "hostile.sqlite"
    _hostile_logbook(logbook)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    out = tmp_path / "out"
    out.mkdir()
    from tracer.logbook.export import safe_name

    # the run's folder is a link to elsewhere
    os.symlink(elsewhere, out / safe_name(HOSTILE_UID))
    with Logbook(logbook) as lb, pytest.raises(ExportError, match="outside"):
        export_run(lb, HOSTILE_UID, out)
    assert list(elsewhere.iterdir()) == []
    # a file of the run's folder is a link to a file elsewhere
    os.unlink(out / safe_name(HOSTILE_UID))
    with Logbook(logbook) as lb:
        first = export_run(lb, HOSTILE_UID, out)
    target = elsewhere / "victim.txt"
    target.write_text("keep me", encoding="utf-8")
    planted = first.files[0]
    planted.unlink()
    os.symlink(target, planted)
    with Logbook(logbook) as lb, pytest.raises(ExportError, match="outside"):
        export_run(lb, HOSTILE_UID, out)
    assert target.read_text(encoding="utf-8") == "keep me"


def test_a_hostile_sample_id_on_the_command_line_is_refused(tmp_path):
    protocol = protocols.write_protocol(protocols.load_protocol(), tmp_path / "p.yaml")
    for sample in ("../../etc", "/abs/path", "a/b", "..", "x\ny"):
        outcome = fuzz_files.run_cli(["check", str(protocol), "--sample", sample])
        assert outcome.code == 2, (sample, outcome.out, outcome.err)


# ----------------------------------------------------------------------------- addresses
# Values that ARE an address (free text that merely mentions one, in a description, is text
# for people; the run never connects to anything but the bench profile's addresses).
ADDRESS_SMUGGLING = [
    ("metadata", lambda d: d.setdefault("metadata", {}).update(smu="TCPIP0::10.0.0.9::5025::SOCKET")),
    ("address key", lambda d: d["steps"][1].update(address="TCPIP0::10.0.0.9::5025::SOCKET")),
    ("instruments section", lambda d: d.update(instruments={"smu": {"address": "GPIB0::22::INSTR"}})),
    ("sample description", lambda d: d["sample"].update(description="GPIB0::22::INSTR")),
    ("protocol description", lambda d: d.update(description=" USB0::0x0957::0x1234::MY1::INSTR")),
    ("step name", lambda d: d["steps"][1].update(name="TCPIP::10.0.0.9::inst0::INSTR")),
    ("resource key", lambda d: d["limits"].update(resource="ASRL/dev/ttyUSB0::INSTR")),
    ("serial port", lambda d: d.setdefault("metadata", {}).update(port="ASRL3::INSTR")),
]


@pytest.mark.parametrize("where,smuggle", ADDRESS_SMUGGLING, ids=[w for w, _ in ADDRESS_SMUGGLING])
def test_a_protocol_cannot_name_an_instrument(where, smuggle, tmp_path):
    doc = protocols.load_protocol()
    smuggle(doc)
    path = protocols.write_protocol(doc, tmp_path / "p.yaml")
    bench = tmp_path / "bench.yaml"
    bench.write_text(yaml.safe_dump(fuzz_files.bench_document()), encoding="utf-8")
    outcome = fuzz_files.run_cli(["check", str(path), "--bench", str(bench)])
    assert outcome.code == 2, f"{where}: {outcome.out}{outcome.err}"
    assert fuzz_files.judge_refusal(outcome, allowed=(2,), file_name="p.yaml") == []


def test_a_run_opens_only_the_addresses_its_bench_profile_lists(tmp_path, monkeypatch):
    opened: list[str] = []
    original = pyvisa.ResourceManager.open_resource

    def spy(self, resource_name, *args, **kwargs):
        opened.append(str(resource_name))
        return original(self, resource_name, *args, **kwargs)

    monkeypatch.setattr(pyvisa.ResourceManager, "open_resource", spy)
    protocol = protocols.write_protocol(protocols.load_protocol(20), tmp_path / "p.yaml")
    with simulated_instrument.running_bench(time_scale=0.0, seed=1) as bench:
        bench_file = bench.write_bench_profile(tmp_path / "bench.yaml")
        code = run_cmd.execute(protocol, bench_file=bench_file, logbook=tmp_path / "lb.sqlite",
                               out_dir=tmp_path / "out", stdout=io.StringIO(), stderr=io.StringIO())
        listed = set(bench.addresses.values())
    assert code == 0
    assert opened and set(opened) <= listed, (opened, listed)
