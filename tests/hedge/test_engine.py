"""The hedge account and its behaviour in the model's own world."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy.stats import norm

from calib.errors import ParameterError
from calib.hedge.engine import HedgeResult, hedge_paths
from calib.hedge.instruments import CalendarSpread, HedgedOption, VanillaOption
from calib.hedge.world import initial_state, simulate_futures
from calib.model import black76
from calib.model.twofactor import TwoFactorParams, log_futures

# An invented set with a strong Samuelson effect and a loose yield volatility.
SET = TwoFactorParams(
    mu=0.06, kappa=1.2, alpha=0.03, lam=0.01, sigma_spot=0.35, sigma_yield=0.3, rho=0.6
)
RATE = 0.03
SPREAD = CalendarSpread(t_near=0.55, t_far=0.8, t_expiry=0.5, strike=0.5)
PRICES = np.array([50.0, 51.0])


def _run(
    option: HedgedOption,
    pricing: TwoFactorParams,
    world: TwoFactorParams,
    steps: int,
    paths: int,
    seed: int,
    rate: float = RATE,
) -> tuple[HedgeResult, np.ndarray]:
    T = np.array(option.t_legs)
    F0 = PRICES[: T.size]
    times = np.linspace(0.0, option.t_expiry, steps + 1)
    state = initial_state(world, T, F0, rate)
    F = simulate_futures(world, T, times, F0, state, rate, paths, rng=seed)
    return hedge_paths(option, pricing, times, F, rate), F


def test_accounting_identity_on_every_path() -> None:
    # DESIGN section 8: premium x growth + sum(hedge gains x growth) - payoff = P&L, computed
    # here from the positions and the futures, independently of the engine's error recursion.
    result, F = _run(SPREAD, SET, SET, 20, 200, seed=1, rate=0.05)
    t = result.times
    grow_from = np.exp(0.05 * (t[-1] - t))  # growth from each date to expiry
    gains = np.einsum("pkl,pkl->pk", result.positions, np.diff(F, axis=1))
    payoff = np.maximum(F[:, -1, 1] - F[:, -1, 0] - SPREAD.strike, 0.0)
    want = result.premium * grow_from[0] + gains @ grow_from[1:] - payoff
    np.testing.assert_allclose(result.pnl, want, rtol=1e-12, atol=1e-12 * result.premium[0])
    np.testing.assert_allclose(result.payoff, payoff, rtol=0, atol=0)
    # the step errors grown to expiry add up to the P&L (the account's recursion)
    np.testing.assert_allclose(result.hedge_error @ grow_from[1:], result.pnl, atol=1e-12)


def test_continuous_hedging_limit() -> None:
    # DESIGN section 8: in the model's own world the P&L of a discretely hedged option has
    # mean ~0 and a standard deviation shrinking like 1/sqrt(steps): 125 daily against 25
    # weekly rebalancings over half a year gives a ratio near sqrt(5).
    # Tolerance 8 %: 1/sqrt(N) is the leading term; at 25 steps the next terms and the
    # sampling error of two standard deviations (about 1.5 % each at 4,000 paths) remain.
    daily, _ = _run(SPREAD, SET, SET, 125, 4_000, seed=2)
    weekly, _ = _run(SPREAD, SET, SET, 25, 4_000, seed=3)
    for result in (daily, weekly):
        pnl = result.pnl_pct
        assert abs(pnl.mean()) < 3.0 * pnl.std(ddof=1) / math.sqrt(pnl.size)
    ratio = weekly.pnl_pct.std(ddof=1) / daily.pnl_pct.std(ddof=1)
    assert ratio == pytest.approx(math.sqrt(5.0), rel=0.08)


def test_vanilla_discrete_hedging_sd_against_derman_kamal() -> None:
    # Derman and Kamal 1999, "When you cannot hedge continuously" (from memory): an
    # at-the-money option hedged N times at constant volatility sigma has a P&L standard
    # deviation of about sqrt(pi/4) vega sigma / sqrt(N). sigma_yield = 0 makes the futures
    # volatility flat at sigma_spot; mu = r and lam = 0 make the futures driftless.
    flat = replace(SET, sigma_yield=0.0, mu=0.0, lam=0.0)
    option = VanillaOption(t_delivery=1.0, t_expiry=1.0, strike=50.0)
    steps = 252
    result, _ = _run(option, flat, flat, steps, 10_000, seed=4, rate=0.0)
    vega = float(black76.greeks(50.0, 50.0, 1.0, 0.0, flat.sigma_spot, "call")["vega"])
    want = math.sqrt(math.pi / 4.0) * vega * flat.sigma_spot / math.sqrt(steps)
    assert result.pnl.std(ddof=1) == pytest.approx(want, rel=0.10)


def test_misspecified_yield_vol_loses_on_a_sold_spread() -> None:
    # The world's yield volatility twice the pricing set's: the spread's variance (driven by
    # s2 (B(T2 - t) - B(T1 - t)) in DESIGN section 3) is underpriced, so the seller's mean
    # P&L is negative beyond 3 standard errors.
    world = replace(SET, sigma_yield=2.0 * SET.sigma_yield)
    result, _ = _run(SPREAD, SET, world, 50, 4_000, seed=5)
    pnl = result.pnl_pct
    assert pnl.mean() < -3.0 * pnl.std(ddof=1) / math.sqrt(pnl.size)


def test_initial_state_reproduces_a_model_curve() -> None:
    # A curve made by the closed form (DESIGN section 3) gives back its own state.
    taus = np.array([0.1, 0.3, 0.6, 1.0])
    prices = np.exp(log_futures(math.log(50.0), 0.07, taus, RATE, SET))
    x, d = initial_state(SET, taus, prices, RATE)
    assert (x, d) == pytest.approx((math.log(50.0), 0.07), abs=1e-10)
    x1, d1 = initial_state(SET, taus[:1], prices[:1], RATE)
    assert d1 == SET.alpha
    np.testing.assert_allclose(np.exp(log_futures(x1, d1, taus[:1], RATE, SET)), prices[:1])


def test_world_futures_start_at_the_prices_and_are_martingales_without_risk_premia() -> None:
    # With mu = r and lam = 0 the real-world and risk-neutral measures agree, and futures
    # prices are martingales under the latter (Schwartz 1997, section 2).
    neutral = replace(SET, mu=RATE, lam=0.0)
    times = np.linspace(0.0, 0.5, 6)
    state = initial_state(neutral, [0.55, 0.8], PRICES, RATE)
    F = simulate_futures(neutral, [0.55, 0.8], times, PRICES, state, RATE, 20_000, rng=6)
    np.testing.assert_array_equal(F[:, 0], np.broadcast_to(PRICES, (20_000, 2)))
    mean = F[:, -1].mean(axis=0)
    se = F[:, -1].std(axis=0, ddof=1) / math.sqrt(20_000)
    assert np.all(np.abs(mean - PRICES) < 3.0 * se)


def test_bad_grid_and_futures_are_refused() -> None:
    F = np.full((2, 3, 2), 50.0)
    with pytest.raises(ParameterError, match="last date must be the expiry"):
        hedge_paths(SPREAD, SET, [0.0, 0.2, 0.4], F, RATE)
    with pytest.raises(ParameterError, match="need"):
        hedge_paths(SPREAD, SET, [0.0, 0.5], F, RATE)
    with pytest.raises(ParameterError, match="far future must mature after"):
        CalendarSpread(t_near=0.5, t_far=0.5, t_expiry=0.4, strike=0.0)


def test_stats_of_a_normal_sample() -> None:
    from calib.hedge.stats import pnl_stats

    # Normal sample: quantiles from scipy.stats.norm.ppf; the 95 % expected shortfall of a
    # standard normal loss is pdf(ppf(0.05)) / 0.05 (McNeil, Frey and Embrechts 2005,
    # Quantitative Risk Management, example 2.14, from memory); se of the mean sd / sqrt(n).
    n = 20_000
    x = np.random.default_rng(7).standard_normal(n)
    s = pnl_stats(x, seed=8)
    assert s.mean.se == pytest.approx(x.std(ddof=1) / math.sqrt(n))
    for q, est in s.quantiles.items():
        assert abs(est.value - norm.ppf(float(q) / 100.0)) < 3.0 * est.se
    es = -norm.pdf(norm.ppf(0.05)) / 0.05
    assert abs(s.es95.value - es) < 3.0 * s.es95.se
    # bootstrap se of the sd against normal theory sd / sqrt(2 n) (common practice)
    assert s.sd.se == pytest.approx(1.0 / math.sqrt(2 * n), rel=0.25)
