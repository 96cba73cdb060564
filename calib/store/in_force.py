"""The approval lock and the one definition of the approved set in force.

An approval is written under a lock (:func:`approvals_held`) that readers of the set in force
wait behind, so the answer for a past moment never changes; :func:`in_force_stmt` is the one
statement that says which approved set is in force for a commodity at a time. The CLI, the
pricers' client and the HTTP API read through here (``calib.store.runs`` re-exports every
name, where older code imports them from).
"""

from __future__ import annotations

import fcntl
import json
from collections.abc import Iterator, Sequence
from contextlib import AbstractContextManager, contextmanager
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any, cast

from sqlalchemy import Engine, Select, Table, and_, bindparam, exists, func, select
from sqlalchemy.orm import Session, sessionmaker

from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.record.codec import decode
from calib.record.fit import BucketVols
from calib.record.run import ApprovedSet
from calib.store.base import utc_now
from calib.store.engine import sqlite_file
from calib.store.models import Commodity
from calib.store.quick import approval_lock_path
from calib.store.quotes import require_commodity
from calib.store.run_models import CalibrationRun, RunEvent

# --- the approval lock ------------------------------------------------------------------------


def lock_commodity(*, session: Session, commodity_id: int) -> None:
    """Hold the commodity's row and its approval lock until the transaction ends.

    Serialises the writers of one commodity's runs on PostgreSQL (``SELECT ... FOR UPDATE``)
    and holds the approval lock exclusively there (``pg_advisory_xact_lock``), so that readers
    of the set in force wait for the commit (:func:`wait_for_approvals`). SQLite has no row
    locks and serialises every writer with ``BEGIN IMMEDIATE``
    (:func:`calib.store.engine.begin_write`); its approval lock is a file lock held around the
    whole transaction (:func:`approvals_held`).
    """
    session.execute(select(Commodity.id).where(Commodity.id == commodity_id).with_for_update())
    if session.get_bind().dialect.name == "postgresql":
        session.execute(select(func.pg_advisory_xact_lock(APPROVAL_LOCK_SPACE, commodity_id)))


APPROVAL_LOCK_SPACE = 0x63616C69
"""First key of the PostgreSQL advisory locks that guard approvals (the second: commodity id)."""


def approval_lock_file(engine: Engine) -> Path | None:
    """The file whose lock guards approvals on a SQLite store (``None``: not a SQLite file)."""
    database = sqlite_file(engine.url)
    return None if database is None else approval_lock_path(database)


@contextmanager
def approvals_held(sessions: sessionmaker[Session]) -> Iterator[None]:
    """Hold the approval lock exclusively around a write transaction that may approve.

    Why: an approval's event is stamped with the time before its commit; a reader asking for
    the set in force at a moment after the stamp, before the commit, must not get the old set
    and later the new one. Readers wait behind this lock (:func:`wait_for_approvals`), so the
    answer for a past moment never changes. On SQLite this is an exclusive ``flock`` on
    :func:`approval_lock_file` (taken before ``BEGIN IMMEDIATE``, released after the commit);
    on PostgreSQL the transaction takes an advisory lock itself (:func:`lock_commodity`).
    """
    with _flocked(engine_of(sessions), fcntl.LOCK_EX):
        yield


def wait_for_approvals(session: Session, commodity_id: int) -> None:
    """PostgreSQL: wait until no approval of the commodity is being written (a shared advisory
    lock taken and released at once). Call before reading the set in force in a new snapshot.
    SQLite readers take a shared ``flock`` instead (:func:`approvals_read`)."""
    if session.get_bind().dialect.name == "postgresql":
        lock = func.pg_advisory_xact_lock_shared(APPROVAL_LOCK_SPACE, commodity_id)
        session.execute(select(lock))


def approvals_read(engine: Engine) -> AbstractContextManager[None]:
    """SQLite: hold the approval lock shared for one read of the set in force."""
    return _flocked(engine, fcntl.LOCK_SH)


