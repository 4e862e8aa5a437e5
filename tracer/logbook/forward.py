"""Store-and-forward: a bench's finished runs copied from its local logbook to a shared one.

A bench always writes to its local SQLite logbook first (the engine's critical subscriber
never waits on a network). A :class:`Forwarder` then copies every run that has ended
(completed, aborted, failed or interrupted) to the shared store, usually PostgreSQL:

- **One transaction per run** in the shared store: the run, its instruments, sweeps,
  points, analyses and interlock records arrive together or not at all. A crash or a
  lost connection mid-way leaves nothing behind; the next attempt starts again.
- **Idempotent**: runs, sweeps and points keep their identities (run uid, sweep uid,
  ``(sweep uid, seq)``), every insert that could meet an earlier copy says
  ``ON CONFLICT DO NOTHING``, and a run already complete in the shared store is only
  checked (same status, sweeps and points) and topped up with analyses added since
  (an offline re-fit). A retry never duplicates; two forwarders racing on the same run
  end with one copy (the second waits for the first's row, then finds it there).
- **State** lives in the local logbook's ``forward_state`` table (per target store and
  run: forwarded or failed, attempts, next attempt, last error — redacted). It is
  written only after the shared store has committed, so a crash between the two makes
  the next pass find the run already there and just record it.
- **Unreachable store**: the bench keeps measuring; the forwarder retries with
  exponential backoff (:class:`RetryPolicy`) and forwards everything when the store
  answers again. A run the store *refuses* (a conflicting copy, a guard) is marked
  failed with its reason and retried on its own, slower schedule; the others go on.

Rows are copied as stored (a NULL reading stays NULL, floats bit for bit), so the shared
copy of a run reads back exactly like the local one.

``tracer logbook forward [--to URL]`` forwards by hand; ``tracer run --forward-to URL`` (or
``forward_to:`` in the bench profile) runs a :class:`Forwarder` in the background.
"""
from __future__ import annotations

import logging
import random
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

from tracer import events as ev
from tracer.logbook import backend
from tracer.logbook.store import (
    _POINT_COLUMNS, _RUN_COLUMNS, _SWEEP_COLUMNS, Logbook, LogbookError, _Transaction,
)

log = logging.getLogger("tracer.logbook.forward")

FORWARD_STATE_TABLE = """
CREATE TABLE IF NOT EXISTS forward_state (
    target              TEXT NOT NULL,
    run_uid             TEXT NOT NULL REFERENCES runs (uid),
    state               TEXT NOT NULL CHECK (state IN ('forwarded', 'failed')),
    attempts            INTEGER NOT NULL DEFAULT 0,
    first_attempt_at    DOUBLE PRECISION,
    last_attempt_at     DOUBLE PRECISION,
    next_attempt_at     DOUBLE PRECISION,
    forwarded_at        DOUBLE PRECISION,
    points_forwarded    INTEGER,
    analyses_forwarded  INTEGER,
    last_error          TEXT NOT NULL DEFAULT '',
    PRIMARY KEY (target, run_uid)
)"""

RUN_COLUMNS = tuple(c.strip() for c in _RUN_COLUMNS.split(",")) + (
    "writer_host", "writer_pid", "writer_token")
SWEEP_COLUMNS = tuple(c.strip() for c in _SWEEP_COLUMNS.split(","))
POINT_COLUMNS = tuple(c.strip() for c in _POINT_COLUMNS.split(","))
INSTRUMENT_COLUMNS = ("run_uid", "role", "address", "identity", "driver")
ANALYSIS_COLUMNS = ("uid", "sweep_uid", "run_uid", "created_at", "origin", "elapsed_s", "result_json")
INTERLOCK_COLUMNS = ("run_uid", "seq", "sweep_uid", "cause", "message", "time", "value", "limit_value")

# the columns a run or sweep gets when it is closed (inserted first as 'running', because
# the guards accept points only into a running sweep and changes only to a running run)
_RUN_FINAL = ("ended_at", "status", "reason", "output_verified_off", "points_reported")
_SWEEP_FINAL = ("ended_at", "status", "reason", "points_reported", "final_conditions_json")


class ForwardError(LogbookError):
    """A run the shared store refuses (it is retried on its own schedule)."""


class ForwardConflict(ForwardError):
    """The shared store holds a different run under the same uid: never overwritten."""


