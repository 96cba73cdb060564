"""Hedge studies from the store: the model-world simulation of a sold, hedged option.

``simulate`` reads, in one read transaction, the pricing set (the latest approved one, one as
of a time, or a named run), the futures settlements and the zero curve of the start day (the
set's trade date unless another is given), and the world's set (the pricing set itself, another
run, or a JSON file); the numbers come from :mod:`calib.hedge`, outside any transaction.

Notes
-----
Times are ACT/365 from the start day; the rate is the zero rate to the option's expiry,
``r = -ln D(expiry) / t``, used for discounting and for cash accrual (constant over the study).
The world starts from the state whose closed-form curve is nearest to the start day's futures
(least squares in logs, under the world's set), and each leg is scaled once to start at its
settlement. Rebalancing dates are ``N = round(steps_per_year * t)`` (at least 1) equal steps.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from datetime import UTC, date, datetime, time, timedelta
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import (
    HEDGE_NO_SET,
    HEDGE_OPTION_LEGS,
    HEDGE_REPLAY_END,
    HEDGE_REPLAY_SETS,
    HEDGE_REPLAY_START,
    HEDGE_STEPS,
    HEDGE_WORLD_FILE,
    HEDGE_WORLD_RUN,
    SPREAD_EXPIRY,
    SPREAD_ORDER,
    SPREAD_RUN_OTHER,
    HedgeRequestError,
    ParameterError,
)
from calib.hedge.engine import HedgeResult, hedge_paths
from calib.hedge.history import HistoryBook, book_history
from calib.hedge.instruments import CalendarSpread, HedgedOption, VanillaOption, remaining_law
from calib.hedge.stats import QUANTILES, PnlStats, pnl_stats
from calib.hedge.valuation import value_and_ratios
from calib.hedge.world import initial_state, simulate_futures
from calib.model.black76 import Kind
from calib.model.spread import ForwardVols
from calib.model.twofactor import TwoFactorParams
from calib.record.codec import Encoded
from calib.store.quotes import (
    ZeroCurve,
    load_day,
    load_futures_history,
    require_commodity,
    trade_dates,
    year_fraction,
    year_fractions,
    zero_curves,
)
from calib.store.runs import RunRecord, approved_history, latest_approved, require_run
from calib.types import FloatArray
from calib.workflows.pricing import discount_to, fitted_run, quoted_settlements, run_vols

STEPS_PER_YEAR = 252
"""Default rebalancings per year (daily)."""

PATHS = 10_000
"""Default number of simulated paths."""

SEED = 20261202
"""Default seed of the simulation (the bootstrap of the standard errors uses ``seed + 1``)."""


@dataclass(frozen=True, slots=True)
class Trade:
    """The option a study sells, named by dates as ``calib price spread`` names them.

    A vanilla has ``future`` (the delivery of its future); a calendar spread has ``near`` and
    ``far`` (it pays on ``F(far) - F(near)``). ``expiry`` is the option's expiry date.
    """

    expiry: date
    strike: float
    kind: Kind = "call"
    future: date | None = None
    near: date | None = None
    far: date | None = None

    @property
    def legs(self) -> tuple[date, ...]:
        if self.future is not None:
            return (self.future,)
        assert self.near is not None and self.far is not None
        return (self.near, self.far)

    def describe(self) -> str:
        if self.future is not None:
            return f"{self.kind} on {self.future}, strike {self.strike:g}, expiry {self.expiry}"
        return (
            f"{self.kind} on far - near ({self.far} - {self.near}), strike {self.strike:g}, "
            f"expiry {self.expiry}"
        )

    def to_dict(self) -> dict[str, Any]:
        def iso(d: date | None) -> str | None:
            return None if d is None else d.isoformat()

        return {
            "instrument": "vanilla" if self.future is not None else "spread",
            "kind": self.kind,
            "strike": self.strike,
            "expiry": self.expiry.isoformat(),
            "future": iso(self.future),
            "near": iso(self.near),
            "far": iso(self.far),
        }


def check_trade(commodity: str, trade: Trade) -> None:
    """Exactly one of a vanilla's future or a spread's two legs, in order."""
    vanilla = trade.future is not None
    spread = trade.near is not None and trade.far is not None
    partial = (trade.near is None) != (trade.far is None)
    if vanilla == spread or partial:
        raise HedgeRequestError(commodity, HEDGE_OPTION_LEGS)
    if spread and not trade.near < trade.far:  # type: ignore[operator]
        raise HedgeRequestError(commodity, SPREAD_ORDER.format(near=trade.near, far=trade.far))


def option_for(trade: Trade, start: date) -> HedgedOption:
    """The numeric option of ``trade`` seen from ``start`` (times in years)."""
    call = trade.kind == "call"
    t = year_fraction(start, trade.expiry)
    if trade.future is not None:
        return VanillaOption(year_fraction(start, trade.future), t, trade.strike, call)
    assert trade.near is not None and trade.far is not None
    return CalendarSpread(
        year_fraction(start, trade.near), year_fraction(start, trade.far), t, trade.strike, call
    )


@dataclass(frozen=True, slots=True)
class HedgeSimulation:
    """The outcome of ``calib hedge sim``: the study's set-up, the per-path result, its stats."""

    commodity: str
    run: RunRecord
    world_source: str
    world: TwoFactorParams
    trade: Trade
    start: date
    futures0: tuple[float, ...]
    rate: float
    seed: int
    result: HedgeResult
    stats: PnlStats

    @property
    def premium(self) -> float:
        return float(self.result.premium[0])

    def to_dict(self) -> dict[str, Any]:
        s = self.stats
        mean_ccy = float(self.result.pnl.mean())
        return {
            "commodity": self.commodity,
            "run_id": self.run.run_id,
            "run_trade_date": self.run.trade_date.isoformat(),
            "world": self.world_source,
            "world_params": self.world.to_dict(),
            **self.trade.to_dict(),
            "start": self.start.isoformat(),
            "futures": list(self.futures0),
            "rate": self.rate,
            "seed": self.seed,
            "paths": self.result.n_paths,
            "steps": self.result.steps,
            "premium": self.premium,
            "mean": mean_ccy,
            "mean_pct": s.mean.value,
            "mean_pct_se": s.mean.se,
            "sd_pct": s.sd.value,
            "sd_pct_se": s.sd.se,
            "es95_pct": s.es95.value,
            "es95_pct_se": s.es95.se,
            "quantiles_pct": {q: s.quantiles[q].value for q in QUANTILES},
            "quantiles_pct_se": {q: s.quantiles[q].se for q in QUANTILES},
            "hedge_error_rms": float(np.sqrt(np.mean(self.result.hedge_error**2))),
        }

    def summary(self) -> str:
        s = self.stats
        lines = [
            f"{self.commodity} {self.trade.describe()}; sold on {self.start}",
            f"  pricing set: run {self.run.run_id} ({self.run.status}, fitted "
            f"{self.run.trade_date}); world: {self.world_source}",
            f"  futures {', '.join(f'{f:g}' for f in self.futures0)}; rate {self.rate:.4%}; "
            f"{self.result.n_paths} paths x {self.result.steps} rebalancings, seed {self.seed}",
            f"  premium          {self.premium:.6f}",
            "  P&L, % of premium (standard error):",
            f"    mean           {s.mean.value:+9.3f}  ({s.mean.se:.3f})",
            f"    sd             {s.sd.value:9.3f}  ({s.sd.se:.3f})",
        ]
        for q in QUANTILES:
            est = s.quantiles[q]
            lines.append(f"    {q:>2} % quantile  {est.value:+9.3f}  ({est.se:.3f})")
        lines.append(f"    95 % ES        {s.es95.value:+9.3f}  ({s.es95.se:.3f})")
        return "\n".join(lines)


