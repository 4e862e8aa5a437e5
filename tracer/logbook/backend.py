"""Where a logbook lives: a SQLite file or a PostgreSQL database, behind one data layer.

A logbook *target* is either a file path (SQLite, the default) or a ``postgresql://`` URL
(a store shared by the benches of a lab). :class:`tracer.logbook.Logbook` and
:class:`tracer.logbook.LogbookWriter` take either; the SQL they run is the same text for
both (``?`` placeholders, the tables of :mod:`tracer.logbook.schema`), and only the dialect
bits differ: the PostgreSQL connection (:mod:`tracer.logbook.postgres`) turns ``?`` into
its own placeholders and ``BEGIN IMMEDIATE`` into ``BEGIN``, the guards (triggers) are
written per dialect, and bulk copies use each database's fast path (:func:`insert_rows`).

Credentials: a URL may carry ``user:password@`` (better: leave the password out and let
libpq find it in ``PGPASSWORD`` or ``~/.pgpass``/``PGPASSFILE``). The URL is then kept in
a :class:`RedactedUrl`: a ``str`` whose text is the URL with the credentials replaced by
``***`` — what logs, messages, reports and stored snapshots see — and which still opens
the store when handed back to :class:`~tracer.logbook.Logbook`. :func:`redact_text`
scrubs a known secret out of any message (a driver's error text, say).

Standard library only; psycopg is imported only when a PostgreSQL store is opened.
"""
from __future__ import annotations

import os
import re
import sqlite3
from pathlib import Path
from typing import Any, Iterable, Sequence
from urllib.parse import parse_qsl, quote, unquote, urlencode, urlsplit, urlunsplit

URL_SCHEMES = ("postgresql", "postgres")
SQLITE = "sqlite"
POSTGRESQL = "postgresql"
REDACTED = "***"

# query parameters of a libpq URL whose values are secrets
_SECRET_PARAMS = frozenset({"password", "sslpassword"})
# key=value connection strings and URLs inside free text
_KV_SECRET = re.compile(r"\b(password|sslpassword)\s*=\s*('(?:[^'\\]|\\.)*'|[^\s&]+)", re.IGNORECASE)
_URL_USERINFO = re.compile(r"([a-z][a-z0-9+.-]*://)([^@/\s]*:[^@/\s]*)@", re.IGNORECASE)


class RedactedUrl(str):
    """A store URL whose *text* has no credentials; :attr:`secret` is the URL to connect
    with. ``str()``, ``repr()``, f-strings, JSON and logs all see the redacted text."""

    secret: str

    def __new__(cls, url: str) -> "RedactedUrl":
        if isinstance(url, RedactedUrl):
            return url
        self = super().__new__(cls, redact_url(url))
        object.__setattr__(self, "secret", str(url))
        return self

    def __reduce__(self):          # never pickle the secret by accident
        return (str, (str(self),))

    @property
    def has_password(self) -> bool:
        return bool(url_password(self.secret))


def is_url(target: Any) -> bool:
    """Whether ``target`` names a PostgreSQL store (a ``postgresql://`` URL)."""
    if isinstance(target, RedactedUrl):
        return True
    if not isinstance(target, str):
        return False
    scheme = target.split("://", 1)[0].lower() if "://" in target else ""
    return scheme in URL_SCHEMES


def dialect_of_target(target: Any) -> str:
    return POSTGRESQL if is_url(target) else SQLITE


def logbook_target(text: str) -> Path | RedactedUrl:
    """Command-line/profile text to a target: a URL (kept with its secret, shown
    redacted) or a file path."""
    if isinstance(text, RedactedUrl):
        return text                     # str() of it would drop the secret
    text = str(text).strip()
    if is_url(text):
        return RedactedUrl(text)
    return Path(text).expanduser()


def url_password(url: str) -> str:
    """The password a URL carries (in ``user:password@`` or ``?password=``), or ''."""
    try:
        parts = urlsplit(url)
    except ValueError:
        return ""
    found = ""
    if parts.password:
        found = unquote(parts.password)
    for key, value in parse_qsl(parts.query, keep_blank_values=True):
        if key.lower() == "password" and value:
            found = value
    return found


