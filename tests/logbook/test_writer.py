"""The critical subscriber: what it writes, recovery of interrupted runs, concurrency."""
from __future__ import annotations

import math
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
import threading
import time

import pytest

from tracer import events as ev
from tracer.logbook import AmbiguousRun, Logbook, LogbookWriter, RunNotFound, default_logbook_path


def _same(a, b):
    """Event equality where NaN equals NaN (a stored NaN reads back as NaN)."""
    da, db = a.to_dict(), b.to_dict()
    return da == db


def test_a_run_reads_back_as_the_events_that_wrote_it(lb_path, run_events):
    events = run_events("r1", sweeps=3, points=40)
    with LogbookWriter(lb_path) as w:
        for e in events:
            w(e)
        assert w.points_written == 120
    with Logbook(lb_path) as lb:
        replay = list(lb.run_events("r1"))
    assert len(replay) == len(events)
    for original, back in zip(events, replay):
        assert type(original) is type(back)
        if isinstance(original, ev.Point):
            assert original == back          # every field, exactly
        else:
            assert _same(original, back), (original, back)


def test_run_record_holds_protocol_bench_and_instruments(lb_path, run_events):
    events = run_events("r1", sweeps=1, points=3)
    with LogbookWriter(lb_path) as w:
        for e in events:
            w(e)
    with Logbook(lb_path) as lb:
        run = lb.run("r1")
        started = events[0]
        assert run.protocol == started.protocol and run.protocol_sha256 == started.protocol_sha256
        assert run.sample_id == "cell-A" and run.operator == "tester"
        assert run.bench == started.bench and run.software_version == "0.1.0"
        assert {i.role: i.identity for i in run.instruments} == {
            "smu": "Maker,M1,SN1,1.0", "light": "Maker,L1,SN2,1.0"}
        assert run.status == "completed" and run.output_verified_off is True
        assert run.points_reported == 3
        sweep = lb.sweeps("r1")[0]
        assert (sweep.status, sweep.points_stored, sweep.points_reported) == ("completed", 3, 3)
        assert lb.analyses(run_ref="r1")[0].result == {"figures": {"isc_a": 0.0}}


def test_non_finite_and_missing_readings_are_kept(lb_path, run_events):
    events = run_events("r1", sweeps=1, points=1, finish=False)
    odd = [ev.Point(run_uid="r1", sweep_uid="r1-s0", seq=k + 2, run_seq=k + 2, time=1.8e9 + k,
                    setpoint=0.0, voltage_v=v, current_a=i, in_compliance=True,
                    irradiance_w_m2=None, temperature_c=None)
           for k, (v, i) in enumerate([(math.nan, math.nan), (math.inf, -math.inf),
                                       (-0.0, 5e-324), (9.9e37, -1.7976931348623157e308)])]
    with LogbookWriter(lb_path) as w:
        for e in events[:3] + odd:   # RunStarted, SweepStarted, one point, then the odd ones
            w(e)
        got = w.logbook.points("r1-s0")[1:]
    assert math.isnan(got[0].voltage_v) and math.isnan(got[0].current_a)
    for want, have in zip(odd[1:], got[1:]):
        assert want == have
    # SQLite keeps no sign on a zero REAL (it stores integral reals as integers), so a
    # -0.0 reading comes back as 0.0: the same number, documented in tracer.logbook.store.
    assert got[2].voltage_v == 0.0 and got[2].current_a == 5e-324


def test_an_unknown_sweep_is_an_error_not_a_silent_loss(lb_path, run_events):
    events = run_events("r1", sweeps=1, points=2, finish=False)
    with LogbookWriter(lb_path) as w:
        w(events[0])
        stray = ev.Point(run_uid="r1", sweep_uid="nowhere", seq=1, run_seq=1, time=0.0,
                         setpoint=0.0, voltage_v=0.0, current_a=0.0, in_compliance=False)
        with pytest.raises(sqlite3.IntegrityError):
            w(stray)