def _run_in_force(
    session: Session, commodity: str, run_id: int | None, as_of: datetime | None
) -> RunRecord:
    require_commodity(session=session, code=commodity)
    if run_id is None:
        found = latest_approved(session=session, commodity=commodity, as_of=as_of)
        if found is None:
            when = "now" if as_of is None else f"as of {as_of.isoformat()}"
            raise HedgeRequestError(commodity, HEDGE_NO_SET.format(when=when))
        return found
    return fitted_run(session, commodity, run_id, partial(HedgeRequestError, commodity))


def _world_from_file(commodity: str, path: Path) -> TwoFactorParams:
    def bad(reason: str) -> HedgeRequestError:
        return HedgeRequestError(commodity, HEDGE_WORLD_FILE.format(path=path, reason=reason))

    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise bad("no such file") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise bad(f"not a JSON object ({exc})") from None
    if not isinstance(data, dict):
        raise bad("not a JSON object of the seven parameters")
    try:
        return TwoFactorParams.from_dict(data)
    except ParameterError as exc:
        raise bad(str(exc)) from None


def _world(
    session: Session, commodity: str, world: str | None, pricing: RunRecord
) -> tuple[str, TwoFactorParams]:
    assert pricing.params is not None
    if world is None:
        return f"the pricing set (run {pricing.run_id})", pricing.params
    if world.isdigit():
        run = require_run(session=session, run_id=int(world))
        if run.commodity != commodity:
            raise HedgeRequestError(
                commodity, SPREAD_RUN_OTHER.format(run_id=run.run_id, other=run.commodity)
            )
        if run.params is None:
            raise HedgeRequestError(commodity, HEDGE_WORLD_RUN.format(run_id=run.run_id))
        return f"run {run.run_id}", run.params
    return f"file {world}", _world_from_file(commodity, Path(world))


