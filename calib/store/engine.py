"""Engines and sessions for SQLite (embedded default) and PostgreSQL (shared store).

Nothing here runs at import time: :func:`create_store_engine` builds an engine from a URL when
asked. SQLite connections get WAL mode, foreign keys and a busy timeout; their transactions are
begun by SQLAlchemy (not by the sqlite3 module), so that a workflow that writes can take the
write lock up front with :func:`begin_write` instead of failing half way when another process
wrote first. ``postgresql://`` URLs use psycopg 3.
"""

from __future__ import annotations

import functools
import hashlib
import math
import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import URL, Connection, make_url
from sqlalchemy.exc import ArgumentError
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import StoreURLError
from calib.store.quick import sqlite_read_flag

SQLITE_BUSY_TIMEOUT_MS = 10_000
"""How long a SQLite writer waits for another writer's lock before giving up."""

_WRITE = "calib_write"


def parse_url(url: str) -> URL:
    """The SQLAlchemy URL of ``url``; ``postgresql://`` is taken as psycopg 3.

    Raises
    ------
    StoreURLError
        If ``url`` is not a SQLite or PostgreSQL URL.
    """
    try:
        parsed = make_url(url)
    except (ArgumentError, ValueError):  # ValueError: a port that is not a number
        raise StoreURLError(_hidden(url), "not a database URL") from None
    backend = parsed.get_backend_name()
    if backend == "postgresql":
        if parsed.get_driver_name() != "psycopg":
            parsed = parsed.set(drivername="postgresql+psycopg")
    elif backend != "sqlite":
        shown = parsed.render_as_string(hide_password=True)
        raise StoreURLError(shown, "only sqlite:/// and postgresql:// URLs are supported")
    return parsed


def _hidden(url: str) -> str:
    """``url`` with anything between ``://user:`` and ``@`` masked (it may be a password)."""
    scheme, sep, rest = url.partition("://")
    credentials, at, host = rest.rpartition("@")
    if not sep or not at or ":" not in credentials:
        return url
    return f"{scheme}://{credentials.split(':', 1)[0]}:***@{host}"


def sqlite_file(url: URL) -> Path | None:
    """The database file of a SQLite URL (``None`` for in-memory or other engines)."""
    if url.get_backend_name() != "sqlite" or url.database in (None, "", ":memory:"):
        return None
    return Path(str(url.database))


def create_store_engine(
    url: str, *, echo: bool = False, read_only: bool = False, timeout: float | None = None
) -> Engine:
    """A new engine for ``url``, configured for calib's store.

    Parameters
    ----------
    url : SQLAlchemy URL, e.g. ``sqlite:///db/calib.sqlite`` or
        ``postgresql://user@host/db`` (psycopg 3 is used).
    echo : log every statement (debugging).
    read_only : open the database for reading only, for commands that only read. SQLite: the
        file is opened with ``mode=ro``, or ``immutable=1`` when its folder cannot be written
        (a read-only mount, where even a reader cannot make WAL side files; nothing can write
        there either); no pragma that writes is run. PostgreSQL: every transaction is read-only.
    timeout : seconds one statement may run (PostgreSQL ``statement_timeout``; the database
        then cancels it with SQLSTATE 57014) and a writer waits for SQLite's write lock (its
        busy timeout; default :data:`SQLITE_BUSY_TIMEOUT_MS`). ``None``: no statement timeout
        on PostgreSQL.

    Notes
    -----
    SQLite: ``journal_mode=WAL`` (readers never block the one writer), ``foreign_keys=ON``,
    ``synchronous=NORMAL`` (durable at checkpoints; safe with WAL) and a busy timeout of
    :data:`SQLITE_BUSY_TIMEOUT_MS`. The sqlite3 module's own transaction handling is switched
    off and ``BEGIN`` is emitted by SQLAlchemy, as the SQLAlchemy documentation recommends for
    correct transactional DDL and locking.
    """
    parsed = parse_url(url)
    if timeout is not None and not (math.isfinite(timeout) and timeout > 0):
        raise ValueError(f"timeout must be a positive number of seconds, got {timeout!r}")
    busy_ms = SQLITE_BUSY_TIMEOUT_MS if timeout is None else max(1, round(timeout * 1000))
    if parsed.get_backend_name() == "sqlite" and read_only:
        return _sqlite_reader(parsed, echo, busy_ms)
    if parsed.get_backend_name() == "sqlite":
        engine = create_engine(parsed, echo=echo, connect_args={"timeout": busy_ms / 1000})
        event.listen(engine, "connect", functools.partial(_sqlite_on_connect, busy_ms=busy_ms))
        event.listen(engine, "begin", _sqlite_on_begin)
        return engine
    options = {"postgresql_readonly": True} if read_only else {}
    engine = create_engine(parsed, echo=echo, pool_pre_ping=True, execution_options=options)
    if timeout is not None:
        event.listen(engine, "connect", functools.partial(_pg_on_connect, timeout_ms=busy_ms))
    return engine


