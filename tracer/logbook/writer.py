"""The engine's critical subscriber: every event is in the logbook before the call returns.

Subscribe it first and synchronously (``engine.subscribe(writer, critical=True)``): the
engine calls it in its worker thread before any other subscriber sees the event, so a
point that the screen, the GUI or an export has shown is already committed.

Each :class:`~tracer.events.Point` is one autocommitted ``INSERT`` (its own transaction,
one pre-compiled statement from the connection's cache, WAL append); the other events
write their few rows in one ``BEGIN IMMEDIATE`` transaction. Nothing is buffered, so
there is nothing to lose if the process is killed between two events. A failure to
write raises, and the engine ends the run (the data would otherwise not be kept).
"""
from __future__ import annotations

import os
import socket
import uuid
from pathlib import Path
from typing import Any, Callable

from tracer import events as ev
from tracer.logbook.store import (
    DEFAULT_BUSY_TIMEOUT_S, Logbook, LogbookError, _mark_live, _Transaction, process_token,
    to_json,
)

_INSERT_POINT = (
    "INSERT INTO points (sweep_uid, seq, run_uid, run_seq, time, setpoint, voltage_v, current_a, "
    "in_compliance, irradiance_w_m2, temperature_c) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)")


def _opt_float(value: Any) -> float | None:
    return None if value is None else float(value)