def simulate(
    sessions: sessionmaker[Session],
    commodity: str,
    trade: Trade,
    *,
    run_id: int | None = None,
    as_of: datetime | None = None,
    on: date | None = None,
    world: str | None = None,
    steps_per_year: int = STEPS_PER_YEAR,
    paths: int = PATHS,
    seed: int = SEED,
) -> HedgeSimulation:
    """Sell ``trade`` at the pricing set's price and hedge it on simulated model-world paths.

    Parameters
    ----------
    sessions : session factory of the store.
    commodity : commodity code.
    trade : the option (a vanilla or a calendar spread).
    run_id : the pricing set's run (default: the approved set in force at ``as_of``, or now).
    as_of : the time whose approved set prices and hedges (ignored with ``run_id``).
    on : the start day (default: the pricing set's trade date); its futures and curve are used.
    world : ``None`` (the pricing set), a run id, or a JSON file of the seven parameters.
    steps_per_year, paths, seed : rebalancing frequency, number of paths, random seed.

    Raises
    ------
    HedgeRequestError
        No set in force, a failed or foreign run, a bad world file, a leg not quoted on the
        start day, an expiry outside ``(start, first leg]``, bad counts.
    UnknownCommodityError, UnknownRunError
    """
    check_trade(commodity, trade)
    if steps_per_year < 1 or paths < 2:
        raise HedgeRequestError(commodity, HEDGE_STEPS.format(steps=steps_per_year, paths=paths))
    with sessions.begin() as session:
        run = _run_in_force(session, commodity, run_id, as_of)
        world_source, world_params = _world(session, commodity, world, run)
        day = on or run.trade_date
        quotes = load_day(session=session, commodity=commodity, trade_date=day)
    first = trade.legs[0]
    if not day < trade.expiry <= first:
        raise HedgeRequestError(
            commodity, SPREAD_EXPIRY.format(expiry=trade.expiry, day=day, near=first)
        )
    settles = quoted_settlements(quotes, trade.legs, partial(HedgeRequestError, commodity))
    option = option_for(trade, day)
    t = option.t_expiry
    discount = discount_to(quotes, trade.expiry)
    rate = -math.log(discount) / t
    vols: TwoFactorParams | ForwardVols = run_vols(run, day, t)
    curve_taus = year_fractions(day, quotes.futures.delivery)
    live = curve_taus >= 0.0
    state0 = initial_state(world_params, curve_taus[live], quotes.futures.settle[live], rate)
    steps = max(1, round(steps_per_year * t))
    times = np.linspace(0.0, t, steps + 1)
    futures = simulate_futures(
        world_params, option.t_legs, times, settles, state0, rate, paths, rng=seed
    )
    result = hedge_paths(option, vols, times, futures, rate)
    return HedgeSimulation(
        commodity=commodity,
        run=run,
        world_source=world_source,
        world=world_params,
        trade=trade,
        start=day,
        futures0=tuple(float(f) for f in settles),
        rate=rate,
        seed=seed,
        result=result,
        stats=pnl_stats(result.pnl_pct, seed=seed + 1),
    )


