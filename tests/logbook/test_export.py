"""Exports: bit-for-bit round trips, safe file names, no writing outside --out."""
from __future__ import annotations

import json
import math
import os
import struct

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from tracer import events as ev
from tracer.conventions import generator_current
from tracer.logbook import (
    ExportError, Logbook, LogbookWriter, export_run, read_run_json, read_sweep_csv, safe_name,
)


def _bits(x):
    return struct.pack("<d", x) if x is not None else None


def _point_bits(p):
    return (p.seq, p.run_seq, _bits(p.time), _bits(p.setpoint), _bits(p.voltage_v),
            _bits(p.current_a), p.in_compliance, _bits(p.irradiance_w_m2), _bits(p.temperature_c))


@pytest.fixture
def stored(lb_path, run_events):
    with LogbookWriter(lb_path) as w:
        for e in run_events("run-7f3a", sweeps=3, points=50):
            w(e)
    return lb_path


def test_csv_round_trip_is_bit_for_bit(stored, tmp_path):
    out = tmp_path / "out"
    with Logbook(stored) as lb:
        result = export_run(lb, "run-7f", out, fmt="csv")
        assert result.directory == (out / "run-7f3a").resolve()
        assert [f.name for f in result.files] == ["00-dark-forward.csv", "01-light-forward.csv",
                                                  "02-dark-forward.csv"]
        for sweep, path in zip(lb.sweeps("run-7f3a"), result.files):
            back = read_sweep_csv(path)
            stored_points = lb.points(sweep.uid)
            assert [_point_bits(p) for p in back.points] == [_point_bits(p) for p in stored_points]
            assert back.points == stored_points
            # the leading columns are in the generator convention
            assert back.current_a == [generator_current(p.current_a) for p in stored_points]
            assert back.metadata["sweep_uid"] == sweep.uid
            assert back.metadata["run_uid"] == "run-7f3a"
            assert back.metadata["light"] == sweep.light
            assert back.metadata["instruments"]["smu"]["identity"] == "Maker,M1,SN1,1.0"


def test_csv_header_is_commented_key_value_lines(stored, tmp_path):
    with Logbook(stored) as lb:
        path = export_run(lb, "latest", tmp_path, fmt="csv").files[0]
    lines = path.read_text().splitlines()
    header = [ln for ln in lines if ln.startswith("#")]
    assert header and lines[: len(header)] == header
    for ln in header:
        key, sep, value = ln[2:].partition(": ")
        assert sep and key.isidentifier()
        json.loads(value)
    assert lines[len(header)].startswith("voltage_v,current_a,")


def test_json_round_trip_is_bit_for_bit(stored, tmp_path):
    with Logbook(stored) as lb:
        result = export_run(lb, "run-7f3a", tmp_path, fmt="json")
        doc = read_run_json(result.files[0])
        assert doc["run"]["uid"] == "run-7f3a" and doc["run"]["sample_id"] == "cell-A"
        for sweep, entry in zip(lb.sweeps("run-7f3a"), doc["sweeps"]):
            pts = lb.points(sweep.uid)
            cols = entry["points"]
            assert [_bits(x) for x in cols["current_load_a"]] == [_bits(p.current_a) for p in pts]
            assert [_bits(x) for x in cols["voltage_v"]] == [_bits(p.voltage_v) for p in pts]
            assert [_bits(x) for x in cols["time"]] == [_bits(p.time) for p in pts]
            assert cols["current_a"] == [-p.current_a for p in pts]
            assert entry["analyses"][0]["origin"] == "live"


finite = st.floats(allow_nan=False, allow_infinity=True, width=64)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(values=st.lists(st.tuples(finite, finite, finite, st.one_of(st.none(), finite)),
                       min_size=1, max_size=30))
