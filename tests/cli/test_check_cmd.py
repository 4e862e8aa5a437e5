"""`tracer check FILE [--bench FILE]`: exit 0 with a summary, or 2 with every problem; never
a traceback."""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

from tracer.cli.main import main

ROOT = Path(__file__).resolve().parents[2]
PROTOCOLS = sorted((ROOT / "protocols").glob("*.yaml"))


def bench_text() -> str:
    text = (ROOT / "docs" / "bench-profile.md").read_text(encoding="utf-8")
    return re.search(r"```yaml\n(.*?)```", text, re.S).group(1)


@pytest.fixture
def bench_file(tmp_path):
    path = tmp_path / "bench.yaml"
    path.write_text(bench_text(), encoding="utf-8")
    return path


@pytest.mark.parametrize("path", PROTOCOLS, ids=lambda p: p.name)
def test_shipped_protocols_pass(path, bench_file, capsys):
    assert main(["check", str(path), "--bench", str(bench_file)]) == 0
    out = capsys.readouterr()
    assert out.out.startswith(f"OK: {path.stem}, ")
    assert "planned points" in out.out and "about " in out.out
    assert "bench sim-bench-1" in out.out
    assert out.err == ""


def test_summary_counts_the_unrolled_plan(bench_file, capsys):
    six = ROOT / "protocols" / "six-pixel-substrate.yaml"
    assert main(["check", str(six), "--bench", str(bench_file), "--steps"]) == 0
    out = capsys.readouterr().out
    # 2 set-light + 1 wait + 2 loops x 6 pixels x (select + sweep) = 27 steps;
    # points: 6 x 83 (light) + 6 x 121 (dark) = 1224
    assert "27 steps (12 sweeps)" in out and "6 pixels (1, 2, 3, 4, 5, 6)" in out
    assert "1224 planned points" in out
    assert "select pixel 6" in out and "light sweep 'light-p1'" in out


def test_without_a_bench_says_so(capsys):
    assert main(["check", str(PROTOCOLS[0])]) == 0
    assert "hard limits not checked" in capsys.readouterr().out


def test_sample_override(capsys):
    assert main(["check", str(PROTOCOLS[0]), "--sample", "PLT-9999-Q"]) == 0
    assert "sample PLT-9999-Q" in capsys.readouterr().out


BAD = """\
name: bad
sample:
  id: PLT-0001-A
limits:
  voltage_v: 40.0
  current_a: 0.1
  power_w: 0.1
  reverse_voltage_v: 0.5
steps:
  - kind: sweep
    light: false
    range: {start_v: -0.2, stop_v: 0.7}
    points: 1
    nplcs: 2
"""


def test_problems_exit_2_and_are_all_listed(tmp_path, bench_file, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text(BAD)
    assert main(["check", str(bad), "--bench", str(bench_file)]) == 2
    out = capsys.readouterr()
    assert out.out == ""
    assert out.err.splitlines() == [
        "3 problems:",
        f"  {bad}:5: limits.voltage_v: 40 is beyond the hard limit 25 of bench 'sim-bench-1'; "
        "allowed 0 < x ≤ 25",
        f"  {bad}:13: steps[0].points: 1 is too small; allowed 2 … 10000",
        f"  {bad}:14: steps[0].nplcs: unknown key 'nplcs' in a sweep step (did you mean "
        "'nplc'?); allowed: kind, name, light, source, range, points, spacing, direction, "
        "settle_s, nplc, four_wire, repeats, acquisition, compliance_a, voc_estimate_v",
    ]


def test_bad_bench_profile_exits_2(tmp_path, capsys):
    bench = tmp_path / "bench.yaml"
    bench.write_text("bench:\n  name: x\n")
    assert main(["check", str(PROTOCOLS[0]), "--bench", str(bench)]) == 2
    err = capsys.readouterr().err
    assert "missing required key 'instruments'" in err and f"{bench}:1: bench: " in err


@pytest.mark.parametrize("content", [b"", b"\x00\xff junk", b"[unclosed", b"- a list\n"])
def test_broken_files_exit_2_without_traceback(tmp_path, capsys, content):
    path = tmp_path / "broken.yaml"
    path.write_bytes(content)
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert str(path) in err and "Traceback" not in err


def test_missing_file_exits_2(tmp_path, capsys):
    assert main(["check", str(tmp_path / "none.yaml")]) == 2
    assert "no such file" in capsys.readouterr().err


def test_an_internal_error_is_reported_without_traceback(monkeypatch, capsys):
    import tracer.protocol

    def broken(*args, **kwargs):
        raise RuntimeError("boom")
    monkeypatch.setattr(tracer.protocol, "compile_plan", broken)
    assert main(["check", str(PROTOCOLS[0])]) == 1
    err = capsys.readouterr().err
    assert "internal error" in err and "boom" in err and "Traceback" not in err


def test_real_process_exit_codes(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n\x00\x00")
    cmd = [sys.executable, "-m", "tracer.cli.main", "check"]
    bad_run = subprocess.run(cmd + [str(bad)], cwd=ROOT, capture_output=True, text=True,
                             timeout=60)
    assert bad_run.returncode == 2 and "Traceback" not in bad_run.stderr
    assert "not a text file" in bad_run.stderr
    good_run = subprocess.run(cmd + [str(PROTOCOLS[0])], cwd=ROOT, capture_output=True,
                              text=True, timeout=60)
    assert good_run.returncode == 0 and good_run.stdout.startswith("OK: ")