def redact_url(url: str) -> str:
    """``url`` without credentials: ``user:password@`` becomes ``***@`` (a user name
    alone, with no password, is kept), and ``password=``/``sslpassword=`` query values
    become ``***``. Text that is not a URL goes through :func:`redact_text`."""
    try:
        parts = urlsplit(str(url))
    except ValueError:
        return redact_text(str(url))
    if parts.scheme.lower() not in URL_SCHEMES:
        return redact_text(str(url))
    netloc = parts.netloc
    if "@" in netloc:
        userinfo, hostport = netloc.rsplit("@", 1)
        netloc = f"{REDACTED}@{hostport}" if ":" in userinfo else f"{userinfo}@{hostport}"
    query = parts.query
    if query:
        pairs = parse_qsl(query, keep_blank_values=True)
        query = urlencode([(k, REDACTED if k.lower() in _SECRET_PARAMS else v) for k, v in pairs],
                          safe="*=-")
    return urlunsplit((parts.scheme, netloc, parts.path, query, parts.fragment))


def redact_text(text: str, secrets: Iterable[str] = ()) -> str:
    """Scrub credentials from free text: URLs' ``user:password@``, ``password=...`` pairs,
    and every occurrence (plain or percent-encoded) of the given secrets."""
    out = _URL_USERINFO.sub(lambda m: f"{m.group(1)}{REDACTED}@", str(text))
    out = _KV_SECRET.sub(lambda m: f"{m.group(1)}={REDACTED}", out)
    for secret in secrets:
        if secret and len(secret) >= 3:
            out = out.replace(secret, REDACTED)
            encoded = quote(secret, safe="")
            if encoded != secret:
                out = out.replace(encoded, REDACTED)
    return out


def secrets_of(target: Any) -> tuple[str, ...]:
    """The secrets a target carries (its password, if any), for :func:`redact_text`."""
    if isinstance(target, RedactedUrl):
        target = target.secret
    if is_url(target):
        pw = url_password(str(target))
        return (pw,) if pw else ()
    return ()


# ----------------------------------------------------------------------------- dialect bits
def dialect(conn: Any) -> str:
    """``"sqlite"`` for a :class:`sqlite3.Connection`, else the connection's ``dialect``."""
    if isinstance(conn, sqlite3.Connection):
        return SQLITE
    return getattr(conn, "dialect", SQLITE)


def database_errors() -> tuple[type[BaseException], ...]:
    """The exception classes a logbook connection may raise, for either backend."""
    errors: list[type[BaseException]] = [sqlite3.Error]
    try:
        import psycopg
    except ImportError:
        pass
    else:
        errors.append(psycopg.Error)
    return tuple(errors)


def integrity_errors() -> tuple[type[BaseException], ...]:
    """What a guard or a key violation raises: ``sqlite3.IntegrityError`` on SQLite,
    ``psycopg.IntegrityError`` on PostgreSQL (the guards raise SQLSTATE 23000 there)."""
    errors: list[type[BaseException]] = [sqlite3.IntegrityError]
    try:
        import psycopg
    except ImportError:
        pass
    else:
        errors.append(psycopg.IntegrityError)
    return tuple(errors)


def unreachable_errors() -> tuple[type[BaseException], ...]:
    """Errors that say "the store cannot be reached or is not answering now" (retry
    later), as opposed to a record the store refuses."""
    from tracer.logbook.postgres import StoreUnreachable

    errors: list[type[BaseException]] = [StoreUnreachable, sqlite3.OperationalError]
    try:
        import psycopg
    except ImportError:
        pass
    else:
        errors.append(psycopg.OperationalError)
    return tuple(errors)


def insert_rows(conn: Any, table: str, columns: Sequence[str], rows: Sequence[Sequence[Any]],
                *, skip_existing: bool = False) -> None:
    """Insert many rows in the caller's transaction. ``skip_existing`` adds
    ``ON CONFLICT DO NOTHING`` (the same text on both databases). PostgreSQL copies fresh
    rows with ``COPY`` (its bulk path); otherwise one prepared ``INSERT`` per row."""
    if not rows:
        return
    cols = ", ".join(columns)
    if dialect(conn) == POSTGRESQL and not skip_existing:
        conn.copy_rows(table, columns, rows)
        return
    sql = f"INSERT INTO {table} ({cols}) VALUES ({', '.join('?' for _ in columns)})"
    if skip_existing:
        sql += " ON CONFLICT DO NOTHING"
    conn.executemany(sql, rows)


def environment_hint() -> str:
    """Where libpq looks for what a URL leaves out (for help texts)."""
    passfile = os.environ.get("PGPASSFILE") or "~/.pgpass"
    return f"PGHOST, PGPORT, PGUSER, PGDATABASE, PGPASSWORD or {passfile}"
