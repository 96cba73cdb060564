"""Calibration runs, their residuals and status events: the store functions workflows call.

Every function takes the session as the keyword ``session`` and does one thing; the caller
owns the transaction (STYLE 13). Rows are only inserted (see :mod:`calib.store.run_models`).

Status
------
A run's status at time ``t`` is the ``to_status`` of its newest event at or before ``t``
(ties by event id). The moves allowed are :data:`TRANSITIONS`; a fitted run starts as
``candidate``, a failed one is ``rejected`` from the start. Approving a run is the workflow's
unit of work (:func:`calib.workflows.runs.approve`), which appends ``superseded`` for the
previous approved run of the commodity in the same transaction.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from sqlalchemy import Select, Table, func, select
from sqlalchemy.orm import Session

from calib.errors import IllegalTransitionError, UnknownRunError
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.store.base import utc_now
from calib.store.models import Commodity, FuturesSettlement, OptionQuote, RateQuote
from calib.store.quotes import (
    DayQuotes,
    FuturesCurve,
    OptionChain,
    ZeroCurve,
    insert_columns,
    nan_for_none,
    require_commodity,
)
from calib.store.run_models import CalibrationRun, RunEvent, RunResidual
from calib.types import readonly

if TYPE_CHECKING:
    import pandas as pd

TRANSITIONS: Mapping[str, frozenset[str]] = MappingProxyType(
    {
        "candidate": frozenset({"approved", "rejected"}),
        "approved": frozenset({"superseded"}),
        "rejected": frozenset(),
        "superseded": frozenset(),
    }
)
"""Status -> the statuses a run may move to from it (``rejected``, ``superseded`` are final)."""

FIRST_STATUS: Mapping[str, str] = MappingProxyType({"fitted": "candidate", "failed": "rejected"})
"""A new run's first status by outcome."""

RESIDUAL_COLUMNS = (
    "market_price",
    "model_price",
    "market_vol",
    "model_vol",
    "price_residual",
    "vol_residual",
    "weight",
)

_residuals = cast(Table, RunResidual.__table__)


# --- records -----------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class EventRecord:
    """One status change of a run."""

    event_id: int
    run_id: int
    to_status: str
    at: datetime
    actor: str
    note: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "event_id": self.event_id,
            "run_id": self.run_id,
            "to_status": self.to_status,
            "at": self.at.isoformat(),
            "by": self.actor,
            "note": self.note,
        }


@dataclass(frozen=True, slots=True)
class RunRecord:
    """A stored calibration run with its status at a time (read-only).

    ``params`` is ``None`` for a failed run. ``status`` is the status at the time the record
    was read for (``as_of``, default now); ``approved_at`` / ``approved_by`` / ``approval_note``
    come from its ``approved`` event if it had one by then.
    """

    run_id: int
    commodity: str
    trade_date: date
    status: str
    outcome: str
    params: TwoFactorParams | None
    buckets: tuple[Mapping[str, Any], ...]
    diagnostics: Mapping[str, Any]
    settings: Mapping[str, Any]
    inputs: Mapping[str, Any] = field(repr=False)
    inputs_sha256: str
    estimate_id: int
    mode: str
    failure_reason: str | None
    created_at: datetime
    created_by: str
    code_version: str
    approved_at: datetime | None
    approved_by: str | None
    approval_note: str | None
    events: tuple[EventRecord, ...]

    def to_dict(self, *, with_inputs: bool = False) -> dict[str, Any]:
        """Plain values for JSON: the seven parameter names at the top level (null if failed)."""
        params = self.params.to_dict() if self.params is not None else dict.fromkeys(PARAM_NAMES)
        out: dict[str, Any] = {
            "run_id": self.run_id,
            "commodity": self.commodity,
            "trade_date": self.trade_date.isoformat(),
            "status": self.status,
            "outcome": self.outcome,
            **params,
            "failure_reason": self.failure_reason,
            "estimate_id": self.estimate_id,
            "mode": self.mode,
            "buckets": [dict(b) for b in self.buckets],
            "diagnostics": dict(self.diagnostics),
            "settings": dict(self.settings),
            "inputs_sha256": self.inputs_sha256,
            "created_at": self.created_at.isoformat(),
            "created_by": self.created_by,
            "code_version": self.code_version,
            "approved_at": None if self.approved_at is None else self.approved_at.isoformat(),
            "approved_by": self.approved_by,
            "approval_note": self.approval_note,
            "events": [e.to_dict() for e in self.events],
        }
        if with_inputs:
            out["inputs"] = dict(self.inputs)
        return out


