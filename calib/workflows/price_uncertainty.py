"""A vanilla price from a stored parameter set, and what the historical estimate's uncertainty
does to a price (``calib price vanilla``, ``calib price spread|vanilla --uncertainty``).

Notes
-----
**Vanilla.** A European option expiring at ``t`` on the future delivering at ``T >= t`` is
Black-76 with the model's total variance of ``ln F(T)`` up to ``t`` (DESIGN section 3), from
the run's volatilities as seen from the pricing day (forward buckets shifted as for spreads,
:func:`calib.workflows.pricing.run_vols`), discounted from the expiry with the day's curve.

**Price as a function of the estimate.** The price the desk quotes comes from the morning fit,
which holds the historical estimate's parameters fixed. So the price is ``g(theta) =
price(fit(day's quotes | theta))``: the run's own day is refitted (same quote rows, same
settings, the compiled problem re-solved) with ``theta`` in place of the estimate, then priced.
Its standard error is the delta method on the estimate's stored covariance of the seven
parameters, checked against the spread of ``g`` at draws from the estimate's asymptotic
normal law (:mod:`calib.estimate.uncertainty`); and ``g`` at each window estimate of the
commodity's rolling series that ended in the year before the pricing day gives the range of
prices the history of re-estimation would have produced.

Cautions: asymptotic (normal approximation to the likelihood); the market's own errors and
model risk are not in this number.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, replace
from datetime import date, timedelta
from functools import partial
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.calibrate import Calibrator
from calib.calibrate.calibrator import bucket_edges
from calib.calibrate.quotes import prepare
from calib.errors import (
    UNCERTAINTY_NO_COVARIANCE,
    VANILLA_EXPIRY,
    VANILLA_STRIKE,
    RollingRequestError,
    VanillaRequestError,
)
from calib.estimate.uncertainty import DeltaMethod, Sampled, delta_method, sample
from calib.model.black76 import Kind, undiscounted_price
from calib.model.spread import ForwardVols, SpreadOption, spread_greeks, spread_law
from calib.model.twofactor import TwoFactorParams
from calib.policy.settings import RunSettings
from calib.record.codec import Encoded
from calib.store.estimates import EstimateRecord, list_series, series_estimates
from calib.store.quotes import year_fraction
from calib.store.runs import RunRecord
from calib.workflows.estimates import none_if_nan
from calib.workflows.fit import attempt_fit, fitted_inputs, option_quotes
from calib.workflows.pricing import (
    SpreadPrice,
    discount_to,
    pricing_day,
    quoted_settlements,
    run_vols,
)

DRAWS = 200
"""Default draws from the estimate's asymptotic law (the sampling check)."""

DRAW_SEED = 20310107
"""Default seed of the draws (the check is reproducible)."""

AGREEMENT = 0.10
"""Relative gap between the sampled and the delta-method standard error beyond which the
result says the price is not close to linear in the estimate (trust the sampling then)."""

LOOKBACK = timedelta(days=365)
"""Rolling windows that ended this long before the pricing day, or less, are priced."""

CAUTION = (
    "The standard error is asymptotic (normal approximation to the likelihood, linearised by "
    "the delta method); quote errors and model risk are not in it. Validate before use; the "
    "firm's model-validation policy prevails."
)

Vols = TwoFactorParams | ForwardVols


def _one(
    t_near: float,
    t_far: float,
    t_expiry: float,
    strike: float,
    kind: Kind,
    f1: float,
    f2: float,
    d: float,
) -> SpreadOption:
    def a(x: float) -> np.ndarray[Any, Any]:
        return np.array([x], dtype=np.float64)

    return SpreadOption(
        t_near=a(t_near), t_far=a(t_far), t_expiry=a(t_expiry), strike=a(strike),
        is_call=np.array([kind == "call"]), near_price=a(f1), far_price=a(f2), discount=a(d),
    )  # fmt: skip


def vanilla_value(
    vols: Vols, future: float, strike: float, t: float, T: float, discount: float, kind: Kind
) -> tuple[float, float]:
    """``(premium, total variance)``: Black-76 with the model's total variance of ``ln F(T)``
    up to ``t`` (the near leg of a spread law on ``F(T)`` with itself)."""
    option = _one(T, T, t, 0.0, "call", future, future, discount)
    variance = float(spread_law(option, vols).var_near[0])
    call = np.array([kind == "call"])
    premium = discount * undiscounted_price(future, strike, math.sqrt(variance), call)
    return float(np.asarray(premium).ravel()[0]), variance


