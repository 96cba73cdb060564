"""American quotes in the fit: recovery, mixed chains, the European path unchanged, and the
size of the constant-volatility-equivalent approximation against a Crank-Nicolson solution.

References: QuantLib's ``QdFpAmericanEngine`` (high-precision scheme) prices the American
chains (an independent implementation of Andersen, Lake and Offengenden 2016); the total
variances come from ``scipy.integrate.quad`` (``quotes_from_model.quad_variance``); the
time-dependent-volatility check is a Crank-Nicolson finite-difference solution written here
(Crank and Nicolson 1947; the early-exercise constraint by projection after each step,
Rannacher start: Rannacher 1984), itself checked against QuantLib's
``FdBlackScholesVanillaEngine`` at constant volatility.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import replace
from typing import Literal

import numpy as np
import pytest
import QuantLib as ql  # noqa: N813 - QuantLib's own documented alias

from calib.calibrate import CalibrationSettings, OptionQuotes, fit
from calib.model import american
from calib.model.twofactor import TwoFactorParams, total_variance
from tests.calibrate.quotes_from_model import TRUE, quad_variance, vols_of

FORWARD = 50.0  # fictional commodity, currency units per unit
RATE = 0.06  # high enough that early exercise is worth something
EXPIRY_DAYS = (55, 110, 183, 274, 365, 548)
MONEYNESS = (0.8, 0.9, 1.0, 1.1, 1.25)
EXACT = CalibrationSettings(anchor_weight=0.0, smoothness=0.0, refit_costs=False)

# The chain is priced by QuantLib's QdFp engine, which agrees with calib's pricer to about
# 1e-7 relative (tests/model/test_american.py bounds it by 1e-6). A relative premium error
# eps moves a quote's implied vol by eps * premium / vega, at most about 3e-7 on this chain
# (its out-of-the-money short-dated quotes have premium / vega near 0.3 of the vol); the fitted
# sigma_spot, sigma_yield and rho are least-squares combinations of 30 such vols, amplified by
# the conditioning of the two factors (rho and sigma_yield move together at about 10x).
VOL_TOL = 2e-5

_TODAY = ql.Date(15, 6, 2026)
_DAY_COUNT = ql.Actual365Fixed()


def _quantlib_american(F: float, K: float, days: int, r: float, vol: float, call: bool) -> float:
    """QuantLib's QdFp American premium (high precision): a stock with dividend yield r."""
    ql.Settings.instance().evaluationDate = _TODAY
    curve = ql.YieldTermStructureHandle(ql.FlatForward(_TODAY, r, _DAY_COUNT))
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(ql.SimpleQuote(F)),
        curve,
        curve,
        ql.BlackVolTermStructureHandle(
            ql.BlackConstantVol(_TODAY, ql.NullCalendar(), vol, _DAY_COUNT)
        ),
    )
    option = ql.VanillaOption(
        ql.PlainVanillaPayoff(ql.Option.Call if call else ql.Option.Put, K),
        ql.AmericanExercise(_TODAY, _TODAY + days),
    )
    option.setPricingEngine(
        ql.QdFpAmericanEngine(process, ql.QdFpAmericanEngine.highPrecisionScheme())
    )
    return float(option.NPV())


def _chain(style: str) -> OptionQuotes:
    """Puts and calls at every expiry and moneyness (in and out of the money); ``style``:
    ``american``, ``european`` or ``mixed`` (alternating). Premiums from the generating vols:
    American ones by QuantLib's QdFp at the constant-volatility equivalent of the two-factor
    total variance, European ones by QuantLib's ``blackFormula``."""
    rows: list[tuple[float, float, bool, float, float, float, bool]] = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # quad's round-off note at 1e-14 relative
        for days in EXPIRY_DAYS:
            t = days / 365.0
            T = t + 0.05
            var = quad_variance(t, T, TRUE.kappa, [(0.35, 0.25, 0.7)], [0.0, 10.0])
            vol = math.sqrt(var / t)
            disc = math.exp(-RATE * t)
            for m in MONEYNESS:
                for call in (False, True):
                    is_am = style == "american" or (style == "mixed" and len(rows) % 2 == 0)
                    K = FORWARD * m
                    if is_am:
                        prem = _quantlib_american(FORWARD, K, days, RATE, vol, call)
                    else:
                        kind = ql.Option.Call if call else ql.Option.Put
                        prem = ql.blackFormula(kind, K, FORWARD, math.sqrt(var), disc)
                    rows.append((t, T, call, K, disc, prem, is_am))
    return OptionQuotes(
        t_expiry=np.array([r[0] for r in rows]),
        t_delivery=np.array([r[1] for r in rows]),
        is_call=np.array([r[2] for r in rows]),
        strike=np.array([r[3] for r in rows]),
        forward=np.full(len(rows), FORWARD),
        discount=np.array([r[4] for r in rows]),
        premium=np.array([r[5] for r in rows]),
        american=np.array([r[6] for r in rows]),
    )