@dataclass(frozen=True, slots=True)
class ApprovalRecord:
    """One approval of a commodity's history: the set, who approved it, and until when."""

    run_id: int
    trade_date: date
    params: TwoFactorParams
    approved_at: datetime
    approved_by: str
    note: str
    superseded_at: datetime | None
    """When a later approval replaced it (``None``: still in force)."""

    def to_dict(self) -> dict[str, Any]:
        return {
            "run_id": self.run_id,
            "trade_date": self.trade_date.isoformat(),
            **self.params.to_dict(),
            "approved_at": self.approved_at.isoformat(),
            "approved_by": self.approved_by,
            "note": self.note,
            "superseded_at": None if self.superseded_at is None else self.superseded_at.isoformat(),
        }


def _params_of(row: CalibrationRun) -> TwoFactorParams | None:
    if row.outcome != "fitted":
        return None
    return TwoFactorParams(**{name: getattr(row, name) for name in PARAM_NAMES})


def _event(row: RunEvent) -> EventRecord:
    return EventRecord(
        event_id=row.id,
        run_id=row.run_id,
        to_status=row.to_status,
        at=row.at,
        actor=row.actor,
        note=row.note,
    )


def _events(session: Session, run_id: int, as_of: datetime | None) -> list[EventRecord]:
    stmt = select(RunEvent).where(RunEvent.run_id == run_id)
    if as_of is not None:
        stmt = stmt.where(RunEvent.at <= as_of)
    return [_event(r) for r in session.scalars(stmt.order_by(RunEvent.at, RunEvent.id))]


def _record(session: Session, row: CalibrationRun, code: str, as_of: datetime | None) -> RunRecord:
    events = _events(session, row.id, as_of)
    approved = next((e for e in events if e.to_status == "approved"), None)
    return RunRecord(
        run_id=row.id,
        commodity=code,
        trade_date=row.trade_date,
        status=events[-1].to_status if events else "unknown",
        outcome=row.outcome,
        params=_params_of(row),
        buckets=tuple(MappingProxyType(b) for b in (row.buckets or [])),
        diagnostics=MappingProxyType(row.diagnostics),
        settings=MappingProxyType(row.settings),
        inputs=MappingProxyType(row.inputs),
        inputs_sha256=row.inputs_sha256,
        estimate_id=row.estimate_id,
        mode=row.mode,
        failure_reason=row.failure_reason,
        created_at=row.created_at,
        created_by=row.created_by,
        code_version=row.code_version,
        approved_at=None if approved is None else approved.at,
        approved_by=None if approved is None else approved.actor,
        approval_note=None if approved is None else approved.note,
        events=tuple(events),
    )


# --- writing -----------------------------------------------------------------------------------


def add_run(
    *,
    session: Session,
    commodity_id: int,
    trade_date: date,
    created_at: datetime,
    created_by: str,
    estimate_id: int,
    mode: str,
    settings: Mapping[str, Any],
    inputs: Mapping[str, Any],
    inputs_sha256: str,
    outcome: str,
    failure_reason: str | None,
    params: TwoFactorParams | None,
    buckets: Sequence[Mapping[str, Any]] | None,
    diagnostics: Mapping[str, Any],
    code_version: str,
) -> int:
    """Insert a run row (no events, no residuals); returns its id."""
    values = params.to_dict() if params is not None else dict.fromkeys(PARAM_NAMES)
    row = CalibrationRun(
        commodity_id=commodity_id,
        trade_date=trade_date,
        created_at=created_at,
        created_by=created_by,
        estimate_id=estimate_id,
        mode=mode,
        settings=dict(settings),
        inputs=dict(inputs),
        inputs_sha256=inputs_sha256,
        outcome=outcome,
        failure_reason=failure_reason,
        buckets=None if buckets is None else [dict(b) for b in buckets],
        diagnostics=dict(diagnostics),
        code_version=code_version,
        **values,
    )
    session.add(row)
    session.flush()
    return row.id