@dataclass(frozen=True)
class RetryPolicy:
    """Exponential backoff: ``initial_s * factor**(n-1)``, at most ``max_s``, plus up to
    ``jitter`` of itself at random (so benches that lost the store together do not all
    knock at once when it returns). Common practice for reconnect loops."""

    initial_s: float = 1.0
    max_s: float = 60.0
    factor: float = 2.0
    jitter: float = 0.2

    def delay(self, failures: int) -> float:
        base = min(self.max_s, self.initial_s * self.factor ** max(0, failures - 1))
        return base * (1.0 + self.jitter * random.random())


@dataclass
class ForwardReport:
    """What one pass did."""

    target: str                                   # the shared store, redacted
    forwarded: list[str] = field(default_factory=list)      # copied by this pass
    already_there: list[str] = field(default_factory=list)  # found complete; recorded
    failed: dict[str, str] = field(default_factory=dict)    # refused, with the reason
    unreachable: str | None = None                # why the store could not be used
    points: int = 0                               # points copied by this pass
    pending: int = 0                              # runs still waiting after this pass
    elapsed_s: float = 0.0

    @property
    def ok(self) -> bool:
        return self.unreachable is None and not self.failed

    def to_dict(self) -> dict[str, Any]:
        return {"target": str(self.target), "forwarded": list(self.forwarded),
                "already_there": list(self.already_there), "failed": dict(self.failed),
                "unreachable": self.unreachable, "points": self.points,
                "pending": self.pending, "elapsed_s": round(self.elapsed_s, 6)}


@dataclass
class RunRows:
    """One run's rows as stored locally, read in one snapshot."""

    run: dict[str, Any]
    instruments: list[tuple]
    sweeps: list[dict[str, Any]]
    points: dict[str, list[tuple]]                # sweep uid -> rows in seq order
    analyses: list[tuple]
    interlocks: list[tuple]

    @property
    def uid(self) -> str:
        return self.run["uid"]

    @property
    def point_count(self) -> int:
        return sum(len(p) for p in self.points.values())


@dataclass(frozen=True)
class ForwardState:
    target: str
    run_uid: str
    state: str
    attempts: int
    last_attempt_at: float | None
    next_attempt_at: float | None
    forwarded_at: float | None
    points_forwarded: int | None
    analyses_forwarded: int | None
    last_error: str


# ----------------------------------------------------------------------------- local side
def target_key(target: Any) -> str:
    """How the local state names a shared store: its URL without credentials."""
    return str(backend.RedactedUrl(target)) if backend.is_url(target) else str(
        Path(target).expanduser().resolve())


def ensure_state_table(local: Logbook) -> None:
    if local.dialect != backend.SQLITE:
        raise LogbookError("store-and-forward keeps its state in a local SQLite logbook; "
                           f"{local.path} is not one")
    with local._lock:
        local.connection.execute(FORWARD_STATE_TABLE)


def pending_runs(local: Logbook, target: str, *, now: float | None = None,
                 include_failed: bool = False, refits: bool = False) -> list[str]:
    """Runs that have ended and are not yet in ``target`` (oldest first). A run that
    failed waits for its next attempt unless ``include_failed``. ``refits`` also returns
    forwarded runs that have gained analyses since (offline re-fits)."""
    now = time.time() if now is None else now
    sql = ("SELECT r.uid FROM runs r LEFT JOIN forward_state f "
           "ON f.run_uid = r.uid AND f.target = ? "
           "WHERE r.status <> 'running' AND (f.run_uid IS NULL OR (f.state = 'failed' AND "
           "(? OR f.next_attempt_at IS NULL OR f.next_attempt_at <= ?))) "
           "ORDER BY r.started_at, r.uid")
    uids = [r[0] for r in local._query(sql, (target, 1 if include_failed else 0, now))]
    if refits:
        counts = dict(local._query(
            "SELECT s.run_uid, COUNT(*) FROM analyses a JOIN sweeps s ON s.uid = a.sweep_uid "
            "GROUP BY s.run_uid"))
        seen = set(uids)
        for uid, sent in local._query("SELECT run_uid, analyses_forwarded FROM forward_state "
                                      "WHERE target = ? AND state = 'forwarded'", (target,)):
            if uid not in seen and counts.get(uid, 0) > (sent or 0):
                uids.append(uid)
    return uids


def forward_states(local: Logbook, target: str | None = None) -> list[ForwardState]:
    sql = ("SELECT target, run_uid, state, attempts, last_attempt_at, next_attempt_at, "
           "forwarded_at, points_forwarded, analyses_forwarded, last_error FROM forward_state")
    params: tuple = ()
    if target is not None:
        sql += " WHERE target = ?"
        params = (target,)
    return [ForwardState(*row) for row in local._query(sql + " ORDER BY last_attempt_at", params)]


