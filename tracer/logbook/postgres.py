"""The PostgreSQL side of the logbook's data layer (psycopg 3).

:func:`connect` opens an autocommit connection and wraps it in :class:`PgConnection`, which
speaks the same small dialect as ``sqlite3.Connection`` to :mod:`tracer.logbook.store` and
:mod:`tracer.logbook.writer`: ``execute(sql, params)`` with ``?`` placeholders,
``executemany``, and ``BEGIN IMMEDIATE``/``COMMIT``/``ROLLBACK`` issued as statements. So
the store's SQL is written once. Differences kept on purpose:

- A NaN reading is stored as NULL, as SQLite does (it cannot store NaN), so a run reads
  back the same from either database and a forwarded run is a copy of the local one.
  Unlike SQLite, PostgreSQL keeps the sign of a zero (-0.0 stays -0.0).
- ``BEGIN IMMEDIATE`` (SQLite's "take the write lock now") becomes a plain ``BEGIN``:
  PostgreSQL locks rows, not the database, so writers of different runs never wait for
  each other.
- Integrity errors are ``psycopg.IntegrityError`` (the guards raise SQLSTATE 23000).
- Commits are durable before they return: a session on a server whose default is
  ``synchronous_commit=off`` sets it back to ``on`` (see :func:`connect`).

Connection parameters missing from the URL (password, host, user...) come from libpq's
environment variables and ``~/.pgpass`` (``PGPASSFILE``). Error messages never carry the
password: they name the store by its redacted URL.
"""
from __future__ import annotations

import threading
from typing import Any, Iterable, Sequence

from tracer.logbook.backend import POSTGRESQL, RedactedUrl, redact_text, secrets_of

DEFAULT_CONNECT_TIMEOUT_S = 10.0


class StoreUnreachable(Exception):
    """The PostgreSQL store could not be reached (message already redacted)."""


def _psycopg():
    try:
        import psycopg
    except ImportError as exc:   # pragma: no cover - psycopg is a declared dependency
        raise StoreUnreachable(
            "a PostgreSQL logbook needs the psycopg package (pip install 'psycopg[binary]')") from exc
    return psycopg


def _translate(sql: str) -> str:
    """``?`` placeholders to ``%s`` (and a literal ``%`` to ``%%``), outside quotes."""
    out = []
    quote = None
    for ch in sql:
        if quote:
            out.append("%%" if ch == "%" else ch)
            if ch == quote:
                quote = None
        elif ch in ("'", '"'):
            quote = ch
            out.append(ch)
        elif ch == "?":
            out.append("%s")
        elif ch == "%":
            out.append("%%")
        else:
            out.append(ch)
    return "".join(out)


def _clean(params: Sequence[Any]) -> list[Any]:
    return [None if type(p) is float and p != p else p for p in params]


class PgConnection:
    """A psycopg connection that takes the store's SQLite-flavoured statements."""

    dialect = POSTGRESQL

    def __init__(self, raw: Any, url: RedactedUrl):
        self.raw = raw
        self.url = url
        self._cache: dict[str, str] = {}
        self._lock = threading.RLock()

    def _sql(self, sql: str, with_params: bool) -> str:
        if not with_params:
            stripped = sql.strip().upper()
            if stripped == "BEGIN IMMEDIATE":
                return "BEGIN"
            return sql
        q = self._cache.get(sql)
        if q is None:
            q = self._cache[sql] = _translate(sql)
        return q

    def execute(self, sql: str, params: Sequence[Any] = ()) -> Any:
        with self._lock:
            if params:
                return self.raw.execute(self._sql(sql, True), _clean(params))
            return self.raw.execute(self._sql(sql, False))

    def executemany(self, sql: str, rows: Iterable[Sequence[Any]]) -> Any:
        with self._lock:
            cur = self.raw.cursor()
            cur.executemany(self._sql(sql, True), [_clean(r) for r in rows])
            return cur

    def copy_rows(self, table: str, columns: Sequence[str], rows: Iterable[Sequence[Any]]) -> None:
        """``COPY table (columns) FROM STDIN``: PostgreSQL's bulk insert (rows must be new)."""
        with self._lock:
            cur = self.raw.cursor()
            with cur.copy(f"COPY {table} ({', '.join(columns)}) FROM STDIN") as copy:
                for row in rows:
                    copy.write_row(_clean(row))

    @property
    def in_transaction(self) -> bool:
        return self.raw.info.transaction_status != 0   # psycopg.pq.TransactionStatus.IDLE

    def close(self) -> None:
        with self._lock:
            self.raw.close()

    @property
    def closed(self) -> bool:
        return self.raw.closed


