"""The logbook: one SQLite file (WAL) holding every run, sweep, raw point and analysis
(or the same tables in a PostgreSQL database shared by a lab's benches: give a
``postgresql://`` URL instead of a path; see :mod:`tracer.logbook.backend`).

Opening a :class:`Logbook` creates the file if needed, applies the missing schema
migrations, and marks as ``interrupted`` any run whose writing process has died (a run
left ``running`` by a crash is never lost, and never mistaken for a live one: a run
written by a process that is still alive is left alone). Every connection has a busy
timeout, and every write transaction starts with ``BEGIN IMMEDIATE``, so concurrent
readers and writers wait for each other instead of failing with "database is locked".

Readers make their own :class:`Logbook`; the engine's writer is
:class:`tracer.logbook.writer.LogbookWriter`, with its own connection.

Durability: ``synchronous=NORMAL`` by default. In WAL mode a committed transaction is
then in the WAL file before the commit returns, so it survives the death of the process
(SIGKILL, crash) — the failure this program must survive — and the file is never
corrupted; only a power cut or kernel crash can lose the last transactions since the
previous WAL sync. ``synchronous="FULL"`` syncs the WAL on every commit and survives a
power cut too, at the price measured by ``tests/benchmarks/bench_logbook.py`` (a disk
sync per point).
"""
from __future__ import annotations

import dataclasses
import json
import math
import os
import socket
import sqlite3
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterator, Mapping, Sequence

from tracer import events as ev
from tracer.logbook import backend, schema
from tracer.logbook.paths import default_logbook_path

DEFAULT_BUSY_TIMEOUT_S = 30.0
SYNCHRONOUS_MODES = ("NORMAL", "FULL")


class LogbookError(Exception):
    """A logbook problem worth telling the user in one sentence."""


class RunNotFound(LogbookError):
    pass


class AmbiguousRun(LogbookError):
    def __init__(self, ref: str, candidates: Sequence[str]):
        self.ref = ref
        self.candidates = list(candidates)
        shown = ", ".join(self.candidates[:8]) + (" ..." if len(self.candidates) > 8 else "")
        super().__init__(f"run reference {ref!r} matches {len(self.candidates)} runs: {shown}")


# ----------------------------------------------------------------------------- helpers
def to_json(value: Any) -> str:
    """Compact, key-sorted, strictly valid JSON (NaN -> null, +-inf -> +-1e308, like the
    events' ``to_dict``); anything else unknown becomes its ``str``."""
    return json.dumps(_plain(value), sort_keys=True, separators=(",", ":"), allow_nan=False)


def _plain(value: Any) -> Any:
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return 1e308 if value > 0 else -1e308
        return value
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [_plain(v) for v in value]
    if hasattr(value, "item") and callable(value.item):  # numpy scalar
        try:
            return _plain(value.item())
        except (TypeError, ValueError):
            pass
    if hasattr(value, "tolist") and callable(value.tolist):  # numpy array
        return _plain(value.tolist())
    return str(value)


def _from_json(text: str | None) -> Any:
    return None if text is None else json.loads(text)


def _nan_if_null(value: float | None) -> float:
    return math.nan if value is None else value


def process_token(pid: int | None = None) -> str:
    """A token that tells a process apart from a later one reusing its pid: the boot id
    and the process start time (Linux ``/proc``); empty where unavailable."""
    pid = os.getpid() if pid is None else pid
    try:
        with open("/proc/sys/kernel/random/boot_id", encoding="ascii") as fh:
            boot = fh.read().strip()
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            stat = fh.read()
        start_ticks = stat.rsplit(")", 1)[1].split()[19]
        return f"{boot}:{start_ticks}"
    except (OSError, IndexError):
        return ""


def _process_state(pid: int) -> str | None:
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return None


def writer_is_alive(host: str, pid: int, token: str) -> bool:
    """Whether the process that wrote a ``running`` run may still be writing it.

    A run from another host is assumed alive (we cannot tell). On this host the pid
    must exist, not be a zombie, and (where the token is available) be the same process.
    """
    if host != socket.gethostname():
        return True
    if pid == os.getpid():
        return token == process_token()  # same pid, same process; the caller checks live runs
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # exists, belongs to someone else
    except OSError:
        return False
    if _process_state(pid) == "Z":
        return False
    if token and os.path.exists("/proc"):
        return process_token(pid) == token
    return True


