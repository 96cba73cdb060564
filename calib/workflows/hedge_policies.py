"""Calibration policies compared by how the options they price can be hedged.

A *policy* is a calibration settings file (:mod:`calib.policy.settings`) with a name. For each
commodity and policy, :func:`compare_policies`

1. **fits** every trading day from the first sale day to the day before the option's expiry
   with the policy's settings, as runs of the *study* named after the policy: never approved
   or served (:class:`~calib.errors.StudyRunError`), their stored settings carry the study's
   name, so their resume key (estimate id and settings hash, as in
   :mod:`calib.workflows.backfill`) never matches a production run's. A day already stored
   with that key is skipped (an interrupted comparison resumes). Each study run is gated
   against the study's newest earlier run whose gates all passed, as if the policy had run
   every morning;
2. **replays** the same option sold every ``every``-th trading day of ``start..end`` and
   hedged to expiry, each day with the policy's newest study run fitted on or before that day
   whose gates all passed (a day whose own run failed its gates or its fit carries the last
   such set, and says so; before the first one the hedge is carried, reported);
3. gives **one row per policy**: trades, mean, sd, worst and 5 % quantile of the final P&L in %
   of premium, RMS daily hedge error, mean fit RMSE (vol points) and the share of days whose
   gates failed.

Units of work
-------------
Reads are one read transaction per commodity; the fits of one ``(commodity, policy)`` are
handed out :data:`DAYS_PER_UNIT` days at a time, and the replays one ``(commodity, policy)``
at a time, to an :class:`~calib.estimate.executor.Executor` (:func:`fit_unit`,
:func:`replay_unit`: module-level functions of plain data; workers never open the store). The
caller writes each fit unit's runs in one write transaction
(:func:`calib.workflows.fit.store_attempts`).
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass
from datetime import date, timedelta
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from calib.calibrate import CalibrationSettings
from calib.errors import HEDGE_REPLAY_END, SPREAD_EXPIRY, HedgeRequestError, InputError
from calib.estimate.executor import Executor, InlineExecutor
from calib.model.twofactor import TwoFactorParams
from calib.output.text import vol_points
from calib.policy.settings import RunSettings, load_settings
from calib.store.engine import Store
from calib.store.quotes import (
    DayQuotes,
    ZeroCurve,
    all_commodity_codes,
    load_days,
    load_futures_history,
    require_commodity,
    trade_dates,
    zero_curves,
)
from calib.store.runs import RunKey, RunRecord, run_keys, study_runs
from calib.types import FloatArray
from calib.workflows.backfill import Calibrators
from calib.workflows.fit import Attempt, attempt_fit, choose_estimate, store_attempts
from calib.workflows.fit import study_settings as stored_settings
from calib.workflows.hedge import (
    CURVE_LOOKBACK,
    Trade,
    ValuedDays,
    book_from,
    check_trade,
    leg_table,
    value_days,
    weekdays,
)
from calib.workflows.provenance import inputs_sha256

DAYS_PER_UNIT = 16
"""Days of one ``(commodity, policy)`` fitted in one unit of work and stored in one write."""

EVERY = 5
"""Default number of trading days between two sales of the option."""

NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
"""A policy's name: the study's name in the store."""

NO_STUDY_SET = "no study run of this policy with every gate passed yet"
SET_CARRIED = "{why}: the set of {fitted} (run {run_id}) used"
GATES_FAILED = "run {run_id} failed its gates"
FIT_FAILED = "run {run_id} failed to fit"
NOT_FITTED = "no study run of the day"


class PolicyError(InputError):
    """A policy that cannot be compared as given (nothing is fitted or replayed)."""


@dataclass(frozen=True, slots=True)
class Policy:
    """A named calibration settings file."""

    name: str
    path: Path

    @classmethod
    def parse(cls, spec: str) -> Policy:
        """``NAME=FILE`` or ``FILE`` (named after the file's stem).

        Raises
        ------
        PolicyError
            A name that is not 1-64 letters, digits, ``_``, ``.``, ``-`` (starting with a
            letter or digit).
        """
        name, sep, path = spec.partition("=")
        if not sep:
            name, path = Path(spec).stem, spec
        if not NAME.match(name):
            raise PolicyError(
                f"policy {spec!r}: the name {name!r} must be 1-64 letters, digits, '_', '.' "
                "or '-', starting with a letter or digit (give NAME=FILE)"
            )
        return cls(name, Path(path))


# --- plain-data units of work ------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FitUnit:
    """Days of one commodity to fit with one policy's settings."""

    commodity: str
    policy: str
    historical: TwoFactorParams
    settings: CalibrationSettings
    days: tuple[DayQuotes, ...]


def fit_unit(unit: FitUnit) -> tuple[Attempt | None, ...]:
    """The fit of each day of ``unit`` (``None``: the day has no options), one compiled
    problem per shape re-solved (:class:`~calib.workflows.backfill.Calibrators`)."""
    calibrators = Calibrators(unit.settings)
    return tuple(
        attempt_fit(day, unit.historical, unit.settings, calibrator_for=calibrators)
        if len(day.options)
        else None
        for day in unit.days
    )


@dataclass(frozen=True, slots=True)
class ReplayUnit:
    """One commodity's history valued under one policy, and the days the option is sold."""

    commodity: str
    policy: str
    trade: Trade
    days: tuple[date, ...]
    stored: frozenset[date]
    futures: FloatArray
    expiry_note: str | None
    curves: dict[date, ZeroCurve]
    chosen: dict[date, tuple[RunRecord | None, str | None]]
    starts: tuple[int, ...]


@dataclass(frozen=True, slots=True)
class TradeOutcome:
    """One sale replayed to expiry (``reason`` set: it could not be sold that day)."""

    start: date
    premium: float
    pnl: float
    pnl_pct: float
    hedge_errors: FloatArray
    carried: int
    reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            "start": self.start.isoformat(),
            "premium": _json_num(self.premium),
            "pnl": _json_num(self.pnl),
            "pnl_pct": _json_num(self.pnl_pct),
            "hedge_error_rms": _json_num(_rms(self.hedge_errors)),
            "carried_days": self.carried,
            "not_sold": self.reason,
        }