# --- replay on stored history ------------------------------------------------------------------

SETS_IN_FORCE = "in-force"
"""Each day's set: the approved set in force at that morning by the approval log."""

SETS_BY_TRADE_DATE = "by-trade-date"
"""Each day's set: the newest ever-approved run fitted on an earlier trading day."""

CURVE_LOOKBACK = 14
"""Calendar days before the start searched for a zero curve when the start day has none."""

MORNING = time(7, 0)
"""Default time (UTC) of the morning at which the day's set is taken (in-force mode)."""

NO_SET = "no set in force"
LATE_SET = "the set in force (run {run_id}) was fitted on {fitted}, not before the day"
NO_PRICE = "no settlement of {legs}"
NO_DAY = "no settlements stored (missing day)"
EXPIRY_FROM = "expiry settlement of {legs} taken from {day}"
NO_CURVE = "no zero curve stored yet: rate 0"
OLD_CURVE = "zero curve of {day} used"


@dataclass(frozen=True, slots=True)
class ReplayDay(Encoded):
    """One day of a replay: what was used, and the account after it."""

    day: date
    run_id: int | None
    futures: tuple[float, ...]
    value: float
    positions: tuple[float, ...]
    carried: bool
    margin: float
    cash: float
    pnl_marked: float
    """Cash less the option's model value."""
    hedge_error: float
    notes: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class HedgeReplay:
    """The outcome of ``calib hedge replay``: the account day by day and the final P&L."""

    commodity: str
    trade: Trade
    sets: str
    morning: time
    days: tuple[ReplayDay, ...]
    premium: float
    payoff: float
    pnl: float

    @property
    def pnl_pct(self) -> float:
        return 100.0 * self.pnl / self.premium

    def counts(self) -> dict[str, int]:
        """Days by what was missing (a day may count under several)."""

        def has(prefix: str) -> int:
            return sum(any(n.startswith(prefix) for n in d.notes) for d in self.days)

        return {
            "days": len(self.days),
            "carried": sum(d.carried for d in self.days),
            "no_set": has(NO_SET) + has(LATE_SET.split("{", 1)[0]),
            "no_price": has(NO_PRICE.split("{", 1)[0]),
            "missing_day": has(NO_DAY),
        }

    def to_dict(self) -> dict[str, Any]:
        errors = np.array([d.hedge_error for d in self.days[1:]])
        return {
            "commodity": self.commodity,
            **self.trade.to_dict(),
            "sets": self.sets,
            "morning": self.morning.isoformat(),
            "start": self.days[0].day.isoformat(),
            "premium": self.premium,
            "payoff": self.payoff,
            "pnl": self.pnl,
            "pnl_pct": self.pnl_pct,
            "hedge_error_rms": float(np.sqrt(np.nanmean(errors**2))) if errors.size else 0.0,
            "counts": self.counts(),
            "days": [d.to_dict() for d in self.days],
        }

    def summary(self) -> str:
        legs = len(self.trade.legs)
        head = f"{'day':<10} {'run':>5} " + " ".join(f"{'F' + str(i + 1):>10}" for i in range(legs))
        head += f" {'value':>10} " + " ".join(f"{'pos' + str(i + 1):>8}" for i in range(legs))
        head += f" {'margin':>10} {'P&L':>10}  notes"
        lines = [
            f"{self.commodity} {self.trade.describe()}; sold on {self.days[0].day}, sets "
            f"{self.sets}"
            + (f" at {self.morning.strftime('%H:%M')} UTC" if self.sets == SETS_IN_FORCE else ""),
            head,
        ]
        for d in self.days:
            run = "-" if d.run_id is None else str(d.run_id)
            row = f"{d.day.isoformat():<10} {run:>5} " + " ".join(f"{f:>10.4f}" for f in d.futures)
            row += f" {d.value:>10.4f} " + " ".join(f"{p:>+8.4f}" for p in d.positions)
            row += f" {d.margin:>+10.4f} {d.pnl_marked:>+10.4f}  " + "; ".join(d.notes)
            lines.append(row.replace("nan", "  -"))
        c = self.counts()
        lines.append(
            f"premium {self.premium:.6f}, payoff {self.payoff:.6f}, P&L {self.pnl:+.6f} "
            f"({self.pnl_pct:+.3f} % of premium); {c['days']} days, {c['carried']} carried "
            f"({c['no_set']} without a set, {c['no_price']} without a price, "
            f"{c['missing_day']} missing)"
        )
        return "\n".join(lines)