def connect(url: str | RedactedUrl, *, connect_timeout_s: float = DEFAULT_CONNECT_TIMEOUT_S,
            application_name: str = "tracer", keepalives: bool = True) -> PgConnection:
    """Open the store at ``url`` (autocommit: each statement its own transaction unless a
    ``BEGIN`` is issued). Raises :class:`StoreUnreachable` with a redacted message."""
    psycopg = _psycopg()
    url = RedactedUrl(url)
    kwargs: dict[str, Any] = {"autocommit": True, "connect_timeout": max(1, int(round(connect_timeout_s))),
                              "application_name": application_name}
    if keepalives:
        # notice a dead server or network in about half a minute rather than hours
        kwargs.update(keepalives=1, keepalives_idle=10, keepalives_interval=5, keepalives_count=3)
    try:
        raw = psycopg.connect(url.secret, **kwargs)
    except psycopg.Error as exc:
        raise StoreUnreachable(
            f"cannot reach the shared logbook {url}: {describe_error(exc, url)}") from None
    except (ValueError, TypeError) as exc:        # a malformed URL
        raise StoreUnreachable(f"bad logbook URL {url}: {describe_error(exc, url)}") from None
    try:
        # A commit must be durable before it returns, whatever the server's default: the
        # writer's contract (a point anyone has seen is kept) and the forwarder's (a run is
        # recorded as forwarded only once the store has it) both rest on it. A server
        # running with synchronous_commit=off would otherwise lose the last commits in a
        # crash after having acknowledged them. Stronger settings are left as they are.
        if raw.execute("SHOW synchronous_commit").fetchone()[0] == "off":
            raw.execute("SET synchronous_commit TO on")
    except psycopg.Error as exc:
        raw.close()
        raise StoreUnreachable(f"cannot use the shared logbook {url}: {describe_error(exc, url)}") from None
    return PgConnection(raw, url)


def describe_error(exc: BaseException, url: Any = None) -> str:
    """One line about a driver error, with no secret in it."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return redact_text(text, secrets_of(url) if url is not None else ())


def store_identity(conn: PgConnection) -> dict[str, Any]:
    """Server, database and schema a connection is using (no credentials)."""
    info = conn.raw.info
    schema = conn.execute("SELECT current_schema()").fetchone()[0]
    return {"host": info.host, "port": info.port, "database": info.dbname, "schema": schema,
            "server_version": info.server_version}


def has_logbook(url: str | RedactedUrl, *, connect_timeout_s: float = DEFAULT_CONNECT_TIMEOUT_S) -> bool:
    """Whether the database (schema) at ``url`` holds a logbook, without creating one.
    Raises :class:`tracer.logbook.LogbookError` when it cannot be reached."""
    from tracer.logbook.schema import VERSION_TABLE_EXISTS
    from tracer.logbook.store import LogbookError

    try:
        conn = connect(url, connect_timeout_s=connect_timeout_s)
    except StoreUnreachable as exc:
        raise LogbookError(str(exc)) from None
    try:
        return bool(conn.execute(VERSION_TABLE_EXISTS[POSTGRESQL]).fetchone()[0])
    finally:
        conn.close()