def read_run(local: Logbook, run_uid: str) -> RunRows:
    """The run's rows, read in one snapshot of the local logbook."""
    with local._lock:
        conn = local.connection
        conn.execute("BEGIN")          # a read transaction: one consistent snapshot (WAL)
        try:
            row = conn.execute(f"SELECT {', '.join(RUN_COLUMNS)} FROM runs WHERE uid = ?",
                               (run_uid,)).fetchone()
            if row is None:
                raise LogbookError(f"no run {run_uid!r} in {local.path}")
            run = dict(zip(RUN_COLUMNS, row))
            instruments = conn.execute(
                f"SELECT {', '.join(INSTRUMENT_COLUMNS)} FROM run_instruments WHERE run_uid = ? "
                "ORDER BY role", (run_uid,)).fetchall()
            sweeps = [dict(zip(SWEEP_COLUMNS, r)) for r in conn.execute(
                f"SELECT {', '.join(SWEEP_COLUMNS)} FROM sweeps WHERE run_uid = ? "
                "ORDER BY sweep_index", (run_uid,)).fetchall()]
            points, analyses = {}, []
            for sw in sweeps:
                points[sw["uid"]] = conn.execute(
                    f"SELECT {', '.join(POINT_COLUMNS)} FROM points WHERE sweep_uid = ? "
                    "ORDER BY seq", (sw["uid"],)).fetchall()
                analyses += conn.execute(
                    f"SELECT {', '.join(ANALYSIS_COLUMNS)} FROM analyses WHERE sweep_uid = ? "
                    "ORDER BY created_at, uid", (sw["uid"],)).fetchall()
            interlocks = conn.execute(
                f"SELECT {', '.join(INTERLOCK_COLUMNS)} FROM interlock_trips WHERE run_uid = ? "
                "ORDER BY seq", (run_uid,)).fetchall()
        finally:
            conn.execute("COMMIT")
    return RunRows(run, instruments, sweeps, points, analyses, interlocks)


def _record(local: Logbook, target: str, uid: str, *, ok: bool, points: int = 0,
            analyses: int = 0, error: str = "", retry: RetryPolicy | None = None) -> None:
    now = time.time()
    with local._lock, _Transaction(local.connection) as conn:
        row = conn.execute("SELECT attempts FROM forward_state WHERE target = ? AND run_uid = ?",
                           (target, uid)).fetchone()
        attempts = (row[0] if row else 0) + 1
        next_at = None if ok else now + (retry or RetryPolicy()).delay(attempts)
        conn.execute(
            "INSERT INTO forward_state (target, run_uid, state, attempts, first_attempt_at, "
            "last_attempt_at, next_attempt_at, forwarded_at, points_forwarded, "
            "analyses_forwarded, last_error) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) "
            "ON CONFLICT (target, run_uid) DO UPDATE SET state = excluded.state, "
            "attempts = excluded.attempts, last_attempt_at = excluded.last_attempt_at, "
            "next_attempt_at = excluded.next_attempt_at, "
            "forwarded_at = COALESCE(excluded.forwarded_at, forward_state.forwarded_at), "
            "points_forwarded = COALESCE(excluded.points_forwarded, forward_state.points_forwarded), "
            "analyses_forwarded = COALESCE(excluded.analyses_forwarded, forward_state.analyses_forwarded), "
            "last_error = excluded.last_error",
            (target, uid, "forwarded" if ok else "failed", attempts, now, now, next_at,
             now if ok else None, points if ok else None, analyses if ok else None,
             "" if ok else error[:2000]))


# ----------------------------------------------------------------------------- shared side
def _insert_sql(table: str, columns: Sequence[str], *, skip_existing: bool = True) -> str:
    sql = (f"INSERT INTO {table} ({', '.join(columns)}) "
           f"VALUES ({', '.join('?' for _ in columns)})")
    return sql + (" ON CONFLICT DO NOTHING" if skip_existing else "")


