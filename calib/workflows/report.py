"""The fit report of a stored run: gather its values from the store, recompute the frontier, render.

:func:`report_inputs` reads, in one read transaction, everything a stored run was made from and
left behind: its parameters and diagnostics, the historical estimate it held fixed, its
residuals joined with the option quotes they belong to (expiry, delivery, strike, kind), and
the futures curve and zero curve of its stored inputs (by row id, exactly as the fit saw
them). Outside the transaction it re-solves the calibration over a few anchor weights around
the run's own (:func:`anchor_weights`) to draw the trade-off frontier, and :func:`write_report`
renders the page with :func:`calib.output.report.render_report`.

Notes
-----
The frontier is recomputed, not stored: the run's quotes, estimate and settings are stored,
and the calibration is deterministic, so the point at the run's own weight reproduces the run
(the rerun check of :func:`calib.workflows.rerun.rerun`). The weights are the run's weight
``w`` times :data:`ANCHOR_FACTORS` (``0`` is the unanchored fit, the far end of the
frontier); a run fitted with ``w = 0`` takes its ladder from the default weight instead.
"""

from __future__ import annotations

import datetime as dt
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from calib.calibrate import CalibrationSettings, frontier
from calib.errors import CalibWarning, RunNotFittedError
from calib.model.twofactor import TwoFactorParams
from calib.output.report import (
    Commodity,
    DroppedRow,
    EstimateUsed,
    EstimateWindow,
    FrontierRow,
    FuturesCurve,
    GateRow,
    PreviousSet,
    QuoteFits,
    ReportFiles,
    ReportInputs,
    RunInfo,
    SolveInfo,
    render_report,
)
from calib.policy.gates import AT_LEAST
from calib.policy.settings import RunSettings
from calib.record.codec import copy_fields
from calib.record.fit import FitRecord, Gate
from calib.store.estimates import (
    EstimateRecord,
    SeriesRecord,
    list_series,
    series_estimates,
)
from calib.store.quotes import DayQuotes, require_commodity, year_fractions
from calib.store.runs import (
    RunRecord,
    approved_set,
    require_run,
    run_residuals,
)
from calib.workflows.fit import early_exercise, fitted_inputs, option_quotes
from calib.workflows.stability import DEFAULT_K, assemble

ANCHOR_FACTORS: tuple[float, ...] = (0.0, 0.1, 1.0, 10.0, 100.0, 1000.0)
"""Multiples of the run's anchor weight at which the frontier is re-solved (``1`` = the run)."""


def anchor_weights(chosen: float, factors: Sequence[float] = ANCHOR_FACTORS) -> tuple[float, ...]:
    """The frontier's anchor weights: ``chosen`` times each factor, ascending, no repeats.

    With ``chosen = 0`` the ladder is built on the default weight of
    :class:`~calib.calibrate.CalibrationSettings`, and ``0`` (the run's own) is among them.
    """
    base = chosen if chosen > 0.0 else CalibrationSettings().anchor_weight
    return tuple(sorted({base * float(f) for f in factors} | {float(chosen)}))


@dataclass(frozen=True, slots=True)
class RunReport:
    """What :func:`write_report` wrote, and the anchor weights of the frontier it drew."""

    run_id: int
    files: ReportFiles
    anchor_weights: tuple[float, ...]
    warnings: tuple[str, ...] = ()
    """The solver's warnings shown on the page (the fit's and the frontier's), one line each."""

    def to_dict(self) -> dict[str, Any]:
        return {
            "run_id": self.run_id,
            "index": str(self.files.index),
            "figures": {name: str(p) for name, p in self.files.figures.items()},
            "frontier_anchor_weights": list(self.anchor_weights),
            "warnings": list(self.warnings),
        }


def _kind(is_call: Any) -> str:
    return "call" if bool(is_call) else "put"


def _day(value: Any) -> dt.date:
    return dt.date.fromisoformat(str(np.datetime64(value, "D")))


