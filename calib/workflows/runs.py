"""The morning run: fit one day, gate it, store it; approve, reject and re-run stored runs.

Units of work
-------------
:func:`fit_day` reads the day's quotes and the historical estimate in one read transaction,
fits outside any transaction, then writes the run, its residuals and its first event in **one**
write transaction (SQLite ``BEGIN IMMEDIATE``; PostgreSQL row lock on the commodity, so gates
compare against the approved set that is current when the run is written). A fit that the
calibration refuses (too few quotes, conflicting constraints, solver failure, unusable quotes)
is stored as a ``failed`` run with its reason and status ``rejected``; the approved set is
never touched by it.

:func:`approve` appends ``approved`` for the run and ``superseded`` for the commodity's
previous approved run in one transaction, under the same lock; :func:`reject` appends
``rejected``.

Settings file
-------------
TOML with two optional tables: ``[calibration]`` (the fields of
:class:`~calib.calibrate.CalibrationSettings`) and ``[gates]`` (the fields of
:class:`GateLimits`), where ``[gates.<CODE>]`` overrides the gates for one commodity::

    [calibration]
    mode = "constant"
    yield_floor = 0.5

    [gates]
    max_rmse_vol_points = 1.0

    [gates.QLM]
    max_jump_rho = 0.1

Gates
-----
``solver_optimal`` (status ``optimal``, no caution flags), ``decay_bound``
(``sigma_yield <= rho kappa sigma_spot`` in every bucket, value = smallest slack),
``rmse_vol`` and ``max_error_vol`` (model minus market Black volatility over the fitted quotes,
in vol points), and ``jump_sigma_spot``, ``jump_sigma_yield`` (relative change) and
``jump_rho`` (absolute change) against the approved set in force; with no approved set yet the
jump gates pass with no value. ``--auto-approve`` approves only when every gate passes.
"""

from __future__ import annotations

import math
import os
import sys
import time
import tomllib
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, fields
from datetime import date
from pathlib import Path
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
    InputsChangedError,
    NoEstimateError,
    NoQuotesError,
    NotConvergedEstimateError,
    QuoteError,
    SettingError,
    SettingsFileError,
    UnknownEstimateError,
)
from calib.model import black76
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.store.base import utc_now
from calib.store.engine import begin_write
from calib.store.estimates import (
    EstimateRecord,
    get_estimate,
    latest_estimate,
    unconverged_estimate_ids,
)
from calib.store.quotes import DAYS_PER_YEAR, DayQuotes, load_day, require_commodity
from calib.store.runs import (
    RunRecord,
    add_residuals,
    add_run,
    append_event,
    latest_approved,
    latest_approved_stmt,
    lock_commodity,
    require_run,
    run_quotes,
)
from calib.workflows.provenance import code_version, inputs_sha256

PAUSE_IN_WRITE_ENV = "CALIB_TEST_PAUSE_IN_WRITE"
"""Test hook: seconds :func:`fit_day` sleeps inside its write transaction, after the run and its
residuals are inserted and before the commit (used to kill a fit mid-write in the tests)."""

CALIBRATION_FAILURES = CALIBRATION_ERRORS
"""What the calibration raises for a day it cannot fit; each becomes a stored failed run."""


# --- settings and gates ------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class GateLimits:
    """Limits a run must meet to be approved automatically.

    Defaults are common practice for a liquid futures-options market, not a published
    standard: the firm's model-validation policy sets the real limits.

    Attributes
    ----------
    max_rmse_vol_points : root mean square of model minus market Black vol, in vol points.
    max_error_vol_points : largest absolute vol error, in vol points.
    max_jump_sigma_spot, max_jump_sigma_yield : relative change against the approved set.
    max_jump_rho : absolute change of the correlation against the approved set.
    decay_tolerance : slack below zero still accepted by the decay-bound gate (solver noise).
    """

    max_rmse_vol_points: float = 1.0
    max_error_vol_points: float = 3.0
    max_jump_sigma_spot: float = 0.25
    max_jump_sigma_yield: float = 0.25
    max_jump_rho: float = 0.2
    decay_tolerance: float = 1e-8

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise SettingError(f"gates.{f.name}", value, "must be a real number")
            if not (math.isfinite(value) and value >= 0.0):
                raise SettingError(f"gates.{f.name}", value, "must be finite and >= 0")
            object.__setattr__(self, f.name, float(value))

    def to_dict(self) -> dict[str, float]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> GateLimits:
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise SettingError("gates", unknown, f"unknown key(s); known: {sorted(known)}")
        return cls(**dict(data))


