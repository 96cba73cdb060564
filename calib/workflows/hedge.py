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

import csv
import json
import math
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import (
    HEDGE_NO_SET,
    HEDGE_OPTION_LEGS,
    HEDGE_STEPS,
    HEDGE_WORLD_FILE,
    HEDGE_WORLD_RUN,
    SPREAD_EXPIRY,
    SPREAD_NOT_QUOTED,
    SPREAD_ORDER,
    SPREAD_RUN_FAILED,
    SPREAD_RUN_OTHER,
    HedgeRequestError,
    ParameterError,
)
from calib.hedge.engine import HedgeResult, hedge_paths
from calib.hedge.instruments import CalendarSpread, HedgedOption, VanillaOption
from calib.hedge.stats import QUANTILES, PnlStats, pnl_stats
from calib.hedge.world import initial_state, simulate_futures
from calib.model.black76 import Kind
from calib.model.spread import ForwardVols
from calib.model.twofactor import TwoFactorParams
from calib.store.quotes import DAYS_PER_YEAR, load_day, require_commodity, year_fractions
from calib.store.runs import RunRecord, latest_approved, require_run
from calib.workflows.pricing import run_vols

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


def _years(start: date, end: date) -> float:
    return (end - start).days / DAYS_PER_YEAR


def option_for(trade: Trade, start: date) -> HedgedOption:
    """The numeric option of ``trade`` seen from ``start`` (times in years)."""
    call = trade.kind == "call"
    t = _years(start, trade.expiry)
    if trade.future is not None:
        return VanillaOption(_years(start, trade.future), t, trade.strike, call)
    assert trade.near is not None and trade.far is not None
    return CalendarSpread(
        _years(start, trade.near), _years(start, trade.far), t, trade.strike, call
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
    run = require_run(session=session, run_id=run_id)
    if run.commodity != commodity:
        raise HedgeRequestError(
            commodity, SPREAD_RUN_OTHER.format(run_id=run_id, other=run.commodity)
        )
    if run.params is None:
        raise HedgeRequestError(commodity, SPREAD_RUN_FAILED.format(run_id=run_id))
    return run


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
    legs = np.array(trade.legs, dtype="datetime64[D]")
    settles = quotes.futures.settle_for(legs)
    for delivery, value in zip(trade.legs, settles, strict=True):
        if np.isnan(value):
            raise HedgeRequestError(commodity, SPREAD_NOT_QUOTED.format(delivery=delivery, day=day))
    option = option_for(trade, day)
    t = option.expiry
    discount = float(quotes.rates.discount(np.array([trade.expiry], dtype="datetime64[D]"))[0])
    rate = -math.log(discount) / t
    vols: TwoFactorParams | ForwardVols = run_vols(run, day, t)
    curve_taus = year_fractions(day, quotes.futures.delivery)
    live = curve_taus >= 0.0
    state0 = initial_state(world_params, curve_taus[live], quotes.futures.settle[live], rate)
    steps = max(1, round(steps_per_year * t))
    times = np.linspace(0.0, t, steps + 1)
    futures = simulate_futures(
        world_params, option.maturities, times, settles, state0, rate, paths, rng=seed
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


def write_paths_csv(sim: HedgeSimulation, path: Path) -> Path:
    """One row a path: P&L in currency and % of premium, payoff, RMS step hedge error."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    r = sim.result
    rms = np.sqrt(np.mean(r.hedge_error**2, axis=1))
    with path.open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(["path", "pnl", "pnl_pct", "payoff", "hedge_error_rms"])
        for i in range(r.n_paths):
            out.writerow(
                [
                    i,
                    f"{r.pnl[i]:.10g}",
                    f"{r.pnl_pct[i]:.10g}",
                    f"{r.payoff[i]:.10g}",
                    f"{rms[i]:.10g}",
                ]
            )
    return path


def plot_histogram(sim: HedgeSimulation, path: Path) -> Path:
    """PNG histogram of the P&L in % of premium (central 99 % of paths drawn, the rest counted),
    with the mean and the 5 % quantile marked."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig = Figure(figsize=(8.0, 4.5), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    pct = sim.result.pnl_pct
    lo, hi = np.quantile(pct, [0.005, 0.995])
    pad = 0.05 * max(hi - lo, 1e-12)
    shown = (pct >= lo - pad) & (pct <= hi + pad)
    outside = int(pct.size - shown.sum())
    ax.hist(
        pct[shown],
        bins=80,
        color="#6baed6",
        edgecolor="#2171b5",
        lw=0.4,
        label=f"{outside} paths beyond the 0.5-99.5 % range not drawn" if outside else None,
    )
    s = sim.stats
    ax.axvline(s.mean.value, color="#08306b", lw=1.5, label=f"mean {s.mean.value:+.2f} %")
    q5 = s.quantiles["5"].value
    ax.axvline(q5, color="#cb181d", lw=1.2, ls="--", label=f"5 % quantile {q5:+.2f} %")
    ax.set_xlabel("P&L at expiry, % of premium (seller, hedged)")
    ax.set_ylabel("paths")
    ax.set_title(
        f"{sim.commodity} {sim.trade.describe()}\n"
        f"run {sim.run.run_id}, world: {sim.world_source}; "
        f"{sim.result.n_paths} paths x {sim.result.steps} rebalancings",
        fontsize=9,
    )
    ax.legend(fontsize=8)
    fig.savefig(path, dpi=110)
    return path