@contextmanager
def _flocked(engine: Engine, mode: int) -> Iterator[None]:
    path = approval_lock_file(engine)
    if path is None:
        yield
        return
    try:  # a reader never makes the file: with none, no approval is being written
        handle = path.open("r" if mode == fcntl.LOCK_SH else "a")
    except OSError:
        if mode != fcntl.LOCK_SH:
            raise
        yield
        return
    with handle:
        fcntl.flock(handle, mode)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def engine_of(sessions: sessionmaker[Session]) -> Engine:
    """The engine a store's sessions are bound to."""
    bind = sessions.kw["bind"]
    assert isinstance(bind, Engine), "a store's sessions are bound to its engine"
    return bind


# --- the set in force ------------------------------------------------------------------------


def in_force_stmt() -> Select[Any]:
    """The one definition of the approved set in force: commodity ``:cid`` at time ``:t``.

    The newest ``approved`` event of the commodity at or before ``:t`` whose run was not
    ``superseded`` by ``:t`` (ties by event id), joined to its run: the columns of
    :data:`IN_FORCE_COLUMNS`. One seek on ``ix_run_events_commodity_id`` (``commodity_id,
    to_status, at, id``). The CLI (:func:`latest_approved`), the pricers' client and the HTTP
    API all run this statement; :func:`approved_set_of` builds the answer from its row.
    """
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
            runs.c.study.is_(None),  # a study run is never served (nor ever approved)
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


IN_FORCE_COLUMNS = (
    "run_id",
    "trade_date",
    "mode",
    "buckets",
    *PARAM_NAMES,
    "approval_id",
    "approved_at",
    "approved_by",
    "approval_note",
)
"""The columns of a row of :func:`in_force_stmt`, in order."""


def approved_set_of(commodity: str, row: Sequence[Any]) -> ApprovedSet:
    """The :class:`ApprovedSet` of a row of :func:`in_force_stmt`.

    The row may come from SQLAlchemy or straight from a driver (SQLite then hands back text
    for dates, times and JSON).
    """
    v = dict(zip(IN_FORCE_COLUMNS, row, strict=True))
    trade_date, at, buckets = v["trade_date"], v["approved_at"], v["buckets"]
    if isinstance(trade_date, str):
        trade_date = date.fromisoformat(trade_date)
    if isinstance(at, str):
        at = datetime.fromisoformat(at)
    at = at.replace(tzinfo=UTC) if at.tzinfo is None else at.astimezone(UTC)
    if isinstance(buckets, str):
        buckets = json.loads(buckets)
    return ApprovedSet(
        run_id=v["run_id"],
        commodity=commodity,
        trade_date=trade_date,
        approved_at=at,
        approved_by=v["approved_by"],
        approval_note=v["approval_note"],
        approval_id=v["approval_id"],
        mode=v["mode"],
        params=TwoFactorParams(**{n: v[n] for n in PARAM_NAMES}),
        buckets=tuple(decode(BucketVols, b) for b in buckets or ()),
    )


def approved_set(
    *, session: Session, commodity: str, as_of: datetime | None = None
) -> ApprovedSet | None:
    """The :class:`ApprovedSet` of ``commodity`` in force at ``as_of`` (default now), or
    ``None`` (:func:`in_force_stmt`).

    Raises
    ------
    UnknownCommodityError
        ``commodity`` is not registered.
    """
    cid = require_commodity(session=session, code=commodity).id
    row = _in_force_row(session, cid, as_of or utc_now())
    return None if row is None else approved_set_of(commodity, row)


def in_force_run_id(*, session: Session, commodity_id: int, as_of: datetime) -> int | None:
    """The run id of the approved set in force at ``as_of`` (:func:`in_force_stmt`)."""
    row = _in_force_row(session, commodity_id, as_of)
    return None if row is None else int(row[0])


def _in_force_row(session: Session, commodity_id: int, as_of: datetime) -> tuple[Any, ...] | None:
    row = session.execute(in_force_stmt(), {"cid": commodity_id, "t": as_of}).one_or_none()
    return None if row is None else tuple(row)