def add_residuals(
    *, session: Session, run_id: int, quote_id: Sequence[int], columns: Mapping[str, Any]
) -> None:
    """Insert a run's per-quote residuals in bulk.

    ``columns`` maps each name of :data:`RESIDUAL_COLUMNS` to an array aligned with
    ``quote_id`` (the ``option_quotes`` ids of the fitted quotes).
    """
    missing = set(RESIDUAL_COLUMNS) - set(columns)
    assert not missing, f"residual columns missing: {sorted(missing)}"
    insert_columns(
        session=session,
        table=_residuals,
        columns={"run_id": run_id, "quote_id": list(quote_id), **dict(columns)},
        count=len(quote_id),
    )


def append_event(
    *,
    session: Session,
    run_id: int,
    to_status: str,
    actor: str,
    note: str,
    at: datetime | None = None,
) -> EventRecord:
    """Append a status change after checking it against :data:`TRANSITIONS`.

    Raises
    ------
    UnknownRunError
        No run ``run_id``.
    IllegalTransitionError
        The run's current status does not allow ``to_status`` (the message lists what does).
    """
    run = session.get(CalibrationRun, run_id)
    if run is None:
        raise UnknownRunError(run_id)
    events = _events(session, run_id, None)
    if events:
        current = events[-1].to_status
        allowed = TRANSITIONS[current]
    else:
        current = "new"
        allowed = frozenset({FIRST_STATUS[run.outcome]})
    if to_status not in allowed:
        raise IllegalTransitionError(run_id, current, to_status, sorted(allowed))
    row = RunEvent(
        run_id=run_id,
        commodity_id=run.commodity_id,
        to_status=to_status,
        at=at or utc_now(),
        actor=actor,
        note=note,
    )
    session.add(row)
    session.flush()
    return _event(row)


def lock_commodity(*, session: Session, commodity_id: int) -> None:
    """Hold the commodity's row until the transaction ends (``SELECT ... FOR UPDATE``).

    Serialises approvals of one commodity on PostgreSQL; SQLite has no row locks (SQLAlchemy
    drops ``FOR UPDATE``) and serialises every writer with ``BEGIN IMMEDIATE`` instead
    (:func:`calib.store.engine.begin_write`).
    """
    session.execute(select(Commodity.id).where(Commodity.id == commodity_id).with_for_update())


# --- reading -----------------------------------------------------------------------------------


def latest_approved_stmt(commodity_id: int, as_of: datetime) -> Select[Any]:
    """The run id of the newest ``approved`` event of a commodity at or before ``as_of``.

    One seek on ``ix_run_events_commodity_id`` (``commodity_id, to_status, at, id``).
    """
    return (
        select(RunEvent.run_id)
        .where(
            RunEvent.commodity_id == commodity_id,
            RunEvent.to_status == "approved",
            RunEvent.at <= as_of,
        )
        .order_by(RunEvent.at.desc(), RunEvent.id.desc())
        .limit(1)
    )


def latest_approved(
    *, session: Session, commodity: str, as_of: datetime | None = None
) -> RunRecord | None:
    """The approved run of ``commodity`` in force at ``as_of`` (default now), or ``None``.

    Raises
    ------
    UnknownCommodityError
        ``commodity`` is not registered.
    """
    cid = require_commodity(session=session, code=commodity).id
    when = as_of or utc_now()
    run_id = session.scalars(latest_approved_stmt(cid, when)).one_or_none()
    if run_id is None:
        return None
    row = session.get(CalibrationRun, run_id)
    assert row is not None  # foreign key
    return _record(session, row, commodity, when)


def get_run(*, session: Session, run_id: int, as_of: datetime | None = None) -> RunRecord | None:
    """The run ``run_id`` with its status at ``as_of`` (default now), or ``None``."""
    row = session.get(CalibrationRun, run_id)
    if row is None:
        return None
    code = session.scalars(select(Commodity.code).where(Commodity.id == row.commodity_id)).one()
    return _record(session, row, code, as_of)