def _quote_label(day: DayQuotes, pos: int) -> str:
    o = day.options
    return (
        f"{int(o.row_id[pos])}: {_kind(o.is_call[pos])} {float(o.strike[pos]):g} "
        f"exp {_day(o.expiry[pos])}"
    )


def _quote_fits(day: DayQuotes, residuals: pd.DataFrame) -> QuoteFits:
    """The fitted quotes: residual rows joined with their option rows by quote id."""
    o = day.options
    order = np.argsort(o.row_id, kind="stable")
    ids = residuals["quote_id"].to_numpy(dtype=np.int64)
    pos = order[np.searchsorted(o.row_id[order], ids)]
    # run_quotes returns exactly the run's rows; a residual keyed to any other row is a bug
    assert np.array_equal(o.row_id[pos], ids), "residuals name quotes outside the run's inputs"
    return QuoteFits(
        label=tuple(str(i) for i in ids.tolist()),
        expiry=tuple(_day(x) for x in o.expiry[pos]),
        delivery=tuple(_day(x) for x in o.delivery[pos]),
        kind=tuple(_kind(x) for x in o.is_call[pos]),
        strike=o.strike[pos],
        t_expiry=year_fractions(day.trade_date, o.expiry[pos]),
        market_vol=residuals["market_vol"].to_numpy(),
        model_vol=residuals["model_vol"].to_numpy(),
        market_price=residuals["market_price"].to_numpy(),
        model_price=residuals["model_price"].to_numpy(),
        exercise=tuple("american" if a else "european" for a in o.american[pos]),
        early_exercise=early_exercise(day)[pos],
    )


def _gate_row(g: Gate) -> GateRow:
    """A stored gate as the report shows it: numeric value, limit as ``<= x`` / ``>= x``."""
    value, limit = g.value, g.limit
    if isinstance(value, str) or isinstance(limit, str) or limit is None:
        text = "" if limit is None else f"{limit}"
        if isinstance(value, str):
            text = f"{text} (found {value})".strip()
        return GateRow(g.name, None, text, g.passed)
    sign = ">=" if g.name in AT_LEAST else "<="
    shown = None if value is None else float(value)
    return GateRow(g.name, shown, f"{sign} {float(limit):.6g}", g.passed)


def _settings(run: RunRecord, estimate: EstimateRecord) -> dict[str, Any]:
    out: dict[str, Any] = dict(run.settings.get("calibration", {}))
    for name, limit in dict(run.settings.get("gates", {})).items():
        out[f"gates.{name}"] = limit
    out["historical_estimate"] = (
        f"{estimate.estimate_id} ({estimate.source}, {estimate.window_start}.."
        f"{estimate.window_end}, {'converged' if estimate.converged else 'NOT converged'})"
    )
    return out


def _known_windows(
    session: Session, run: RunRecord
) -> tuple[SeriesRecord | None, list[EstimateRecord]]:
    """The commodity's newest rolling series and its windows that ended by the trade date."""
    found = list_series(session=session, commodity=run.commodity)
    if not found:
        return None, []
    windows = series_estimates(session=session, series_id=found[0].series_id)
    return found[0], [w for w in windows if w.window_end <= run.trade_date]


def _estimate_used(
    estimate: EstimateRecord,
    series: SeriesRecord | None,
    windows: Sequence[EstimateRecord],
    k: float = DEFAULT_K,
) -> EstimateUsed:
    """The report's section on the estimate a run held, with the stability view over the
    windows of ``series`` known on the trade date (no hindsight)."""
    used = EstimateUsed(
        estimate_id=estimate.estimate_id,
        source=estimate.source,
        window_start=estimate.window_start,
        window_end=estimate.window_end,
        converged=estimate.converged,
        std_errors=dict(estimate.std_errors),
        k=k,
    )
    if series is None:
        return used
    label = (
        f"Rolling series {series.series_id} ({series.window_length} windows every {series.step})"
    )
    if not windows:
        return replace(used, series=label)
    view = assemble(series, windows, estimate, "held fixed by this run", k)
    return replace(
        used,
        series=label,
        windows=tuple(
            EstimateWindow(w.estimate_id, w.window_start, w.window_end, w.params, w.z, w.flags)
            for w in view.windows
        ),
        recommendation=view.recommendation,
    )


