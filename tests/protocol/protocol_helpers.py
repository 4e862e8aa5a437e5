"""Constants and helpers shared by the protocol and bench-profile tests.

A uniquely named module (not ``conftest``): every test folder has its own conftest.py and
pytest imports each under the same module name, so ``from conftest import ...`` picks up
whichever folder's conftest was imported first when several folders are collected together.
"""
from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PROTOCOLS = sorted((ROOT / "protocols").glob("*.yaml"))
DRIVER_NAMES = ("scpi-smu", "scpi-light", "scpi-thermometer", "scpi-switch")


def bench_profile_doc_example() -> str:
    """The YAML example in docs/bench-profile.md: the tests load exactly what the doc shows."""
    text = (ROOT / "docs" / "bench-profile.md").read_text(encoding="utf-8")
    match = re.search(r"```yaml\n(.*?)```", text, re.S)
    assert match, "docs/bench-profile.md has no yaml example"
    return match.group(1)


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