# Runs being written by a LogbookWriter in this process (guarded by _LIVE_LOCK).
_LIVE_RUNS: set[tuple[str, str]] = set()   # (resolved db path, run uid)
_LIVE_LOCK = threading.Lock()


def _mark_live(db: str, run_uid: str, live: bool) -> None:
    with _LIVE_LOCK:
        (_LIVE_RUNS.add if live else _LIVE_RUNS.discard)((db, run_uid))


def _is_live_here(db: str, run_uid: str) -> bool:
    with _LIVE_LOCK:
        return (db, run_uid) in _LIVE_RUNS


# ----------------------------------------------------------------------------- records
@dataclass(frozen=True)
class RunSummary:
    uid: str
    protocol_name: str
    sample_id: str
    operator: str
    bench_name: str
    started_at: float
    ended_at: float | None
    status: str
    reason: str
    sweeps: int
    points: int


@dataclass(frozen=True)
class InstrumentRecord:
    role: str
    address: str
    identity: str
    driver: str


@dataclass(frozen=True)
class StoredRun:
    uid: str
    protocol_name: str
    protocol: dict
    protocol_sha256: str
    sample_id: str
    sample: dict
    operator: str
    bench_name: str
    bench: dict
    limits: dict
    metadata: dict
    software_version: str
    started_at: float
    ended_at: float | None
    status: str
    reason: str
    output_verified_off: bool | None
    points_reported: int | None
    instruments: tuple[InstrumentRecord, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class StoredSweep:
    uid: str
    run_uid: str
    sweep_index: int
    step_index: int
    step_name: str
    kind: str
    light: bool
    direction: str
    pixel: int | None
    source_mode: str
    acquisition: str
    points_planned: int
    four_wire: bool
    nplc: float
    settle_s: float
    compliance: float
    started_at: float
    conditions: dict
    pair_sweep_uid: str | None
    ended_at: float | None
    status: str
    reason: str
    points_reported: int | None
    final_conditions: dict | None
    points_stored: int = 0

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class StoredAnalysis:
    uid: str
    sweep_uid: str
    run_uid: str
    created_at: float
    origin: str           # "live" (from the run) or e.g. "refit"
    elapsed_s: float
    result: dict

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class StoredInterlock:
    run_uid: str
    seq: int
    sweep_uid: str | None
    cause: str
    message: str
    time: float
    value: float | None
    limit: float | None

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class RecoveryReport:
    interrupted_runs: tuple[str, ...] = field(default_factory=tuple)


# ----------------------------------------------------------------------------- connection
def connect(path: Path | str, *, synchronous: str = "NORMAL",
            busy_timeout_s: float = DEFAULT_BUSY_TIMEOUT_S) -> sqlite3.Connection:
    """A connection configured the way every logbook connection is: autocommit (each
    statement its own transaction unless a ``BEGIN`` is issued), WAL, the chosen
    ``synchronous`` level, foreign keys on, a busy timeout."""
    synchronous = synchronous.upper()
    if synchronous not in SYNCHRONOUS_MODES:
        raise ValueError(f"synchronous must be one of {SYNCHRONOUS_MODES}, not {synchronous!r}")
    conn = sqlite3.connect(os.fspath(path), timeout=busy_timeout_s, isolation_level=None,
                           check_same_thread=False, cached_statements=64)
    try:
        conn.execute(f"PRAGMA busy_timeout = {int(busy_timeout_s * 1000)}")
        mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise LogbookError(f"{path}: cannot switch the logbook to WAL mode (got {mode!r})")
        conn.execute(f"PRAGMA synchronous = {synchronous}")
        conn.execute("PRAGMA foreign_keys = ON")
    except Exception:
        conn.close()
        raise
    return conn


class _Transaction:
    """``BEGIN IMMEDIATE`` ... ``COMMIT`` (``ROLLBACK`` on error): the write lock is taken
    up front, so the busy timeout applies and no transaction is upgraded mid-way."""

    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn

    def __enter__(self) -> sqlite3.Connection:
        self.conn.execute("BEGIN IMMEDIATE")
        return self.conn

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is None:
            self.conn.execute("COMMIT")
        else:
            try:
                self.conn.execute("ROLLBACK")
            except Exception:  # noqa: BLE001 - keep the original error (any backend's)
                pass


def _current_version(conn: sqlite3.Connection) -> int:
    (exists,) = conn.execute(schema.VERSION_TABLE_EXISTS[backend.dialect(conn)]).fetchone()
    if not exists:
        return 0
    (version,) = conn.execute("SELECT COALESCE(MAX(version), 0) FROM schema_version").fetchone()
    return int(version)


def migrate(conn: sqlite3.Connection, *, target: int | None = None) -> list[int]:
    """Apply the missing migrations (up to ``target``, default the latest) in order,
    each in its own transaction; returns the versions applied."""
    target = schema.LATEST_VERSION if target is None else target
    dialect = backend.dialect(conn)
    applied: list[int] = []
    version = _current_version(conn)
    if version > schema.LATEST_VERSION:
        raise LogbookError(
            f"the logbook has schema version {version}, newer than this program knows "
            f"({schema.LATEST_VERSION}); use a newer version of tracer")
    for migration in schema.pending(version):
        if migration.version > target:
            break
        with _Transaction(conn):
            if dialect in schema.MIGRATION_LOCK:
                conn.execute(schema.MIGRATION_LOCK[dialect])
            # Re-read under the write lock: another process may have migrated meanwhile.
            conn.execute(schema.schema_version_table())
            if _current_version(conn) >= migration.version:
                continue
            for statement in migration.tables + migration.guards.get(dialect, ()):
                conn.execute(statement)
            conn.execute("INSERT INTO schema_version (version, purpose, applied_at) "
                         "VALUES (?, ?, ?)", (migration.version, migration.purpose, time.time()))
        applied.append(migration.version)
    return applied


# ----------------------------------------------------------------------------- the store
_RUN_COLUMNS = ("uid, protocol_name, protocol_json, protocol_sha256, sample_id, sample_json, "
                "operator, bench_name, bench_json, limits_json, metadata_json, software_version, "
                "started_at, ended_at, status, reason, output_verified_off, points_reported")
_SWEEP_COLUMNS = ("uid, run_uid, sweep_index, step_index, step_name, kind, light, direction, "
                  "pixel, source_mode, acquisition, points_planned, four_wire, nplc, settle_s, "
                  "compliance, started_at, conditions_json, pair_sweep_uid, ended_at, status, "
                  "reason, points_reported, final_conditions_json")
_POINT_COLUMNS = ("sweep_uid, seq, run_uid, run_seq, time, setpoint, voltage_v, current_a, "
                  "in_compliance, irradiance_w_m2, temperature_c")


class Logbook:
    """A connection to one logbook file, for reading (and for derived records).

    ``Logbook(path)`` opens (creating if needed), migrates and recovers interrupted
    runs. Use as a context manager or call :meth:`close`. Safe to share between threads
    (calls are serialised); better: one ``Logbook`` per thread.

    ``path`` may also be a ``postgresql://`` URL (or a :class:`~tracer.logbook.backend.RedactedUrl`):
    the same tables, guards, migrations and recovery in a PostgreSQL database. ``path``
    is then the URL with its credentials redacted (it still opens the store when handed
    back to ``Logbook``); ``busy_timeout_s`` is the connection timeout and
    ``synchronous`` does not apply (the server decides durability).
    """

    def __init__(self, path: Path | str | None = None, *, synchronous: str = "NORMAL",
                 busy_timeout_s: float = DEFAULT_BUSY_TIMEOUT_S, recover: bool = True):
        self.dialect = backend.dialect_of_target(path)
        self._key: str | None = None
        if self.dialect == backend.POSTGRESQL:
            self._open_postgresql(path, busy_timeout_s, recover)
            return
        self.path = Path(path) if path is not None else default_logbook_path()
        self.path = self.path.expanduser()
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise LogbookError(f"cannot create the folder for the logbook {self.path}: {exc}") from exc
        self.synchronous = synchronous.upper()
        self._lock = threading.RLock()
        try:
            self._conn = connect(self.path, synchronous=synchronous, busy_timeout_s=busy_timeout_s)
        except sqlite3.Error as exc:
            raise LogbookError(f"cannot open the logbook {self.path}: {exc}") from exc
        try:
            migrate(self._conn)
            self.recovery = self.recover_interrupted() if recover else RecoveryReport()
        except sqlite3.DatabaseError as exc:
            self._conn.close()
            raise LogbookError(f"cannot use the logbook {self.path}: {exc}") from exc
        except BaseException:
            self._conn.close()
            raise

    def _open_postgresql(self, url: Any, connect_timeout_s: float, recover: bool) -> None:
        from tracer.logbook import postgres

        self.path = backend.RedactedUrl(url)          # shown everywhere: no credentials
        self._key = str(self.path)
        self.synchronous = "NORMAL"
        self._lock = threading.RLock()
        try:
            self._conn = postgres.connect(self.path, connect_timeout_s=connect_timeout_s)
        except postgres.StoreUnreachable as exc:
            raise LogbookError(str(exc)) from None
        try:
            migrate(self._conn)
            self.recovery = self.recover_interrupted() if recover else RecoveryReport()
        except backend.database_errors() as exc:
            self._conn.close()
            raise LogbookError(f"cannot use the logbook {self.path}: "
                               f"{postgres.describe_error(exc, self.path)}") from None
        except BaseException:
            self._conn.close()
            raise

    # -- lifetime
    @property
    def key(self) -> str:
        if self._key is not None:
            return self._key
        return os.path.realpath(self.path)

    def close(self) -> None:
        with self._lock:
            if self._conn is not None:
                self._conn.close()
                self._conn = None  # type: ignore[assignment]

    def __enter__(self) -> "Logbook":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def connection(self) -> sqlite3.Connection:
        if self._conn is None:
            raise LogbookError("the logbook is closed")
        return self._conn

    def transaction(self) -> _Transaction:
        return _Transaction(self.connection)

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[tuple]:
        with self._lock:
            return self.connection.execute(sql, params).fetchall()

    # -- schema
    @property
    def schema_version(self) -> int:
        with self._lock:
            return _current_version(self.connection)

    # -- recovery
    def recover_interrupted(self) -> RecoveryReport:
        """Mark ``interrupted`` every ``running`` run whose writer is gone, with its
        running sweeps; the stored points stay as they are."""
        with self._lock:
            rows = self.connection.execute(
                "SELECT uid, writer_host, writer_pid, writer_token FROM runs "
                "WHERE status = 'running'").fetchall()
            dead = []
            for uid, host, pid, token in rows:
                if _is_live_here(self.key, uid):
                    continue            # a LogbookWriter in this process is writing it
                if host == socket.gethostname() and pid == os.getpid():
                    dead.append(uid)    # ours, and no writer here has it open: abandoned
                elif not writer_is_alive(host, pid, token):
                    dead.append(uid)
            if not dead:
                return RecoveryReport()
            now = time.time()
            done = []
            with _Transaction(self.connection) as conn:
                for uid in dead:
                    # re-check under the write lock
                    (status,) = conn.execute("SELECT status FROM runs WHERE uid = ?", (uid,)).fetchone()
                    if status != "running":
                        continue
                    last = conn.execute("SELECT MAX(time) FROM points WHERE sweep_uid IN "
                                        "(SELECT uid FROM sweeps WHERE run_uid = ?)",
                                        (uid,)).fetchone()[0]
                    conn.execute(
                        "UPDATE sweeps SET status = 'interrupted', reason = ?, ended_at = ? "
                        "WHERE run_uid = ? AND status = 'running'",
                        ("the program stopped before the sweep finished", last, uid))
                    # "AND status = 'running'": another program recovering the same
                    # shared store at the same moment finds nothing left to change
                    changed = conn.execute(
                        "UPDATE runs SET status = ?, reason = ?, ended_at = ? "
                        "WHERE uid = ? AND status = 'running'",
                        (ev.RUN_INTERRUPTED,
                         f"found unfinished when the logbook was opened at "
                         f"{time.strftime('%Y-%m-%d %H:%M:%S', time.localtime(now))}; the "
                         f"writing process had stopped", last, uid)).rowcount
                    if changed:
                        done.append(uid)
            return RecoveryReport(tuple(done))

    # -- runs
    def resolve_run(self, ref: str) -> str:
        """The uid of the run that ``ref`` names: a full uid, a unique prefix of one, or
        ``latest`` (the most recently started run)."""
        ref = ref.strip()
        if not ref:
            raise RunNotFound("empty run reference")
        if ref == "latest":
            rows = self._query("SELECT uid FROM runs ORDER BY started_at DESC, uid LIMIT 1")
            if not rows:
                raise RunNotFound("the logbook holds no runs")
            return rows[0][0]
        if self._query("SELECT 1 FROM runs WHERE uid = ?", (ref,)):
            return ref
        rows = self._query("SELECT uid FROM runs WHERE substr(uid, 1, ?) = ? ORDER BY started_at",
                           (len(ref), ref))
        if not rows:
            raise RunNotFound(f"no run {ref!r} in {self.path}")
        if len(rows) > 1:
            raise AmbiguousRun(ref, [r[0] for r in rows])
        return rows[0][0]

    def list_runs(self, *, sample_id: str | None = None, status: str | None = None,
                  limit: int | None = None, bench_name: str | None = None,
                  since: float | None = None, until: float | None = None) -> list[RunSummary]:
        """Runs, newest first, with their sweep and point counts; optionally only one
        sample's, one bench's, or those started in ``[since, until)`` (POSIX seconds)."""
        where, params = [], []
        if sample_id is not None:
            where.append("r.sample_id = ?")
            params.append(sample_id)
        if status is not None:
            where.append("r.status = ?")
            params.append(status)
        if bench_name is not None:
            where.append("r.bench_name = ?")
            params.append(bench_name)
        if since is not None:
            where.append("r.started_at >= ?")
            params.append(float(since))
        if until is not None:
            where.append("r.started_at < ?")
            params.append(float(until))
        # points are counted through their sweeps: the points' primary key (sweep_uid, seq)
        # serves that count on both databases, with no index on points.run_uid
        sql = ("SELECT r.uid, r.protocol_name, r.sample_id, r.operator, r.bench_name, "
               "r.started_at, r.ended_at, r.status, r.reason, "
               "(SELECT COUNT(*) FROM sweeps s WHERE s.run_uid = r.uid), "
               "(SELECT COUNT(*) FROM points p JOIN sweeps s ON p.sweep_uid = s.uid "
               "WHERE s.run_uid = r.uid) "
               "FROM runs r")
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY r.started_at DESC, r.uid"
        if limit is not None:
            sql += " LIMIT ?"
            params.append(int(limit))
        return [RunSummary(*row) for row in self._query(sql, params)]

    def run(self, ref: str) -> StoredRun:
        uid = self.resolve_run(ref)
        row = self._query(f"SELECT {_RUN_COLUMNS} FROM runs WHERE uid = ?", (uid,))[0]
        instruments = tuple(InstrumentRecord(*r) for r in self._query(
            "SELECT role, address, identity, driver FROM run_instruments WHERE run_uid = ? "
            "ORDER BY role", (uid,)))
        (uid, pname, pjson, psha, sid, sjson, operator, bname, bjson, ljson, mjson, version,
         started, ended, status, reason, off, npoints) = row
        return StoredRun(uid, pname, _from_json(pjson), psha, sid, _from_json(sjson), operator,
                         bname, _from_json(bjson), _from_json(ljson), _from_json(mjson), version,
                         started, ended, status, reason, None if off is None else bool(off),
                         npoints, instruments)

    # -- sweeps and points
    def sweeps(self, run_ref: str) -> list[StoredSweep]:
        uid = self.resolve_run(run_ref)
        rows = self._query(
            f"SELECT {_SWEEP_COLUMNS}, (SELECT COUNT(*) FROM points p WHERE p.sweep_uid = s.uid) "
            "FROM sweeps s WHERE run_uid = ? ORDER BY sweep_index", (uid,))
        return [self._sweep_from_row(r) for r in rows]

    def sweep(self, sweep_uid: str) -> StoredSweep:
        rows = self._query(
            f"SELECT {_SWEEP_COLUMNS}, (SELECT COUNT(*) FROM points p WHERE p.sweep_uid = s.uid) "
            "FROM sweeps s WHERE uid = ?", (sweep_uid,))
        if not rows:
            raise LogbookError(f"no sweep {sweep_uid!r} in {self.path}")
        return self._sweep_from_row(rows[0])

    @staticmethod
    def _sweep_from_row(r: tuple) -> StoredSweep:
        return StoredSweep(
            uid=r[0], run_uid=r[1], sweep_index=r[2], step_index=r[3], step_name=r[4], kind=r[5],
            light=bool(r[6]), direction=r[7], pixel=r[8], source_mode=r[9], acquisition=r[10],
            points_planned=r[11], four_wire=bool(r[12]), nplc=r[13], settle_s=r[14],
            compliance=r[15], started_at=r[16], conditions=_from_json(r[17]),
            pair_sweep_uid=r[18], ended_at=r[19], status=r[20], reason=r[21],
            points_reported=r[22], final_conditions=_from_json(r[23]), points_stored=r[24])

    def points(self, sweep_uid: str) -> list[ev.Point]:
        """The sweep's raw points as :class:`tracer.events.Point` (current in the LOAD
        convention, exactly as stored; a stored NULL reading comes back as NaN)."""
        rows = self._query(f"SELECT {_POINT_COLUMNS} FROM points WHERE sweep_uid = ? ORDER BY seq",
                           (sweep_uid,))
        return [ev.Point(run_uid=r[2], sweep_uid=r[0], seq=r[1], run_seq=r[3], time=r[4],
                         setpoint=_nan_if_null(r[5]), voltage_v=_nan_if_null(r[6]),
                         current_a=_nan_if_null(r[7]), in_compliance=bool(r[8]),
                         irradiance_w_m2=r[9], temperature_c=r[10]) for r in rows]

    def run_points(self, run_ref: str) -> list[ev.Point]:
        """Every raw point of a run, in ``run_seq`` order."""
        uid = self.resolve_run(run_ref)
        rows = self._query(f"SELECT {_POINT_COLUMNS} FROM points WHERE sweep_uid IN "
                           "(SELECT uid FROM sweeps WHERE run_uid = ?) ORDER BY run_seq", (uid,))
        return [ev.Point(run_uid=r[2], sweep_uid=r[0], seq=r[1], run_seq=r[3], time=r[4],
                         setpoint=_nan_if_null(r[5]), voltage_v=_nan_if_null(r[6]),
                         current_a=_nan_if_null(r[7]), in_compliance=bool(r[8]),
                         irradiance_w_m2=r[9], temperature_c=r[10]) for r in rows]

    def point_count(self, run_ref: str) -> int:
        uid = self.resolve_run(run_ref)
        return self._query("SELECT COUNT(*) FROM points WHERE sweep_uid IN "
                           "(SELECT uid FROM sweeps WHERE run_uid = ?)", (uid,))[0][0]

    # -- derived records
    def analyses(self, *, run_ref: str | None = None, sweep_uid: str | None = None) -> list[StoredAnalysis]:
        if sweep_uid is not None:
            rows = self._query("SELECT uid, sweep_uid, run_uid, created_at, origin, elapsed_s, "
                               "result_json FROM analyses WHERE sweep_uid = ? "
                               "ORDER BY created_at, uid", (sweep_uid,))
        elif run_ref is not None:
            uid = self.resolve_run(run_ref)
            rows = self._query("SELECT uid, sweep_uid, run_uid, created_at, origin, elapsed_s, "
                               "result_json FROM analyses WHERE run_uid = ? "
                               "ORDER BY created_at, uid", (uid,))
        else:
            raise TypeError("give run_ref or sweep_uid")
        return [StoredAnalysis(r[0], r[1], r[2], r[3], r[4], r[5], _from_json(r[6])) for r in rows]

    def latest_analysis(self, sweep_uid: str) -> StoredAnalysis | None:
        found = self.analyses(sweep_uid=sweep_uid)
        return found[-1] if found else None

    def add_analysis(self, sweep_uid: str, result: Mapping[str, Any], *, origin: str = "refit",
                     elapsed_s: float = 0.0, created_at: float | None = None) -> str:
        """Append a derived record (e.g. an offline re-fit) to a stored sweep; returns its uid."""
        import uuid

        rows = self._query("SELECT run_uid FROM sweeps WHERE uid = ?", (sweep_uid,))
        if not rows:
            raise LogbookError(f"no sweep {sweep_uid!r} in {self.path}")
        uid = uuid.uuid4().hex
        with self._lock, _Transaction(self.connection) as conn:
            conn.execute("INSERT INTO analyses (uid, sweep_uid, run_uid, created_at, origin, "
                         "elapsed_s, result_json) VALUES (?, ?, ?, ?, ?, ?, ?)",
                         (uid, sweep_uid, rows[0][0], time.time() if created_at is None else created_at,
                          origin, float(elapsed_s), to_json(result)))
        return uid

    def interlocks(self, run_ref: str) -> list[StoredInterlock]:
        uid = self.resolve_run(run_ref)
        rows = self._query("SELECT run_uid, seq, sweep_uid, cause, message, time, value, limit_value "
                           "FROM interlock_trips WHERE run_uid = ? ORDER BY seq", (uid,))
        return [StoredInterlock(*r) for r in rows]

    # -- replay
    def run_events(self, run_ref: str) -> Iterator[ev._Event]:
        """The run as the event stream that produced it (for replay in a viewer):
        RunStarted, per sweep SweepStarted/Point*/SweepFinished/Analysis*, the interlock
        trips, and RunFinished when the run has ended (``interrupted`` included)."""
        run = self.run(run_ref)
        yield ev.RunStarted(
            run_uid=run.uid, time=run.started_at, protocol_name=run.protocol_name,
            protocol=run.protocol, protocol_sha256=run.protocol_sha256, sample=run.sample,
            operator=run.operator, bench=run.bench, limits=run.limits,
            software_version=run.software_version, metadata=run.metadata)
        for sw in self.sweeps(run.uid):
            yield ev.SweepStarted(
                run_uid=run.uid, sweep_uid=sw.uid, sweep_index=sw.sweep_index,
                step_index=sw.step_index, step_name=sw.step_name, kind=sw.kind, light=sw.light,
                direction=sw.direction, pixel=sw.pixel, source_mode=sw.source_mode,
                acquisition=sw.acquisition, points_planned=sw.points_planned,
                four_wire=sw.four_wire, nplc=sw.nplc, settle_s=sw.settle_s,
                compliance=sw.compliance, time=sw.started_at, conditions=sw.conditions,
                pair_sweep_uid=sw.pair_sweep_uid)
            yield from self.points(sw.uid)
            if sw.status != "running":
                yield ev.SweepFinished(
                    run_uid=run.uid, sweep_uid=sw.uid,
                    status=sw.status if sw.status != "interrupted" else ev.SWEEP_ABORTED,
                    reason=sw.reason, points=sw.points_reported if sw.points_reported is not None
                    else sw.points_stored, time=sw.ended_at if sw.ended_at is not None else sw.started_at,
                    conditions=sw.final_conditions or {})
            for a in self.analyses(sweep_uid=sw.uid):
                yield ev.Analysis(run_uid=run.uid, sweep_uid=sw.uid, time=a.created_at,
                                  result=a.result, elapsed_s=a.elapsed_s)
        for trip in self.interlocks(run.uid):
            yield ev.InterlockTripped(run_uid=run.uid, sweep_uid=trip.sweep_uid, cause=trip.cause,
                                      message=trip.message, time=trip.time, value=trip.value,
                                      limit=trip.limit)
        if run.status != "running":
            yield ev.RunFinished(run_uid=run.uid, status=run.status, reason=run.reason,
                                 time=run.ended_at if run.ended_at is not None else run.started_at,
                                 output_verified_off=bool(run.output_verified_off),
                                 points=run.points_reported if run.points_reported is not None
                                 else self.point_count(run.uid))


def open_logbook(path: Path | str | None = None, **kwargs: Any) -> Logbook:
    """``Logbook(path)``; ``None`` means :func:`default_logbook_path`; a ``postgresql://``
    URL opens a shared store. The reader API is the same for both."""
    return Logbook(path, **kwargs)
