"""Calibration runs, their residuals and status events: the store functions workflows call.

Every function takes the session as the keyword ``session`` and does one thing; the caller
owns the transaction (STYLE 13). Rows are only inserted (see :mod:`calib.store.run_models`).

Status
------
A run's status at time ``t`` is the ``to_status`` of its newest event at or before ``t``
(ties by event id). The moves allowed are :data:`TRANSITIONS`; a fitted run starts as
``candidate``, a failed one is ``rejected`` from the start. Approving a run is the workflow's
unit of work (:func:`calib.workflows.approve.approve`), which appends ``superseded`` for the
previous approved run of the commodity in the same transaction.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from types import MappingProxyType
from typing import TYPE_CHECKING, Any, cast

import numpy as np
from sqlalchemy import Table, func, select
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import IllegalTransitionError, StudyRunError, UnknownRunError
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.record.codec import copy_fields
from calib.record.fit import (
    SCHEMA_VERSION,
    FitRecord,
    fit_to_columns,
)
from calib.record.run import RUN_COLUMNS, run_record
from calib.record.run import ApprovalRecord as ApprovalRecord  # the records moved there
from calib.record.run import ApprovedSet as ApprovedSet
from calib.record.run import EventRecord as EventRecord
from calib.record.run import RunRecord as RunRecord
from calib.store.base import utc_now
from calib.store.in_force import APPROVAL_LOCK_SPACE as APPROVAL_LOCK_SPACE
from calib.store.in_force import IN_FORCE_COLUMNS as IN_FORCE_COLUMNS
from calib.store.in_force import approval_lock_file as approval_lock_file
from calib.store.in_force import approvals_held as approvals_held
from calib.store.in_force import approvals_read as approvals_read
from calib.store.in_force import approved_set as approved_set
from calib.store.in_force import approved_set_of as approved_set_of
from calib.store.in_force import engine_of
from calib.store.in_force import in_force_run_id as in_force_run_id
from calib.store.in_force import in_force_stmt as in_force_stmt
from calib.store.in_force import lock_commodity as lock_commodity
from calib.store.in_force import wait_for_approvals as wait_for_approvals
from calib.store.models import Commodity, FuturesSettlement, OptionQuote, RateQuote
from calib.store.quotes import (
    DayQuotes,
    FuturesCurve,
    OptionChain,
    ZeroCurve,
    american_of,
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


def _event(row: RunEvent) -> EventRecord:
    return copy_fields(EventRecord, row, event_id=row.id)


def _events(session: Session, run_id: int, as_of: datetime | None) -> list[EventRecord]:
    stmt = select(RunEvent).where(RunEvent.run_id == run_id)
    if as_of is not None:
        stmt = stmt.where(RunEvent.at <= as_of)
    return [_event(r) for r in session.scalars(stmt.order_by(RunEvent.at, RunEvent.id))]


def _record(session: Session, row: CalibrationRun, code: str, as_of: datetime | None) -> RunRecord:
    return _record_of(row, code, _events(session, row.id, as_of))


def _record_of(row: CalibrationRun, code: str, events: list[EventRecord]) -> RunRecord:
    values = {name: getattr(row, name) for name in RUN_COLUMNS}
    return run_record(values, code, events)


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
    failure_reason: str | None,
    fit: FitRecord | None,
    code_version: str,
    study: str | None = None,
) -> int:
    """Insert a run row (no events, no residuals); returns its id.

    ``fit`` is the stored-fit record of a fitted run; ``None`` stores a failed run with
    ``failure_reason``. ``study`` names the policy study of a run never to be approved.
    """
    if fit is None:
        assert failure_reason is not None, "a failed run needs its reason"
        values: dict[str, Any] = dict.fromkeys(PARAM_NAMES)
        buckets = None
        diagnostics: dict[str, Any] = {"schema_version": SCHEMA_VERSION, "failure": failure_reason}
    else:
        params, buckets, diagnostics = fit_to_columns(fit)
        values = params.to_dict()
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
        outcome="failed" if fit is None else "fitted",
        failure_reason=failure_reason,
        buckets=buckets,
        diagnostics=diagnostics,
        code_version=code_version,
        study=study,
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
    by: str,
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
    StudyRunError
        ``to_status`` is ``approved`` and the run belongs to a policy study.
    """
    run = session.get(CalibrationRun, run_id)
    if run is None:
        raise UnknownRunError(run_id)
    if to_status == "approved" and run.study is not None:
        raise StudyRunError(run_id, run.study)
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
        by=by,
        note=note,
    )
    session.add(row)
    session.flush()
    return _event(row)