def test_resolving_runs_by_prefix_and_latest(lb_path, run_events):
    with LogbookWriter(lb_path) as w:
        for uid, t0 in (("abc111", 1.0e9), ("abc222", 1.1e9), ("zzz333", 1.2e9)):
            for e in run_events(uid, sweeps=1, points=1, t0=t0, sample_id=uid[:3]):
                w(e)
    with Logbook(lb_path) as lb:
        assert lb.resolve_run("abc1") == "abc111"
        assert lb.resolve_run("zzz333") == "zzz333"
        assert lb.resolve_run("latest") == "zzz333"
        with pytest.raises(AmbiguousRun) as err:
            lb.resolve_run("abc")
        assert set(err.value.candidates) == {"abc111", "abc222"}
        with pytest.raises(RunNotFound):
            lb.resolve_run("q")
        assert [r.uid for r in lb.list_runs()] == ["zzz333", "abc222", "abc111"]
        assert [r.uid for r in lb.list_runs(sample_id="abc")] == ["abc222", "abc111"]
        assert lb.list_runs(sample_id="abc")[0].points == 1


def test_default_location_follows_the_environment(monkeypatch, tmp_path):
    monkeypatch.delenv("TRACER_LOGBOOK", raising=False)
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "xdg"))
    assert default_logbook_path() == tmp_path / "xdg" / "tracer" / "logbook.sqlite"
    monkeypatch.setenv("XDG_DATA_HOME", "relative/ignored")   # XDG Base Directory spec: must be absolute
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert default_logbook_path() == tmp_path / "home" / ".local" / "share" / "tracer" / "logbook.sqlite"
    monkeypatch.setenv("TRACER_LOGBOOK", str(tmp_path / "x.sqlite"))
    assert default_logbook_path() == tmp_path / "x.sqlite"


# ----------------------------------------------------------------------------- interrupted runs
def test_a_run_left_open_in_this_process_is_marked_interrupted(lb_path, run_events):
    events = run_events("r1", sweeps=2, points=10, finish=False)
    w = LogbookWriter(lb_path)
    for e in events[:18]:        # 1 + (1 + 10 + 2) + 1 + 3: three points into the second sweep
        w(e)
    with Logbook(lb_path) as reader:          # the writer is alive: left alone
        assert reader.run("r1").status == "running"
        assert reader.recovery.interrupted_runs == ()
    w.close()                                 # no RunFinished came
    with Logbook(lb_path) as lb:
        run = lb.run("r1")
        assert run.status == "interrupted" and "unfinished" in run.reason
        assert [s.status for s in lb.sweeps("r1")] == ["completed", "interrupted"]
        assert lb.point_count("r1") == 13


_CHILD = textwrap.dedent("""
    import sys, time
    sys.path.insert(0, {tests!r})
    from conftest import make_run
    from tracer import events as ev
    from tracer.logbook import LogbookWriter
    w = LogbookWriter({path!r})
    for e in make_run("killed", sweeps=1, points=100000, finish=False):
        w(e)
        if isinstance(e, ev.Point):
            print(e.seq, flush=True)
            if e.seq >= {stop_after}:
                time.sleep(60)
""")


def _start_child(lb_path, stop_after):
    code = _CHILD.format(tests=os.path.dirname(__file__), path=str(lb_path), stop_after=stop_after)
    return subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)


def test_a_killed_writer_leaves_a_clean_logbook_with_every_printed_point(lb_path):
    child = _start_child(lb_path, stop_after=10**9)
    printed = []
    try:
        for line in child.stdout:
            printed.append(int(line))
            if len(printed) >= 300:
                break
        child.send_signal(signal.SIGKILL)
        child.wait(10)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    with Logbook(lb_path) as lb:
        assert lb.connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert lb.recovery.interrupted_runs == ("killed",)
        run = lb.run("killed")
        assert run.status == "interrupted"
        stored = {p.seq for p in lb.points("killed-s0")}
        assert set(printed) <= stored          # everything shown was on disk first
        assert lb.sweeps("killed")[0].status == "interrupted"


