"""The logbook schema, as an ordered list of migrations.

Each migration has a version number, a one-line purpose, the *table* statements in plain
SQL that a PostgreSQL backend can run unchanged (types TEXT, INTEGER, BIGINT, DOUBLE
PRECISION; JSON kept as TEXT; booleans as 0/1 INTEGER with a CHECK), and the *guard*
statements (triggers) per dialect, because trigger syntax is the one thing the two
databases do not share. The applied version lives in the ``schema_version`` table; opening
a logbook applies the missing migrations in order, each in one transaction.

What the guards enforce (the same rules on SQLite and PostgreSQL; PostgreSQL's raise
SQLSTATE 23000, an integrity error, as SQLite's ``RAISE(ABORT)`` does, and also refuse
``TRUNCATE``, which SQLite does not have):

- raw points can be neither changed nor deleted, and none can be added to a sweep that
  has finished;
- runs and sweeps cannot be deleted; a finished run or sweep cannot be changed (only a
  ``running`` one can be closed, by its writer or by the interrupted-run recovery);
- analyses and interlock records are append-only.

Times are POSIX seconds (DOUBLE PRECISION); values are SI, named with their unit.
Points keep the SMU's current as measured, in the LOAD convention.
"""
from __future__ import annotations

from dataclasses import dataclass, field

RUN_STATUSES = ("running", "completed", "aborted", "failed", "interrupted")
SWEEP_STATUSES = ("running", "completed", "aborted", "interrupted")


@dataclass(frozen=True)
class Migration:
    version: int
    purpose: str
    tables: tuple[str, ...]                       # portable SQL
    guards: dict[str, tuple[str, ...]] = field(default_factory=dict)  # dialect -> statements


_SCHEMA_VERSION_TABLE = """
CREATE TABLE IF NOT EXISTS schema_version (
    version     INTEGER PRIMARY KEY,
    purpose     TEXT NOT NULL,
    applied_at  DOUBLE PRECISION NOT NULL
)"""


def _status_check(column: str, statuses: tuple[str, ...]) -> str:
    return f"CHECK ({column} IN ({', '.join(repr(s) for s in statuses)}))"


# ---------------------------------------------------------------------------------------
# Version 1: the raw record (runs, their instruments, sweeps, points).
# ---------------------------------------------------------------------------------------
_V1_TABLES = (
    f"""
CREATE TABLE runs (
    uid                 TEXT PRIMARY KEY,
    protocol_name       TEXT NOT NULL,
    protocol_json       TEXT NOT NULL,
    protocol_sha256     TEXT NOT NULL,
    sample_id           TEXT NOT NULL,
    sample_json         TEXT NOT NULL,
    operator            TEXT NOT NULL,
    bench_name          TEXT NOT NULL,
    bench_json          TEXT NOT NULL,
    limits_json         TEXT NOT NULL,
    metadata_json       TEXT NOT NULL,
    software_version    TEXT NOT NULL,
    started_at          DOUBLE PRECISION NOT NULL,
    ended_at            DOUBLE PRECISION,
    status              TEXT NOT NULL {_status_check('status', RUN_STATUSES)},
    reason              TEXT NOT NULL DEFAULT '',
    output_verified_off INTEGER CHECK (output_verified_off IN (0, 1)),
    points_reported     INTEGER,
    writer_host         TEXT NOT NULL,
    writer_pid          INTEGER NOT NULL,
    writer_token        TEXT NOT NULL
)""",
    "CREATE INDEX runs_by_sample ON runs (sample_id, started_at)",
    "CREATE INDEX runs_by_start ON runs (started_at)",
    "CREATE INDEX runs_by_status ON runs (status)",
    """
CREATE TABLE run_instruments (
    run_uid     TEXT NOT NULL REFERENCES runs (uid),
    role        TEXT NOT NULL,
    address     TEXT NOT NULL,
    identity    TEXT NOT NULL,
    driver      TEXT NOT NULL,
    PRIMARY KEY (run_uid, role)
)""",
    f"""
CREATE TABLE sweeps (
    uid                 TEXT PRIMARY KEY,
    run_uid             TEXT NOT NULL REFERENCES runs (uid),
    sweep_index         INTEGER NOT NULL,
    step_index          INTEGER NOT NULL,
    step_name           TEXT NOT NULL,
    kind                TEXT NOT NULL,
    light               INTEGER NOT NULL CHECK (light IN (0, 1)),
    direction           TEXT NOT NULL,
    pixel               INTEGER,
    source_mode         TEXT NOT NULL,
    acquisition         TEXT NOT NULL,
    points_planned      INTEGER NOT NULL,
    four_wire           INTEGER NOT NULL CHECK (four_wire IN (0, 1)),
    nplc                DOUBLE PRECISION NOT NULL,
    settle_s            DOUBLE PRECISION NOT NULL,
    compliance          DOUBLE PRECISION NOT NULL,
    started_at          DOUBLE PRECISION NOT NULL,
    conditions_json     TEXT NOT NULL,
    pair_sweep_uid      TEXT,
    ended_at            DOUBLE PRECISION,
    status              TEXT NOT NULL {_status_check('status', SWEEP_STATUSES)},
    reason              TEXT NOT NULL DEFAULT '',
    points_reported     INTEGER,
    final_conditions_json TEXT,
    UNIQUE (run_uid, sweep_index)
)""",
    # Readings may be NULL: SQLite cannot store NaN (it turns it into NULL), so NULL means
    # "not a number" (a reading the instrument could not make) and reads back as NaN.
    # SQLite also keeps no sign on a zero: a -0.0 reading reads back as 0.0.
    """
CREATE TABLE points (
    sweep_uid       TEXT NOT NULL REFERENCES sweeps (uid),
    seq             INTEGER NOT NULL,
    run_uid         TEXT NOT NULL,
    run_seq         INTEGER NOT NULL,
    time            DOUBLE PRECISION NOT NULL,
    setpoint        DOUBLE PRECISION,
    voltage_v       DOUBLE PRECISION,
    current_a       DOUBLE PRECISION,
    in_compliance   INTEGER NOT NULL CHECK (in_compliance IN (0, 1)),
    irradiance_w_m2 DOUBLE PRECISION,
    temperature_c   DOUBLE PRECISION,
    PRIMARY KEY (sweep_uid, seq)
)""",
)