def require_run(*, session: Session, run_id: int, as_of: datetime | None = None) -> RunRecord:
    """:func:`get_run`, raising :class:`~calib.errors.UnknownRunError` if there is none."""
    found = get_run(session=session, run_id=run_id, as_of=as_of)
    if found is None:
        raise UnknownRunError(run_id)
    return found


def run_status(*, session: Session, run_id: int, as_of: datetime | None = None) -> str | None:
    """The run's status at ``as_of`` (default now); ``None`` if it had no event by then.

    Raises
    ------
    UnknownRunError
        No run ``run_id``.
    """
    if session.get(CalibrationRun, run_id) is None:
        raise UnknownRunError(run_id)
    stmt = select(RunEvent.to_status).where(RunEvent.run_id == run_id)
    if as_of is not None:
        stmt = stmt.where(RunEvent.at <= as_of)
    stmt = stmt.order_by(RunEvent.at.desc(), RunEvent.id.desc()).limit(1)
    return session.scalars(stmt).one_or_none()


def list_runs(
    *,
    session: Session,
    commodity: str,
    trade_date: date | None = None,
    status: str | None = None,
    limit: int | None = None,
) -> list[RunRecord]:
    """Runs of ``commodity``, newest first, with their current status.

    ``trade_date`` keeps one day's runs, ``status`` those currently in that status, ``limit``
    the first so many (after the other filters).
    """
    cid = require_commodity(session=session, code=commodity).id
    stmt = select(CalibrationRun).where(CalibrationRun.commodity_id == cid)
    if trade_date is not None:
        stmt = stmt.where(CalibrationRun.trade_date == trade_date)
    out: list[RunRecord] = []
    for row in session.scalars(stmt.order_by(CalibrationRun.id.desc())):
        record = _record(session, row, commodity, None)
        if status is None or record.status == status:
            out.append(record)
        if limit is not None and len(out) >= limit:
            break
    return out


def approved_history(*, session: Session, commodity: str) -> list[ApprovalRecord]:
    """Every approval of ``commodity``, oldest first, with when each was superseded."""
    cid = require_commodity(session=session, code=commodity).id
    stmt = (
        select(RunEvent, CalibrationRun)
        .join(CalibrationRun, CalibrationRun.id == RunEvent.run_id)
        .where(RunEvent.commodity_id == cid, RunEvent.to_status == "approved")
        .order_by(RunEvent.at, RunEvent.id)
    )
    approvals = [(row[0], row[1]) for row in session.execute(stmt)]
    superseded = select(RunEvent.run_id, RunEvent.at).where(
        RunEvent.commodity_id == cid, RunEvent.to_status == "superseded"
    )
    ended = {row[0]: row[1] for row in session.execute(superseded)}
    out = []
    for event, run in approvals:
        params = _params_of(run)
        assert params is not None  # only fitted runs become candidates
        out.append(
            ApprovalRecord(
                run_id=run.id,
                trade_date=run.trade_date,
                params=params,
                approved_at=event.at,
                approved_by=event.actor,
                note=event.note,
                superseded_at=ended.get(run.id),
            )
        )
    return out


def run_residuals(*, session: Session, run_id: int) -> pd.DataFrame:
    """The run's residuals: ``quote_id`` and :data:`RESIDUAL_COLUMNS`, by quote id."""
    import pandas as pd

    stmt = (
        select(_residuals.c.quote_id, *[_residuals.c[c] for c in RESIDUAL_COLUMNS])
        .where(_residuals.c.run_id == run_id)
        .order_by(_residuals.c.quote_id)
    )
    return pd.DataFrame(session.execute(stmt).all(), columns=["quote_id", *RESIDUAL_COLUMNS])


def run_quotes(*, session: Session, run: RunRecord) -> DayQuotes:
    """The quote rows ``run`` was fitted to, by the ids it stored (see :func:`load_rows`)."""
    ids = run.inputs
    return load_rows(
        session=session,
        commodity=run.commodity,
        trade_date=run.trade_date,
        futures_rows=ids["futures_rows"],
        option_rows=ids["option_rows"],
        rate_rows=ids["rate_rows"],
    )