def _solve(fit: FitRecord) -> SolveInfo:
    return copy_fields(SolveInfo, fit)


def _frontier(
    day: DayQuotes, historical: TwoFactorParams, settings: CalibrationSettings
) -> tuple[tuple[FrontierRow, ...], tuple[float, ...], tuple[str, ...]]:
    """The frontier's rows and weights, and the calibration's warnings while re-solving it
    (one line each: they are shown on the page and by the command, never as raw warnings)."""
    weights = anchor_weights(settings.anchor_weight)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", CalibWarning)
        points = frontier(option_quotes(day), historical, weights, settings)
    notes = tuple(
        dict.fromkeys(
            f"frontier: {str(w.message).splitlines()[0]}"
            for w in caught
            if issubclass(w.category, CalibWarning)
        )
    )
    rows = tuple(FrontierRow(p.anchor_weight, p.distance, p.rmse, p.fit) for p in points)
    return rows, weights, notes


def report_inputs(
    sessions: sessionmaker[Session], run_id: int
) -> tuple[ReportInputs, tuple[float, ...]]:
    """The :class:`ReportInputs` of a stored run and the frontier's anchor weights.

    Raises
    ------
    UnknownRunError
        No run ``run_id``.
    RunNotFittedError
        The run failed: it has no parameters or residuals to show.
    """
    with sessions.begin() as session:
        run = require_run(session=session, run_id=run_id)
        fit = run.fit
        if fit is None:
            raise RunNotFittedError(run_id, run.failure_reason or "no reason stored")
        commodity = require_commodity(session=session, code=run.commodity)
        estimate, day = fitted_inputs(session, run)
        residuals = run_residuals(session=session, run_id=run_id)
        before = approved_set(session=session, commodity=run.commodity, as_of=run.created_at)
        series, windows = _known_windows(session, run)
    settings = RunSettings.from_dict(run.settings).calibration
    rows, weights, frontier_notes = _frontier(day, estimate.params, settings)
    by_id = {int(i): pos for pos, i in enumerate(day.options.row_id.tolist())}
    inputs = ReportInputs(
        commodity=Commodity(commodity.code, commodity.name, commodity.unit, commodity.currency),
        trade_date=run.trade_date,
        run=RunInfo(
            run_id=str(run.run_id),
            status=run.status,
            created_at=run.created_at,
            created_by=run.created_by,
            code_version=run.code_version,
            input_batches=tuple(str(b) for b in run.inputs.get("batch_ids", ())),
            inputs_hash=run.inputs_sha256,
        ),
        params=fit.params,
        historical=estimate.params,
        quotes=_quote_fits(day, residuals),
        curve=FuturesCurve(
            delivery=tuple(_day(x) for x in day.futures.delivery),
            t_delivery=year_fractions(run.trade_date, day.futures.delivery),
            settle=day.futures.settle,
        ),
        solve=_solve(fit),
        buckets=fit.buckets,
        constraints=fit.constraints,
        gates=tuple(_gate_row(g) for g in fit.gates),
        dropped=tuple(
            DroppedRow(_quote_label(day, by_id[x.quote_id]), x.reason) for x in fit.dropped
        ),
        frontier=rows,
        settings=_settings(run, estimate),
        warnings=tuple(w.splitlines()[0] for w in fit.warnings) + frontier_notes,
        previous=None
        if before is None or before.run_id == run.run_id
        else PreviousSet(before.run_id, before.trade_date, before.params),
        estimate=_estimate_used(estimate, series, windows),
    )
    return inputs, weights


def write_report(sessions: sessionmaker[Session], run_id: int, out_dir: Path) -> RunReport:
    """Render the fit report of a stored run into ``out_dir`` (``index.html`` + figures).

    Raises
    ------
    UnknownRunError, RunNotFittedError
        As :func:`report_inputs`.
    """
    inputs, weights = report_inputs(sessions, run_id)
    return RunReport(run_id, render_report(inputs, Path(out_dir)), weights, inputs.warnings)
