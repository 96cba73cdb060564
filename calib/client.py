"""The pricers' client: the approved parameter set in force, fast, from the store.

::

    from calib.client import Client

    with Client() as calib:                 # $CALIB_DB, else sqlite:///db/calib.sqlite
        s = calib.latest("QLM")             # ApprovedSet, frozen
        s.params.sigma_spot, s.run_id, s.approved_by
        calib.latest("QLM", as_of=when)     # the set in force at a past time
        calib.run(17)                       # any stored run, with its status and events
        calib.history("QLM")                # every approval, oldest first

How a read is made
------------------
:meth:`Client.latest` is one round trip on one held database connection: a single statement,
compiled once per client for the engine's dialect (SQLAlchemy Core) and executed on the raw
DBAPI connection with the driver's own parameter style. It is the one definition of the set in
force, :func:`calib.store.runs.in_force_stmt` (the CLI and the HTTP API run the same): the
newest ``approved`` event of the commodity at or before the time asked for, joined to its run,
refusing (``NOT EXISTS``) an approval that was already superseded by then. The statement
sees one snapshot (SQLite: its own read transaction in WAL mode; PostgreSQL: autocommit, one
statement), and a run, its residuals and its first event are committed together by the
morning run, so a set is never seen without its residuals.

The answer for a past moment never changes: a read waits while an approval of the commodity is
being written (the approval lock, :func:`calib.store.runs.approvals_held`: a shared ``flock``
on SQLite, two system calls; on PostgreSQL a shared advisory lock, one more round trip).

Runs and events are never updated, so the :class:`ApprovedSet` built for an approval event is
kept (a small cache keyed by the event id) and handed out again while that approval is in
force: a poll that finds no change allocates nothing.

Threads and processes
---------------------
A client may be shared by threads: each read holds the client's lock for its one statement
(reads from many threads then queue on that lock; give a busy thread its own client). A client
must not cross ``fork``: a child that inherits one opens its own connection on first use
(the parent's is left alone), and with the ``spawn`` start method each process makes its own
client anyway. A lost PostgreSQL connection is replaced once per read before
:class:`~calib.errors.StoreUnavailableError` is raised.
"""

from __future__ import annotations

import fcntl
import os
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from datetime import UTC, datetime
from types import TracebackType
from typing import Any, cast

from sqlalchemy import Select, bindparam, func, select
from sqlalchemy.engine import Dialect

from calib.errors import (
    NoApprovedSetError,
    StoreUnavailableError,
    StudyRunError,
    UnknownCommodityError,
)
from calib.settings import get_settings
from calib.store.base import utc_now
from calib.store.engine import Store, make_store
from calib.store.migrate import check_current
from calib.store.models import Commodity
from calib.store.quick import SQLITE_TIME
from calib.store.runs import (
    APPROVAL_LOCK_SPACE,
    IN_FORCE_COLUMNS,
    ApprovalRecord,
    ApprovedSet,
    RunRecord,
    approval_lock_file,
    approved_history,
    approved_set_of,
    in_force_stmt,
    require_run,
)

_APPROVAL_ID = IN_FORCE_COLUMNS.index("approval_id")

STATEMENT_TIMEOUT = "57014"
"""PostgreSQL's SQLSTATE for a statement cancelled (by ``statement_timeout``): not a lost
connection, so not worth a second wait."""

CACHE_SIZE = 64
"""Approved sets kept per client (one per approval event seen; they never change)."""

__all__ = ["ApprovedSet", "Client"]


class _Prepared:
    """A statement compiled once for a dialect, bound with the driver's parameter style."""

    def __init__(self, stmt: Select[Any], dialect: Dialect) -> None:
        compiled = stmt.compile(dialect=dialect)
        self.sql = compiled.string
        self._defaults = dict(compiled.params)
        self._order: Sequence[str] | None = (
            list(compiled.positiontup or []) if compiled.positional else None
        )

    def params(self, values: Mapping[str, Any]) -> Sequence[Any] | Mapping[str, Any]:
        merged = {**self._defaults, **values}
        if self._order is None:
            return merged
        return tuple(merged[name] for name in self._order)


