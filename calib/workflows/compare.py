"""Calibrated against historical over stored runs: pick the runs, pair each with its estimate.

:func:`compare_rows` reads, in one read transaction, the runs of a commodity whose trade dates
lie in ``start..end`` and pairs each with the historical estimate in force that day, which is
the estimate the run held fixed (``calibration_runs.estimate_id``): that is the set the run's
gates and constraints were measured against, so a later estimate never rewrites the past.
:func:`compare_runs` hands the rows to :func:`calib.output.compare.compare_series`.

Which runs
----------
By default the runs that were **ever approved**: every fitted run with an ``approved`` event,
whatever its status now (an approved set later superseded by the next morning's is still that
morning's set, and is what risk compares). With ``every_fit`` every fitted run, candidates and
rejected ones included; failed runs (no parameters) never enter. Several runs of one day all
appear, in run-id order.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

from sqlalchemy.orm import Session, sessionmaker

from calib.output.compare import Bands, CompareRow, CompareTable, compare_series
from calib.store.estimates import EstimateRecord, get_estimate
from calib.store.runs import RunRecord, list_runs


@dataclass(frozen=True, slots=True)
class Selection:
    """Which runs a comparison covers (for the table's caption and ``--json``)."""

    commodity: str
    start: date
    end: date
    every_fit: bool

    @property
    def rule(self) -> str:
        return "every fitted run" if self.every_fit else "runs ever approved"


def _row(run: RunRecord, estimate: EstimateRecord) -> CompareRow:
    assert run.params is not None  # only fitted runs are selected
    cal, hist = run.params, estimate.params
    return CompareRow(
        trade_date=run.trade_date,
        run_id=run.run_id,
        status=run.status,
        sigma_spot=cal.sigma_spot,
        sigma_yield=cal.sigma_yield,
        rho=cal.rho,
        hist_sigma_spot=hist.sigma_spot,
        hist_sigma_yield=hist.sigma_yield,
        hist_rho=hist.rho,
    )


def selected(run: RunRecord, every_fit: bool) -> bool:
    """Whether ``run`` enters a comparison (see the module notes)."""
    if run.params is None:
        return False
    return every_fit or any(e.to_status == "approved" for e in run.events)


def compare_rows(sessions: sessionmaker[Session], selection: Selection) -> list[CompareRow]:
    """One row per selected run of ``selection``, trade date then run id ascending.

    Raises
    ------
    UnknownCommodityError
        The commodity is not registered.
    """
    with sessions.begin() as session:
        runs = [
            r
            for r in list_runs(session=session, commodity=selection.commodity)
            if selection.start <= r.trade_date <= selection.end and selected(r, selection.every_fit)
        ]
        estimates: dict[int, EstimateRecord] = {}
        for r in runs:
            if r.estimate_id not in estimates:
                found = get_estimate(session=session, estimate_id=r.estimate_id)
                assert found is not None  # foreign key
                estimates[r.estimate_id] = found
    runs.sort(key=lambda r: (r.trade_date, r.run_id))
    return [_row(r, estimates[r.estimate_id]) for r in runs]


def compare_runs(
    sessions: sessionmaker[Session], selection: Selection, bands: Bands | None = None
) -> CompareTable:
    """The compared series of ``selection`` (:func:`compare_rows`, then ``compare_series``).

    Raises
    ------
    UnknownCommodityError
    ReportInputError
        No run in the selection.
    """
    return compare_series(compare_rows(sessions, selection), bands)