_V1_SQLITE_GUARDS = (
    """
CREATE TRIGGER points_no_update BEFORE UPDATE ON points
BEGIN SELECT RAISE(ABORT, 'raw points are immutable'); END""",
    """
CREATE TRIGGER points_no_delete BEFORE DELETE ON points
BEGIN SELECT RAISE(ABORT, 'raw points are immutable'); END""",
    """
CREATE TRIGGER points_only_into_running_sweep BEFORE INSERT ON points
WHEN (SELECT status FROM sweeps WHERE uid = NEW.sweep_uid) IS NOT 'running'
BEGIN SELECT RAISE(ABORT, 'points can only be added to a running sweep'); END""",
    """
CREATE TRIGGER runs_no_delete BEFORE DELETE ON runs
BEGIN SELECT RAISE(ABORT, 'runs are never deleted'); END""",
    """
CREATE TRIGGER runs_finished_are_final BEFORE UPDATE ON runs
WHEN OLD.status <> 'running'
BEGIN SELECT RAISE(ABORT, 'a finished run cannot be changed'); END""",
    """
CREATE TRIGGER runs_identity_fixed BEFORE UPDATE OF uid, protocol_json, protocol_sha256,
    sample_id, sample_json, operator, bench_json, started_at, software_version ON runs
BEGIN SELECT RAISE(ABORT, 'the recorded identity of a run cannot be changed'); END""",
    """
CREATE TRIGGER run_instruments_no_update BEFORE UPDATE ON run_instruments
BEGIN SELECT RAISE(ABORT, 'instrument identities are immutable'); END""",
    """
CREATE TRIGGER run_instruments_no_delete BEFORE DELETE ON run_instruments
BEGIN SELECT RAISE(ABORT, 'instrument identities are immutable'); END""",
    """
CREATE TRIGGER sweeps_no_delete BEFORE DELETE ON sweeps
BEGIN SELECT RAISE(ABORT, 'sweeps are never deleted'); END""",
    """
CREATE TRIGGER sweeps_finished_are_final BEFORE UPDATE ON sweeps
WHEN OLD.status <> 'running'
BEGIN SELECT RAISE(ABORT, 'a finished sweep cannot be changed'); END""",
    """
CREATE TRIGGER sweeps_identity_fixed BEFORE UPDATE OF uid, run_uid, sweep_index, step_index,
    kind, light, direction, pixel, source_mode, started_at, conditions_json ON sweeps
BEGIN SELECT RAISE(ABORT, 'the recorded identity of a sweep cannot be changed'); END""",
)