def weekdays(start: date, end: date) -> list[date]:
    days = [start + timedelta(days=i) for i in range((end - start).days + 1)]
    return [d for d in days if d.weekday() < 5]


def _sets_by_day(
    session: Session, commodity: str, days: list[date], sets: str, morning: time
) -> dict[date, tuple[RunRecord | None, str | None]]:
    """Each day's set and, where there is none to use, why."""
    out: dict[date, tuple[RunRecord | None, str | None]] = {}
    if sets == SETS_IN_FORCE:
        for day in days:
            run = latest_approved(
                session=session, commodity=commodity, as_of=datetime.combine(day, morning, UTC)
            )
            if run is None:
                out[day] = (None, NO_SET)
            elif run.trade_date >= day:
                out[day] = (None, LATE_SET.format(run_id=run.run_id, fitted=run.trade_date))
            else:
                out[day] = (run, None)
        return out
    history = approved_history(session=session, commodity=commodity)
    chosen: dict[int, RunRecord] = {}
    for day in days:
        earlier = [a for a in history if a.trade_date < day]
        if not earlier:
            out[day] = (None, NO_SET)
            continue
        best = max(earlier, key=lambda a: (a.trade_date, a.approved_at))
        if best.run_id not in chosen:
            chosen[best.run_id] = require_run(session=session, run_id=best.run_id)
        out[day] = (chosen[best.run_id], None)
    return out


def replay(
    sessions: sessionmaker[Session],
    commodity: str,
    trade: Trade,
    *,
    start: date,
    sets: str = SETS_IN_FORCE,
    morning: time = MORNING,
) -> HedgeReplay:
    """Sell ``trade`` on ``start`` and rehedge it every day on the stored history.

    Each weekday (and any other day with settlements) from ``start`` to the day before expiry:
    the day's set (``sets``: the approved set
    in force at ``morning`` UTC that day by the approval log, refusing one fitted on that day or
    later; or the newest ever-approved run fitted on an earlier day), the day's settlements of
    the legs and its zero curve. A day without a set or without a leg's settlement keeps the
    position it had (carried) and is reported; weekdays with no settlements at all are listed
    as missing days. The payoff is settled on the legs' settlements on the expiry (or the last
    ones before it, reported). See :mod:`calib.hedge.history` for the account.

    Raises
    ------
    HedgeRequestError
        Bad trade, unknown set mode, the sale day without a set or a leg's settlement, or an
        expiry after the stored history.
    UnknownCommodityError
    """
    check_trade(commodity, trade)
    if sets not in (SETS_IN_FORCE, SETS_BY_TRADE_DATE):
        raise HedgeRequestError(commodity, HEDGE_REPLAY_SETS.format(value=sets))
    first = trade.legs[0]
    if not start < trade.expiry <= first:
        raise HedgeRequestError(
            commodity, SPREAD_EXPIRY.format(expiry=trade.expiry, day=start, near=first)
        )
    with sessions.begin() as session:
        stored = trade_dates(session=session, commodity=commodity, start=start)
        futures = load_futures_history(
            session=session, commodity=commodity, start=start, end=trade.expiry
        )
        curves = zero_curves(
            session=session, start=start - timedelta(days=CURVE_LOOKBACK), end=trade.expiry
        )
        settled = {d for d in stored if d < trade.expiry}  # weekend sessions included
        days = sorted(set(weekdays(start, trade.expiry)) | settled | {start, trade.expiry})
        days = [d for d in days if d < trade.expiry] + [trade.expiry]
        chosen = _sets_by_day(session, commodity, days[:-1], sets, morning)
    if not stored or stored[-1] < trade.expiry:
        last = stored[-1] if stored else start
        raise HedgeRequestError(commodity, HEDGE_REPLAY_END.format(expiry=trade.expiry, last=last))
    F, expiry_note = leg_table(futures, trade, days, set(stored))
    valued = value_days(trade, days, set(stored), F, expiry_note, curves, chosen)
    return _replay_days(commodity, sets, morning, valued)


