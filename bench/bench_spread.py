"""Exact price and both hedge ratios of 10,000 calendar-spread options (target <= 50 ms).

Peers in the same run: QuantLib's Kirk engine, one option at a time, and scipy's adaptive
quadrature of the same integrand on a subsample; the ratios are per option.
"""

from __future__ import annotations

import math
import time

import numpy as np
import QuantLib as ql  # noqa: N813

from calib.model.spread import SpreadLaw, SpreadOption, price_quad, spread_greeks, spread_law
from calib.model.twofactor import TwoFactorParams

N_OPTIONS = 10_000
N_QUANTLIB = 500
N_QUAD = 100
REPEATS = 7


def _options(rng: np.random.Generator) -> SpreadOption:
    expiry = rng.uniform(0.05, 2.0, N_OPTIONS)
    near = expiry + rng.uniform(0.01, 0.1, N_OPTIONS)
    far = near + rng.choice([1 / 12, 0.25, 0.5, 1.0], N_OPTIONS)
    near_price = rng.uniform(40.0, 60.0, N_OPTIONS)
    return SpreadOption(
        t_near=near,
        t_far=far,
        t_expiry=expiry,
        strike=rng.uniform(-3.0, 5.0, N_OPTIONS),
        is_call=rng.random(N_OPTIONS) < 0.5,
        near_price=near_price,
        far_price=near_price * rng.uniform(0.9, 1.1, N_OPTIONS),
        discount=np.exp(-0.03 * expiry),
    )


def _best(fn: object, repeats: int) -> float:
    assert callable(fn)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def _quantlib_per_option(opt: SpreadOption, law: SpreadLaw, n: int) -> float:
    today = ql.Date(15, 1, 2030)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    curve = ql.YieldTermStructureHandle(ql.FlatForward(today, 0.03, dc))
    t0 = time.perf_counter()
    for i in range(n):
        t = float(opt.t_expiry[i])
        v1 = math.sqrt(law.var_near[i] / t)
        v2 = math.sqrt(law.var_far[i] / t)
        rho = float(law.corr[i])
        procs = []
        for F, vol in ((opt.far_price[i], v2), (opt.near_price[i], v1)):
            vts = ql.BlackVolTermStructureHandle(
                ql.BlackConstantVol(today, ql.NullCalendar(), vol, dc)
            )
            procs.append(ql.BlackProcess(ql.QuoteHandle(ql.SimpleQuote(float(F))), curve, vts))
        kind = ql.Option.Call if opt.is_call[i] else ql.Option.Put
        payoff = ql.SpreadBasketPayoff(ql.PlainVanillaPayoff(kind, float(opt.strike[i])))
        option = ql.BasketOption(payoff, ql.EuropeanExercise(today + max(1, round(t * 365))))
        option.setPricingEngine(ql.KirkEngine(procs[0], procs[1], rho))
        option.NPV()
    return (time.perf_counter() - t0) / n


def _quad_per_option(opt: SpreadOption, law: SpreadLaw, n: int) -> float:
    sub = SpreadLaw(*(getattr(law, name)[:n] for name in SpreadLaw.__slots__))
    t0 = time.perf_counter()
    price_quad(sub, opt.strike[:n], opt.is_call[:n], opt.discount[:n])
    return (time.perf_counter() - t0) / n


def main() -> None:
    rng = np.random.default_rng(20301)
    params = TwoFactorParams(
        mu=0.1, kappa=1.5, alpha=0.05, lam=0.0, sigma_spot=0.4, sigma_yield=0.45, rho=0.8
    )
    opt = _options(rng)
    law = spread_law(opt, params)
    spread_greeks(law, opt.strike, opt.is_call, opt.discount)  # warm the node cache
    ours = _best(lambda: spread_greeks(law, opt.strike, opt.is_call, opt.discount), REPEATS)
    with_law = _best(
        lambda: spread_greeks(spread_law(opt, params), opt.strike, opt.is_call, opt.discount),
        REPEATS,
    )
    ql_each = _quantlib_per_option(opt, law, N_QUANTLIB)
    quad_each = _quad_per_option(opt, law, N_QUAD)
    per_ours = ours / N_OPTIONS
    print(
        f"exact price + 2 hedge ratios, {N_OPTIONS} options: {ours * 1e3:.1f} ms "
        f"(target <= 50 ms); with the law: {with_law * 1e3:.1f} ms"
    )
    print(f"  per option: {per_ours * 1e6:.2f} us")
    print(
        f"QuantLib KirkEngine per option (price only; it gives no delta, {N_QUANTLIB} options): "
        f"{ql_each * 1e6:.1f} us; ratio {ql_each / per_ours:.1f}x"
    )
    print(
        f"scipy quad per option (price only, {N_QUAD} options): {quad_each * 1e6:.1f} us; "
        f"ratio {quad_each / per_ours:.0f}x"
    )


if __name__ == "__main__":
    main()