def add_first_event(
    *, session: Session, run_id: int, commodity_id: int, outcome: str, by: str, note: str
) -> None:
    """The first event of the run just inserted by :func:`add_run` in this transaction: its
    status is :data:`FIRST_STATUS` of ``outcome`` (the caller passed the run's fit, or none).

    :func:`append_event` for the writer that knows the run has no event yet: nothing is read
    back (a backfill writes thousands of runs). Flushed with the transaction's next statement.
    """
    row = RunEvent(
        run_id=run_id,
        commodity_id=commodity_id,
        to_status=FIRST_STATUS[outcome],
        at=utc_now(),
        by=by,
        note=note,
    )
    session.add(row)


def latest_approved(
    *, session: Session, commodity: str, as_of: datetime | None = None
) -> RunRecord | None:
    """The run of the approved set of ``commodity`` in force at ``as_of`` (default now), with
    its status at that time, or ``None`` (:func:`in_force_stmt`).

    Raises
    ------
    UnknownCommodityError
        ``commodity`` is not registered.
    """
    when = as_of or utc_now()
    found = approved_set(session=session, commodity=commodity, as_of=when)
    if found is None:
        return None
    row = session.get(CalibrationRun, found.run_id)
    assert row is not None  # foreign key
    return _record(session, row, commodity, when)


def read_in_force(
    sessions: sessionmaker[Session], commodity: str, as_of: datetime | None = None
) -> RunRecord | None:
    """:func:`latest_approved` in a read transaction of its own, after any approval being
    written has committed (the answer for a past moment never changes; see
    :func:`approvals_held`). For readers outside a write; the CLI's ``latest`` uses it.
    """
    when = as_of or utc_now()
    with approvals_read(engine_of(sessions)):
        with sessions.begin() as session:
            cid = require_commodity(session=session, code=commodity).id
            wait_for_approvals(session, cid)
        with sessions.begin() as session:
            return latest_approved(session=session, commodity=commodity, as_of=when)


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
        params = TwoFactorParams(**{name: getattr(run, name) for name in PARAM_NAMES})
        out.append(
            ApprovalRecord(
                run_id=run.id,
                trade_date=run.trade_date,
                params=params,
                approved_at=event.at,
                approved_by=event.by,
                approval_note=event.note,
                approval_id=event.id,
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
            american=american_of([r.exercise for r in opt]),
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


def study_runs(
    *, session: Session, commodity: str, study: str, start: date, end: date
) -> list[RunRecord]:
    """The runs of policy study ``study`` of ``commodity`` fitted in ``start..end``, by trade
    date then id, with their current status (two queries: the runs, then their events)."""
    cid = require_commodity(session=session, code=commodity).id
    stmt = (
        select(CalibrationRun)
        .where(
            CalibrationRun.commodity_id == cid,
            CalibrationRun.study == study,
            CalibrationRun.trade_date.between(start, end),
        )
        .order_by(CalibrationRun.trade_date, CalibrationRun.id)
    )
    rows = list(session.scalars(stmt))
    events: dict[int, list[EventRecord]] = {r.id: [] for r in rows}
    if rows:
        found = select(RunEvent).where(RunEvent.run_id.in_(list(events)))
        for e in session.scalars(found.order_by(RunEvent.at, RunEvent.id)):
            events[e.run_id].append(_event(e))
    return [_record_of(row, commodity, events[row.id]) for row in rows]


def study_baseline(
    *, session: Session, commodity_id: int, study: str, before: date
) -> RunRecord | None:
    """The newest run of policy study ``study`` fitted before ``before`` whose gates all
    passed (what the policy would have had in force), or ``None``."""
    stmt = (
        select(CalibrationRun)
        .where(
            CalibrationRun.commodity_id == commodity_id,
            CalibrationRun.study == study,
            CalibrationRun.outcome == "fitted",
            CalibrationRun.trade_date < before,
        )
        .order_by(CalibrationRun.trade_date.desc(), CalibrationRun.id.desc())
    )
    code = session.scalars(select(Commodity.code).where(Commodity.id == commodity_id)).one()
    for row in session.scalars(stmt):
        record = _record_of(row, code, [])
        if record.fit is not None and record.fit.all_gates_pass:
            return _record(session, row, code, None)
    return None


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
