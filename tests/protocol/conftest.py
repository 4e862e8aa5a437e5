"""Fixtures for the protocol and bench-profile tests."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
PROTOCOLS = sorted((ROOT / "protocols").glob("*.yaml"))
DRIVER_NAMES = ("scpi-smu", "scpi-light", "scpi-thermometer", "scpi-switch")


def bench_profile_doc_example() -> str:
    """The YAML example in docs/bench-profile.md: the tests load exactly what the doc shows."""
    text = (ROOT / "docs" / "bench-profile.md").read_text(encoding="utf-8")
    match = re.search(r"```yaml\n(.*?)```", text, re.S)
    assert match, "docs/bench-profile.md has no yaml example"
    return match.group(1)


@pytest.fixture
def bench_file(tmp_path: Path) -> Path:
    path = tmp_path / "bench.yaml"
    path.write_text(bench_profile_doc_example(), encoding="utf-8")
    return path


@pytest.fixture
def bench(bench_file: Path):
    from tracer.bench_profile import load_bench_profile
    return load_bench_profile(bench_file, known_drivers=DRIVER_NAMES)


MINIMAL = """\
name: minimal
sample:
  id: PLT-0001-A
limits:
  voltage_v: 1.0
  current_a: 0.1
  power_w: 0.1
  reverse_voltage_v: 0.5
steps:
  - kind: sweep
    light: false
    range: {start_v: -0.2, stop_v: 0.7}
    points: 10
"""


@pytest.fixture
def write(tmp_path: Path):
    def _write(text: str | bytes, name: str = "protocol.yaml") -> Path:
        path = tmp_path / name
        if isinstance(text, bytes):
            path.write_bytes(text)
        else:
            path.write_text(text, encoding="utf-8")
        return path
    return _write