def write_run(shared: Logbook, rows: RunRows) -> bool:
    """Copy one run into ``shared`` in one transaction. Returns True if this call created
    it, False if it was already complete there (then only missing analyses are added).
    Raises :class:`ForwardConflict` if the store holds a different run under its uid."""
    uid = rows.uid
    final_run = {c: rows.run[c] for c in _RUN_FINAL}
    if final_run["status"] == "running":
        raise ForwardError(f"run {uid} is still running; only ended runs are forwarded")
    opening = dict(rows.run, ended_at=None, status="running", reason="",
                   output_verified_off=None, points_reported=None)
    with shared._lock, shared.transaction() as conn:
        created = conn.execute(_insert_sql("runs", RUN_COLUMNS),
                               [opening[c] for c in RUN_COLUMNS]).rowcount == 1
        if not created:
            status = conn.execute("SELECT status FROM runs WHERE uid = ?", (uid,)).fetchone()[0]
            if status != "running":
                _check_same(conn, rows, status)
                backend.insert_rows(conn, "analyses", ANALYSIS_COLUMNS, rows.analyses,
                                    skip_existing=True)
                return False
            # else: left running in the shared store by a direct writer; complete it below
        fresh = created
        backend.insert_rows(conn, "run_instruments", INSTRUMENT_COLUMNS, rows.instruments,
                            skip_existing=not fresh)
        sweep_rows = [[opened[c] for c in SWEEP_COLUMNS] for opened in (
            dict(sw, ended_at=None, status="running", reason="", points_reported=None,
                 final_conditions_json=None) for sw in rows.sweeps)]
        backend.insert_rows(conn, "sweeps", SWEEP_COLUMNS, sweep_rows, skip_existing=not fresh)
        all_points = [p for sw in rows.sweeps for p in rows.points[sw["uid"]]]
        backend.insert_rows(conn, "points", POINT_COLUMNS, all_points, skip_existing=not fresh)
        for sw in rows.sweeps:
            if sw["status"] == "running":
                continue
            conn.execute(
                "UPDATE sweeps SET ended_at = ?, status = ?, reason = ?, points_reported = ?, "
                "final_conditions_json = ? WHERE uid = ? AND status = 'running'",
                [sw[c] for c in _SWEEP_FINAL] + [sw["uid"]])
        backend.insert_rows(conn, "analyses", ANALYSIS_COLUMNS, rows.analyses,
                            skip_existing=not fresh)
        backend.insert_rows(conn, "interlock_trips", INTERLOCK_COLUMNS, rows.interlocks,
                            skip_existing=not fresh)
        conn.execute(
            "UPDATE runs SET ended_at = ?, status = ?, reason = ?, output_verified_off = ?, "
            "points_reported = ? WHERE uid = ? AND status = 'running'",
            [final_run[c] for c in _RUN_FINAL] + [uid])
    return True


def _check_same(conn: Any, rows: RunRows, status: str) -> None:
    """A run already complete in the shared store must be this run."""
    uid = rows.uid
    (sha, started, bench) = conn.execute(
        "SELECT protocol_sha256, started_at, bench_name FROM runs WHERE uid = ?", (uid,)).fetchone()
    (sweeps,) = conn.execute("SELECT COUNT(*) FROM sweeps WHERE run_uid = ?", (uid,)).fetchone()
    (points,) = conn.execute("SELECT COUNT(*) FROM points p JOIN sweeps s ON p.sweep_uid = s.uid "
                             "WHERE s.run_uid = ?", (uid,)).fetchone()
    mine = (rows.run["status"], rows.run["protocol_sha256"], rows.run["started_at"],
            rows.run["bench_name"], len(rows.sweeps), rows.point_count)
    theirs = (status, sha, started, bench, sweeps, points)
    if mine != theirs:
        names = ("status", "protocol", "start time", "bench", "sweeps", "points")
        diff = ", ".join(f"{n} {a!r} here, {b!r} there" for n, a, b in zip(names, mine, theirs) if a != b)
        raise ForwardConflict(f"the shared store already holds a different run {uid}: {diff}")