class LogbookWriter:
    """Writes the event stream of runs into a logbook.

    ``LogbookWriter(path)`` opens its own connection (``path`` None = the default
    logbook); ``LogbookWriter(logbook=existing)`` shares an open :class:`Logbook`.
    Call it with each event. :meth:`close` marks any run it still has open as
    ``interrupted`` (its RunFinished never came), then closes its connection.
    """

    def __init__(self, path: Path | str | None = None, *, logbook: Logbook | None = None,
                 synchronous: str = "NORMAL", busy_timeout_s: float = DEFAULT_BUSY_TIMEOUT_S):
        if logbook is None:
            logbook = Logbook(path, synchronous=synchronous, busy_timeout_s=busy_timeout_s)
            self._owns_logbook = True
        else:
            self._owns_logbook = False
        self.logbook = logbook
        self.path = logbook.path
        self._conn = logbook.connection
        self._lock = logbook._lock   # one connection, one lock, shared with the Logbook
        self._host = socket.gethostname()
        self._pid = os.getpid()
        self._token = process_token()
        self._open_runs: set[str] = set()
        self._trip_seq: dict[str, int] = {}
        self.points_written = 0
        self._handlers: dict[type, Callable[[Any], None]] = {
            ev.RunStarted: self._run_started,
            ev.SweepStarted: self._sweep_started,
            ev.SweepFinished: self._sweep_finished,
            ev.Analysis: self._analysis,
            ev.InterlockTripped: self._interlock,
            ev.RunFinished: self._run_finished,
        }

    # -- the subscriber
    def __call__(self, event: Any) -> None:
        if type(event) is ev.Point:   # the hot path: one statement, autocommitted
            p = event
            with self._lock:
                self._conn.execute(_INSERT_POINT, (
                    p.sweep_uid, int(p.seq), p.run_uid, int(p.run_seq), float(p.time),
                    _opt_float(p.setpoint), _opt_float(p.voltage_v), _opt_float(p.current_a),
                    1 if p.in_compliance else 0, _opt_float(p.irradiance_w_m2),
                    _opt_float(p.temperature_c)))
                self.points_written += 1
            return
        handler = self._handlers.get(type(event))
        if handler is None:
            return  # not a record the logbook keeps (e.g. a state notice)
        with self._lock:
            handler(event)

    handle = __call__

    @property
    def open_runs(self) -> frozenset[str]:
        return frozenset(self._open_runs)

    # -- records
    def _run_started(self, e: ev.RunStarted) -> None:
        sample = dict(e.sample or {})
        sample_id = str(sample.get("id", sample.get("sample_id", "")) or "")
        bench = dict(e.bench or {})
        instruments = bench.get("instruments") or {}
        with _Transaction(self._conn) as conn:
            conn.execute(
                "INSERT INTO runs (uid, protocol_name, protocol_json, protocol_sha256, sample_id, "
                "sample_json, operator, bench_name, bench_json, limits_json, metadata_json, "
                "software_version, started_at, ended_at, status, reason, output_verified_off, "
                "points_reported, writer_host, writer_pid, writer_token) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, NULL, 'running', '', NULL, NULL, ?, ?, ?)",
                (e.run_uid, e.protocol_name, to_json(e.protocol), e.protocol_sha256, sample_id,
                 to_json(sample), e.operator or "", str(bench.get("name", "")), to_json(bench),
                 to_json(e.limits), to_json(e.metadata), e.software_version, float(e.time),
                 self._host, self._pid, self._token))
            if isinstance(instruments, dict):
                for role, info in instruments.items():
                    info = info if isinstance(info, dict) else {"identity": str(info)}
                    conn.execute(
                        "INSERT INTO run_instruments (run_uid, role, address, identity, driver) "
                        "VALUES (?, ?, ?, ?, ?)",
                        (e.run_uid, str(role), str(info.get("address", "") or ""),
                         str(info.get("identity", "") or ""), str(info.get("driver", "") or "")))
        self._open_runs.add(e.run_uid)
        _mark_live(self.logbook.key, e.run_uid, True)

    def _sweep_started(self, e: ev.SweepStarted) -> None:
        with _Transaction(self._conn) as conn:
            conn.execute(
                "INSERT INTO sweeps (uid, run_uid, sweep_index, step_index, step_name, kind, light, "
                "direction, pixel, source_mode, acquisition, points_planned, four_wire, nplc, "
                "settle_s, compliance, started_at, conditions_json, pair_sweep_uid, status) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 'running')",
                (e.sweep_uid, e.run_uid, int(e.sweep_index), int(e.step_index), e.step_name, e.kind,
                 1 if e.light else 0, e.direction, None if e.pixel is None else int(e.pixel),
                 e.source_mode, e.acquisition, int(e.points_planned), 1 if e.four_wire else 0,
                 float(e.nplc), float(e.settle_s), float(e.compliance), float(e.time),
                 to_json(e.conditions), e.pair_sweep_uid))

    def _sweep_finished(self, e: ev.SweepFinished) -> None:
        with _Transaction(self._conn) as conn:
            conn.execute(
                "UPDATE sweeps SET status = ?, reason = ?, ended_at = ?, points_reported = ?, "
                "final_conditions_json = ? WHERE uid = ?",
                (e.status, e.reason or "", float(e.time), int(e.points), to_json(e.conditions),
                 e.sweep_uid))

    def _analysis(self, e: ev.Analysis) -> None:
        with _Transaction(self._conn) as conn:
            conn.execute(
                "INSERT INTO analyses (uid, sweep_uid, run_uid, created_at, origin, elapsed_s, "
                "result_json) VALUES (?, ?, ?, ?, 'live', ?, ?)",
                (uuid.uuid4().hex, e.sweep_uid, e.run_uid, float(e.time), float(e.elapsed_s),
                 to_json(e.result)))

    def _interlock(self, e: ev.InterlockTripped) -> None:
        with _Transaction(self._conn) as conn:
            if e.run_uid not in self._trip_seq:
                (last,) = conn.execute("SELECT COALESCE(MAX(seq), 0) FROM interlock_trips "
                                       "WHERE run_uid = ?", (e.run_uid,)).fetchone()
                self._trip_seq[e.run_uid] = int(last)
            seq = self._trip_seq[e.run_uid] + 1
            conn.execute(
                "INSERT INTO interlock_trips (run_uid, seq, sweep_uid, cause, message, time, value, "
                "limit_value) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (e.run_uid, seq, e.sweep_uid, e.cause, e.message, float(e.time),
                 _opt_float(e.value), _opt_float(e.limit)))
            self._trip_seq[e.run_uid] = seq

    def _run_finished(self, e: ev.RunFinished) -> None:
        reason = e.reason or ""
        with _Transaction(self._conn) as conn:
            conn.execute(
                "UPDATE sweeps SET status = 'aborted', reason = ?, ended_at = ? "
                "WHERE run_uid = ? AND status = 'running'",
                (reason or "the run ended before the sweep was closed", float(e.time), e.run_uid))
            conn.execute(
                "UPDATE runs SET status = ?, reason = ?, ended_at = ?, output_verified_off = ?, "
                "points_reported = ? WHERE uid = ?",
                (e.status, reason, float(e.time), 1 if e.output_verified_off else 0, int(e.points),
                 e.run_uid))
        self._open_runs.discard(e.run_uid)
        self._trip_seq.pop(e.run_uid, None)
        _mark_live(self.logbook.key, e.run_uid, False)

    # -- lifetime
    def close(self) -> None:
        """Close the writer; a run still open here (no RunFinished came) is marked
        ``interrupted`` by the logbook's recovery."""
        with self._lock:
            leftover = list(self._open_runs)
            for uid in leftover:
                _mark_live(self.logbook.key, uid, False)
            self._open_runs.clear()
            try:
                if leftover and self.logbook._conn is not None:
                    self.logbook.recover_interrupted()
            finally:
                if self._owns_logbook:
                    self.logbook.close()

    def __enter__(self) -> "LogbookWriter":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


__all__ = ["LogbookWriter", "LogbookError"]
