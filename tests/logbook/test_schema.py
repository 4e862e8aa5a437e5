"""Schema creation, migrations and the immutability guards."""
from __future__ import annotations

import sqlite3

import pytest

from tracer import events as ev
from tracer.logbook import Logbook, LogbookError, LogbookWriter, SCHEMA_VERSION, migrate, schema
from tracer.logbook.store import connect


def _tables(conn):
    return {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}


def test_migrates_an_empty_file_to_the_latest_version(lb_path):
    with Logbook(lb_path) as lb:
        assert lb.schema_version == SCHEMA_VERSION == schema.MIGRATIONS[-1].version
        assert {"schema_version", "runs", "run_instruments", "sweeps", "points", "analyses",
                "interlock_trips"} <= _tables(lb.connection)
        versions = [r[0] for r in lb.connection.execute("SELECT version FROM schema_version ORDER BY version")]
        assert versions == [m.version for m in schema.MIGRATIONS]
        assert lb.connection.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    # opening again applies nothing
    conn = connect(lb_path)
    assert migrate(conn) == []
    conn.close()


def test_migrates_a_version_1_logbook_keeping_its_data(lb_path):
    conn = connect(lb_path)
    assert migrate(conn, target=1) == [1]
    assert "analyses" not in _tables(conn)
    # a run written by a version-1 program (no analyses table yet)
    conn.execute("INSERT INTO runs (uid, protocol_name, protocol_json, protocol_sha256, sample_id, "
                 "sample_json, operator, bench_name, bench_json, limits_json, metadata_json, "
                 "software_version, started_at, ended_at, status, reason, writer_host, writer_pid, "
                 "writer_token) VALUES ('old', 'p', '{}', 'h', 's', '{}', 'o', 'b', '{}', '{}', '{}', "
                 "'0.0.1', 1.0, 2.0, 'completed', '', 'h', 1, '')")
    conn.execute("INSERT INTO sweeps (uid, run_uid, sweep_index, step_index, step_name, kind, light, "
                 "direction, pixel, source_mode, acquisition, points_planned, four_wire, nplc, "
                 "settle_s, compliance, started_at, conditions_json, status) VALUES "
                 "('old-s', 'old', 0, 0, 'dark', 'sweep', 0, 'forward', NULL, 'voltage', 'point', 2, "
                 "1, 1.0, 0.0, 0.1, 1.0, '{}', 'running')")
    conn.execute("INSERT INTO points VALUES ('old-s', 1, 'old', 1, 1.5, 0.1, 0.1, -0.01, 0, NULL, 25.0)")
    conn.close()

    with Logbook(lb_path) as lb:
        assert lb.schema_version == SCHEMA_VERSION
        assert [p.current_a for p in lb.points("old-s")] == [-0.01]
        # the version-2 table works on the migrated file
        uid = lb.add_analysis("old-s", {"isc_a": 0.01}, origin="refit")
        assert lb.analyses(sweep_uid="old-s")[0].uid == uid


def test_refuses_a_logbook_from_a_newer_program(lb_path):
    Logbook(lb_path).close()
    conn = sqlite3.connect(lb_path)
    conn.execute("INSERT INTO schema_version VALUES (?, 'future', 0.0)", (SCHEMA_VERSION + 1,))
    conn.commit()
    conn.close()
    with pytest.raises(LogbookError, match="newer"):
        Logbook(lb_path)


def test_tables_use_only_types_postgresql_also_has():
    # PostgreSQL 16 manual, chapter 8 "Data Types": TEXT, INTEGER, BIGINT, DOUBLE PRECISION.
    allowed = {"TEXT", "INTEGER", "BIGINT", "DOUBLE PRECISION"}
    conn = sqlite3.connect(":memory:")
    conn.execute(schema.schema_version_table())
    for m in schema.MIGRATIONS:
        for statement in m.tables:
            conn.execute(statement)
    for (table,) in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'").fetchall():
        for col in conn.execute(f"PRAGMA table_info({table})"):
            assert col[2] in allowed, (table, col[1], col[2])


@pytest.fixture
def finished_run(lb_path, run_events):
    with LogbookWriter(lb_path) as w:
        for e in run_events("r1", sweeps=1, points=5):
            w(e)
    return lb_path


@pytest.mark.parametrize("statement", [
    "UPDATE points SET current_a = 0.0 WHERE seq = 1",
    "UPDATE points SET in_compliance = 1",
    "DELETE FROM points WHERE seq = 2",
    "DELETE FROM points",
    "DELETE FROM sweeps",
    "DELETE FROM runs",
    "DELETE FROM run_instruments",
    "UPDATE run_instruments SET identity = 'other'",
    "UPDATE runs SET status = 'aborted'",
    "UPDATE runs SET sample_id = 'someone-else'",
    "UPDATE sweeps SET status = 'aborted'",
    "UPDATE analyses SET result_json = '{}'",
    "DELETE FROM analyses",
    "INSERT INTO points VALUES ('r1-s0', 99, 'r1', 99, 2e9, 0.0, 0.0, 0.0, 0, NULL, NULL)",
])
def test_raw_records_cannot_be_changed(finished_run, statement):
    with Logbook(finished_run) as lb:
        before = [p for p in lb.points("r1-s0")]
        with pytest.raises(sqlite3.IntegrityError):
            lb.connection.execute(statement)
        assert lb.points("r1-s0") == before
        assert lb.run("r1").status == "completed"


def test_a_running_sweep_accepts_points_but_not_edits(lb_path, run_events):
    events = run_events("r2", sweeps=1, points=3, finish=False)
    with LogbookWriter(lb_path) as w:
        for e in events[:4]:   # RunStarted, SweepStarted, two points
            w(e)
        conn = w.logbook.connection
        with pytest.raises(sqlite3.IntegrityError):
            conn.execute("UPDATE points SET voltage_v = 1.0 WHERE sweep_uid = 'r2-s0'")
        with pytest.raises(sqlite3.IntegrityError):
            conn.execute("UPDATE sweeps SET direction = 'reverse' WHERE uid = 'r2-s0'")
        with pytest.raises(sqlite3.IntegrityError):   # same key twice
            w(events[2])
        w(events[4])
        assert w.logbook.point_count("r2") == 3
