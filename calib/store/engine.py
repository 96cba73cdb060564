"""Engines and sessions for SQLite (embedded default) and PostgreSQL (shared store).

Nothing here runs at import time: :func:`create_store_engine` builds an engine from a URL when
asked. SQLite connections get WAL mode, foreign keys and a busy timeout; their transactions are
begun by SQLAlchemy (not by the sqlite3 module), so that a workflow that writes can take the
write lock up front with :func:`begin_write` instead of failing half way when another process
wrote first. ``postgresql://`` URLs use psycopg 3.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import URL, Connection, make_url
from sqlalchemy.exc import ArgumentError
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import StoreURLError

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
    except ArgumentError as exc:
        raise StoreURLError(url, str(exc)) from None
    backend = parsed.get_backend_name()
    if backend == "postgresql":
        if parsed.get_driver_name() != "psycopg":
            parsed = parsed.set(drivername="postgresql+psycopg")
    elif backend != "sqlite":
        raise StoreURLError(url, "only sqlite:/// and postgresql:// URLs are supported")
    return parsed


def sqlite_file(url: URL) -> Path | None:
    """The database file of a SQLite URL (``None`` for in-memory or other engines)."""
    if url.get_backend_name() != "sqlite" or url.database in (None, "", ":memory:"):
        return None
    return Path(str(url.database))


def create_store_engine(url: str, *, echo: bool = False) -> Engine:
    """A new engine for ``url``, configured for calib's store.

    Parameters
    ----------
    url : SQLAlchemy URL, e.g. ``sqlite:///db/calib.sqlite`` or
        ``postgresql://user@host/db`` (psycopg 3 is used).
    echo : log every statement (debugging).

    Notes
    -----
    SQLite: ``journal_mode=WAL`` (readers never block the one writer), ``foreign_keys=ON``,
    ``synchronous=NORMAL`` (durable at checkpoints; safe with WAL) and a busy timeout of
    :data:`SQLITE_BUSY_TIMEOUT_MS`. The sqlite3 module's own transaction handling is switched
    off and ``BEGIN`` is emitted by SQLAlchemy, as the SQLAlchemy documentation recommends for
    correct transactional DDL and locking.
    """
    parsed = parse_url(url)
    if parsed.get_backend_name() == "sqlite":
        engine = create_engine(
            parsed, echo=echo, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000}
        )
        event.listen(engine, "connect", _sqlite_on_connect)
        event.listen(engine, "begin", _sqlite_on_begin)
        return engine
    return create_engine(parsed, echo=echo, pool_pre_ping=True)


def _sqlite_on_connect(dbapi_connection: sqlite3.Connection, _record: Any) -> None:
    dbapi_connection.isolation_level = None
    cursor = dbapi_connection.cursor()
    try:
        cursor.execute("PRAGMA journal_mode=WAL")
        cursor.execute("PRAGMA foreign_keys=ON")
        cursor.execute("PRAGMA synchronous=NORMAL")
        cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
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


@dataclass(frozen=True)
class Store:
    """An engine and the session factory bound to it."""

    engine: Engine
    sessions: sessionmaker[Session]

    @property
    def url(self) -> str:
        """The URL, password hidden."""
        return self.engine.url.render_as_string(hide_password=True)


def make_store(url: str, *, echo: bool = False) -> Store:
    """A :class:`Store` for ``url`` (no connection is opened yet)."""
    engine = create_store_engine(url, echo=echo)
    return Store(engine=engine, sessions=sessionmaker(engine, expire_on_commit=False))


@contextmanager
def store_for(url: str) -> Iterator[Store]:
    """A :class:`Store` for the duration of a ``with`` block; the engine is disposed after."""
    store = make_store(url)
    try:
        yield store
    finally:
        store.engine.dispose()
