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
DBAPI connection with the driver's own parameter style. It joins the newest ``approved`` event
of the commodity at or before the time asked for to its run, and refuses (``NOT EXISTS``) an
approval that was already superseded by then, so a run that was not approved at that time is
never returned. The statement sees one snapshot (SQLite: its own read transaction in WAL mode;
PostgreSQL: autocommit, one statement), and a run, its residuals and its first event are
committed together by the morning run, so a set is never seen without its residuals.

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

import json
import os
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime
from types import TracebackType
from typing import Any, cast

from sqlalchemy import Select, Table, and_, bindparam, exists, select
from sqlalchemy.engine import Dialect

from calib.errors import NoApprovedSetError, StoreUnavailableError, UnknownCommodityError
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.settings import get_settings
from calib.store.base import utc_now
from calib.store.engine import Store, make_store
from calib.store.migrate import check_current
from calib.store.models import Commodity
from calib.store.run_models import CalibrationRun, RunEvent
from calib.store.runs import ApprovalRecord, RunRecord, approved_history, require_run

CACHE_SIZE = 64
"""Approved sets kept per client (one per approval event seen; they never change)."""

_SQLITE_TIME = "%Y-%m-%d %H:%M:%S.%f"
"""How :class:`~calib.store.base.UtcDateTime` stores a time on SQLite (naive UTC text)."""


@dataclass(frozen=True, slots=True)
class ForwardBucket:
    """The parameters in force over one stretch of time, in years from the trade date."""

    start: float
    end: float
    params: TwoFactorParams

    def to_dict(self) -> dict[str, Any]:
        return {"start": self.start, "end": self.end, "params": self.params.to_dict()}


@dataclass(frozen=True, slots=True)
class ApprovedSet:
    """An approved parameter set of one commodity, as a pricer uses it (read-only).

    Attributes
    ----------
    run_id : the calibration run the set comes from.
    commodity : commodity code.
    trade_date : the trading day the run was fitted to.
    approved_at, approved_by, note : the approval event (UTC time, who, why).
    approval_id : the approval event's id (changes whenever another set comes into force).
    mode : calibration mode (``constant``, ``forward``, ``held_rho``).
    params : the parameter set (in forward mode the first bucket's volatilities).
    buckets : the forward buckets, in years from the trade date (one in constant mode).
    """

    run_id: int
    commodity: str
    trade_date: date
    approved_at: datetime
    approved_by: str
    note: str
    approval_id: int
    mode: str
    params: TwoFactorParams
    buckets: tuple[ForwardBucket, ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON: the seven parameter names at the top level."""
        return {
            "run_id": self.run_id,
            "commodity": self.commodity,
            "trade_date": self.trade_date.isoformat(),
            **self.params.to_dict(),
            "approved_at": self.approved_at.isoformat(),
            "approved_by": self.approved_by,
            "note": self.note,
            "approval_id": self.approval_id,
            "mode": self.mode,
            "buckets": [b.to_dict() for b in self.buckets],
        }


def latest_set_stmt() -> Select[Any]:
    """Run and approval event of the newest approval of ``:cid`` at or before ``:t``."""
    events = cast(Table, RunEvent.__table__)
    runs = cast(Table, CalibrationRun.__table__)
    ended = events.alias("ended")
    t = bindparam("t", type_=RunEvent.at.type)
    return (
        select(
            runs.c.id,
            runs.c.trade_date,
            runs.c.mode,
            runs.c.buckets,
            *[runs.c[n] for n in PARAM_NAMES],
            events.c.id,
            events.c.at,
            events.c.actor,
            events.c.note,
        )
        .join_from(events, runs, runs.c.id == events.c.run_id)
        .where(
            events.c.commodity_id == bindparam("cid"),
            events.c.to_status == "approved",
            events.c.at <= t,
            ~exists().where(
                and_(
                    ended.c.run_id == events.c.run_id,
                    ended.c.to_status == "superseded",
                    ended.c.at <= t,
                )
            ),
        )
        .order_by(events.c.at.desc(), events.c.id.desc())
        .limit(1)
    )


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

    Raises
    ------
    StoreNotInitialisedError, StoreOutdatedError, SchemaTooNewError
        The database is not at this program's schema revision.
    StoreURLError
        Not a SQLite or PostgreSQL URL.
    """

    def __init__(self, url: str | None = None, *, cache_size: int = CACHE_SIZE) -> None:
        self._store: Store = make_store(get_settings(url).db_url)
        engine = self._store.engine
        check_current(engine)
        self._sqlite = engine.dialect.name == "sqlite"
        self._latest = _Prepared(latest_set_stmt(), engine.dialect)
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
                if attempt == 2:
                    detail = str(exc).strip().splitlines()[0] if str(exc) else type(exc).__name__
                    raise StoreUnavailableError(self._store.url, detail) from None
        raise AssertionError("unreachable")

    def close(self) -> None:
        """Close the connection and dispose of the engine (the client cannot be used after)."""
        with self._lock:
            if self._conn is not None and self._pid == os.getpid():
                if not self._sqlite:
                    self._conn.driver_connection.autocommit = False
                self._cursor.close()
                self._conn.close()
            self._conn = self._cursor = None
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
        bound = when.replace(tzinfo=None).strftime(_SQLITE_TIME) if self._sqlite else when
        with self._lock:
            cid = self._commodity_id(commodity)
            row = self._fetch(self._latest, {"cid": cid, "t": bound})
            if row is None:
                what = "now" if as_of is None else f"at {when.isoformat()}"
                raise NoApprovedSetError(commodity, what)
            approval_id = row[11]
            found = self._sets.get(approval_id)
            if found is None:
                found = self._sets[approval_id] = _approved_set(commodity, row, self._sqlite)
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
        """
        when = None if as_of is None else _utc(as_of)
        return cast(RunRecord, self._session_read(require_run, run_id=run_id, as_of=when))

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


def _approved_set(commodity: str, row: Sequence[Any], sqlite: bool) -> ApprovedSet:
    """Build the frozen set from a row of :func:`latest_set_stmt` (SQLite hands back text)."""
    run_id, trade_date, mode, buckets = row[0], row[1], row[2], row[3]
    at = row[12]
    if sqlite:
        trade_date = date.fromisoformat(trade_date)
        at = datetime.fromisoformat(at).replace(tzinfo=UTC)
    else:
        at = at.astimezone(UTC)
    if isinstance(buckets, str):
        buckets = json.loads(buckets)
    return ApprovedSet(
        run_id=run_id,
        commodity=commodity,
        trade_date=trade_date,
        approved_at=at,
        approved_by=row[13],
        note=row[14],
        approval_id=row[11],
        mode=mode,
        params=TwoFactorParams(*row[4:11]),
        buckets=tuple(
            ForwardBucket(
                float(b["start"]), float(b["end"]), TwoFactorParams.from_dict(b["params"])
            )
            for b in buckets or ()
        ),
    )