@pytest.fixture(scope="module")
def american_chain() -> OptionQuotes:
    return _chain("american")


@pytest.mark.parametrize("measure", ["price", "vol"])
def test_an_american_chain_is_fitted_back_to_its_vols(
    american_chain: OptionQuotes, measure: Literal["price", "vol"]
) -> None:
    hist = TRUE.with_vols(0.3, 0.3, TRUE.rho)
    res = fit(american_chain, hist, replace(EXACT, error_measure=measure))
    np.testing.assert_allclose(vols_of(res.params), vols_of(TRUE), atol=VOL_TOL)
    assert res.converged and res.flags == ()
    assert res.american is not None and res.american.all()
    assert res.early_exercise is not None and np.all(res.early_exercise > 0.0)
    # the model premium is the American one: it matches the market within the vol tolerance
    # times the vega (at most 0.2 F per unit vol on this chain)
    assert np.max(np.abs(res.price_residual)) < VOL_TOL * 0.2 * FORWARD


def test_fitting_american_premiums_as_european_biases_the_vols(
    american_chain: OptionQuotes,
) -> None:
    """The point of the style: the same premiums read as European fit higher volatilities."""
    hist = TRUE.with_vols(0.3, 0.3, TRUE.rho)
    as_european = replace(american_chain, american=None)
    res = fit(as_european, hist, EXACT)
    assert res.params.sigma_spot > TRUE.sigma_spot + 100 * VOL_TOL or (
        res.max_error > 1e-4 * FORWARD
    )


def test_a_mixed_chain_is_fitted_back_to_its_vols() -> None:
    quotes = _chain("mixed")
    res = fit(quotes, TRUE.with_vols(0.3, 0.3, TRUE.rho), EXACT)
    np.testing.assert_allclose(vols_of(res.params), vols_of(TRUE), atol=VOL_TOL)
    assert res.american is not None
    np.testing.assert_array_equal(res.american, quotes.is_american[res.quote_index])
    assert res.early_exercise is not None
    assert np.all(res.early_exercise[~res.american] == 0.0)
    assert np.all(res.early_exercise[res.american] > 0.0)


def test_an_all_european_chain_fits_bit_identically_whatever_the_style_field() -> None:
    quotes = _chain("european")
    hist = TRUE.with_vols(0.3, 0.3, TRUE.rho)
    a = fit(quotes, hist, EXACT).to_dict()
    b = fit(replace(quotes, american=np.zeros(len(quotes), dtype=bool)), hist, EXACT).to_dict()
    assert a == b


def test_held_rho_mode_fits_american_quotes_in_vol(american_chain: OptionQuotes) -> None:
    s = replace(EXACT, mode="held_rho", error_measure="vol")
    res = fit(american_chain, TRUE.with_vols(0.3, 0.3, TRUE.rho), s)
    np.testing.assert_allclose(vols_of(res.params), vols_of(TRUE), atol=VOL_TOL)


# --- the constant-volatility equivalent against the model's time-dependent volatility ---------


def _cn_american(
    F: float,
    K: float,
    T: float,
    r: float,
    call: bool,
    variance_rate: Callable[[float], float],
    n_space: int = 1200,
    n_time: int = 1200,
) -> float:
    """Crank-Nicolson price of an American option on a future with instantaneous variance
    ``variance_rate(t)`` (calendar time ``t`` from today): the PDE in ``x = ln F``,
    ``V_t + v(t)/2 (V_xx - V_x) - r V = 0``, solved backwards from expiry on a grid of
    +-8 total standard deviations, exercise by projection onto the payoff after each step,
    two half-size implicit steps first (Rannacher) against the payoff's kink."""
    rate_of = variance_rate
    total = quad_total(rate_of, T)
    half_width = 8.0 * math.sqrt(total)
    x = np.linspace(math.log(F) - half_width, math.log(F) + half_width, n_space + 1)
    dx = x[1] - x[0]
    payoff = np.maximum(np.exp(x) - K, 0.0) if call else np.maximum(K - np.exp(x), 0.0)
    value = payoff.copy()
    steps = [T / n_time / 2.0] * 4 + [T / n_time] * (n_time - 2)
    thetas = [1.0] * 4 + [0.5] * (n_time - 2)
    t = T
    n = n_space + 1
    for dt, theta in zip(steps, thetas, strict=True):
        v = float(rate_of(t - 0.5 * dt))
        a = 0.5 * v / dx**2
        b = 0.25 * v / dx  # the drift -v/2 V_x, central
        lower, diag, upper = a + b, -2.0 * a - r, a - b  # L V_j = lower V_{j-1} + ...
        rhs = value.copy()
        rhs[1:-1] += (
            (1.0 - theta) * dt * (lower * value[:-2] + diag * value[1:-1] + upper * value[2:])
        )
        # implicit part: (I - theta dt L) V_new = rhs, boundaries at the payoff
        ab = np.zeros((3, n))
        ab[0, 2:] = -theta * dt * upper
        ab[1, 1:-1] = 1.0 - theta * dt * diag
        ab[2, :-2] = -theta * dt * lower
        ab[1, 0] = ab[1, -1] = 1.0
        rhs[0], rhs[-1] = payoff[0], payoff[-1]
        from scipy.linalg import solve_banded

        value = np.maximum(solve_banded((1, 1), ab, rhs), payoff)
        t -= dt
    return float(np.interp(math.log(F), x, value))