def _leg_prices(futures: Any, legs: tuple[date, ...], days: list[date]) -> FloatArray:
    """``(n_days, n_legs)`` settlements, NaN where none is stored."""
    table = futures.pivot(index="trade_date", columns="delivery", values="settle")
    wanted = [np.datetime64(d, "ns") for d in legs]
    index = [np.datetime64(d, "ns") for d in days]
    return np.array(table.reindex(index=index, columns=wanted).to_numpy(dtype=np.float64))


def leg_table(
    futures: Any, trade: Trade, days: list[date], stored: set[date]
) -> tuple[FloatArray, str | None]:
    """The legs' settlements on ``days`` (the last one the expiry) from a futures history
    frame; a leg with no settlement on the expiry is settled on its last one before it (the
    note says which)."""
    legs = trade.legs
    F = _leg_prices(futures, legs, days)
    expiry_row = F[-1]
    if not np.any(np.isnan(expiry_row)):
        return F, None
    before = _leg_prices(futures, legs, sorted(d for d in stored if d <= trade.expiry))
    taken = []
    for j in np.flatnonzero(np.isnan(expiry_row)):
        col = before[:, j]
        ok = np.flatnonzero(np.isfinite(col))
        expiry_row[j] = col[ok[-1]]
        taken.append(str(legs[j]))
    return F, EXPIRY_FROM.format(legs=", ".join(taken), day="the last settlement")


@dataclass(frozen=True, slots=True)
class ValuedDays:
    """An option valued on each day of a history, before any account is booked.

    ``values``, ``ratios``, ``rates``, ``run_ids`` cover ``days[:-1]`` (NaN where the option
    could not be valued: no set, or a leg without a settlement); ``futures`` and ``notes``
    cover every day, the last the expiry. A replay sold on ``days[k]`` books ``[k:]``: a day's
    value, ratios and rate do not depend on the sale day.
    """

    trade: Trade
    days: tuple[date, ...]
    futures: FloatArray
    values: FloatArray
    ratios: FloatArray
    rates: FloatArray
    run_ids: tuple[int | None, ...]
    notes: tuple[tuple[str, ...], ...]