def replay_unit(unit: ReplayUnit) -> tuple[TradeOutcome, ...]:
    """Value the option once on every day, then book each sale from its day to expiry."""
    valued = value_days(
        unit.trade,
        list(unit.days),
        set(unit.stored),
        unit.futures,
        unit.expiry_note,
        unit.curves,
        unit.chosen,
    )
    return tuple(_outcome(unit.commodity, valued, k) for k in unit.starts)


def _outcome(commodity: str, valued: ValuedDays, first: int) -> TradeOutcome:
    day = valued.days[first]
    try:
        book, _ = book_from(commodity, valued, first)
    except HedgeRequestError as exc:
        nan = float("nan")
        return TradeOutcome(day, nan, nan, nan, np.empty(0), 0, exc.reason)
    errors = book.hedge_error[1:]
    return TradeOutcome(
        start=day,
        premium=book.premium,
        pnl=book.pnl,
        pnl_pct=book.pnl_pct,
        hedge_errors=errors[np.isfinite(errors)],
        carried=int(book.carried.sum()),
    )


def _json_num(x: float) -> float | None:
    """``x``, or ``None`` (JSON null) for NaN: a quantity with nothing to measure."""
    return None if np.isnan(x) else x


def _rms(x: FloatArray) -> float:
    return float(np.sqrt(np.mean(x**2))) if x.size else float("nan")


# --- the result --------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class PolicyFits:
    """What the fitting step did for one ``(commodity, policy)``."""

    fitted: int
    failed: int
    no_quotes: int
    skipped: int