# ----------------------------------------------------------------------------- one pass
def forward_pass(local: Logbook, shared_target: Any, *, shared: Logbook | None = None,
                 include_failed: bool = False, refits: bool = False,
                 retry: RetryPolicy | None = None, connect_timeout_s: float = 10.0,
                 limit: int | None = None, stop: threading.Event | None = None
                 ) -> tuple[ForwardReport, Logbook | None]:
    """Forward what is pending from ``local`` to ``shared_target`` (opening it unless an
    open ``shared`` is given). Returns the report and the shared logbook, open, for reuse
    (None if it could not be opened or was lost)."""
    retry = retry or RetryPolicy()
    key = target_key(shared_target)
    secrets = backend.secrets_of(shared_target)
    report = ForwardReport(target=key)
    t0 = time.perf_counter()
    ensure_state_table(local)
    todo = pending_runs(local, key, include_failed=include_failed, refits=refits)
    if limit is not None:
        todo = todo[:limit]
    if todo and shared is None:
        try:
            shared = Logbook(shared_target, busy_timeout_s=connect_timeout_s, recover=False)
        except LogbookError as exc:
            report.unreachable = backend.redact_text(str(exc), secrets)
            shared = None
    unreachable = backend.unreachable_errors()
    for k, uid in enumerate(todo):
        if shared is None or (stop is not None and stop.is_set()):
            break
        try:
            rows = read_run(local, uid)
        except (LogbookError, *backend.database_errors()) as exc:
            report.failed[uid] = f"cannot read it from the local logbook: {exc}"
            continue
        try:
            created = write_run(shared, rows)
        except unreachable as exc:
            report.unreachable = (f"lost the shared logbook {key} while forwarding run {uid}: "
                                  + backend.redact_text(" ".join(str(exc).split()), secrets))
            _close_quietly(shared)
            shared = None
            break
        except (ForwardError, *backend.database_errors()) as exc:
            message = backend.redact_text(" ".join(str(exc).split()), secrets)
            report.failed[uid] = message
            _record(local, key, uid, ok=False, error=message, retry=retry)
            log.error("run %s not forwarded to %s: %s", uid, key, message)
            if shared is not None and _connection_broken(shared):
                _close_quietly(shared)
                shared = None
            continue
        _record(local, key, uid, ok=True, points=rows.point_count, analyses=len(rows.analyses))
        if created:
            report.forwarded.append(uid)
            report.points += rows.point_count
            log.info("run %s forwarded to %s (%d points)", uid, key, rows.point_count)
        else:
            report.already_there.append(uid)
    report.pending = len(pending_runs(local, key, include_failed=True))
    report.elapsed_s = time.perf_counter() - t0
    return report, shared


def _connection_broken(lb: Logbook) -> bool:
    conn = getattr(lb, "_conn", None)
    return conn is None or bool(getattr(conn, "closed", False))


def _close_quietly(lb: Logbook | None) -> None:
    if lb is None:
        return
    try:
        lb.close()
    except Exception:  # noqa: BLE001 - the connection is gone anyway
        pass


def forward(local_target: Any, shared_target: Any, *, include_failed: bool = True,
            refits: bool = True, connect_timeout_s: float = 10.0,
            retry: RetryPolicy | None = None) -> ForwardReport:
    """Forward by hand: every ended run of the local logbook not yet in the shared store
    (failed ones too, and analyses added since), in one pass."""
    if backend.is_url(local_target):
        raise LogbookError("the runs are forwarded from a bench's local logbook file, not "
                           f"from {backend.RedactedUrl(local_target)}")
    if not backend.is_url(shared_target) and target_key(shared_target) == target_key(local_target):
        raise LogbookError("the shared logbook is the local logbook itself")
    with Logbook(local_target) as local:     # opening recovers runs whose writer died
        report, shared = forward_pass(local, shared_target, include_failed=include_failed,
                                      refits=refits, retry=retry,
                                      connect_timeout_s=connect_timeout_s)
        _close_quietly(shared)
    return report


# ----------------------------------------------------------------------------- background
@dataclass(frozen=True)
class ForwarderStatus:
    target: str
    running: bool
    reachable: bool | None          # None before the first attempt
    last_error: str | None
    runs_forwarded: int
    points_forwarded: int
    pending: int | None
    passes: int