class Client:
    """Read approved parameter sets for pricing (see the module notes on threads, processes).

    Parameters
    ----------
    url : database URL; default ``$CALIB_DB``, else ``sqlite:///db/calib.sqlite``.
    cache_size : approved sets kept for reuse (``0``: build every answer afresh).
    timeout : seconds a read may take on PostgreSQL (the session's ``statement_timeout``); a
        read cancelled by it raises :class:`~calib.errors.StoreUnavailableError` at once (it
        is not retried). ``None``: no limit.

    Raises
    ------
    StoreNotInitialisedError, StoreOutdatedError, SchemaTooNewError
        The database is not at this program's schema revision.
    StoreURLError
        Not a SQLite or PostgreSQL URL.
    """

    def __init__(
        self, url: str | None = None, *, cache_size: int = CACHE_SIZE, timeout: float | None = None
    ) -> None:
        self._store: Store = make_store(get_settings(url).db_url, timeout=timeout)
        engine = self._store.engine
        check_current(engine)
        self._sqlite = engine.dialect.name == "sqlite"
        self._latest = _Prepared(in_force_stmt(), engine.dialect)
        wait = select(func.pg_advisory_xact_lock_shared(APPROVAL_LOCK_SPACE, bindparam("cid")))
        self._wait = None if self._sqlite else _Prepared(wait, engine.dialect)
        self._lock_path = approval_lock_file(engine)
        self._lock_file: Any = None
        code = select(Commodity.id).where(Commodity.code == bindparam("code"))
        self._code = _Prepared(code, engine.dialect)
        dbapi = engine.dialect.loaded_dbapi
        self._lost: tuple[type[BaseException], ...] = (dbapi.OperationalError, dbapi.InterfaceError)
        self._lock = threading.Lock()
        self._ids: dict[str, int] = {}
        self._sets: OrderedDict[int, ApprovedSet] = OrderedDict()
        self._cache_size = cache_size
        self._conn: Any = None
        self._inherited: list[Any] = []
        self._cursor: Any = None
        self._pid = -1
        self._connect()

    # --- connection ----------------------------------------------------------------------------

    def _connect(self) -> None:
        if self._lock_path is not None:
            try:
                self._lock_file = self._lock_path.open("a")
            except OSError:  # a read-only folder: nothing can approve through it
                self._lock_file = None
        self._conn = self._store.engine.raw_connection()
        if not self._sqlite:
            self._conn.driver_connection.autocommit = True  # one statement, one snapshot
        self._cursor = self._conn.driver_connection.cursor()
        self._pid = os.getpid()

    def _leave_to_parent(self) -> None:
        """After ``fork``: keep the parent's connection object alive (never closed or rolled
        back from here, which would break the parent's session) and open our own."""
        self._inherited.append(self._conn)
        self._store.engine.dispose(close=False)
        self._connect()

    def _drop(self) -> None:
        conn, self._conn, self._cursor = self._conn, None, None
        if conn is not None:
            conn.invalidate()

    def _fetch(self, prepared: _Prepared, values: Mapping[str, Any]) -> Any:
        """The first row of ``prepared`` (one round trip); the caller holds the lock."""
        if self._pid != os.getpid():
            self._leave_to_parent()
        params = prepared.params(values)
        for attempt in (1, 2):
            if self._cursor is None:
                self._connect()
            try:
                self._cursor.execute(prepared.sql, params)
                return self._cursor.fetchone()
            except self._lost as exc:
                self._drop()
                if attempt == 2 or getattr(exc, "sqlstate", None) == STATEMENT_TIMEOUT:
                    detail = str(exc).strip().splitlines()[0] if str(exc) else type(exc).__name__
                    raise StoreUnavailableError(self._store.url, detail) from None
        raise AssertionError("unreachable")

    def _read_in_force(self, cid: int, bound: Any) -> Any:
        """The row of the set in force, read after any approval being written has committed
        (:func:`calib.store.runs.approvals_held`); the caller holds the lock."""
        if self._wait is not None:  # PostgreSQL: wait on the shared advisory lock, then read
            self._fetch(self._wait, {"cid": cid})
            return self._fetch(self._latest, {"cid": cid, "t": bound})
        if self._pid != os.getpid():
            self._leave_to_parent()
        if self._lock_file is None:
            return self._fetch(self._latest, {"cid": cid, "t": bound})
        fcntl.flock(self._lock_file, fcntl.LOCK_SH)
        try:
            return self._fetch(self._latest, {"cid": cid, "t": bound})
        finally:
            fcntl.flock(self._lock_file, fcntl.LOCK_UN)

    def close(self) -> None:
        """Close the connection and dispose of the engine (the client cannot be used after)."""
        with self._lock:
            if self._conn is not None and self._pid == os.getpid():
                if not self._sqlite:
                    self._conn.driver_connection.autocommit = False
                self._cursor.close()
                self._conn.close()
            self._conn = self._cursor = None
            if self._lock_file is not None:
                self._lock_file.close()
                self._lock_file = None
            self._store.engine.dispose()

    def __enter__(self) -> Client:
        return self

    def __exit__(
        self,
        _type: type[BaseException] | None,
        _value: BaseException | None,
        _tb: TracebackType | None,
    ) -> None:
        self.close()

    @property
    def url(self) -> str:
        """The database URL, password hidden."""
        return self._store.url

    # --- reads ---------------------------------------------------------------------------------

    def _commodity_id(self, code: str) -> int:
        """The id of ``code`` (kept: commodities are never deleted); the caller holds the lock."""
        cid = self._ids.get(code)
        if cid is None:
            row = self._fetch(self._code, {"code": code})
            if row is None:
                raise UnknownCommodityError([code])
            cid = self._ids[code] = int(row[0])
        return cid

    def latest(self, commodity: str, as_of: datetime | None = None) -> ApprovedSet:
        """The approved set of ``commodity`` in force at ``as_of`` (default: now).

        Parameters
        ----------
        commodity : commodity code.
        as_of : an aware time (a naive one is taken as UTC).

        Raises
        ------
        UnknownCommodityError
            ``commodity`` is not registered.
        NoApprovedSetError
            No set of ``commodity`` was approved (and not yet superseded) at that time.
        StoreUnavailableError
            The database cannot be reached.
        """
        when = utc_now() if as_of is None else _utc(as_of)
        bound = when.replace(tzinfo=None).strftime(SQLITE_TIME) if self._sqlite else when
        with self._lock:
            cid = self._commodity_id(commodity)
            row = self._read_in_force(cid, bound)
            if row is None:
                what = "now" if as_of is None else f"at {when.isoformat()}"
                raise NoApprovedSetError(commodity, what)
            approval_id = row[_APPROVAL_ID]
            found = self._sets.get(approval_id)
            if found is None:
                found = self._sets[approval_id] = approved_set_of(commodity, row)
                if len(self._sets) > self._cache_size:
                    self._sets.popitem(last=False)
            return found

    def _session_read(self, read: Callable[..., Any], **kwargs: Any) -> Any:
        try:
            with self._store.sessions.begin() as session:
                return read(session=session, **kwargs)
        except self._lost as exc:  # pragma: no cover - needs a server going away
            raise StoreUnavailableError(self._store.url, str(exc)) from None

    def run(self, run_id: int, as_of: datetime | None = None) -> RunRecord:
        """The stored run ``run_id`` with its status at ``as_of`` (default now).

        Raises
        ------
        UnknownRunError
            No run ``run_id``.
        StudyRunError
            The run belongs to a policy study (never served).
        """
        when = None if as_of is None else _utc(as_of)
        found = cast(RunRecord, self._session_read(require_run, run_id=run_id, as_of=when))
        if found.study is not None:
            raise StudyRunError(run_id, found.study)
        return found

    def history(self, commodity: str) -> list[ApprovalRecord]:
        """Every approval of ``commodity``, oldest first, with when each was superseded.

        Raises
        ------
        UnknownCommodityError
            ``commodity`` is not registered.
        """
        return cast(list[ApprovalRecord], self._session_read(approved_history, commodity=commodity))


def _utc(when: datetime) -> datetime:
    return when.replace(tzinfo=UTC) if when.tzinfo is None else when.astimezone(UTC)