def quad_total(rate_of: Callable[[float], float], T: float) -> float:
    from scipy.integrate import quad

    return float(quad(rate_of, 0.0, T, epsabs=1e-14, epsrel=1e-12)[0])


def _model_variance_rate(params: TwoFactorParams, maturity: float) -> Callable[[float], float]:
    """``v(t) = s1^2 + s2^2 B^2 - 2 rho s1 s2 B``, ``B = (1 - exp(-kappa (T_m - t))) / kappa``
    (the futures volatility of the two-factor model; DESIGN §3)."""
    s1, s2, rho, kappa = params.sigma_spot, params.sigma_yield, params.rho, params.kappa

    def v(t: float) -> float:
        b = (1.0 - math.exp(-kappa * (maturity - t))) / kappa
        return s1 * s1 + s2 * s2 * b * b - 2.0 * rho * s1 * s2 * b

    return v


# Cases: a futures volatility that rises steeply towards the future's maturity (sigma_yield and
# rho high), in, at and out of the money, puts and a call, futures maturing soon and late.
_STRONG = TwoFactorParams(
    mu=0.05, kappa=1.5, alpha=0.02, lam=0.0, sigma_spot=0.45, sigma_yield=0.40, rho=0.8
)
_CASES = [  # (K / F, expiry, maturity, rate, call)
    (1.0, 1.0, 1.1, 0.08, False),
    (1.2, 1.0, 3.0, 0.08, False),
    (0.8, 2.0, 2.1, 0.08, True),
    (1.3, 2.0, 5.0, 0.10, False),
]
# Measured on these cases (README, "American quotes"): the time-dependent price lies below
# the constant-volatility one by 0.09 %-22 % of the early-exercise premium, 0.007-0.64 vol
# points of the American vega. The bounds below are those figures rounded up: the
# approximation is documented at that size, and a change that made it worse must say so.
APPROX_EEP_TOL = 0.25  # of the early-exercise premium
APPROX_VOL_TOL = 0.007  # in volatility (0.7 vol points)
CN_TOL = 1e-4  # the grid's own error at constant vol, relative (measured 5e-5 at most)


def test_the_crank_nicolson_solver_agrees_with_quantlib_at_constant_vol() -> None:
    # QuantLib's QdFp engine (high precision) is within 1e-6 of the exact American premium
    F, K, T, r, vol = 50.0, 60.0, 1.0, 0.08, 0.4
    ref = _quantlib_american(F, K, 365, r, vol, False)
    ours = _cn_american(F, K, T, r, False, lambda t: vol * vol)
    assert abs(ours - ref) <= CN_TOL * ref


@pytest.mark.parametrize(("m", "t", "tm", "r", "call"), _CASES)
def test_the_constant_vol_equivalent_against_the_model_s_time_dependent_vol(
    m: float, t: float, tm: float, r: float, call: bool
) -> None:
    F = FORWARD
    K = m * F
    v_rate = _model_variance_rate(_STRONG, tm)
    exact = _cn_american(F, K, t, r, call, v_rate)
    V = float(total_variance(t, tm, _STRONG))
    assert abs(V - quad_total(v_rate, t)) < 1e-12  # the same total variance
    vol = math.sqrt(V / t)
    approx = float(american.price(F, K, t, r, vol, call))
    const = _cn_american(F, K, t, r, call, lambda _t: V / t)  # same grid, constant vol
    assert abs(const - approx) <= CN_TOL * approx  # the grid agrees with the pricer
    # the approximation's size, free of the grid's own error: time-dependent minus constant
    eep = float(american.early_exercise_premium(F, K, t, r, vol, call))
    vega = float(american.greeks(F, K, t, r, vol, call)["vega"])
    assert abs(exact - const) <= APPROX_EEP_TOL * eep
    assert abs(exact - const) <= APPROX_VOL_TOL * vega
