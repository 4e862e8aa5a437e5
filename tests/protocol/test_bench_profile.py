"""Bench profiles: the documented example loads; problems name file, line and key; the
snapshot is JSON-safe and carries no credentials."""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

from tracer.bench_profile import (BenchProfileError, load_bench_profile, redact_address,
                                  registered_drivers)
from tracer.plan import Limits

from protocol_helpers import DRIVER_NAMES, ROOT, bench_profile_doc_example


def test_the_documented_example_loads(bench):
    assert bench.name == "sim-bench-1"
    assert bench.roles == ("smu", "light", "thermometer", "switch")
    assert bench.hard_limits == Limits(voltage_v=25.0, current_a=1.0, power_w=10.0,
                                       reverse_voltage_v=2.0)
    assert bench.instrument("smu").address == "TCPIP0::127.0.0.1::5025::SOCKET"
    assert bench.instrument("smu").timeout_s == 5.0
    assert bench.switch_channels == 6
    assert bench.reference_cell.calibration_isc_a == 0.12
    assert bench.instability_class == "A" and bench.simulated
    with pytest.raises(KeyError):
        bench.instrument("oscilloscope")


def test_snapshot_is_json_safe_and_leaves_out_the_harness(bench):
    snap = bench.to_snapshot()
    assert json.loads(json.dumps(snap)) == snap
    assert "simulator_control" not in json.dumps(snap) and "5029" not in json.dumps(snap)
    assert snap["hard_limits"]["voltage_v"] == 25.0
    assert snap["instruments"]["switch"]["channels"] == 6


def test_credentials_are_redacted():
    assert redact_address("TCPIP0::user:secret@10.0.0.5::INSTR") == "TCPIP0::***@10.0.0.5::INSTR"
    assert redact_address("TCPIP0::127.0.0.1::5025::SOCKET") == "TCPIP0::127.0.0.1::5025::SOCKET"


def test_the_drivers_registry_is_used_when_no_list_is_given(bench_file):
    names = registered_drivers()
    assert names is not None, "the drivers package is part of this project and must import"
    assert set(DRIVER_NAMES) <= names
    load_bench_profile(bench_file)


def test_loading_the_module_does_not_import_visa():
    code = ("import sys, tracer.bench_profile, tracer.protocol, tracer.cli.check_cmd; "
            "print('pyvisa' in sys.modules, 'drivers' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True,
                         timeout=60)
    assert out.stdout.split() == ["False", "False"], out.stderr


def problems(text, **kw):
    with pytest.raises(BenchProfileError) as info:
        load_bench_profile(text, source_name="bench.yaml", known_drivers=DRIVER_NAMES, **kw)
    assert str(info.value).startswith(f"{len(info.value.problems)} problem")
    return {p.key: p for p in info.value.problems}


def test_every_problem_at_once():
    text = bench_profile_doc_example()
    text = (text.replace("driver: scpi-light", "driver: scpi-lite")
                .replace("channels: 6", "channels: 0")
                .replace("current_a: 1.0", "current_a: 5.0")
                .replace("instability_class: A", "instability_class: D")
                .replace("timeout_s: 5", "timeout_s: -1")
                .replace('address: "TCPIP0::127.0.0.1::5027::SOCKET"', "address: localhost"))
    found = problems(text)
    assert set(found) == {"bench.instruments.light.driver", "bench.instruments.switch.channels",
                          "bench.hard_limits.current_a", "bench.instability_class",
                          "bench.instruments.smu.timeout_s",
                          "bench.instruments.thermometer.address"}
    light = found["bench.instruments.light.driver"]
    assert light.line == 10 and "did you mean 'scpi-light'?" in light.message
    assert found["bench.hard_limits.current_a"].line == 20
    assert "VISA resource string" in found["bench.instruments.thermometer.address"].allowed


def test_unknown_role_and_missing_smu():
    text = "bench:\n  name: b\n  instruments:\n    lamp: {address: 'ASRL1::INSTR', driver: x}\n" \
           "  hard_limits: {voltage_v: 1, current_a: 0.1, power_w: 0.1, reverse_voltage_v: 0}\n"
    found = problems(text)
    assert "the role is called 'light'" in found["bench.instruments.lamp"].message
    text = text.replace("lamp:", "light:").replace("driver: x", "driver: scpi-light")
    assert "needs an 'smu'" in problems(text)["bench.instruments"].message


def test_channels_only_on_a_switch():
    text = bench_profile_doc_example().replace("      timeout_s: 5\n",
                                               "      timeout_s: 5\n      channels: 4\n")
    assert "only a switch has channels" in problems(text)[
        "bench.instruments.smu.channels"].message


@pytest.mark.parametrize("text, needle", [
    ("", "is empty"),
    ("bench: [1, 2\n", "not valid YAML"),
    ("- bench\n", "top level must be a mapping"),
    ("name: x\nsteps: []\n", "looks like a protocol"),
    (b"\x00\x01\x02", "not a text file"),
])
def test_bad_files(text, needle):
    with pytest.raises(BenchProfileError) as info:
        load_bench_profile(text, source_name="bench.yaml", known_drivers=DRIVER_NAMES)
    assert needle in str(info.value)
    assert all(p.file == "bench.yaml" for p in info.value.problems)


def test_a_bad_bench_file_given_to_the_protocol_loader(tmp_path):
    from tracer.protocol import load_protocol
    from protocol_helpers import MINIMAL
    bad = tmp_path / "bench.yaml"
    bad.write_text("bench: {}\n")
    with pytest.raises(BenchProfileError):
        load_protocol(MINIMAL, bench=bad)
