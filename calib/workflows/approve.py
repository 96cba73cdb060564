"""Approving and rejecting stored runs.

:func:`approve` appends ``approved`` for the run and ``superseded`` for the commodity's
previous approved run in one transaction, under the commodity's write lock
(:func:`calib.store.runs.lock_commodity`) and the approval lock
(:func:`calib.store.runs.approvals_held`: readers of the set in force wait for the commit, so
the answer for a past moment never changes); :func:`reject` appends ``rejected``. The morning
run's auto-approval appends the same events (:func:`approve_in`) inside its own write.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.orm import Session, sessionmaker

from calib.store.base import utc_now
from calib.store.engine import begin_write
from calib.store.quotes import require_commodity
from calib.store.runs import (
    RunRecord,
    append_event,
    approvals_held,
    in_force_run_id,
    lock_commodity,
    require_run,
)


def approve_in(
    session: Session, run_id: int, commodity_id: int, *, by: str, note: str
) -> int | None:
    """Append ``approved`` (and ``superseded`` for the set it replaces); returns the run id it
    replaced. The caller's write transaction holds the commodity's lock."""
    now = utc_now()
    previous = in_force_run_id(session=session, commodity_id=commodity_id, as_of=now)
    append_event(session=session, run_id=run_id, to_status="approved", by=by, note=note, at=now)
    if previous is not None and previous != run_id:
        append_event(
            session=session,
            run_id=previous,
            to_status="superseded",
            by=by,
            note=f"superseded by run {run_id}",
            at=now,
        )
    return previous


@dataclass(frozen=True, slots=True)
class Approval:
    """An approval: the run now in force and the one it replaced."""

    run: RunRecord
    superseded: int | None


def approve(sessions: sessionmaker[Session], run_id: int, *, by: str, note: str) -> Approval:
    """Approve a candidate run; the commodity's previous approved run becomes superseded.

    Raises
    ------
    UnknownRunError, IllegalTransitionError
    """
    with approvals_held(sessions), sessions.begin() as session:
        begin_write(session)
        record = require_run(session=session, run_id=run_id)
        cid = require_commodity(session=session, code=record.commodity).id
        lock_commodity(session=session, commodity_id=cid)
        previous = approve_in(session, run_id, cid, by=by, note=note)
    with sessions.begin() as session:
        return Approval(require_run(session=session, run_id=run_id), previous)


def reject(sessions: sessionmaker[Session], run_id: int, *, by: str, note: str) -> RunRecord:
    """Reject a candidate run.

    Raises
    ------
    UnknownRunError, IllegalTransitionError
    """
    with sessions.begin() as session:
        begin_write(session)
        append_event(session=session, run_id=run_id, to_status="rejected", by=by, note=note)
    with sessions.begin() as session:
        return require_run(session=session, run_id=run_id)