def load_rows(
    *,
    session: Session,
    commodity: str,
    trade_date: date,
    futures_rows: Sequence[int],
    option_rows: Sequence[int],
    rate_rows: Sequence[int],
) -> DayQuotes:
    """The quote rows with these ids, as :func:`calib.store.quotes.load_day` would hand them.

    Same sort orders as ``load_day`` (futures by delivery; options by delivery, expiry, put
    before call, strike; rates by maturity), so a run rebuilt from its stored ids sees the very
    arrays the original fit saw. Ids that are not stored are simply absent: the caller compares
    the counts.
    """
    cid = require_commodity(session=session, code=commodity).id
    fut = sorted(
        session.scalars(select(FuturesSettlement).where(FuturesSettlement.id.in_(futures_rows))),
        key=lambda r: r.delivery,
    )
    opt = sorted(
        session.scalars(select(OptionQuote).where(OptionQuote.id.in_(option_rows))),
        key=lambda r: (r.delivery, r.expiry, r.is_call, r.strike),
    )
    rates = sorted(
        session.scalars(select(RateQuote).where(RateQuote.id.in_(rate_rows))),
        key=lambda r: r.maturity,
    )
    batches = {r.batch_id for r in fut} | {r.batch_id for r in opt} | {r.batch_id for r in rates}
    return DayQuotes(
        commodity=commodity,
        commodity_id=cid,
        trade_date=trade_date,
        as_of=utc_now(),
        futures=FuturesCurve(
            delivery=readonly([r.delivery for r in fut], "datetime64[D]"),
            settle=readonly([r.settle for r in fut], np.float64),
            row_id=readonly([r.id for r in fut], np.int64),
        ),
        options=OptionChain(
            delivery=readonly([r.delivery for r in opt], "datetime64[D]"),
            expiry=readonly([r.expiry for r in opt], "datetime64[D]"),
            is_call=readonly([r.is_call for r in opt], np.bool_),
            strike=readonly([r.strike for r in opt], np.float64),
            premium=nan_for_none([r.premium for r in opt]),
            implied_vol=nan_for_none([r.implied_vol for r in opt]),
            bid=nan_for_none([r.bid for r in opt]),
            ask=nan_for_none([r.ask for r in opt]),
            row_id=readonly([r.id for r in opt], np.int64),
        ),
        rates=ZeroCurve(
            trade_date=trade_date,
            maturity=readonly([r.maturity for r in rates], "datetime64[D]"),
            zero_rate=readonly([r.zero_rate for r in rates], np.float64),
            row_id=readonly([r.id for r in rates], np.int64),
        ),
        batch_ids=tuple(sorted(batches)),
    )


@dataclass(frozen=True, slots=True)
class RunKey:
    """What identifies a run for a backfill's resume: its day, estimate and settings."""

    run_id: int
    trade_date: date
    estimate_id: int
    settings: Mapping[str, Any]
    outcome: str


def run_keys(*, session: Session, commodity: str, start: date, end: date) -> list[RunKey]:
    """Every run of ``commodity`` with a trade date in ``start..end`` (inclusive), by id.

    One query on ``(commodity_id, trade_date)``; no events are read.
    """
    cid = require_commodity(session=session, code=commodity).id
    stmt = (
        select(
            CalibrationRun.id,
            CalibrationRun.trade_date,
            CalibrationRun.estimate_id,
            CalibrationRun.settings,
            CalibrationRun.outcome,
        )
        .where(CalibrationRun.commodity_id == cid, CalibrationRun.trade_date.between(start, end))
        .order_by(CalibrationRun.id)
    )
    return [RunKey(*row) for row in session.execute(stmt)]


def newest_trade_date(*, session: Session, commodity: str) -> date | None:
    """The latest trade date with a stored run of ``commodity`` (``None``: no run yet).

    Raises
    ------
    UnknownCommodityError
        ``commodity`` is not registered.
    """
    cid = require_commodity(session=session, code=commodity).id
    stmt = select(func.max(CalibrationRun.trade_date)).where(CalibrationRun.commodity_id == cid)
    found: date | None = session.scalars(stmt).one()
    return found