@dataclass(frozen=True, slots=True)
class PolicyRow:
    """One policy's line of the comparison (one commodity)."""

    commodity: str
    policy: str
    path: str
    settings_sha256: str
    trades: tuple[TradeOutcome, ...]
    fits: PolicyFits
    days: int
    """Trading days of the replay window (first sale to the day before expiry) with a study
    run (a day without options has none)."""
    gate_failed_days: int
    """Of those, days whose study run failed its fit or its gates."""
    fit_rmse_vp: float
    """Mean fit RMSE of the window's fitted study runs, vol points (NaN: none known)."""

    @property
    def sold(self) -> tuple[TradeOutcome, ...]:
        return tuple(t for t in self.trades if t.reason is None)

    @property
    def pnl_pct(self) -> FloatArray:
        return np.array([t.pnl_pct for t in self.sold])

    def stats(self) -> dict[str, float]:
        """Mean, sd, worst and 5 % quantile of the final P&L in % of premium; RMS daily
        hedge error (currency per option, every day of every sold trade)."""
        p = self.pnl_pct
        nan = float("nan")
        errors = np.concatenate([t.hedge_errors for t in self.sold]) if self.sold else np.empty(0)
        return {
            "mean_pct": float(p.mean()) if p.size else nan,
            "sd_pct": float(p.std(ddof=1)) if p.size > 1 else nan,
            "worst_pct": float(p.min()) if p.size else nan,
            "q5_pct": float(np.quantile(p, 0.05)) if p.size else nan,
            "hedge_error_rms": _rms(errors),
        }

    def to_dict(self, *, with_trades: bool = True) -> dict[str, Any]:
        out: dict[str, Any] = {
            "commodity": self.commodity,
            "policy": self.policy,
            "settings_file": self.path,
            "settings_sha256": self.settings_sha256,
            "trades": len(self.sold),
            "not_sold": len(self.trades) - len(self.sold),
            **{k: _json_num(v) for k, v in self.stats().items()},
            "fit_rmse_vol_points": _json_num(self.fit_rmse_vp),
            "gate_failed_share": self.gate_failed_days / self.days if self.days else None,
            "days": self.days,
            "gate_failed_days": self.gate_failed_days,
            "fitted": self.fits.fitted,
            "fit_failed": self.fits.failed,
            "no_quotes": self.fits.no_quotes,
            "skipped": self.fits.skipped,
        }
        if with_trades:
            out["trade_list"] = [t.to_dict() for t in self.trades]
        return out


@dataclass(frozen=True, slots=True)
class PolicyComparison:
    """The outcome of ``calib hedge policies``: one row per commodity and policy."""

    trade: Trade
    start: date
    end: date
    every: int
    rows: tuple[PolicyRow, ...]

    def to_list(self) -> list[dict[str, Any]]:
        """One object per policy (and commodity): the stable keys of ``--json``."""
        head = {**self.trade.to_dict(), "from": self.start.isoformat(), "to": self.end.isoformat()}
        return [{**r.to_dict(), **head, "every": self.every} for r in self.rows]


# --- the unit of work --------------------------------------------------------------------------


def _key(settings: RunSettings, study: str) -> str:
    return inputs_sha256(stored_settings(settings, study))


def compare_policies(
    store: Store,
    commodities: list[str] | None,
    policies: list[Policy],
    trade: Trade,
    *,
    start: date,
    end: date,
    every: int = EVERY,
    by: str,
    executor: Executor | None = None,
) -> PolicyComparison:
    """Fit each policy's study runs over the window (resumable), then replay the same sales
    under each; see the module notes.

    Parameters
    ----------
    store : the store.
    commodities : commodity codes (``None``: every registered commodity).
    policies : the policies (distinct names).
    trade : the option sold (a vanilla or a calendar spread, by dates).
    start, end : the first and last possible sale day; sales on every ``every``-th trading
        day of ``start..min(end, expiry - 1 day)``.
    by : recorded as the study runs' creator.
    executor : where fits and replays run (default: this process).

    Raises
    ------
    PolicyError, SettingsFileError, HedgeRequestError, UnknownCommodityError, NoEstimateError
    """
    if not policies:
        raise PolicyError("name at least one policy (--policy NAME=FILE)")
    names = [p.name for p in policies]
    if len(set(names)) != len(names):
        raise PolicyError(f"policy names must differ, got {names}")
    if every < 1:
        raise PolicyError(f"--every must be at least 1, not {every}")
    if start > end:
        raise PolicyError(f"--from {start} is after --to {end}")
    run = executor or InlineExecutor()
    with store.sessions.begin() as session:
        codes = commodities or all_commodity_codes(session=session)
        for code in codes:
            require_commodity(session=session, code=code)
    rows: list[PolicyRow] = []
    for code in codes:
        settings = {p.name: load_settings(p.path, code) for p in policies}
        check_trade(code, trade)
        if not trade.expiry <= trade.legs[0]:
            raise HedgeRequestError(
                code, SPREAD_EXPIRY.format(expiry=trade.expiry, day=start, near=trade.legs[0])
            )
        fits = _fit_policies(store, code, policies, settings, trade, start, by, run)
        rows.extend(
            _replay_policies(store, code, policies, settings, trade, start, end, every, fits, run)
        )
    return PolicyComparison(trade, start, end, every, tuple(rows))


