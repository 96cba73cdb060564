"""The morning run: fit one day, gate it, store it (one write transaction).

:func:`fit_day` reads the day's quotes and the historical estimate in one read transaction,
fits outside any transaction, then writes the run, its residuals and its first event in **one**
write transaction (SQLite ``BEGIN IMMEDIATE``; PostgreSQL row lock on the commodity, so gates
compare against the approved set that is current when the run is written). A fit that the
calibration refuses (too few quotes, conflicting constraints, solver failure, unusable quotes)
is stored as a ``failed`` run with its reason and status ``rejected``; the approved set is
never touched by it. The settings file and the gates are :mod:`calib.policy`; what a run
stores is :class:`calib.record.fit.FitRecord`.
"""

from __future__ import annotations

import warnings
from bisect import bisect_left
from collections.abc import Callable, Collection, Sequence
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.calibrate import (
    CalibrationResult,
    CalibrationSettings,
    Calibrator,
    OptionQuotes,
    fit,
)
from calib.errors import (
    CALIBRATION_ERRORS,
    CalibWarning,
    NoEstimateError,
    NoQuotesError,
    NotConvergedEstimateError,
    QuoteError,
    UnknownEstimateError,
)
from calib.model import american, black76
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.policy.gates import CurveMove, curve_move, evaluate_gates
from calib.policy.settings import RunSettings, default_settings
from calib.record.fit import Dropped, FitRecord, Gate
from calib.store.base import utc_now
from calib.store.engine import begin_write
from calib.store.estimates import (
    EstimateRecord,
    get_estimate,
    latest_estimate,
    unconverged_estimate_ids,
)
from calib.store.quotes import (
    DayQuotes,
    current_quotes,
    load_day,
    previous_trade_date,
    trade_dates,
    year_fractions,
)
from calib.store.runs import (
    RunRecord,
    add_first_event,
    add_residuals,
    add_run,
    approvals_held,
    latest_approved,
    lock_commodity,
    require_run,
    run_quotes,
    study_baseline,
)
from calib.types import FloatArray
from calib.workflows.approve import approve_in
from calib.workflows.provenance import code_version, inputs_sha256

CALIBRATION_FAILURES = CALIBRATION_ERRORS
"""What the calibration raises for a day it cannot fit; each becomes a stored failed run."""


# --- building the calibration's input from stored quotes ---------------------------------------


def option_quotes(day: DayQuotes) -> OptionQuotes:
    """The calibration's quotes for a stored day.

    Forwards are the day's futures settlements of each option's delivery; discount factors
    come from the day's zero curve at the option expiry; times are ACT/365 from the trade
    date. A quote with only an implied volatility gets its premium at that volatility
    (Black-76, or the American pricer for an American quote); bid and ask are used only when
    every quote has both. Labels are the ``option_quotes`` row ids; the style is the stored
    one (a day without American quotes is the all-European case).

    Raises
    ------
    QuoteError
        An option whose delivery has no futures settlement that day, or other unusable
        values (the calibration's own checks).
    """
    o = day.options
    forward = day.futures.settle_for(o.delivery)
    if np.isnan(forward).any():
        j = int(np.argmax(np.isnan(forward)))
        raise QuoteError(
            "forward",
            f"missing: no futures settlement for delivery {o.delivery[j]} (row {o.row_id[j]})",
        )
    t_expiry = year_fractions(day.trade_date, o.expiry)
    discount = day.rates.discount(o.expiry)
    premium = np.array(o.premium, dtype=np.float64)
    missing = np.isnan(premium)
    for style, pricer in ((~o.american, black76.price), (o.american, american.price)):
        fill = missing & style
        if fill.any():
            premium[fill] = pricer(
                forward[fill],
                o.strike[fill],
                t_expiry[fill],
                -np.log(discount[fill]) / t_expiry[fill],
                o.implied_vol[fill],
                o.is_call[fill],
            )
    quoted = ~(np.isnan(o.bid) | np.isnan(o.ask))
    return OptionQuotes(
        t_expiry=t_expiry,
        t_delivery=year_fractions(day.trade_date, o.delivery),
        is_call=np.asarray(o.is_call),
        strike=np.asarray(o.strike),
        forward=forward,
        discount=discount,
        premium=premium,
        bid=np.asarray(o.bid) if quoted.all() else None,
        ask=np.asarray(o.ask) if quoted.all() else None,
        labels=tuple(str(i) for i in o.row_id.tolist()),
        american=np.asarray(o.american) if o.american.any() else None,
    )