def test_any_double_survives_store_and_csv(tmp_path_factory, run_events, values):
    d = tmp_path_factory.mktemp("h")
    events = run_events("h1", sweeps=1, points=0, finish=False)[:2]
    events += [ev.Point(run_uid="h1", sweep_uid="h1-s0", seq=k + 1, run_seq=k + 1, time=float(k),
                        setpoint=s, voltage_v=v, current_a=i, in_compliance=k % 2 == 0,
                        irradiance_w_m2=g, temperature_c=None)
               for k, (s, v, i, g) in enumerate(values)]
    with LogbookWriter(d / "lb.sqlite") as w:
        for e in events:
            w(e)
        lb = w.logbook
        stored_points = lb.points("h1-s0")
        for want, have in zip(events[2:], stored_points):
            assert want == have        # equal numbers (a -0.0 comes back as 0.0, see store)
        path = export_run(lb, "h1", d / "out").files[0]
        back = read_sweep_csv(path).points
    assert [_point_bits(p) for p in back] == [_point_bits(p) for p in stored_points]


def test_nan_reading_exports_as_nan(lb_path, run_events, tmp_path):
    events = run_events("n1", sweeps=1, points=0, finish=False)[:2]
    events.append(ev.Point(run_uid="n1", sweep_uid="n1-s0", seq=1, run_seq=1, time=1.0,
                           setpoint=0.1, voltage_v=math.nan, current_a=math.nan, in_compliance=False))
    with LogbookWriter(lb_path) as w:
        for e in events:
            w(e)
        path = export_run(w.logbook, "n1", tmp_path).files[0]
        doc = read_run_json(export_run(w.logbook, "n1", tmp_path, fmt="json").files[0])
    p = read_sweep_csv(path).points[0]
    assert math.isnan(p.voltage_v) and math.isnan(p.current_a)
    assert doc["sweeps"][0]["points"]["current_load_a"] == [None]   # strict JSON has no NaN


@pytest.mark.parametrize("text,expected", [
    ("../../etc/passwd", "etc-passwd"),
    ("..", "unnamed"),
    ("", "unnamed"),
    ("light sweep #1 / pixel:3", "light-sweep-1-pixel-3"),
    (".hidden", "hidden"),
    ("ok_name-1.2", "ok_name-1.2"),
])
def test_safe_names(text, expected):
    assert safe_name(text) == expected


def test_hostile_ids_stay_inside_out(lb_path, run_events, tmp_path):
    events = run_events("../../../escape", sweeps=1, points=3)
    events = [e if not isinstance(e, ev.SweepStarted) else
              ev.SweepStarted(**{**{f: getattr(e, f) for f in e.__dataclass_fields__},
                                 "step_name": "../../x/../../y", "direction": "/etc"})
              for e in events]
    out = tmp_path / "out"
    with LogbookWriter(lb_path) as w:
        for e in events:
            w(e)
        result = export_run(w.logbook, "../../../escape", out)
    assert len(result.files) == 1
    for f in result.files:
        assert f.resolve().is_relative_to(out.resolve())
    written = {os.path.relpath(os.path.join(r, n), tmp_path)
               for r, _, names in os.walk(tmp_path) for n in names}
    assert all(w.startswith("out" + os.sep) or w == "logbook.sqlite" or w.startswith("logbook.sqlite")
               for w in written), written


def test_a_planted_symlink_cannot_redirect_an_export(stored, tmp_path):
    out = tmp_path / "out"
    elsewhere = tmp_path / "elsewhere"
    out.mkdir()
    elsewhere.mkdir()
    os.symlink(elsewhere, out / "run-7f3a")
    with Logbook(stored) as lb, pytest.raises(ExportError, match="outside"):
        export_run(lb, "run-7f3a", out)
    assert list(elsewhere.iterdir()) == []


def test_unknown_format_is_refused(stored, tmp_path):
    with Logbook(stored) as lb, pytest.raises(ExportError, match="format"):
        export_run(lb, "run-7f3a", tmp_path, fmt="xlsx")