def _fit_policies(
    store: Store,
    code: str,
    policies: list[Policy],
    settings: dict[str, RunSettings],
    trade: Trade,
    start: date,
    by: str,
    run: Executor,
) -> dict[str, PolicyFits]:
    """Fit every missing day of each policy's study (units through ``run``); the caller
    stores each unit in one write transaction."""
    last = trade.expiry - timedelta(days=1)
    with store.sessions.begin() as session:
        estimate = choose_estimate(session, code, None)
        dates = trade_dates(session=session, commodity=code, start=start, end=last)
        keys = run_keys(session=session, commodity=code, start=start, end=last)
        units: list[FitUnit] = []
        skipped: dict[str, int] = {}
        for p in policies:
            key = _key(settings[p.name], p.name)
            done = _days_keyed(keys, estimate.estimate_id, key)
            todo = [d for d in dates if d not in done]
            skipped[p.name] = len(dates) - len(todo)
            for i in range(0, len(todo), DAYS_PER_UNIT):
                days = load_days(session=session, commodity=code, dates=todo[i : i + DAYS_PER_UNIT])
                units.append(
                    FitUnit(
                        code, p.name, estimate.params, settings[p.name].calibration, tuple(days)
                    )
                )
    counts = {p.name: [0, 0, 0] for p in policies}
    for unit, attempts in zip(units, run.map(fit_unit, units), strict=True):
        policy = settings[unit.policy]
        key = _key(policy, unit.policy)
        pairs = [(d, a) for d, a in zip(unit.days, attempts, strict=True) if a is not None]
        counts[unit.policy][2] += len(unit.days) - len(pairs)

        stored = store_attempts(
            store.sessions,
            pairs,
            estimate.estimate_id,
            policy,
            by=by,
            auto_approve=False,
            skip_stored=partial(
                _stored_days, code, unit.days[0].trade_date, last, estimate.estimate_id, key
            ),
            study=unit.policy,
        )
        for (_, attempt), s in zip(pairs, stored, strict=True):
            if s.run_id is None:
                skipped[unit.policy] += 1
            else:
                counts[unit.policy][0 if attempt.failure is None else 1] += 1
    return {
        p.name: PolicyFits(
            fitted=counts[p.name][0],
            failed=counts[p.name][1],
            no_quotes=counts[p.name][2],
            skipped=skipped[p.name],
        )
        for p in policies
    }


def _days_keyed(keys: list[RunKey], estimate_id: int, key: str) -> set[date]:
    """The days of ``keys`` with a run of this estimate and this settings hash."""
    return {
        k.trade_date
        for k in keys
        if k.estimate_id == estimate_id and inputs_sha256(dict(k.settings)) == key
    }


def _stored_days(
    code: str, start: date, end: date, estimate_id: int, key: str, session: Session
) -> set[date]:
    """Asked under the write lock: the days of ``start..end`` stored meanwhile."""
    keys = run_keys(session=session, commodity=code, start=start, end=end)
    return _days_keyed(keys, estimate_id, key)


def _portable(run: RunRecord) -> RunRecord:
    """``run`` without its read-only mappings and events (plain data for an executor)."""
    return dataclasses.replace(run, settings={}, inputs={}, events=())


