"""`tracer logbook list|show` and `tracer export` against a logbook written by the writer."""
from __future__ import annotations

import json

import pytest

from tracer.cli.main import main
from tracer.logbook import LogbookWriter, read_sweep_csv


@pytest.fixture
def book(lb_path, run_events):
    with LogbookWriter(lb_path) as w:
        for uid, t0, sample in (("aa11", 1.0e9, "cell-A"), ("aa22", 1.1e9, "cell-B"),
                                ("bb33", 1.2e9, "cell-A")):
            for e in run_events(uid, sweeps=2, points=5, t0=t0, sample_id=sample):
                w(e)
    return lb_path


def test_list_newest_first_and_by_sample(book, capsys):
    assert main(["logbook", "list", "--logbook", str(book)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert [ln.split()[0] for ln in lines[1:4]] == ["bb33", "aa22", "aa11"]
    assert main(["logbook", "list", "--sample", "cell-A", "--json", "--logbook", str(book)]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert [r["uid"] for r in doc["runs"]] == ["bb33", "aa11"]
    assert doc["runs"][0]["points"] == 10 and doc["runs"][0]["sweeps"] == 2


def test_show_by_prefix_as_text_and_json(book, capsys):
    assert main(["logbook", "show", "bb", "--logbook", str(book)]) == 0
    text = capsys.readouterr().out
    assert "Run bb33  COMPLETED" in text and "Maker,M1,SN1,1.0" in text
    assert main(["logbook", "show", "aa2", "--json", "--logbook", str(book)]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["run"]["uid"] == "aa22" and len(doc["sweeps"]) == 2
    assert doc["sweeps"][0]["analysis"] == {"figures": {"isc_a": 0.0}}


def test_bad_references_exit_2(book, capsys):
    assert main(["logbook", "show", "aa", "--logbook", str(book)]) == 2     # ambiguous
    assert "matches 2 runs" in capsys.readouterr().err
    assert main(["logbook", "show", "zz", "--logbook", str(book)]) == 2
    assert main(["export", "zz", "--logbook", str(book)]) == 2


def test_missing_logbook_exits_1(tmp_path, capsys):
    assert main(["logbook", "list", "--logbook", str(tmp_path / "none.sqlite")]) == 1
    assert "no logbook" in capsys.readouterr().err


def test_export_csv_and_json(book, tmp_path, capsys):
    out = tmp_path / "exports"
    assert main(["export", "aa11", "--out", str(out), "--logbook", str(book)]) == 0
    files = sorted((out / "aa11").glob("*.csv"))
    assert [f.name for f in files] == ["00-dark-forward.csv", "01-light-forward.csv"]
    assert len(read_sweep_csv(files[1]).points) == 5
    assert main(["export", "aa11", "--format", "json", "--out", str(out), "--logbook", str(book)]) == 0
    assert json.loads((out / "aa11" / "run.json").read_text())["run"]["uid"] == "aa11"
    assert str(out / "aa11") in capsys.readouterr().out