# PostgreSQL: one refusing function, named by each trigger with its message. Row triggers
# (not statement triggers) for UPDATE/DELETE, so that a statement touching no row is no
# error, as on SQLite. PostgreSQL triggers cannot hold a subquery in WHEN, so the "points
# only into a running sweep" rule is a statement trigger over the inserted rows (one check
# per INSERT or COPY, not per point).
_PG_REFUSE = """
CREATE FUNCTION tracer_refuse() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    RAISE EXCEPTION USING ERRCODE = 'integrity_constraint_violation', MESSAGE = TG_ARGV[0];
END $$"""


def _pg_refuse(name: str, when: str, table: str, message: str, *, condition: str = "",
               level: str = "ROW") -> str:
    cond = f" WHEN ({condition})" if condition else ""
    return (f"CREATE TRIGGER {name} {when} ON {table} FOR EACH {level}{cond} "
            f"EXECUTE FUNCTION tracer_refuse('{message}')")


_V1_POSTGRESQL_GUARDS = (
    _PG_REFUSE,
    _pg_refuse("points_no_update", "BEFORE UPDATE", "points", "raw points are immutable"),
    _pg_refuse("points_no_delete", "BEFORE DELETE", "points", "raw points are immutable"),
    _pg_refuse("points_no_truncate", "BEFORE TRUNCATE", "points", "raw points are immutable",
               level="STATEMENT"),
    """
CREATE FUNCTION tracer_points_into_running_sweep() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF EXISTS (SELECT 1 FROM new_points n LEFT JOIN sweeps s ON s.uid = n.sweep_uid
               WHERE s.status IS DISTINCT FROM 'running') THEN
        RAISE EXCEPTION USING ERRCODE = 'integrity_constraint_violation',
            MESSAGE = 'points can only be added to a running sweep';
    END IF;
    RETURN NULL;
END $$""",
    """
CREATE TRIGGER points_only_into_running_sweep AFTER INSERT ON points
REFERENCING NEW TABLE AS new_points FOR EACH STATEMENT
EXECUTE FUNCTION tracer_points_into_running_sweep()""",
    _pg_refuse("runs_no_delete", "BEFORE DELETE", "runs", "runs are never deleted"),
    _pg_refuse("runs_no_truncate", "BEFORE TRUNCATE", "runs", "runs are never deleted",
               level="STATEMENT"),
    _pg_refuse("runs_finished_are_final", "BEFORE UPDATE", "runs", "a finished run cannot be changed",
               condition="OLD.status <> 'running'"),
    _pg_refuse("runs_identity_fixed",
               "BEFORE UPDATE OF uid, protocol_json, protocol_sha256, sample_id, sample_json, "
               "operator, bench_json, started_at, software_version", "runs",
               "the recorded identity of a run cannot be changed"),
    _pg_refuse("run_instruments_no_update", "BEFORE UPDATE", "run_instruments",
               "instrument identities are immutable"),
    _pg_refuse("run_instruments_no_delete", "BEFORE DELETE", "run_instruments",
               "instrument identities are immutable"),
    _pg_refuse("run_instruments_no_truncate", "BEFORE TRUNCATE", "run_instruments",
               "instrument identities are immutable", level="STATEMENT"),
    _pg_refuse("sweeps_no_delete", "BEFORE DELETE", "sweeps", "sweeps are never deleted"),
    _pg_refuse("sweeps_no_truncate", "BEFORE TRUNCATE", "sweeps", "sweeps are never deleted",
               level="STATEMENT"),
    _pg_refuse("sweeps_finished_are_final", "BEFORE UPDATE", "sweeps",
               "a finished sweep cannot be changed", condition="OLD.status <> 'running'"),
    _pg_refuse("sweeps_identity_fixed",
               "BEFORE UPDATE OF uid, run_uid, sweep_index, step_index, kind, light, direction, "
               "pixel, source_mode, started_at, conditions_json", "sweeps",
               "the recorded identity of a sweep cannot be changed"),
)

