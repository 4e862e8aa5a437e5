"""``tracer bench``: the report runs, carries every figure (or its error), survives failures.

No time is asserted anywhere here (project rule): the figures are whatever the machine gives.
The first test runs the real quick report once in a subprocess, as CI does; the others run
the report machinery on small stand-in benchmark files written into ``tmp_path``.
"""
from __future__ import annotations

import json
import math
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from tracer.perf import FIGURES, REQUIRED_KEYS, Goal, format_report, run_report

ROOT = Path(__file__).resolve().parents[2]


def _assert_complete(report: dict) -> None:
    """Every goal figure is a key: a finite number, or null with an error text."""
    for key in REQUIRED_KEYS:
        assert key in report, f"{key} missing from the report"
        value = report[key]
        if value is None:
            assert isinstance(report["errors"].get(key), str) and report["errors"][key], key
        else:
            assert isinstance(value, (int, float)) and math.isfinite(value), (key, value)


@pytest.mark.benchmark
def test_tracer_bench_quick_runs_and_writes_every_key(tmp_path):
    out = tmp_path / "bench.json"
    proc = subprocess.run([sys.executable, "-m", "tracer.cli.main", "bench", "--quick",
                           "--json", str(out)], cwd=ROOT, capture_output=True, text=True,
                          timeout=280, stdin=subprocess.DEVNULL)
    assert proc.returncode == 0, proc.stderr[-3000:]
    report = json.loads(out.read_text(encoding="utf-8"))
    _assert_complete(report)
    assert report["size"] == "quick"
    assert report["machine"]["cores"] >= 1
    # the table on stdout shows the same figures as the JSON; a benchmark's failure is a
    # line of the report, not a failure of this test (CI fails only if the report crashes)
    for key in REQUIRED_KEYS:
        assert key in proc.stdout
    for row in report["figures"]:
        assert (row["value"] is None) == (row["error"] is not None), row


# --------------------------------------------------------------- the report machinery
GOOD_MODEL = """
def run(quick=False):
    return {"ours_s": 0.010, "pvlib_s": 0.020, "model_eval_ratio": 0.5, "quick": quick}
"""
SLOW_LOGBOOK = """
def run(quick=False):
    return {"logbook_durable_points_per_s": 1000.0,
            "logbook_one_transaction_points_per_s": 4000.0,
            "logbook_durable_over_one_transaction": 0.25}
"""
RAISES = """
def run(quick=False):
    raise RuntimeError("instrument gone")
"""
NAN = """
def run(quick=False):
    return {"engine_vs_bare_ratio": float("nan"), "list_vs_point_ratio": 7.5}
"""
HANGS = """
import time
def run(quick=False):
    time.sleep(60)
"""
DIES = """
import os
def run(quick=False):
    os._exit(3)
"""


def _write(folder: Path, files: dict[str, str]) -> None:
    for name, text in files.items():
        (folder / name).write_text(textwrap.dedent(text), encoding="utf-8")


