"""``tracer reliability``: the figures, the verdict and the exit status.

The quick-size checks themselves run in this folder's other tests (the CI run of the
report's quick mode, part by part); here the command is run end to end on its cheapest
part at a tiny size, and the verdict logic is checked on results made up to fail.
"""
from __future__ import annotations

import json

from tracer.cli.main import build_parser
from tracer.reliability import report as rep
from tracer.reliability.crash import KillTrial
from tracer.reliability.fuzz_files import FuzzSummary, run_cli
from tracer.reliability.load import LoadResult, LoadRun
from tracer.reliability.matrix import CellResult

TINY = rep.Sizes("tiny", (("garble", "teardown"),), 1, 5, 3, 2, 5)


def test_the_command_is_registered():
    parser = build_parser()
    args = parser.parse_args(["reliability", "--quick", "--json", "x.json", "--only", "fuzz"])
    assert args.quick and args.only == ["fuzz"] and str(args.json) == "x.json"


def test_the_command_runs_a_part_and_writes_its_figures(tmp_path, monkeypatch):
    monkeypatch.setattr(rep, "QUICK", TINY)
    target = tmp_path / "figures.json"
    outcome = run_cli(["reliability", "--quick", "--only", "fuzz", "--json", str(target)])
    assert outcome.code == 0, outcome.out + outcome.err
    assert "hostile input" in outcome.out and "result: MET" in outcome.out
    doc = json.loads(target.read_text(encoding="utf-8"))
    figures = doc["figures"]
    assert figures["fuzz_cases"] >= 3 * TINY.fuzz_cases + TINY.wire_cases
    assert figures["fuzz_failures"] == 0 and figures["passed"] is True
    assert figures["matrix_cells_run"] == 0          # not asked for
    assert {f["kind"] for f in doc["fuzz"]} == {"protocol", "bench", "csv", "wire"}


def test_usage_errors_exit_2(tmp_path):
    outcome = run_cli(["reliability", "--workers", "0"])
    assert outcome.code == 2
    outcome = run_cli(["reliability", "--json", str(tmp_path)])
    assert outcome.code == 2
    outcome = run_cli(["reliability", "--only", "nonsense"])
    assert outcome.code == 2


def _report(**changes) -> rep.ReliabilityReport:
    r = rep.ReliabilityReport(TINY, rep.PARTS)
    r.matrix_cells = [CellResult("garble", "teardown", passed=True)]
    r.kill_trials = [KillTrial(0, 1.0, passed=True)]
    r.fuzz = [FuzzSummary("protocol", cases=5)]
    good = LoadResult("shared logbook", runs=[LoadRun(0, "x", stored=15)])
    r.load = [good]
    for key, value in changes.items():
        setattr(r, key, value)
    return r


def test_the_verdict_is_met_only_when_every_figure_is():
    assert _report().passed
    assert "result: MET" in _report().format()
    failed_cell = CellResult("stall", "mpp", passed=False, problems=["the SMU output is ON"])
    bad = _report(matrix_cells=[failed_cell])
    assert not bad.passed and "the SMU output is ON" in bad.format()
    assert "NOT MET" in bad.format()
    lost = KillTrial(1, 2.0, passed=False, points_lost=3, problems=["3 lost"])
    assert not _report(kill_trials=[lost]).passed
    assert _report(kill_trials=[lost]).kill_points_lost == 3
    assert not _report(fuzz=[FuzzSummary("csv", cases=9, failures=1)]).passed
    assert not _report(fuzz=[FuzzSummary("csv", skipped="no hypothesis")]).passed
    lossy = LoadResult("own logbooks", runs=[LoadRun(0, "x", stored=14, lost=1, problems=["1 lost"])])
    assert not _report(load=[lossy]).passed
    assert not _report(errors=["fault matrix: CalibrationError"]).passed
    assert _report().figures()["load_points_written"] == 15