def early_exercise(day: DayQuotes) -> FloatArray:
    """Each stored option's early-exercise premium at its own implied volatility.

    0 for a European quote; for an American one its American premium less the Black-76
    premium at its American implied volatility (that of its premium, else the stored one).
    NaN where there is none: no futures settlement for its delivery that day, or no American
    implied volatility (e.g. a premium at intrinsic value).
    """
    o = day.options
    out = np.zeros(len(o))
    am = np.flatnonzero(o.american)
    if am.size == 0:
        return out
    F = day.futures.settle_for(o.delivery[am])
    T = year_fractions(day.trade_date, o.expiry[am])
    r = -np.log(day.rates.discount(o.expiry[am])) / T
    K, call, premium = o.strike[am], o.is_call[am], o.premium[am]
    with np.errstate(invalid="ignore", divide="ignore"):
        vol = np.where(
            np.isnan(premium),
            o.implied_vol[am],
            american.implied_vol(premium, F, K, T, r, call),
        )
        out[am] = american.early_exercise_premium(F, K, T, r, vol, call)
    return out


def _inputs(day: DayQuotes) -> dict[str, Any]:
    return {
        "futures_rows": sorted(day.futures.row_id.tolist()),
        "option_rows": sorted(day.options.row_id.tolist()),
        "rate_rows": sorted(day.rates.row_id.tolist()),
        "batch_ids": list(day.batch_ids),
        "as_of": day.as_of.isoformat(),
    }


@dataclass(frozen=True, slots=True)
class Attempt:
    """What a fit of one day gave: a result, or the reason there is none."""

    result: CalibrationResult | None
    failure: str | None
    warnings: tuple[str, ...]