def choose_sets(
    days: list[date], runs: list[RunRecord]
) -> tuple[dict[date, tuple[RunRecord | None, str | None]], int]:
    """Each day's set under a policy: its newest study run fitted on or before the day whose
    gates all passed (noted when it is not the day's own run); and the number of days with
    whose own run failed its fit or its gates."""
    by_day = {r.trade_date: r for r in runs}  # runs by id within a day: the newest wins
    chosen: dict[date, tuple[RunRecord | None, str | None]] = {}
    current: RunRecord | None = None
    failed = 0
    for day in days:
        own = by_day.get(day)
        why: str | None = None
        if own is None:
            why = NOT_FITTED
        elif own.fit is None:
            why = FIT_FAILED.format(run_id=own.run_id)
        elif not own.fit.all_gates_pass:
            why = GATES_FAILED.format(run_id=own.run_id)
        else:
            current = _portable(own)
        if why is not None and own is not None:
            failed += 1
        if why is None:
            chosen[day] = (current, None)
        elif current is None:
            chosen[day] = (None, f"{NO_STUDY_SET} ({why})")
        else:
            note = SET_CARRIED.format(why=why, fitted=current.trade_date, run_id=current.run_id)
            chosen[day] = (current, note)
    return chosen, failed


def _replay_policies(
    store: Store,
    code: str,
    policies: list[Policy],
    settings: dict[str, RunSettings],
    trade: Trade,
    start: date,
    end: date,
    every: int,
    fits: dict[str, PolicyFits],
    run: Executor,
) -> list[PolicyRow]:
    last = trade.expiry - timedelta(days=1)
    with store.sessions.begin() as session:
        estimate = choose_estimate(session, code, None)
        stored = trade_dates(session=session, commodity=code, start=start)
        sale_days = [d for d in stored if d <= min(end, last)][::every]
        if not sale_days:
            raise HedgeRequestError(
                code, SPREAD_EXPIRY.format(expiry=trade.expiry, day=start, near=trade.legs[0])
            )
        if stored[-1] < trade.expiry:
            raise HedgeRequestError(
                code, HEDGE_REPLAY_END.format(expiry=trade.expiry, last=stored[-1])
            )
        first = sale_days[0]
        futures = load_futures_history(
            session=session, commodity=code, start=first, end=trade.expiry
        )
        curves = zero_curves(
            session=session, start=first - timedelta(days=CURVE_LOOKBACK), end=trade.expiry
        )
        settled = {d for d in stored if d < trade.expiry}
        days = sorted(set(weekdays(first, trade.expiry)) | settled | {trade.expiry})
        days = [d for d in days if first <= d < trade.expiry] + [trade.expiry]
        runs = {
            p.name: [
                r
                for r in study_runs(
                    session=session, commodity=code, study=p.name, start=first, end=last
                )
                if r.estimate_id == estimate.estimate_id
                and inputs_sha256(dict(r.settings)) == _key(settings[p.name], p.name)
            ]
            for p in policies
        }
    F, expiry_note = leg_table(futures, trade, days, set(stored))
    index = {d: k for k, d in enumerate(days)}
    trading = [d for d in days[:-1] if d in settled]
    units, extras = [], []
    for p in policies:
        chosen, failed = choose_sets(days[:-1], runs[p.name])
        units.append(
            ReplayUnit(
                code,
                p.name,
                trade,
                tuple(days),
                frozenset(stored),
                F,
                expiry_note,
                curves,
                chosen,
                tuple(index[d] for d in sale_days),
            )
        )
        fitted = [r for r in runs[p.name] if r.fit is not None]
        vps = [vp[0] for r in fitted if (vp := vol_points(r.fit.to_dict())) is not None]  # type: ignore[union-attr]
        judged = len({r.trade_date for r in runs[p.name]} & set(trading))
        extras.append((failed, judged, float(np.mean(vps)) if vps else float("nan")))
    rows = []
    for p, outcomes, (gate_failed, judged, rmse) in zip(
        policies, run.map(replay_unit, units), extras, strict=True
    ):
        rows.append(
            PolicyRow(
                commodity=code,
                policy=p.name,
                path=str(p.path),
                settings_sha256=_key(settings[p.name], p.name),
                trades=outcomes,
                fits=fits[p.name],
                days=judged,
                gate_failed_days=gate_failed,
                fit_rmse_vp=rmse,
            )
        )
    return rows