def test_report_reads_figures_compares_goals_and_keeps_failures(tmp_path):
    _write(tmp_path, {"m.py": GOOD_MODEL, "l.py": SLOW_LOGBOOK, "f.py": RAISES,
                      "e.py": NAN, "g.py": DIES})
    benchmarks = (("model", "m.py"), ("logbook", "l.py"), ("fit", "f.py"),
                  ("engine", "e.py"), ("gui", "g.py"), ("analysis", "absent.py"))
    report = run_report("quick", benchmark_dir=tmp_path, benchmarks=benchmarks,
                        timeout_s=60)
    _assert_complete(report)
    json.dumps(report, allow_nan=False)          # valid JSON: no NaN slipped through
    assert report["model_eval_ratio"] == 0.5
    assert report["benchmarks"]["model"]["result"]["quick"] is True
    rows = {r["key"]: r for r in report["figures"]}
    assert rows["model_eval_ratio"]["met"] is True
    assert rows["model_eval_ratio"]["ours"] == pytest.approx(10.0)       # s -> ms
    assert rows["model_eval_ratio"]["baseline"] == pytest.approx(20.0)
    assert report["logbook_durable_points_per_s"] == 1000.0
    assert rows["logbook_durable_points_per_s"]["met"] is False
    assert rows["logbook_durable_points_per_s"]["ratio"] == 0.25
    # a raising benchmark: its figures are null with its message
    for key in ("fit_single_ms", "fit_double_ms", "fit_single_rmse_ratio_vs_baseline"):
        assert report[key] is None
        assert "RuntimeError: instrument gone" in report["errors"][key]
    # NaN is not a figure; the other figure of the same benchmark still counts
    assert report["engine_vs_bare_ratio"] is None
    assert "not a number" in report["errors"]["engine_vs_bare_ratio"]
    assert report["list_vs_point_ratio"] == 7.5
    # a process that dies without a result
    assert "status 3" in report["errors"]["gui_worst_frame_ms"]
    assert "not found" in report["errors"]["analysis_latency_ms"]
    assert report["goals_met"] == 2 and report["goals_measured"] == 3
    table = format_report(report)
    assert "ERROR" in table and "instrument gone" in table and "model_eval_ratio" in table


def test_a_hanging_benchmark_is_ended_and_reported(tmp_path):
    _write(tmp_path, {"h.py": HANGS, "m.py": GOOD_MODEL})
    report = run_report("quick", benchmark_dir=tmp_path, timeout_s=2,
                        benchmarks=(("analysis", "h.py"), ("model", "m.py")))
    outcome = report["benchmarks"]["analysis"]
    assert outcome["status"] == "timeout"
    assert "no result within 2 s" in report["errors"]["analysis_latency_ms"]
    assert outcome["seconds"] < 30          # ended, not waited for (a bound, not a timing claim)
    assert report["model_eval_ratio"] == 0.5   # the next benchmark still ran


def test_only_runs_the_named_benchmarks(tmp_path):
    _write(tmp_path, {"m.py": GOOD_MODEL, "f.py": RAISES})
    report = run_report("quick", benchmark_dir=tmp_path, only=["model"],
                        benchmarks=(("model", "m.py"), ("fit", "f.py")))
    assert report["benchmarks"]["fit"]["status"] == "skipped"
    assert "not run" in report["errors"]["fit_single_ms"]
    _assert_complete(report)


def test_goal_operators():
    assert Goal("<", 20.0).met(19.9) and not Goal("<", 20.0).met(20.0)
    assert Goal("<=", 1.0).met(1.0) and not Goal("<=", 1.0).met(1.01)
    assert Goal(">=", 5.0).met(5.0) and not Goal(">=", 5.0).met(4.99)
    assert Goal(">=", 5.0).met(None) is None
    with pytest.raises(ValueError):
        Goal("=", 1.0)


def test_the_goals_are_those_of_the_project_brief():
    goals = {f.key: str(f.goal) for f in FIGURES}
    assert goals == {
        "model_eval_ratio": "<= 1", "fit_single_ms": "< 20", "fit_double_ms": "< 100",
        "fit_single_rmse_ratio_vs_baseline": "<= 1", "engine_vs_bare_ratio": ">= 0.8",
        "list_vs_point_ratio": ">= 5", "analysis_latency_ms": "< 100",
        "logbook_durable_points_per_s": ">= 20,000", "gui_worst_frame_ms": "< 50"}


def test_cli_refuses_an_unknown_benchmark_name():
    proc = subprocess.run([sys.executable, "-m", "tracer.cli.main", "bench", "--only", "nope"],
                          cwd=ROOT, capture_output=True, text=True, timeout=60,
                          stdin=subprocess.DEVNULL)
    assert proc.returncode == 2
    assert "unknown benchmark" in proc.stderr