def attempt_fit(
    day: DayQuotes,
    historical: TwoFactorParams,
    settings: CalibrationSettings,
    *,
    calibrator_for: Callable[[OptionQuotes], Calibrator] | None = None,
) -> Attempt:
    """Fit ``day`` holding ``historical`` fixed; a refusal of the calibration becomes
    ``failure`` (its message).

    ``calibrator_for`` hands out a :class:`~calib.calibrate.Calibrator` built with
    ``settings`` for the day's quotes (a backfill re-solves one compiled problem); without it
    the problem is built for this day alone (:func:`calib.calibrate.fit`). The calibration's
    warnings are caught and kept, one line each, in ``warnings`` (and stored with the run).
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", CalibWarning)
        try:
            quotes = option_quotes(day)
            if calibrator_for is None:
                result = fit(quotes, historical, settings)
            else:
                result = calibrator_for(quotes).fit(quotes, historical)
        except CALIBRATION_FAILURES as exc:
            return Attempt(None, f"{type(exc).__name__}: {exc}", ())
    notes = tuple(str(w.message) for w in caught if issubclass(w.category, CalibWarning))
    return Attempt(result, None, notes)


def fit_record(
    result: CalibrationResult, gates: Sequence[Gate], warnings_: Sequence[str]
) -> FitRecord:
    """The stored-fit record of ``result``: every :class:`~calib.record.fit.FitRecord` field
    that the result has under the same name, plus the gates, warnings and what is derived."""
    same = {
        name: getattr(result, name)
        for name in FitRecord.__dataclass_fields__
        if name not in ("dropped", "gates", "warnings") and hasattr(result, name)
    }
    return FitRecord(
        **same,
        error_measure=result.settings.error_measure,
        n_quotes=int(result.quote_index.size),
        dropped=tuple(Dropped(int(d.label), d.reason) for d in result.dropped),
        gates=tuple(gates),
        warnings=tuple(warnings_),
    )


# --- the estimate the fit holds fixed ----------------------------------------------------------


def choose_estimate(session: Session, commodity: str, estimate_id: int | None) -> EstimateRecord:
    """The named estimate (of this commodity, converged), else the newest converged one.

    Raises
    ------
    UnknownEstimateError, NotConvergedEstimateError, NoEstimateError
    """
    if estimate_id is None:
        found = latest_estimate(session=session, commodity=commodity)
        if found is None:
            raise NoEstimateError(
                commodity, unconverged_estimate_ids(session=session, commodity=commodity)
            )
        return found
    named = get_estimate(session=session, estimate_id=estimate_id)
    if named is None:
        raise UnknownEstimateError(estimate_id)
    if named.commodity != commodity:
        raise UnknownEstimateError(estimate_id, f" for {commodity} (it is {named.commodity}'s)")
    if not named.converged:
        raise NotConvergedEstimateError(estimate_id, named.message)
    return named


def fitted_inputs(session: Session, run: RunRecord) -> tuple[EstimateRecord, DayQuotes]:
    """What ``run`` was fitted from: the estimate it held fixed and its quote rows (by id)."""
    estimate = get_estimate(session=session, estimate_id=run.estimate_id)
    assert estimate is not None  # foreign key
    return estimate, run_quotes(session=session, run=run)


# --- units of work -----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FitOutcome:
    """A stored run and what the morning run saw: gates, the set it would replace."""

    run: RunRecord
    previous: RunRecord | None
    """The approved run in force when this one was written (``None``: none yet)."""
    auto_approved: bool

    @property
    def gates(self) -> tuple[Gate, ...]:
        return () if self.run.fit is None else self.run.fit.gates

    def change(self) -> dict[str, dict[str, float]] | None:
        """Per parameter: previous approved value, new value, difference (``None``: no pair)."""
        if self.previous is None or self.previous.params is None or self.run.params is None:
            return None
        old, new = self.previous.params, self.run.params
        return {
            n: {
                "approved": getattr(old, n),
                "new": getattr(new, n),
                "change": getattr(new, n) - getattr(old, n),
            }
            for n in PARAM_NAMES
        }

    def to_dict(self) -> dict[str, Any]:
        return {
            **self.run.to_dict(),
            "gates": [g.to_dict() for g in self.gates],
            "auto_approved": self.auto_approved,
            "previous_run_id": None if self.previous is None else self.previous.run_id,
            "change": self.change(),
        }


@dataclass(frozen=True, slots=True)
class StoredAttempt:
    """What :func:`store_attempts` wrote for a day: the run id, the set it was gated against,
    approval; ``run_id`` is ``None`` when the day was skipped (already stored, see
    ``skip_stored``)."""

    run_id: int | None
    previous: RunRecord | None
    auto_approved: bool


def store_attempt(
    sessions: sessionmaker[Session],
    day: DayQuotes,
    estimate_id: int,
    settings: RunSettings,
    attempt: Attempt,
    *,
    by: str,
    auto_approve: bool,
) -> StoredAttempt:
    """Store a fit of ``day`` in one write transaction: the run, its residuals, its first
    event, gated against the approved set in force (and approved if asked and every gate
    passes). A failed attempt is stored ``rejected`` with its reason.
    """
    (stored,) = store_attempts(
        sessions, [(day, attempt)], estimate_id, settings, by=by, auto_approve=auto_approve
    )
    return stored


def store_attempts(
    sessions: sessionmaker[Session],
    fits: Sequence[tuple[DayQuotes, Attempt]],
    estimate_id: int,
    settings: RunSettings,
    *,
    by: str,
    auto_approve: bool,
    skip_stored: Callable[[Session], Collection[date]] | None = None,
    study: str | None = None,
) -> list[StoredAttempt]:
    """:func:`store_attempt` for several days of one commodity, in order, in **one** write
    transaction: all of them are stored, or (interrupted, failed) none.

    Each day is gated against the approved set in force when it is written, which includes
    an earlier day of ``fits`` approved in this transaction. ``skip_stored`` is asked, under
    the commodity's write lock, which days already have their run (stored by another writer
    since the caller looked): those are not stored again (a backfill's claim on its days).

    ``study`` stores the runs as runs of that policy study (never approved or served; the
    name is part of their stored settings): each is gated against the study's newest earlier
    run whose gates all passed, as if the policy had run every morning.
    """
    assert study is None or not auto_approve, "a study run is never approved"
    if not fits:
        return []
    commodity_id = fits[0][0].commodity_id
    assert all(day.commodity_id == commodity_id for day, _ in fits), "one commodity at a time"
    run_settings = study_settings(settings, study)
    version = code_version()
    out: list[StoredAttempt] = []
    with approvals_held(sessions), sessions.begin() as session:
        begin_write(session)
        lock_commodity(session=session, commodity_id=commodity_id)
        # under the lock only these writes can change the approved set in force
        taken = set() if skip_stored is None else set(skip_stored(session))
        previous = latest_approved(session=session, commodity=fits[0][0].commodity)
        moves = curve_moves(session, [day for day, attempt in fits if attempt.result is not None])
        for day, attempt in fits:
            if day.trade_date in taken:
                out.append(StoredAttempt(None, previous, False))
                continue
            if study is not None:
                previous = study_baseline(
                    session=session, commodity_id=commodity_id, study=study, before=day.trade_date
                )
            stored = _store_in(
                session,
                day,
                moves.get(day.trade_date),
                estimate_id,
                settings,
                run_settings,
                version,
                attempt,
                previous,
                by=by,
                auto_approve=auto_approve,
                study=study,
            )
            out.append(stored)
            if stored.auto_approved:
                previous = latest_approved(session=session, commodity=day.commodity)
    return out


def _store_in(
    session: Session,
    day: DayQuotes,
    move: CurveMove | None,
    estimate_id: int,
    settings: RunSettings,
    run_settings: dict[str, Any],
    version: str,
    attempt: Attempt,
    previous: RunRecord | None,
    *,
    by: str,
    auto_approve: bool,
    study: str | None = None,
) -> StoredAttempt:
    """Write one day's run inside the caller's write transaction (which holds the lock),
    gated against ``previous``, the approved run in force, and ``move``, the day's curve
    move (:func:`curve_moves`)."""
    inputs = _inputs(day)
    result = attempt.result
    gates: tuple[Gate, ...] = ()
    record = None
    if result is not None:
        gates = evaluate_gates(
            result,
            settings.gates,
            None if previous is None else previous.params,
            move,
        )
        record = fit_record(result, gates, attempt.warnings)
    run_id = add_run(
        session=session,
        commodity_id=day.commodity_id,
        trade_date=day.trade_date,
        created_at=utc_now(),
        created_by=by,
        estimate_id=estimate_id,
        mode=settings.calibration.mode,
        settings=run_settings,
        inputs=inputs,
        inputs_sha256=inputs_sha256(inputs),
        failure_reason=attempt.failure,
        fit=record,
        code_version=version,
        study=study,
    )
    if result is not None:
        add_residuals(
            session=session,
            run_id=run_id,
            quote_id=[int(x) for x in np.asarray(result.labels)],
            columns={
                "market_price": result.market_price,
                "model_price": result.model_price,
                "market_vol": result.market_vol,
                "model_vol": result.model_vol,
                "price_residual": result.price_residual,
                "vol_residual": result.vol_residual,
                "weight": result.weight,
            },
        )
    add_first_event(
        session=session,
        run_id=run_id,
        commodity_id=day.commodity_id,
        outcome="failed" if record is None else "fitted",
        by=by,
        note="fitted" if record is not None else f"fit failed: {attempt.failure}",
    )
    approved = auto_approve and record is not None and record.all_gates_pass
    if approved:
        note = "auto-approved: every gate passed"
        approve_in(session, run_id, day.commodity_id, by=by, note=note)
    return StoredAttempt(run_id, previous, approved)


def curve_moves(session: Session, days: Sequence[DayQuotes]) -> dict[date, CurveMove | None]:
    """Per day of ``days`` (one commodity), its futures curve against the previous stored
    trading day's, as known at the day's ``as_of`` (``None``: no earlier day).

    A few queries for all of ``days`` (per ``as_of`` they were read at: the previous trading
    day of the first, the trading days up to the last, their futures), whatever the length
    of the stored history.
    """
    out: dict[date, CurveMove | None] = {}
    by_as_of: dict[datetime, list[DayQuotes]] = {}
    for day in days:
        by_as_of.setdefault(day.as_of, []).append(day)
    for as_of, group in by_as_of.items():
        first = min(day.trade_date for day in group)
        earliest = previous_trade_date(
            session=session, commodity_id=group[0].commodity_id, before=first, as_of=as_of
        )
        known = trade_dates(
            session=session,
            commodity=group[0].commodity,
            start=earliest or first,
            end=max(day.trade_date for day in group) - timedelta(days=1),
            as_of=as_of,
        )
        before = {
            day.trade_date: known[k - 1] if (k := bisect_left(known, day.trade_date)) else None
            for day in group
        }
        out.update((d, None) for d, prior in before.items() if prior is None)
        wanted = sorted({prior for prior in before.values() if prior is not None})
        if not wanted:
            continue
        rows = current_quotes(
            session=session,
            kind="futures",
            commodity_ids=[group[0].commodity_id],
            start=wanted[0],
            end=wanted[-1],
            as_of=as_of,
        )
        on = rows["trade_date"].to_numpy()
        delivery = rows["delivery"].to_numpy().astype("datetime64[D]")
        settle = rows["settle"].to_numpy(dtype=np.float64, na_value=np.nan)
        for day in group:
            prior = before[day.trade_date]
            if prior is None:
                continue
            mine = on == prior
            out[day.trade_date] = curve_move(
                day.futures.delivery, day.futures.settle, delivery[mine], settle[mine], prior
            )
    return out


def study_settings(settings: RunSettings, study: str | None) -> dict[str, Any]:
    """The settings stored with a run: those of ``settings``, plus ``study`` for a study run
    (so its settings hash, the resume key, never matches a production run's)."""
    out = settings.to_dict()
    if study is not None:
        out["study"] = study
    return out


def fit_day(
    sessions: sessionmaker[Session],
    commodity: str,
    trade_date: date,
    *,
    by: str,
    settings: RunSettings | None = None,
    estimate_id: int | None = None,
    auto_approve: bool = False,
) -> FitOutcome:
    """Fit one day's options, store the run (candidate, or rejected if it failed), gate it.

    Raises
    ------
    UnknownCommodityError, NoQuotesError
        Unknown commodity, or no futures or options stored for the day (nothing stored).
    NoEstimateError, UnknownEstimateError, NotConvergedEstimateError
        No usable historical estimate (nothing stored).
    """
    settings = settings or default_settings()
    with sessions.begin() as session:
        day = load_day(session=session, commodity=commodity, trade_date=trade_date)
        estimate = choose_estimate(session, commodity, estimate_id)
    if not len(day.options) or not len(day.futures):
        what = "options" if len(day.futures) else "futures"
        raise NoQuotesError(commodity, f"no {what} stored for {trade_date}")
    attempt = attempt_fit(day, estimate.params, settings.calibration)
    stored = store_attempt(
        sessions, day, estimate.estimate_id, settings, attempt, by=by, auto_approve=auto_approve
    )
    assert stored.run_id is not None  # nothing is skipped without skip_stored
    with sessions.begin() as session:
        run = require_run(session=session, run_id=stored.run_id)
    return FitOutcome(run=run, previous=stored.previous, auto_approved=stored.auto_approved)
