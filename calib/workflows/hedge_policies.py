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
The fits are a backfill of every ``(commodity, policy)`` study
(:func:`calib.workflows.backfill.backfill_many`: days read, shipped as plain data, fitted on the
executor, written by the caller, resumable); the replays go to the same
:class:`~calib.compute.executor.Executor`, one ``(commodity, policy)`` per unit
(:func:`replay_unit`: a module-level function of plain data; workers never open the store).
Reads are one read transaction per commodity.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from calib.compute.executor import Executor, InlineExecutor
from calib.errors import HEDGE_REPLAY_END, SPREAD_EXPIRY, HedgeRequestError, InputError
from calib.output.text import vol_points
from calib.policy.settings import RunSettings, load_settings
from calib.store.engine import Store
from calib.store.quotes import (
    ZeroCurve,
    all_commodity_codes,
    load_futures_history,
    require_commodity,
    trade_dates,
    zero_curves,
)
from calib.store.runs import RunRecord, study_runs
from calib.types import FloatArray
from calib.workflows.backfill import BackfillJob, BackfillReport, backfill_many
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
    settings = {(c, p.name): load_settings(p.path, c) for c in codes for p in policies}
    for code in codes:
        check_trade(code, trade)
        if not trade.expiry <= trade.legs[0]:
            raise HedgeRequestError(
                code, SPREAD_EXPIRY.format(expiry=trade.expiry, day=start, near=trade.legs[0])
            )
    fits = _fit_studies(store, codes, policies, settings, trade, start, by, run)
    units: list[ReplayUnit] = []
    partial_rows: list[PolicyRow] = []
    for code in codes:
        made = _replay_units(store, code, policies, fits, trade, start, end, every)
        units.extend(u for u, _ in made)
        partial_rows.extend(r for _, r in made)
    rows = tuple(
        dataclasses.replace(row, trades=outcomes)
        for row, outcomes in zip(partial_rows, run.map(replay_unit, units), strict=True)
    )
    return PolicyComparison(trade, start, end, every, rows)


def _fit_studies(
    store: Store,
    codes: list[str],
    policies: list[Policy],
    settings: dict[tuple[str, str], RunSettings],
    trade: Trade,
    start: date,
    by: str,
    run: Executor,
) -> dict[tuple[str, str], BackfillReport]:
    """Backfill every ``(commodity, policy)`` study from ``start`` to the day before expiry
    (:func:`calib.workflows.backfill.backfill_many`: units through ``run``, resumable)."""
    jobs = [
        BackfillJob(code, settings[code, p.name], study=p.name) for code in codes for p in policies
    ]
    last = trade.expiry - timedelta(days=1)
    reports = backfill_many(store, jobs, start, max(start, last), by=by, executor=run)
    return {(j.commodity, j.study or ""): r for j, r in zip(jobs, reports, strict=True)}


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


def _replay_units(
    store: Store,
    code: str,
    policies: list[Policy],
    fits: dict[tuple[str, str], BackfillReport],
    trade: Trade,
    start: date,
    end: date,
    every: int,
) -> list[tuple[ReplayUnit, PolicyRow]]:
    """One commodity's replay unit per policy (read in one transaction) and its row so far
    (everything but the trades)."""
    last = trade.expiry - timedelta(days=1)
    with store.sessions.begin() as session:
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
        runs = {}
        for p in policies:
            report = fits[code, p.name]
            found = study_runs(session=session, commodity=code, study=p.name, start=first, end=last)
            runs[p.name] = [
                r
                for r in found
                if r.estimate_id == report.estimate_id
                and inputs_sha256(dict(r.settings)) == report.settings_sha256
            ]
    F, expiry_note = leg_table(futures, trade, days, set(stored))
    index = {d: k for k, d in enumerate(days)}
    trading = set(d for d in days[:-1] if d in settled)
    out = []
    for p in policies:
        mine = runs[p.name]
        chosen, failed = choose_sets(days[:-1], mine)
        unit = ReplayUnit(
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
        vps = [vp[0] for r in mine if r.fit and (vp := vol_points(r.fit.to_dict())) is not None]
        report = fits[code, p.name]
        row = PolicyRow(
            commodity=code,
            policy=p.name,
            path=str(p.path),
            settings_sha256=report.settings_sha256,
            trades=(),
            fits=PolicyFits(
                fitted=report.count("fitted"),
                failed=report.count("failed"),
                no_quotes=report.count("no_quotes"),
                skipped=len(report.skipped),
            ),
            days=len({r.trade_date for r in mine} & trading),
            gate_failed_days=failed,
            fit_rmse_vp=float(np.mean(vps)) if vps else float("nan"),
        )
        out.append((unit, row))
    return out