def _pg_on_connect(dbapi_connection: Any, _record: Any, *, timeout_ms: int) -> None:
    """``statement_timeout`` for the whole session (committed, so it outlives this transaction)."""
    with dbapi_connection.cursor() as cursor:
        cursor.execute(f"SET statement_timeout = {int(timeout_ms)}")
    dbapi_connection.commit()


def _sqlite_reader(parsed: URL, echo: bool, busy_ms: int = SQLITE_BUSY_TIMEOUT_MS) -> Engine:
    """A read-only SQLite engine (``mode=ro``, or ``immutable=1`` where nothing can write:
    :func:`sqlite_read_flag`). Its URL names the file, so the approval lock beside it is found."""
    path = sqlite_file(parsed)
    if path is None:
        raise StoreURLError(str(parsed), "an in-memory database cannot be opened read-only")

    def connect() -> sqlite3.Connection:
        target = f"file:{quote(str(path.resolve()))}?{sqlite_read_flag(path)}"
        return sqlite3.connect(target, uri=True, timeout=busy_ms / 1000, check_same_thread=False)

    engine = create_engine(parsed, echo=echo, creator=connect)
    event.listen(
        engine, "connect", functools.partial(_sqlite_on_connect, busy_ms=busy_ms, wal=False)
    )
    event.listen(engine, "begin", _sqlite_on_begin)
    return engine


def _sqlite_on_connect(
    dbapi_connection: sqlite3.Connection, _record: Any, *, busy_ms: int, wal: bool = True
) -> None:
    """Pragmas of every connection; a reader (``wal=False``) runs none that writes."""
    dbapi_connection.isolation_level = None
    cursor = dbapi_connection.cursor()
    try:
        if wal:
            cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute("PRAGMA foreign_keys=ON")
        if wal:
            cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.execute(f"PRAGMA busy_timeout={busy_ms}")
    finally:
        cursor.close()


def _sqlite_on_begin(conn: Connection) -> None:
    write = conn.get_execution_options().get(_WRITE, False)
    conn.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")


def begin_write(session: Session) -> None:
    """Start ``session``'s transaction as a writer; call first in a writing unit of work.

    On SQLite this is ``BEGIN IMMEDIATE``: the write lock is taken now (waiting up to the busy
    timeout), so the reads that follow see the state the writes will apply to. On PostgreSQL
    it simply begins the transaction.
    """
    session.connection(execution_options={_WRITE: True})


def lock_for(session: Session, name: str) -> None:
    """Hold a lock named ``name`` until ``session``'s transaction ends (after
    :func:`begin_write`), so that two processes doing the same thing take turns.

    PostgreSQL: a transaction-level advisory lock on a 64-bit hash of ``name``. SQLite: the
    write lock :func:`begin_write` took already serialises every writer.
    """
    connection = session.connection()
    if connection.dialect.name == "postgresql":
        key = int.from_bytes(hashlib.sha256(name.encode()).digest()[:8], "big", signed=True)
        connection.exec_driver_sql("SELECT pg_advisory_xact_lock(%(key)s)", {"key": key})


@dataclass(frozen=True)
class Store:
    """An engine and the session factory bound to it."""

    engine: Engine
    sessions: sessionmaker[Session]

    @property
    def url(self) -> str:
        """The URL, password hidden."""
        return self.engine.url.render_as_string(hide_password=True)


def make_store(
    url: str, *, echo: bool = False, read_only: bool = False, timeout: float | None = None
) -> Store:
    """A :class:`Store` for ``url`` (no connection is opened yet); see
    :func:`create_store_engine` for ``read_only`` and ``timeout``."""
    engine = create_store_engine(url, echo=echo, read_only=read_only, timeout=timeout)
    return Store(engine=engine, sessions=sessionmaker(engine, expire_on_commit=False))


@contextmanager
def store_for(url: str, *, read_only: bool = False) -> Iterator[Store]:
    """A :class:`Store` for the duration of a ``with`` block; the engine is disposed after."""
    store = make_store(url, read_only=read_only)
    try:
        yield store
    finally:
        store.engine.dispose()