def value_days(
    trade: Trade,
    days: list[date],
    stored: set[date],
    F: FloatArray,
    expiry_note: str | None,
    curves: dict[date, ZeroCurve],
    chosen: dict[date, tuple[RunRecord | None, str | None]],
) -> ValuedDays:
    """Value ``trade`` and take its hedge ratios on each day of ``days[:-1]`` with the day's
    chosen set, the legs' settlements ``F`` (:func:`leg_table`) and the day's zero curve (or
    the last one before it); what is missing is noted on the day."""
    legs = trade.legs
    notes: list[list[str]] = [[] for _ in days]
    if expiry_note is not None:
        notes[-1].append(expiry_note)
    t = np.array([year_fraction(days[0], d) for d in days])
    n = len(days) - 1
    values = np.full(n, np.nan)
    ratios = np.full((n, len(legs)), np.nan)
    rates = np.zeros(n)
    run_ids: list[int | None] = []
    earlier = [d for d in curves if d < days[0] and len(curves[d])]
    last_curve: ZeroCurve | None = curves[max(earlier)] if earlier else None
    for k, day in enumerate(days[:-1]):
        run, why = chosen[day]
        run_ids.append(None if run is None else run.run_id)
        curve = curves.get(day)
        last_curve = curve if curve is not None and len(curve) else last_curve
        if day not in stored:
            notes[k].append(NO_DAY)
        elif np.any(np.isnan(F[k])):
            missing = [str(leg) for leg, f in zip(legs, F[k], strict=True) if np.isnan(f)]
            notes[k].append(NO_PRICE.format(legs=", ".join(missing)))
        if why is not None:
            notes[k].append(why)
        if last_curve is None:
            notes[k].append(NO_CURVE)
        elif last_curve.trade_date != day:
            notes[k].append(OLD_CURVE.format(day=last_curve.trade_date))
        if last_curve is not None:  # discount factors from this day (1 today on its own curve)
            ahead = np.array([day, days[k + 1], trade.expiry], dtype="datetime64[D]")
            today, step_discount, discount = (float(x) for x in last_curve.discount(ahead))
            step_discount, discount = step_discount / today, discount / today
            rates[k] = -math.log(step_discount) / (t[k + 1] - t[k])
        else:
            discount = 1.0
        if run is None or np.any(np.isnan(F[k])):
            continue
        option = option_for(trade, day)
        vols = run_vols(run, day, option.t_expiry)
        law = remaining_law(option, vols, np.zeros(1))
        value, ratio = value_and_ratios(
            option,
            float(law.var_near[0]),
            float(law.var_far[0]),
            float(law.cov[0]),
            F[k][None, :],
            discount,
        )
        values[k], ratios[k] = value[0], ratio[0]
    return ValuedDays(
        trade=trade,
        days=tuple(days),
        futures=F,
        values=values,
        ratios=ratios,
        rates=rates,
        run_ids=tuple(run_ids),
        notes=tuple(tuple(x) for x in notes),
    )


def book_from(commodity: str, valued: ValuedDays, first: int = 0) -> tuple[HistoryBook, float]:
    """The account of the option sold on ``valued.days[first]``, and its payoff.

    Raises
    ------
    HedgeRequestError
        The option has no value on the sale day (no set, or a leg without a settlement).
    """
    days = valued.days[first:]
    if np.isnan(valued.values[first]):
        reason = "; ".join(valued.notes[first]) or NO_SET
        raise HedgeRequestError(commodity, HEDGE_REPLAY_START.format(day=days[0], reason=reason))
    trade = valued.trade
    F = valued.futures[first:]
    option0 = option_for(trade, days[0])
    payoff = float(option0.payoff(F[-1][None, :])[0])
    t = np.array([year_fraction(days[0], d) for d in days])
    book = book_history(
        t, F, valued.values[first:], valued.ratios[first:], payoff, valued.rates[first:]
    )
    return book, payoff


def _replay_days(commodity: str, sets: str, morning: time, valued: ValuedDays) -> HedgeReplay:
    book, payoff = book_from(commodity, valued)
    F, n = valued.futures, len(valued.days) - 1
    run_ids = [*valued.run_ids, None]
    out = tuple(
        ReplayDay(
            day=day,
            run_id=run_ids[k],
            futures=tuple(float(f) for f in F[k]),
            value=float(valued.values[k]) if k < n else payoff,
            positions=tuple(float(p) for p in book.positions[k]),
            carried=bool(book.carried[k]),
            margin=float(book.margin[k]),
            cash=float(book.cash[k]),
            pnl_marked=float(book.marked[k]),
            hedge_error=float(book.hedge_error[k]),
            notes=valued.notes[k],
        )
        for k, day in enumerate(valued.days)
    )
    return HedgeReplay(
        commodity=commodity,
        trade=valued.trade,
        sets=sets,
        morning=morning,
        days=out,
        premium=book.premium,
        payoff=payoff,
        pnl=book.pnl,
    )