@dataclass(frozen=True, slots=True)
class RunSettings:
    """The calibration settings and the gate limits of one commodity's runs."""

    calibration: CalibrationSettings
    gates: GateLimits

    def to_dict(self) -> dict[str, Any]:
        return {"calibration": self.calibration.to_dict(), "gates": self.gates.to_dict()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> RunSettings:
        return cls(
            calibration=CalibrationSettings.from_dict(dict(data.get("calibration", {}))),
            gates=GateLimits.from_dict(data.get("gates", {})),
        )


def load_settings(path: Path | None, commodity: str) -> RunSettings:
    """Run settings from a TOML file (see the module notes); defaults when ``path`` is None.

    Raises
    ------
    SettingsFileError
        The file cannot be read or parsed, holds unknown tables, or a bad value.
    """
    if path is None:
        return RunSettings(CalibrationSettings(), GateLimits())
    name = str(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SettingsFileError(name, "no such file") from None
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise SettingsFileError(name, f"not a TOML file ({exc})") from None
    unknown = sorted(set(data) - {"calibration", "gates"})
    if unknown:
        raise SettingsFileError(name, f"unknown table(s) {unknown}: use [calibration] and [gates]")
    gates = dict(data.get("gates", {}))
    per_commodity = {k: gates.pop(k) for k in list(gates) if isinstance(gates[k], dict)}
    gates.update(per_commodity.get(commodity, {}))
    try:
        return RunSettings.from_dict({"calibration": data.get("calibration", {}), "gates": gates})
    except SettingError as exc:
        raise SettingsFileError(name, str(exc)) from None


@dataclass(frozen=True, slots=True)
class Gate:
    """One gate's verdict: its value, its limit and whether it passed."""

    name: str
    value: float | str | None
    limit: float | str | None
    passed: bool
    detail: str

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def _relative(new: float, old: float) -> float:
    return abs(new - old) / abs(old) if old != 0.0 else (0.0 if new == old else math.inf)


def evaluate_gates(
    result: CalibrationResult, limits: GateLimits, approved: TwoFactorParams | None
) -> tuple[Gate, ...]:
    """The gates of the module notes for ``result``, against the ``approved`` set in force."""
    status_ok = result.status == "optimal" and not result.flags
    flags = f" ({', '.join(result.flags)})" if result.flags else ""
    gates = [
        Gate(
            "solver_optimal",
            f"{result.solver}: {result.status}{flags}",
            "optimal",
            status_ok,
            "",
        )
    ]
    slack = min(
        b.params.rho * b.params.kappa * b.params.sigma_spot - b.params.sigma_yield
        for b in result.buckets
    )
    gates.append(
        Gate(
            "decay_bound",
            slack,
            -limits.decay_tolerance,
            slack >= -limits.decay_tolerance,
            "smallest rho kappa sigma_spot - sigma_yield over the buckets",
        )
    )
    vol_points = 100.0 * np.asarray(result.vol_residual)
    finite = bool(np.all(np.isfinite(vol_points))) and vol_points.size > 0
    rmse = float(np.sqrt(np.mean(vol_points**2))) if finite else math.nan
    worst = float(np.max(np.abs(vol_points))) if finite else math.nan
    gates.append(
        Gate(
            "rmse_vol",
            rmse,
            limits.max_rmse_vol_points,
            rmse <= limits.max_rmse_vol_points,
            "vol points",
        )
    )
    gates.append(
        Gate(
            "max_error_vol",
            worst,
            limits.max_error_vol_points,
            worst <= limits.max_error_vol_points,
            "vol points",
        )
    )
    new = result.params
    jumps = (
        ("jump_sigma_spot", "sigma_spot", limits.max_jump_sigma_spot, True),
        ("jump_sigma_yield", "sigma_yield", limits.max_jump_sigma_yield, True),
        ("jump_rho", "rho", limits.max_jump_rho, False),
    )
    for name, field_, limit, relative in jumps:
        if approved is None:
            gates.append(Gate(name, None, limit, True, "no approved set yet"))
            continue
        a, b = getattr(new, field_), getattr(approved, field_)
        value = _relative(a, b) if relative else abs(a - b)
        kind = "relative" if relative else "absolute"
        gates.append(Gate(name, value, limit, value <= limit, f"{kind}, {b:.6g} -> {a:.6g}"))
    return tuple(gates)


# --- building the calibration's input from stored quotes ---------------------------------------


def _years(start: date, dates: Any) -> Any:
    days = (np.asarray(dates, dtype="datetime64[D]") - np.datetime64(start, "D")) / np.timedelta64(
        1, "D"
    )
    return np.asarray(days / DAYS_PER_YEAR, dtype=np.float64)


def option_quotes(day: DayQuotes) -> OptionQuotes:
    """The calibration's quotes for a stored day.

    Forwards are the day's futures settlements of each option's delivery; discount factors
    come from the day's zero curve at the option expiry; times are ACT/365 from the trade
    date. A quote with only an implied volatility gets its Black-76 premium at that
    volatility; bid and ask are used only when every quote has both. Labels are the
    ``option_quotes`` row ids.

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
    expiry = _years(day.trade_date, o.expiry)
    discount = day.rates.discount(o.expiry)
    premium = np.array(o.premium, dtype=np.float64)
    missing = np.isnan(premium)
    if missing.any():
        rate = -np.log(discount[missing]) / expiry[missing]
        premium[missing] = black76.price(
            forward[missing],
            o.strike[missing],
            expiry[missing],
            rate,
            o.implied_vol[missing],
            o.is_call[missing],
        )
    quoted = ~(np.isnan(o.bid) | np.isnan(o.ask))
    return OptionQuotes(
        expiry=expiry,
        maturity=_years(day.trade_date, o.delivery),
        is_call=np.asarray(o.is_call),
        strike=np.asarray(o.strike),
        forward=forward,
        discount=discount,
        premium=premium,
        bid=np.asarray(o.bid) if quoted.all() else None,
        ask=np.asarray(o.ask) if quoted.all() else None,
        labels=tuple(str(i) for i in o.row_id.tolist()),
    )


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
    """Fit ``day``; a refusal of the calibration becomes ``failure`` (its message).

    ``calibrator_for`` hands out a :class:`~calib.calibrate.Calibrator` built with
    ``settings`` for the day's quotes (a backfill re-solves one compiled problem); without it
    the problem is built for this day alone (:func:`calib.calibrate.fit`).
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


def _diagnostics(
    result: CalibrationResult, gates: tuple[Gate, ...], notes: tuple[str, ...]
) -> dict[str, Any]:
    return {
        "rmse": result.rmse,
        "max_error": result.max_error,
        "error_measure": result.settings.error_measure,
        "objective": result.objective,
        "fit": result.fit,
        "constraints": [c.to_dict() for c in result.constraints],
        "binding": list(result.binding),
        "solver": result.solver,
        "status": result.status,
        "iterations": result.iterations,
        "converged": result.converged,
        "flags": list(result.flags),
        "warnings": list(notes),
        "n_quotes": int(result.quote_index.size),
        "dropped": [{"quote_id": int(d.label), "reason": d.reason} for d in result.dropped],
        "gates": [g.to_dict() for g in gates],
        "all_gates_pass": all(g.passed for g in gates),
    }


def _buckets(result: CalibrationResult) -> list[dict[str, Any]]:
    return [{"start": b.start, "end": b.end, "params": b.params.to_dict()} for b in result.buckets]


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


# --- units of work -----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FitOutcome:
    """A stored run and what the morning run saw: gates, the set it would replace."""

    run: RunRecord
    previous: RunRecord | None
    """The approved run in force when this one was written (``None``: none yet)."""
    auto_approved: bool

    @property
    def gates(self) -> list[dict[str, Any]]:
        return list(self.run.diagnostics.get("gates", []))

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
            "gates": self.gates,
            "auto_approved": self.auto_approved,
            "previous_run_id": None if self.previous is None else self.previous.run_id,
            "change": self.change(),
        }


def _pause_for_tests() -> None:
    pause = os.environ.get(PAUSE_IN_WRITE_ENV)
    if pause:
        print(
            f"{PAUSE_IN_WRITE_ENV}: pausing {pause} s inside the write", file=sys.stderr, flush=True
        )
        time.sleep(float(pause))


def _approve_in(
    session: Session, run_id: int, commodity_id: int, *, by: str, note: str
) -> int | None:
    """Append ``approved`` (and ``superseded`` for the previous set); the caller holds the lock."""
    now = utc_now()
    previous = session.scalars(latest_approved_stmt(commodity_id, now)).one_or_none()
    append_event(session=session, run_id=run_id, to_status="approved", actor=by, note=note, at=now)
    if previous is not None and previous != run_id:
        append_event(
            session=session,
            run_id=previous,
            to_status="superseded",
            actor=by,
            note=f"superseded by run {run_id}",
            at=now,
        )
    return previous


@dataclass(frozen=True, slots=True)
class StoredAttempt:
    """What :func:`store_attempt` wrote: the run id, the set it was gated against, approval."""

    run_id: int
    previous: RunRecord | None
    auto_approved: bool


def store_attempt(
    sessions: sessionmaker[Session],
    day: DayQuotes,
    estimate_id: int,
    settings: RunSettings,
    attempt: Attempt,
    *,
    user: str,
    auto_approve: bool,
) -> StoredAttempt:
    """Store a fit of ``day`` in one write transaction: the run, its residuals, its first
    event, gated against the approved set in force (and approved if asked and every gate
    passes). A failed attempt is stored ``rejected`` with its reason.
    """
    (stored,) = store_attempts(
        sessions, [(day, attempt)], estimate_id, settings, user=user, auto_approve=auto_approve
    )
    return stored


def store_attempts(
    sessions: sessionmaker[Session],
    fits: Sequence[tuple[DayQuotes, Attempt]],
    estimate_id: int,
    settings: RunSettings,
    *,
    user: str,
    auto_approve: bool,
) -> list[StoredAttempt]:
    """:func:`store_attempt` for several days of one commodity, in order, in **one** write
    transaction: all of them are stored, or (interrupted, failed) none.

    Each day is gated against the approved set in force when it is written, which includes
    an earlier day of ``fits`` approved in this transaction.
    """
    if not fits:
        return []
    commodity_id = fits[0][0].commodity_id
    assert all(day.commodity_id == commodity_id for day, _ in fits), "one commodity at a time"
    run_settings = settings.to_dict()
    version = code_version()
    out: list[StoredAttempt] = []
    with sessions.begin() as session:
        begin_write(session)
        lock_commodity(session=session, commodity_id=commodity_id)
        # under the lock only these writes can change the approved set in force
        previous = latest_approved(session=session, commodity=fits[0][0].commodity)
        for day, attempt in fits:
            stored = _store_in(
                session,
                day,
                estimate_id,
                settings,
                run_settings,
                version,
                attempt,
                previous,
                user=user,
                auto_approve=auto_approve,
            )
            out.append(stored)
            if stored.auto_approved:
                previous = latest_approved(session=session, commodity=day.commodity)
        _pause_for_tests()
    return out


def _store_in(
    session: Session,
    day: DayQuotes,
    estimate_id: int,
    settings: RunSettings,
    run_settings: dict[str, Any],
    version: str,
    attempt: Attempt,
    previous: RunRecord | None,
    *,
    user: str,
    auto_approve: bool,
) -> StoredAttempt:
    """Write one day's run inside the caller's write transaction (which holds the lock),
    gated against ``previous``, the approved run in force."""
    inputs = _inputs(day)
    result = attempt.result
    gates: tuple[Gate, ...] = ()
    if result is not None:
        gates = evaluate_gates(
            result, settings.gates, None if previous is None else previous.params
        )
    run_id = add_run(
        session=session,
        commodity_id=day.commodity_id,
        trade_date=day.trade_date,
        created_at=utc_now(),
        created_by=user,
        estimate_id=estimate_id,
        mode=settings.calibration.mode,
        settings=run_settings,
        inputs=inputs,
        inputs_sha256=inputs_sha256(inputs),
        outcome="fitted" if result is not None else "failed",
        failure_reason=attempt.failure,
        params=None if result is None else result.params,
        buckets=None if result is None else _buckets(result),
        diagnostics={"failure": attempt.failure}
        if result is None
        else _diagnostics(result, gates, attempt.warnings),
        code_version=version,
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
        append_event(
            session=session, run_id=run_id, to_status="candidate", actor=user, note="fitted"
        )
    else:
        append_event(
            session=session,
            run_id=run_id,
            to_status="rejected",
            actor=user,
            note=f"fit failed: {attempt.failure}",
        )
    approved = auto_approve and result is not None and all(g.passed for g in gates)
    if approved:
        _approve_in(
            session, run_id, day.commodity_id, by=user, note="auto-approved: every gate passed"
        )
    return StoredAttempt(run_id, previous, approved)


def fit_day(
    sessions: sessionmaker[Session],
    commodity: str,
    trade_date: date,
    *,
    user: str,
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
    settings = settings or RunSettings(CalibrationSettings(), GateLimits())
    with sessions.begin() as session:
        day = load_day(session=session, commodity=commodity, trade_date=trade_date)
        estimate = choose_estimate(session, commodity, estimate_id)
    if not len(day.options) or not len(day.futures):
        what = "options" if len(day.futures) else "futures"
        raise NoQuotesError(commodity, f"no {what} stored for {trade_date}")
    attempt = attempt_fit(day, estimate.params, settings.calibration)
    stored = store_attempt(
        sessions, day, estimate.estimate_id, settings, attempt, user=user, auto_approve=auto_approve
    )
    run_id, previous, approved = stored.run_id, stored.previous, stored.auto_approved
    with sessions.begin() as session:
        run = require_run(session=session, run_id=run_id)
    return FitOutcome(run=run, previous=previous, auto_approved=approved)


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
    with sessions.begin() as session:
        begin_write(session)
        record = require_run(session=session, run_id=run_id)
        cid = require_commodity(session=session, code=record.commodity).id
        lock_commodity(session=session, commodity_id=cid)
        previous = _approve_in(session, run_id, cid, by=by, note=note)
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
        append_event(session=session, run_id=run_id, to_status="rejected", actor=by, note=note)
    with sessions.begin() as session:
        return require_run(session=session, run_id=run_id)


@dataclass(frozen=True, slots=True)
class Rerun:
    """A stored run fitted again from its stored inputs and settings."""

    run: RunRecord
    params: TwoFactorParams | None
    failure: str | None
    identical: bool
    """Parameters (and outcome) bit for bit equal to the stored run's."""
    differences: dict[str, float]
    """Per parameter that differs: new minus stored."""

    def to_dict(self) -> dict[str, Any]:
        return {
            "run_id": self.run.run_id,
            "identical": self.identical,
            "stored": None if self.run.params is None else self.run.params.to_dict(),
            "rerun": None if self.params is None else self.params.to_dict(),
            "failure": self.failure,
            "differences": self.differences,
            "code_version_stored": self.run.code_version,
            "code_version_now": code_version(),
        }


def rerun(sessions: sessionmaker[Session], run_id: int) -> Rerun:
    """Refit a run from the exact quote rows it used (by id) and its stored settings.

    Raises
    ------
    UnknownRunError
    InputsChangedError
        A stored row is missing, or the ids no longer hash to the stored ``inputs_sha256``.
    """
    with sessions.begin() as session:
        run = require_run(session=session, run_id=run_id)
        if inputs_sha256(dict(run.inputs)) != run.inputs_sha256:
            raise InputsChangedError(run_id, "the stored ids do not match their stored hash")
        ids = run.inputs
        day = run_quotes(session=session, run=run)
        estimate = get_estimate(session=session, estimate_id=run.estimate_id)
    for what, key in (
        ("futures", "futures_rows"),
        ("options", "option_rows"),
        ("rates", "rate_rows"),
    ):
        found = len(getattr(day, what))
        if found != len(ids[key]):
            raise InputsChangedError(run_id, f"{len(ids[key]) - found} {what} row(s) are missing")
    assert estimate is not None  # foreign key
    settings = RunSettings.from_dict(run.settings)
    attempt = attempt_fit(day, estimate.params, settings.calibration)
    new = None if attempt.result is None else attempt.result.params
    differences: dict[str, float] = {}
    if new is not None and run.params is not None:
        for n in PARAM_NAMES:
            delta = getattr(new, n) - getattr(run.params, n)
            if getattr(new, n) != getattr(run.params, n):
                differences[n] = delta
    identical = (new is None) == (run.params is None) and not differences
    return Rerun(run, new, attempt.failure, identical, differences)
