"""What the morning review shows: per commodity the set in force, the newest day's fits with
their gates, drift alerts, and the approval history; read from the store, nothing written.

The review pages of ``calib serve`` (:mod:`calib.api.review`) render these records; deciding
(approve, reject) goes through :func:`calib.workflows.approve.approve` and
:func:`calib.workflows.approve.reject` like the CLI.

Notes
-----
*Today's fits* are the runs of the newest trade date that has any run of the commodity, in
every status, newest first: the candidates among them are what the morning decides.

*Alerts* come from the calibrated-against-historical comparison
(:func:`calib.workflows.compare.compare_series`) over the runs of the last
:data:`ALERT_DAYS` calendar days up to that trade date that were ever approved or are
candidates now (a run rejected is no longer a set anyone may use). One alert per run and
quantity outside its band, newest first.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta

from sqlalchemy.orm import Session, sessionmaker

from calib.output.compare import (
    MEASURE_KIND,
    QUANTITIES,
    Band,
    Bands,
    CompareTable,
    compare_series,
)
from calib.store.quotes import CommodityRecord, list_commodities, require_commodity
from calib.store.runs import (
    ApprovalRecord,
    RunRecord,
    approved_history,
    latest_approved,
    list_runs,
    newest_trade_date,
    require_run,
)
from calib.workflows.compare import Selection, compare_rows

ALERT_DAYS = 31
"""Calendar days back from the newest trade date that the overview's alerts look at."""

_LIVE = frozenset({"candidate", "approved", "superseded"})
"""Statuses of the runs whose drift is worth an alert (rejected runs are out of use)."""


@dataclass(frozen=True, slots=True)
class Alert:
    """A run whose calibrated value of ``quantity`` left its band against history."""

    trade_date: date
    run_id: int
    status: str
    quantity: str
    kind: str
    """``ratio`` (calibrated / historical) or ``diff`` (calibrated - historical)."""
    measure: float
    band: Band


@dataclass(frozen=True, slots=True)
class CommodityOverview:
    """One commodity on the overview."""

    commodity: CommodityRecord
    in_force: RunRecord | None
    """The approved run in force now (``None``: nothing approved yet)."""
    newest_date: date | None
    """The newest trade date with a run (``None``: no run yet)."""
    fits: tuple[RunRecord, ...]
    """The runs of ``newest_date``, newest first."""
    alerts: tuple[Alert, ...]
    bands: Bands

    @property
    def candidates(self) -> tuple[RunRecord, ...]:
        return tuple(r for r in self.fits if r.status == "candidate")


@dataclass(frozen=True, slots=True)
class CommodityHistory:
    """One commodity's history: every approval and the compared series of approved runs."""

    commodity: CommodityRecord
    in_force: RunRecord | None
    approvals: tuple[ApprovalRecord, ...]
    """Newest first."""
    compared: CompareTable | None
    """Runs ever approved against their estimates (``None``: none approved yet)."""


def _alerts(table: CompareTable, live: set[int]) -> tuple[Alert, ...]:
    out = []
    for i in range(len(table)):
        run_id = int(table.run_id[i])
        if run_id not in live:
            continue
        for q in QUANTITIES:
            if table.flagged[q][i]:
                out.append(
                    Alert(
                        trade_date=table.trade_date[i],
                        run_id=run_id,
                        status=table.status[i],
                        quantity=q,
                        kind=MEASURE_KIND[q],
                        measure=float(table.measure[q][i]),
                        band=table.bands.of(q),
                    )
                )
    out.sort(key=lambda a: (a.trade_date, a.run_id), reverse=True)
    return tuple(out)


def _overview_of(
    sessions: sessionmaker[Session], commodity: CommodityRecord, bands: Bands
) -> CommodityOverview:
    with sessions.begin() as session:
        in_force = latest_approved(session=session, commodity=commodity.code)
        newest = newest_trade_date(session=session, commodity=commodity.code)
        fits: list[RunRecord] = []
        if newest is not None:
            fits = list_runs(session=session, commodity=commodity.code, trade_date=newest)
    alerts: tuple[Alert, ...] = ()
    if newest is not None:
        selection = Selection(commodity.code, newest - timedelta(days=ALERT_DAYS), newest, True)
        rows = [r for r in compare_rows(sessions, selection) if r.status in _LIVE]
        if rows:
            alerts = _alerts(compare_series(rows, bands), {int(r.run_id) for r in rows})
    return CommodityOverview(commodity, in_force, newest, tuple(fits), alerts, bands)


def overview(
    sessions: sessionmaker[Session], bands: Bands | None = None
) -> list[CommodityOverview]:
    """Every registered commodity's overview, by code (see the module notes)."""
    bands = bands or Bands()
    return [_overview_of(sessions, c, bands) for c in commodities(sessions)]


def history(
    sessions: sessionmaker[Session], commodity: str, bands: Bands | None = None
) -> CommodityHistory:
    """The approval history of ``commodity`` and its runs ever approved against history.

    Raises
    ------
    UnknownCommodityError
        ``commodity`` is not registered.
    """
    with sessions.begin() as session:
        record = require_commodity(session=session, code=commodity)
        in_force = latest_approved(session=session, commodity=commodity)
        approvals = approved_history(session=session, commodity=commodity)
    compared = None
    if approvals:
        first = min(a.trade_date for a in approvals)
        last = max(a.trade_date for a in approvals)
        rows = compare_rows(sessions, Selection(commodity, first, last, False))
        compared = compare_series(rows, bands or Bands())
    return CommodityHistory(record, in_force, tuple(reversed(approvals)), compared)


@dataclass(frozen=True, slots=True)
class RunView:
    """A run with its commodity and the approved run in force now (to compare against)."""

    run: RunRecord
    commodity: CommodityRecord
    in_force: RunRecord | None


def run_view(sessions: sessionmaker[Session], run_id: int) -> RunView:
    """The run ``run_id`` with its current status and events.

    Raises
    ------
    UnknownRunError
        No run ``run_id``.
    """
    with sessions.begin() as session:
        run = require_run(session=session, run_id=run_id)
        record = require_commodity(session=session, code=run.commodity)
        in_force = latest_approved(session=session, commodity=run.commodity)
    return RunView(run, record, in_force)


def commodities(sessions: sessionmaker[Session]) -> list[CommodityRecord]:
    """Every registered commodity, by code (the pages' navigation)."""
    with sessions.begin() as session:
        return list_commodities(session=session)