@dataclass(frozen=True, slots=True)
class VanillaPrice:
    """A priced European option on one future."""

    run: RunRecord
    pricing_date: date
    future: date
    expiry: date
    strike: float
    kind: Kind
    future_price: float
    discount: float
    years: tuple[float, float]
    """``(t, T)``: expiry and the future's delivery in years from the pricing day."""
    vols: Vols
    total_variance: float
    price: float

    def to_dict(self) -> dict[str, Any]:
        t = self.years[0]
        return {
            "run_id": self.run.run_id,
            "commodity": self.run.commodity,
            "run_trade_date": self.run.trade_date.isoformat(),
            "run_status": self.run.status,
            "pricing_date": self.pricing_date.isoformat(),
            "future": self.future.isoformat(),
            "expiry": self.expiry.isoformat(),
            "kind": self.kind,
            "strike": self.strike,
            "future_price": self.future_price,
            "discount": self.discount,
            "t_expiry": t,
            "t_future": self.years[1],
            "vols": "forward" if isinstance(self.vols, ForwardVols) else "constant",
            "total_variance": self.total_variance,
            "implied_vol": math.sqrt(self.total_variance / t),
            "price": self.price,
        }


def price_vanilla(
    sessions: sessionmaker[Session],
    commodity: str,
    *,
    future: date,
    expiry: date,
    strike: float,
    kind: Kind = "call",
    run_id: int | None = None,
    on: date | None = None,
) -> VanillaPrice:
    """Price a European option on the future delivering ``future``, expiring ``expiry``.

    Raises
    ------
    SpreadRequestError, VanillaRequestError
        No approved set, a failed or foreign run, the future not quoted that day, an expiry
        outside ``(day, future]``, a strike that is not positive.
    """
    run, quotes = pricing_day(sessions, commodity, run_id, on)
    day = quotes.trade_date
    if not (math.isfinite(strike) and strike > 0.0):
        raise VanillaRequestError(commodity, VANILLA_STRIKE.format(strike=strike))
    if not day < expiry <= future:
        raise VanillaRequestError(
            commodity, VANILLA_EXPIRY.format(expiry=expiry, day=day, future=future)
        )
    settle = float(
        quoted_settlements(quotes, (future,), partial(VanillaRequestError, commodity))[0]
    )
    discount = discount_to(quotes, expiry)
    t, T = year_fraction(day, expiry), year_fraction(day, future)
    vols = run_vols(run, day, t)
    premium, variance = vanilla_value(vols, settle, strike, t, T, discount, kind)
    return VanillaPrice(
        run=run,
        pricing_date=day,
        future=future,
        expiry=expiry,
        strike=float(strike),
        kind=kind,
        future_price=settle,
        discount=discount,
        years=(t, T),
        vols=vols,
        total_variance=variance,
        price=premium,
    )


# --- uncertainty -------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class WindowPrice(Encoded):
    """The price with one rolling window's estimate held fixed (``None``: the refit failed)."""

    estimate_id: int
    window_end: date
    price: float | None


@dataclass(frozen=True, slots=True, eq=False)
class PriceUncertainty:
    """How the historical estimate's uncertainty moves a price (see the module notes)."""

    estimate: EstimateRecord
    price: float
    refit_price: float
    delta: DeltaMethod
    sampled: Sampled
    series_id: int | None
    windows: tuple[WindowPrice, ...]

    @property
    def ratio(self) -> float | None:
        """Sampled over delta-method standard error (``None`` if the latter is 0)."""
        return self.sampled.sd / self.delta.se if self.delta.se > 0 else None

    @property
    def note(self) -> str | None:
        """Why the delta method should not be trusted here, if it should not."""
        r = self.ratio
        if r is not None and abs(r - 1.0) <= AGREEMENT:
            return None
        shown = "-" if r is None else f"{r:.3g}"
        return (
            f"delta method and sampling disagree (sampled / delta {shown}): the price is not "
            "close to linear in the estimate over its error (a constraint of the fit switching, "
            "or a price pinned by its own quote); use the sampled figure"
        )

    @property
    def window_range(self) -> tuple[float, float] | None:
        got = [w.price for w in self.windows if w.price is not None]
        return (min(got), max(got)) if got else None

    def to_dict(self) -> dict[str, Any]:
        s = self.sampled
        rng = self.window_range
        return {
            "estimate_id": self.estimate.estimate_id,
            "price": self.price,
            "refit_price": none_if_nan(self.refit_price),
            "se": none_if_nan(self.delta.se),
            "gradient": {n: none_if_nan(v) for n, v in self.delta.gradient.items()},
            "variance_share": {n: none_if_nan(v) for n, v in self.delta.contribution.items()},
            "sampled_sd": none_if_nan(s.sd),
            "sampled_mean": float(np.mean(s.values)) if s.values.size else None,
            "sampled_over_delta": None if self.ratio is None else none_if_nan(self.ratio),
            "note": self.note,
            "draws": s.n_draws,
            "draws_used": int(s.values.size),
            "draws_outside_domain": s.outside_domain,
            "draws_failed": s.failed,
            "seed": s.seed,
            "series_id": self.series_id,
            "windows": [w.to_dict() for w in self.windows],
            "window_min": None if rng is None else rng[0],
            "window_max": None if rng is None else rng[1],
            "caution": CAUTION,
        }


