"""The results store: every run, sweep, raw point and analysis, durable first.

- :class:`Logbook` — open (create, migrate, recover interrupted runs) and read a logbook.
- :class:`LogbookWriter` — the engine's critical subscriber: each event committed before
  the call returns.
- :func:`export_run`, :func:`read_sweep_csv`, :func:`read_run_json` — exports that read
  back bit for bit.
- :func:`default_logbook_path` — ``$TRACER_LOGBOOK``, else
  ``$XDG_DATA_HOME/tracer/logbook.sqlite``, else ``~/.local/share/tracer/logbook.sqlite``.

A ``postgresql://`` URL in place of a path opens the same logbook in a PostgreSQL database
shared by a lab's benches (:mod:`tracer.logbook.backend`); :mod:`tracer.logbook.forward`
copies a bench's ended runs from its local file to such a store (store-and-forward).

Stdlib only (plus ``tracer.events`` and ``tracer.conventions``; psycopg for a PostgreSQL
store, imported only when one is opened).
"""
from tracer.logbook.export import (
    CSV_COLUMNS, ExportError, ExportResult, SweepCsv, export_run, read_run_json, read_sweep_csv,
    run_document, safe_name,
)
from tracer.logbook.paths import LOGBOOK_ENV, default_logbook_path
from tracer.logbook.schema import LATEST_VERSION as SCHEMA_VERSION
from tracer.logbook.store import (
    AmbiguousRun, InstrumentRecord, Logbook, LogbookError, RecoveryReport, RunNotFound,
    RunSummary, StoredAnalysis, StoredInterlock, StoredRun, StoredSweep, migrate, open_logbook,
)
from tracer.logbook.writer import LogbookWriter

__all__ = [
    "AmbiguousRun", "CSV_COLUMNS", "ExportError", "ExportResult", "InstrumentRecord",
    "LOGBOOK_ENV", "Logbook", "LogbookError", "LogbookWriter", "RecoveryReport", "RunNotFound",
    "RunSummary", "SCHEMA_VERSION", "StoredAnalysis", "StoredInterlock", "StoredRun",
    "StoredSweep", "SweepCsv", "default_logbook_path", "export_run", "migrate", "open_logbook",
    "read_run_json", "read_sweep_csv", "run_document", "safe_name",
]
