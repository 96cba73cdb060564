"""Price and hedge a calendar-spread option from a stored parameter set and a day's futures.

One read transaction gathers the parameter set (the latest approved one of the commodity, or
a named run), the futures settlements of the two deliveries and the zero curve on the pricing
day (the run's trade date unless another is given); the numbers come from
:mod:`calib.model.spread`, outside any transaction.

Notes
-----
Times are ACT/365 from the pricing day: expiry ``t``, near and far maturities ``T1 <= T2``
(the delivery dates). The premium is discounted from the expiry with the day's zero curve,
``D = exp(-r(t) t)``. A run fitted in forward mode carries per-bucket volatilities with edges
in years from its own trade date; priced on a later day they are shifted by the days between
(buckets already over are dropped), and the last bucket's volatilities are held beyond its end
when the option expires after the run's latest option expiry. The exact price is
Gauss-Hermite quadrature (``DEFAULT_NODES`` nodes); Kirk's approximation and a seeded Monte
Carlo estimate with its standard error are cross-checks, not prices.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import date
from functools import partial
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import (
    SPREAD_EXPIRY,
    SPREAD_NO_APPROVED,
    SPREAD_NOT_QUOTED,
    SPREAD_ORDER,
    SPREAD_RUN_FAILED,
    SPREAD_RUN_OTHER,
    ParameterError,
    SpreadRequestError,
)
from calib.model.black76 import Kind
from calib.model.spread import (
    DEFAULT_NODES,
    ForwardVols,
    SpreadOption,
    price_kirk,
    price_mc,
    spread_greeks,
    spread_law,
    vol_sensitivities,
)
from calib.model.twofactor import TwoFactorParams
from calib.store.quotes import DayQuotes, load_day, require_commodity, year_fraction
from calib.store.runs import RunRecord, latest_approved, require_run
from calib.types import FloatArray

MC_PATHS = 200_000
"""Monte Carlo paths of the cross-check (antithetic pairs, control variate)."""

MC_SEED = 20310106
"""Default seed of the Monte Carlo cross-check (the result is reproducible)."""


@dataclass(frozen=True, slots=True)
class SpreadPrice:
    """A priced calendar-spread option with its hedges, sensitivities and cross-checks.

    ``vol_sensitivities`` maps ``sigma_spot``, ``sigma_yield``, ``rho`` to d premium / d
    parameter: one number for constant volatilities, one per bucket in forward mode. ``kirk``
    is ``None`` (with ``kirk_note``) where the approximation is undefined (near + strike <= 0).
    """

    run: RunRecord
    pricing_date: date
    near: date
    far: date
    expiry: date
    strike: float
    kind: Kind
    near_price: float
    far_price: float
    discount: float
    years: tuple[float, float, float]
    """``(t, T1, T2)``: expiry, near and far maturities in years from the pricing day."""
    vols: TwoFactorParams | ForwardVols
    price: float
    delta_near: float
    delta_far: float
    vol_sensitivities: dict[str, float | list[float]]
    kirk: float | None
    kirk_note: str | None
    mc: float
    mc_stderr: float
    mc_paths: int
    mc_seed: int
    nodes: int

    def to_dict(self) -> dict[str, Any]:
        forward = isinstance(self.vols, ForwardVols)
        return {
            "run_id": self.run.run_id,
            "commodity": self.run.commodity,
            "run_trade_date": self.run.trade_date.isoformat(),
            "run_status": self.run.status,
            "pricing_date": self.pricing_date.isoformat(),
            "near": self.near.isoformat(),
            "far": self.far.isoformat(),
            "expiry": self.expiry.isoformat(),
            "kind": self.kind,
            "strike": self.strike,
            "near_price": self.near_price,
            "far_price": self.far_price,
            "discount": self.discount,
            "t_expiry": self.years[0],
            "t_near": self.years[1],
            "t_far": self.years[2],
            "vols": "forward" if forward else "constant",
            "bucket_edges": self.vols.edges.tolist()
            if isinstance(self.vols, ForwardVols)
            else None,
            "price": self.price,
            "delta_near": self.delta_near,
            "delta_far": self.delta_far,
            "vol_sensitivities": self.vol_sensitivities,
            "kirk": self.kirk,
            "kirk_note": self.kirk_note,
            "mc": self.mc,
            "mc_stderr": self.mc_stderr,
            "mc_paths": self.mc_paths,
            "mc_seed": self.mc_seed,
            "nodes": self.nodes,
        }


def run_vols(run: RunRecord, pricing_date: date, t_expiry: float) -> TwoFactorParams | ForwardVols:
    """The run's volatilities as seen from ``pricing_date`` (see the module notes)."""
    assert run.params is not None
    if run.mode != "forward" or len(run.buckets) < 2:
        return run.params
    shift = year_fraction(run.trade_date, pricing_date)
    kept = [b for b in run.buckets if b.end - shift > 0.0]
    if not kept:  # every bucket is over: the last one's volatilities hold from now on
        kept = [run.buckets[-1]]
    edges = [0.0] + [b.end - shift for b in kept]
    edges[-1] = max(edges[-1], t_expiry)
    return ForwardVols(
        kappa=run.params.kappa,
        edges=np.array(edges),
        sigma_spot=np.array([b.params.sigma_spot for b in kept]),
        sigma_yield=np.array([b.params.sigma_yield for b in kept]),
        rho=np.array([b.params.rho for b in kept]),
    )


def choose_run(session: Session, commodity: str, run_id: int | None) -> RunRecord:
    if run_id is None:
        found = latest_approved(session=session, commodity=commodity)
        if found is None:
            raise SpreadRequestError(commodity, SPREAD_NO_APPROVED)
        return found
    require_commodity(session=session, code=commodity)
    return fitted_run(session, commodity, run_id, partial(SpreadRequestError, commodity))