def price_uncertainty(
    sessions: sessionmaker[Session],
    run: RunRecord,
    pricing_date: date,
    t_expiry: float,
    price: float,
    price_of: Callable[[Vols], float],
    *,
    draws: int = DRAWS,
    seed: int = DRAW_SEED,
    series_id: int | None = None,
) -> PriceUncertainty:
    """The uncertainty of ``price`` (priced by ``price_of`` from the run's volatilities).

    Raises
    ------
    RollingRequestError
        The run's estimate has no stored covariance, or ``series_id`` is not the commodity's.
    """
    with sessions.begin() as session:
        estimate, day = fitted_inputs(session, run)
        if series_id is None:
            found = list_series(session=session, commodity=run.commodity)
            series_id = found[0].series_id if found else None
        windows = (
            [] if series_id is None else series_estimates(session=session, series_id=series_id)
        )
    if estimate.covariance is None:
        raise RollingRequestError(
            run.commodity, UNCERTAINTY_NO_COVARIANCE.format(estimate_id=estimate.estimate_id)
        )
    if windows and windows[0].commodity != run.commodity:
        raise RollingRequestError(run.commodity, f"rolling series {series_id} is not its own")
    settings = RunSettings.from_dict(run.settings).calibration
    quotes = option_quotes(day)
    n_buckets = 1
    if settings.mode == "forward":
        n_buckets = max(bucket_edges(prepare(quotes, settings).t_expiry).size - 1, 1)
    calibrator = Calibrator(settings, n_buckets)

    def g(params: TwoFactorParams) -> float:
        attempt = attempt_fit(day, params, settings, calibrator_for=lambda _: calibrator)
        if attempt.result is None:
            return math.nan
        r = attempt.result
        assert run.fit is not None  # a fitted run was chosen
        refit = replace(run, fit=replace(run.fit, params=r.params, buckets=r.buckets))
        return price_of(run_vols(refit, pricing_date, t_expiry))

    cov = np.array(
        [[math.nan if v is None else v for v in row[:7]] for row in estimate.covariance[:7]]
    )
    delta = delta_method(g, estimate.params, cov)
    sampled = sample(g, estimate.params, cov, draws, seed)
    start = pricing_date - LOOKBACK
    priced = tuple(
        WindowPrice(w.estimate_id, w.window_end, none_if_nan(g(w.params)))
        for w in windows
        if w.converged and start <= w.window_end <= pricing_date
    )
    return PriceUncertainty(
        estimate=estimate,
        price=price,
        refit_price=delta.value,
        delta=delta,
        sampled=sampled,
        series_id=series_id,
        windows=priced,
    )


def spread_uncertainty(
    sessions: sessionmaker[Session],
    result: SpreadPrice,
    *,
    draws: int = DRAWS,
    seed: int = DRAW_SEED,
    series_id: int | None = None,
) -> PriceUncertainty:
    """:func:`price_uncertainty` of a priced spread option (same option, same day)."""
    t, T1, T2 = result.years
    option = _one(
        T1, T2, t, result.strike, result.kind, result.near_price, result.far_price, result.discount
    )

    def price_of(vols: Vols) -> float:
        law = spread_law(option, vols)
        greeks = spread_greeks(law, result.strike, result.kind, result.discount, nodes=result.nodes)
        return float(greeks.price[0])

    return price_uncertainty(
        sessions, result.run, result.pricing_date, t, result.price, price_of,
        draws=draws, seed=seed, series_id=series_id,
    )  # fmt: skip


def vanilla_uncertainty(
    sessions: sessionmaker[Session],
    result: VanillaPrice,
    *,
    draws: int = DRAWS,
    seed: int = DRAW_SEED,
    series_id: int | None = None,
) -> PriceUncertainty:
    """:func:`price_uncertainty` of a priced vanilla option (same option, same day)."""
    t, T = result.years

    def price_of(vols: Vols) -> float:
        return vanilla_value(
            vols, result.future_price, result.strike, t, T, result.discount, result.kind
        )[0]

    return price_uncertainty(
        sessions, result.run, result.pricing_date, t, result.price, price_of,
        draws=draws, seed=seed, series_id=series_id,
    )  # fmt: skip