# ---------------------------------------------------------------------------------------
# Version 2: derived records (analyses of a sweep) and the interlock log.
# ---------------------------------------------------------------------------------------
_V2_TABLES = (
    """
CREATE TABLE analyses (
    uid         TEXT PRIMARY KEY,
    sweep_uid   TEXT NOT NULL REFERENCES sweeps (uid),
    run_uid     TEXT NOT NULL REFERENCES runs (uid),
    created_at  DOUBLE PRECISION NOT NULL,
    origin      TEXT NOT NULL,
    elapsed_s   DOUBLE PRECISION NOT NULL,
    result_json TEXT NOT NULL
)""",
    "CREATE INDEX analyses_by_sweep ON analyses (sweep_uid, created_at)",
    """
CREATE TABLE interlock_trips (
    run_uid     TEXT NOT NULL REFERENCES runs (uid),
    seq         INTEGER NOT NULL,
    sweep_uid   TEXT,
    cause       TEXT NOT NULL,
    message     TEXT NOT NULL,
    time        DOUBLE PRECISION NOT NULL,
    value       DOUBLE PRECISION,
    limit_value DOUBLE PRECISION,
    PRIMARY KEY (run_uid, seq)
)""",
)

_V2_SQLITE_GUARDS = (
    """
CREATE TRIGGER analyses_no_update BEFORE UPDATE ON analyses
BEGIN SELECT RAISE(ABORT, 'analyses are append-only'); END""",
    """
CREATE TRIGGER analyses_no_delete BEFORE DELETE ON analyses
BEGIN SELECT RAISE(ABORT, 'analyses are append-only'); END""",
    """
CREATE TRIGGER interlock_trips_no_update BEFORE UPDATE ON interlock_trips
BEGIN SELECT RAISE(ABORT, 'interlock records are append-only'); END""",
    """
CREATE TRIGGER interlock_trips_no_delete BEFORE DELETE ON interlock_trips
BEGIN SELECT RAISE(ABORT, 'interlock records are append-only'); END""",
)

_V2_POSTGRESQL_GUARDS = (
    _pg_refuse("analyses_no_update", "BEFORE UPDATE", "analyses", "analyses are append-only"),
    _pg_refuse("analyses_no_delete", "BEFORE DELETE", "analyses", "analyses are append-only"),
    _pg_refuse("analyses_no_truncate", "BEFORE TRUNCATE", "analyses", "analyses are append-only",
               level="STATEMENT"),
    _pg_refuse("interlock_trips_no_update", "BEFORE UPDATE", "interlock_trips",
               "interlock records are append-only"),
    _pg_refuse("interlock_trips_no_delete", "BEFORE DELETE", "interlock_trips",
               "interlock records are append-only"),
    _pg_refuse("interlock_trips_no_truncate", "BEFORE TRUNCATE", "interlock_trips",
               "interlock records are append-only", level="STATEMENT"),
)

MIGRATIONS: tuple[Migration, ...] = (
    Migration(1, "raw record: runs, instruments, sweeps, immutable points",
              _V1_TABLES, {"sqlite": _V1_SQLITE_GUARDS, "postgresql": _V1_POSTGRESQL_GUARDS}),
    Migration(2, "derived records: analyses of a sweep; interlock log",
              _V2_TABLES, {"sqlite": _V2_SQLITE_GUARDS, "postgresql": _V2_POSTGRESQL_GUARDS}),
)

LATEST_VERSION = MIGRATIONS[-1].version


def schema_version_table() -> str:
    return _SCHEMA_VERSION_TABLE


# Dialect bits of the migration itself: how to tell whether the version table exists, and
# (PostgreSQL) the lock that serialises two programs migrating the same store at once
# (SQLite's BEGIN IMMEDIATE already does).
VERSION_TABLE_EXISTS = {
    "sqlite": "SELECT COUNT(*) FROM sqlite_master WHERE type = 'table' AND name = 'schema_version'",
    "postgresql": "SELECT COUNT(*) FROM (SELECT to_regclass('schema_version') AS t) x WHERE t IS NOT NULL",
}
MIGRATION_LOCK = {
    "postgresql": "SELECT pg_advisory_xact_lock(hashtext('tracer-logbook-schema:' || "
                  "COALESCE(current_schema(), '')))",
}


def pending(current_version: int) -> list[Migration]:
    """The migrations to apply, in order, to a store at ``current_version``."""
    return [m for m in MIGRATIONS if m.version > current_version]