class Forwarder:
    """Forwards a local logbook's ended runs to a shared store from a background thread.

    ``start()`` it next to the engine; subscribe :meth:`notify` to the engine (batch mode,
    not critical) so that a run is sent as soon as it ends; it also looks every
    ``poll_interval_s``. :meth:`close` stops it after one last bounded pass. Never raises
    into the caller's thread: problems are logged (redacted) and kept in :attr:`status`.
    """

    def __init__(self, local_target: Any, shared_target: Any, *, retry: RetryPolicy | None = None,
                 poll_interval_s: float = 30.0, connect_timeout_s: float = 5.0,
                 name: str | None = None):
        if backend.is_url(local_target):
            raise LogbookError("store-and-forward needs a local logbook file; "
                               f"{backend.RedactedUrl(local_target)} is a shared store")
        self.local_target = Path(local_target)
        self.shared_target = (backend.RedactedUrl(shared_target) if backend.is_url(shared_target)
                              else Path(shared_target))
        self.key = target_key(self.shared_target)
        self.retry = retry or RetryPolicy()
        self.poll_interval_s = float(poll_interval_s)
        self.connect_timeout_s = float(connect_timeout_s)
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._pass_lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._name = name or f"tracer-forward-{self.local_target.stem}"
        self._local: Logbook | None = None
        self._shared: Logbook | None = None
        self._failures = 0
        self._reachable: bool | None = None
        self._last_error: str | None = None
        self._runs = 0
        self._points = 0
        self._pending: int | None = None
        self._passes = 0
        self.last_report: ForwardReport | None = None
        self.reports: list[ForwardReport] = []

    # -- lifetime
    def start(self) -> "Forwarder":
        if self._thread is None:
            self._thread = threading.Thread(target=self._loop, name=self._name, daemon=True)
            self._thread.start()
        return self

    def notify(self, batch: Any) -> None:
        """Engine subscriber: wakes the forwarder when a run has finished."""
        events = batch if isinstance(batch, list) else [batch]
        if any(isinstance(e, ev.RunFinished) for e in events):
            self._wake.set()

    __call__ = notify

    def wake(self) -> None:
        self._wake.set()

    def forward_now(self, *, include_failed: bool = False, refits: bool = False) -> ForwardReport:
        """One pass in the caller's thread (waits for a pass in progress)."""
        with self._pass_lock:
            return self._pass(include_failed=include_failed, refits=refits)

    def close(self, *, drain: bool = True, timeout_s: float = 15.0) -> ForwardReport | None:
        """Stop; with ``drain``, first one last pass (bounded by the connection timeout),
        so a run that just ended is sent now if the store answers. What is not sent stays
        in the local logbook for the next forwarder or ``tracer logbook forward``."""
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout_s)
        report = None
        if drain and self._thread is not None and not self._thread.is_alive():
            report = self.forward_now()     # (a forwarder never started sends nothing)
        with self._pass_lock:
            _close_quietly(self._shared)
            self._shared = None
            _close_quietly(self._local)
            self._local = None
        return report

    def __enter__(self) -> "Forwarder":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def status(self) -> ForwarderStatus:
        return ForwarderStatus(target=self.key, running=bool(self._thread and self._thread.is_alive()),
                               reachable=self._reachable, last_error=self._last_error,
                               runs_forwarded=self._runs, points_forwarded=self._points,
                               pending=self._pending, passes=self._passes)

    # -- the work
    def _loop(self) -> None:
        delay = 0.0
        refits = True                       # the first pass also catches analyses added offline
        while not self._stop.is_set():
            self._wake.wait(delay)
            self._wake.clear()
            if self._stop.is_set():
                break
            with self._pass_lock:
                report = self._pass(refits=refits)
            refits = False
            if report.unreachable is not None:
                self._failures += 1
                delay = self.retry.delay(self._failures)
            else:
                self._failures = 0
                delay = self.poll_interval_s
                if report.failed:
                    delay = min(delay, self.retry.delay(1))

    def _pass(self, *, include_failed: bool = False, refits: bool = False) -> ForwardReport:
        try:
            if self._local is None:
                self._local = Logbook(self.local_target, recover=False)
            report, self._shared = forward_pass(
                self._local, self.shared_target, shared=self._shared,
                include_failed=include_failed, refits=refits, retry=self.retry,
                connect_timeout_s=self.connect_timeout_s, stop=None)
        except Exception as exc:  # noqa: BLE001 - a background thread must not die
            report = ForwardReport(target=self.key, unreachable=backend.redact_text(
                f"forwarding failed: {exc}", backend.secrets_of(self.shared_target)))
            _close_quietly(self._shared)
            self._shared = None
        self._passes += 1
        self._runs += len(report.forwarded)
        self._points += report.points
        self._pending = report.pending
        self.last_report = report
        self.reports.append(report)
        del self.reports[:-50]
        if report.unreachable is not None:
            if self._reachable is not False:
                log.warning("%s; the bench keeps measuring into its local logbook and the runs "
                            "are forwarded when the store answers", report.unreachable)
            self._reachable = False
            self._last_error = report.unreachable
        elif self._shared is not None:       # the store was used in this pass
            if self._reachable is False:
                log.warning("shared logbook %s answers again", self.key)
            self._reachable = True
            self._last_error = None
        if report.unreachable is None and report.failed:
            self._last_error = "; ".join(f"{k}: {v}" for k, v in report.failed.items())
        return report