def fitted_run(
    session: Session, commodity: str, run_id: int, refuse: Callable[[str], Exception]
) -> RunRecord:
    """The run ``run_id`` if it is ``commodity``'s and has parameters; else ``refuse(reason)``
    is raised."""
    run = require_run(session=session, run_id=run_id)
    if run.commodity != commodity:
        raise refuse(SPREAD_RUN_OTHER.format(run_id=run_id, other=run.commodity))
    if run.params is None:
        raise refuse(SPREAD_RUN_FAILED.format(run_id=run_id))
    return run


def pricing_day(
    sessions: sessionmaker[Session], commodity: str, run_id: int | None, on: date | None
) -> tuple[RunRecord, DayQuotes]:
    """The set to price with (:func:`choose_run`) and the quotes of the pricing day (``on``,
    else the run's trade date), read in one transaction."""
    with sessions.begin() as session:
        run = choose_run(session, commodity, run_id)
        day = on or run.trade_date
        return run, load_day(session=session, commodity=commodity, trade_date=day)


def quoted_settlements(
    quotes: DayQuotes, deliveries: Sequence[date], refuse: Callable[[str], Exception]
) -> FloatArray:
    """The day's settlement of each of ``deliveries``; ``refuse(reason)`` is raised for the
    first one not quoted that day."""
    settles = quotes.futures.settle_for(np.array(deliveries, dtype="datetime64[D]"))
    for delivery, value in zip(deliveries, settles, strict=True):
        if np.isnan(value):
            raise refuse(SPREAD_NOT_QUOTED.format(delivery=delivery, day=quotes.trade_date))
    return settles


def discount_to(quotes: DayQuotes, when: date) -> float:
    """The day's discount factor to ``when`` (its zero curve)."""
    return float(quotes.rates.discount(np.array([when], dtype="datetime64[D]"))[0])


def price_spread(
    sessions: sessionmaker[Session],
    commodity: str,
    *,
    near: date,
    far: date,
    expiry: date,
    strike: float,
    kind: Kind = "call",
    run_id: int | None = None,
    on: date | None = None,
    mc_paths: int = MC_PATHS,
    mc_seed: int = MC_SEED,
    nodes: int = DEFAULT_NODES,
) -> SpreadPrice:
    """Price a European option on ``F(far) - F(near) - strike`` at ``expiry``.

    Parameters
    ----------
    sessions : session factory of the store.
    commodity : commodity code.
    near, far : delivery dates of the two futures (``near`` before ``far``).
    expiry : the option's expiry (after the pricing day, not after ``near``).
    strike : strike of the spread (any sign).
    kind : ``"call"`` pays ``max(S - K, 0)``, ``"put"`` ``max(K - S, 0)``, ``S = F_far - F_near``.
    run_id : the run whose parameters to use (default: the latest approved set).
    on : pricing day (default: the run's trade date); its futures and zero curve are used.
    mc_paths, mc_seed : the Monte Carlo cross-check.
    nodes : Gauss-Hermite nodes of the exact price.

    Raises
    ------
    SpreadRequestError
        No approved set, a failed or foreign run, a delivery not quoted that day, deliveries
        out of order, or an expiry outside ``(day, near]``.
    UnknownCommodityError, UnknownRunError
    """
    run, quotes = pricing_day(sessions, commodity, run_id, on)
    day = quotes.trade_date
    if not near < far:
        raise SpreadRequestError(commodity, SPREAD_ORDER.format(near=near, far=far))
    if not day < expiry <= near:
        raise SpreadRequestError(commodity, SPREAD_EXPIRY.format(expiry=expiry, day=day, near=near))
    settles = quoted_settlements(quotes, (near, far), partial(SpreadRequestError, commodity))
    discount = discount_to(quotes, expiry)
    t, T1, T2 = year_fraction(day, expiry), year_fraction(day, near), year_fraction(day, far)
    vols = run_vols(run, day, t)
    option = SpreadOption(
        t_near=np.array([T1]),
        t_far=np.array([T2]),
        t_expiry=np.array([t]),
        strike=np.array([strike]),
        is_call=np.array([kind == "call"]),
        near_price=settles[:1],
        far_price=settles[1:],
        discount=np.array([discount]),
    )
    law = spread_law(option, vols)
    greeks = spread_greeks(law, strike, kind, discount, nodes=nodes)
    sens = vol_sensitivities(option, vols, nodes=nodes)
    kirk: float | None
    try:
        kirk, kirk_note = float(price_kirk(law, strike, kind, discount)[0]), None
    except ParameterError as exc:
        kirk, kirk_note = None, str(exc)
    mc, stderr = price_mc(law, strike, kind, discount, n_paths=mc_paths, seed=mc_seed)

    def one(x: Any) -> float | list[float]:
        values = np.asarray(x)[0]
        return float(values) if values.ndim == 0 else [float(v) for v in values]

    return SpreadPrice(
        run=run,
        pricing_date=day,
        near=near,
        far=far,
        expiry=expiry,
        strike=float(strike),
        kind=kind,
        near_price=float(settles[0]),
        far_price=float(settles[1]),
        discount=discount,
        years=(t, T1, T2),
        vols=vols,
        price=float(greeks.price[0]),
        delta_near=float(greeks.delta_near[0]),
        delta_far=float(greeks.delta_far[0]),
        vol_sensitivities={
            "sigma_spot": one(sens.sigma_spot),
            "sigma_yield": one(sens.sigma_yield),
            "rho": one(sens.rho),
        },
        kirk=kirk,
        kirk_note=kirk_note,
        mc=float(mc[0]),
        mc_stderr=float(stderr[0]),
        mc_paths=mc_paths,
        mc_seed=mc_seed,
        nodes=nodes,
    )