def test_a_run_whose_writer_is_alive_elsewhere_is_left_running(lb_path):
    child = _start_child(lb_path, stop_after=5)
    try:
        for line in child.stdout:
            if int(line) >= 5:
                break
        with Logbook(lb_path) as lb:
            assert lb.run("killed").status == "running"
            assert lb.recovery.interrupted_runs == ()
    finally:
        child.kill()
        child.wait()
    with Logbook(lb_path) as lb:
        assert lb.run("killed").status == "interrupted"
        assert lb.point_count("killed") == 5


# ----------------------------------------------------------------------------- concurrency
def test_readers_see_a_consistent_growing_logbook_while_the_writer_writes(lb_path, run_events):
    events = run_events("r1", sweeps=4, points=500)
    writer = LogbookWriter(lb_path)
    writer(events[0])
    errors, seen = [], []
    done = threading.Event()

    def read_loop():
        try:
            with Logbook(lb_path) as lb:
                while not done.is_set():
                    n = lb.point_count("r1")
                    runs = lb.list_runs()
                    assert runs[0].points >= n
                    seen.append(n)
        except Exception as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    readers = [threading.Thread(target=read_loop) for _ in range(2)]
    for t in readers:
        t.start()
    try:
        for e in events[1:]:
            writer(e)
    finally:
        done.set()
        for t in readers:
            t.join(10)
        writer.close()
    assert errors == []
    assert seen                               # the readers did read while the writer wrote
    with Logbook(lb_path) as lb:
        assert lb.point_count("r1") == 2000 and lb.run("r1").status == "completed"


def test_each_readers_view_only_grows(lb_path, run_events):
    events = run_events("r1", sweeps=1, points=800)
    counts: list[int] = []
    with LogbookWriter(lb_path) as writer:
        writer(events[0])
        writer(events[1])
        reader = Logbook(lb_path)
        for k, e in enumerate(events[2:]):
            writer(e)
            if k % 50 == 0:
                counts.append(reader.point_count("r1"))
        reader.close()
    assert counts == sorted(counts) and counts[-1] == 800


def test_a_held_write_lock_makes_the_writer_wait_not_fail(lb_path, run_events):
    events = run_events("r1", sweeps=1, points=3)
    with LogbookWriter(lb_path) as writer:
        for e in events[:3]:
            writer(e)
        other = sqlite3.connect(lb_path, isolation_level=None, check_same_thread=False)
        other.execute("BEGIN IMMEDIATE")           # another process holding the write lock
        released = []

        def release():
            time.sleep(0.3)
            released.append(time.monotonic())
            other.execute("COMMIT")

        t = threading.Thread(target=release)
        t.start()
        writer(events[3])                          # waits on the busy timeout, then commits
        finished = time.monotonic()
        t.join()
        other.close()
        assert released and finished >= released[0]
        for e in events[4:]:
            writer(e)
    with Logbook(lb_path) as lb:
        assert lb.point_count("r1") == 3


def test_reading_never_waits_for_the_writer(lb_path, run_events):
    with LogbookWriter(lb_path) as writer:
        for e in run_events("r1", sweeps=1, points=3):
            writer(e)
    other = sqlite3.connect(lb_path, isolation_level=None)
    other.execute("BEGIN IMMEDIATE")
    other.execute("INSERT INTO schema_version VALUES (99, 'held, never committed', 0.0)")
    try:
        with Logbook(lb_path, busy_timeout_s=0.05, recover=False) as lb:   # WAL: readers don't block
            assert lb.point_count("r1") == 3
            assert lb.list_runs()[0].status == "completed"
    finally:
        other.execute("ROLLBACK")
        other.close()
