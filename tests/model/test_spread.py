"""Calendar-spread options: law, exact quadrature, Kirk, Monte Carlo, hedges, sensitivities."""

from __future__ import annotations

import math

import numpy as np
import pytest
import QuantLib as ql  # noqa: N813
from scipy.special import ndtr

from calib.errors import ParameterError
from calib.model.spread import (
    DEFAULT_NODES,
    ForwardVols,
    SpreadLaw,
    SpreadOption,
    law_coefficients,
    price_exact,
    price_kirk,
    price_mc,
    price_quad,
    spread_greeks,
    spread_law,
    vol_sensitivities,
)
from calib.model.twofactor import TwoFactorParams, bucket_coefficients, log_futures, transition

# Invented two-factor sets: Samuelson decay (s2 <= rho kappa s1) and a loose one.
DECAY = TwoFactorParams(
    mu=0.1, kappa=1.5, alpha=0.05, lam=0.0, sigma_spot=0.4, sigma_yield=0.45, rho=0.8
)
LOOSE = TwoFactorParams(
    mu=0.1, kappa=0.8, alpha=0.05, lam=0.0, sigma_spot=0.35, sigma_yield=0.3, rho=0.9
)

PRICE_REL = 1e-10  # exact quadrature target, relative
FD_REL = 1e-6  # central differences of a smooth function, step 1e-5 relative


def grid_option(params_far: float = 52.0) -> SpreadOption:
    """Calendar spreads across expiries, gaps, strikes, contango and backwardation."""
    t, T1, T2, F2, K = (
        np.array(x, dtype=float).ravel()
        for x in np.meshgrid(
            [0.05, 0.2, 0.9],
            [0.0, 0.05],
            [0.25, 1.0],
            [params_far, 46.0],
            [-3.0, -1.0, 0.0, 0.5, 2.0, 5.0],
            indexing="ij",
        )
    )
    return SpreadOption(
        t_near=t + T1 + 0.01,
        t_far=t + T1 + 0.01 + T2,
        t_expiry=t,
        strike=K,
        is_call=np.arange(t.size) % 2 == 0,
        near_price=50.0,
        far_price=F2,
        discount=0.97,
    )


# --- Kirk against published and library values ------------------------------------------------


def test_kirk_matches_haug_example() -> None:
    # Haug (2007), The Complete Guide to Option Pricing Formulas, 2nd ed., spread option
    # approximation (Kirk 1995): F1 = 28, F2 = 20, K = 7, r = 0.05, T = 90/360, vol1 = 0.29,
    # vol2 = 0.36, rho = 0.42, call max(F1 - F2 - K, 0) = 2.1670. Haug's long leg F1 = 28 is our
    # far leg, his F2 = 20 (lumped with the strike by Kirk) our near leg.
    T = 90 / 360
    law = SpreadLaw.black(
        near_price=20.0, far_price=28.0, vol_near=0.36, vol_far=0.29, rho=0.42, expiry=T
    )
    value = float(price_kirk(law, 7.0, "call", math.exp(-0.05 * T))[0])
    assert value == pytest.approx(2.1670, abs=5e-5)  # Haug prints four decimals


def _quantlib_kirk(
    F1: float, F2: float, K: float, v1: float, v2: float, rho: float, T: float, call: bool
) -> float:
    """QuantLib's KirkEngine on max(F2 - F1 - K, 0): its first process is the long leg."""
    today = ql.Date(15, 1, 2030)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    r = 0.03
    curve = ql.YieldTermStructureHandle(ql.FlatForward(today, r, dc))

    def process(F: float, vol: float) -> ql.BlackProcess:
        vol_ts = ql.BlackVolTermStructureHandle(
            ql.BlackConstantVol(today, ql.NullCalendar(), vol, dc)
        )
        return ql.BlackProcess(ql.QuoteHandle(ql.SimpleQuote(F)), curve, vol_ts)

    expiry = today + round(T * 365)
    payoff = ql.SpreadBasketPayoff(
        ql.PlainVanillaPayoff(ql.Option.Call if call else ql.Option.Put, K)
    )
    option = ql.BasketOption(payoff, ql.EuropeanExercise(expiry))
    option.setPricingEngine(ql.KirkEngine(process(F2, v2), process(F1, v1), rho))
    return float(option.NPV())


@pytest.mark.parametrize("call", [True, False])
def test_kirk_matches_quantlib_on_a_grid(call: bool) -> None:
    # QuantLib 1.3x+ KirkEngine (BasketOption with SpreadBasketPayoff, two BlackProcesses).
    T = 146 / 365  # a whole number of days, as QuantLib's dates count them
    r = 0.03
    for F1, F2, K, v1, v2, rho in [
        (50.0, 52.0, 1.0, 0.40, 0.30, 0.95),
        (50.0, 48.0, 0.0, 0.35, 0.33, 0.90),
        (50.0, 55.0, 4.0, 0.30, 0.25, 0.50),
        (50.0, 45.0, -2.0, 0.45, 0.30, -0.2),
        (20.0, 28.0, 7.0, 0.36, 0.29, 0.42),
    ]:
        law = SpreadLaw.black(F1, F2, v1, v2, rho, T)
        ours = float(price_kirk(law, K, call, math.exp(-r * T))[0])
        theirs = _quantlib_kirk(F1, F2, K, v1, v2, rho, T, call)
        assert ours == pytest.approx(theirs, rel=1e-12, abs=1e-12)


# --- exact price --------------------------------------------------------------------------------


def test_zero_strike_is_margrabe() -> None:
    # Margrabe (1978), exchange option: V = D [F2 N(d1) - F1 N(d2)], s^2 = v1 + v2 - 2c,
    # d1 = ln(F2/F1)/s + s/2.
    opt = grid_option()
    law = spread_law(opt, LOOSE)
    s = np.sqrt(law.var_near + law.var_far - 2.0 * law.cov)
    F1, F2 = opt.near_price, opt.far_price
    d1 = np.log(F2 / F1) / s + 0.5 * s
    call = opt.discount * (F2 * ndtr(d1) - F1 * ndtr(d1 - s))
    put = call - opt.discount * (F2 - F1)
    np.testing.assert_allclose(price_exact(law, 0.0, "call", opt.discount), call, rtol=PRICE_REL)
    np.testing.assert_allclose(price_exact(law, 0.0, "put", opt.discount), put, rtol=PRICE_REL)


@pytest.mark.parametrize("params", [DECAY, LOOSE])
def test_default_nodes_converged_against_many_nodes_and_quad(params: TwoFactorParams) -> None:
    opt = grid_option()
    law = spread_law(opt, params)
    ours = price_exact(law, opt.strike, opt.is_call, opt.discount)
    many = price_exact(law, opt.strike, opt.is_call, opt.discount, nodes=2000)
    np.testing.assert_allclose(ours, many, rtol=PRICE_REL)
    # scipy.integrate.quad (adaptive) of the conditional-Black integrand, on a subsample.
    sub = slice(0, len(opt), 7)
    sub_law = SpreadLaw(*(getattr(law, n)[sub] for n in SpreadLaw.__slots__))
    ref = price_quad(sub_law, opt.strike[sub], opt.is_call[sub], opt.discount[sub])
    np.testing.assert_allclose(ours[sub], ref, rtol=PRICE_REL)


def test_put_call_parity_and_leg_symmetry() -> None:
    opt = grid_option()
    law = spread_law(opt, DECAY)
    K, D = opt.strike, opt.discount
    call = price_exact(law, K, "call", D)
    put = price_exact(law, K, "put", D)
    parity = D * (opt.far_price - opt.near_price - K)
    np.testing.assert_allclose(call - put, parity, rtol=1e-12, atol=1e-12 * 50)
    # The near-minus-far call struck at K is the far-minus-near put struck at -K (module doc):
    # swap the legs in the law and compare.
    swapped = SpreadLaw(law.mean_far, law.mean_near, law.var_far, law.var_near, law.cov)
    np.testing.assert_allclose(price_exact(swapped, -K, "put", D), call, rtol=PRICE_REL)


def test_exact_close_to_kirk_for_small_strikes() -> None:
    # Kirk is exact at K = 0 (Margrabe; quadrature tolerance there) and its error grows with |K|.
    # Sanity bound (common practice, no published table): for |K| <= 0.5 on futures near 50,
    # Kirk within 1e-4 of the futures price in absolute terms (relative error is meaningless
    # for the deep out-of-the-money options of the grid).
    opt = grid_option()
    law = spread_law(opt, LOOSE)
    for K in (0.0, 0.1, 0.5):
        exact = price_exact(law, K, opt.is_call, opt.discount)
        kirk = price_kirk(law, K, opt.is_call, opt.discount)
        if K:
            np.testing.assert_allclose(kirk, exact, rtol=0.0, atol=1e-4 * 50.0)
        else:
            np.testing.assert_allclose(kirk, exact, rtol=PRICE_REL, atol=1e-18)


@pytest.mark.parametrize("far_price", [56.0, 44.0], ids=["contango", "backwardation"])
def test_exact_within_three_standard_errors_of_monte_carlo(far_price: float) -> None:
    opt = SpreadOption(
        t_near=[0.5, 0.5, 1.0, 1.0],
        t_far=[0.75, 1.5, 1.25, 2.0],
        t_expiry=[0.45, 0.4, 0.9, 0.95],
        strike=[2.0, -1.0, 0.0, 6.0],
        is_call=[True, False, True, False],
        near_price=50.0,
        far_price=far_price,
        discount=0.98,
    )
    law = spread_law(opt, DECAY)
    exact = price_exact(law, opt.strike, opt.is_call, opt.discount)
    mc, se = price_mc(law, opt.strike, opt.is_call, opt.discount, n_paths=200_000, seed=8)
    assert np.all(se > 0.0)
    assert np.all(np.abs(mc - exact) <= 3.0 * se)


# --- the law ------------------------------------------------------------------------------------


def test_law_matches_the_state_transition() -> None:
    # Independent route: the exact (X, d) transition (twofactor.transition) started from the
    # state that reproduces today's two futures, then ln F_i(t) = X - d B(T_i - t) + A.
    r = 0.03
    t, T1, T2, F1, F2 = 0.4, 0.5, 1.25, 50.0, 53.0
    opt = SpreadOption(
        t_near=T1,
        t_far=T2,
        t_expiry=t,
        strike=1.0,
        is_call="call",
        near_price=F1,
        far_price=F2,
        discount=1.0,
    )
    law = spread_law(opt, DECAY)
    k = DECAY.kappa
    b1, b2 = (1 - math.exp(-k * T1)) / k, (1 - math.exp(-k * T2)) / k
    a1 = float(log_futures(0.0, 0.0, T1, r, DECAY))
    a2 = float(log_futures(0.0, 0.0, T2, r, DECAY))
    d0 = ((math.log(F1) - a1) - (math.log(F2) - a2)) / (b2 - b1)
    x0 = math.log(F1) - a1 + d0 * b1
    tr = transition(DECAY, [t], measure="risk_neutral", r=r)
    mean_state = tr.c[0] + tr.Phi[0] @ np.array([x0, d0])
    loads = np.array([[1.0, -(1 - math.exp(-k * (T - t))) / k] for T in (T1, T2)])
    cov = loads @ tr.cov[0] @ loads.T
    offset = [float(log_futures(0.0, 0.0, T - t, r, DECAY)) for T in (T1, T2)]
    mean = loads @ mean_state + offset
    np.testing.assert_allclose(
        [law.var_near[0], law.var_far[0], law.cov[0]], [cov[0, 0], cov[1, 1], cov[0, 1]], rtol=1e-12
    )
    np.testing.assert_allclose([law.mean_near[0], law.mean_far[0]], mean, rtol=1e-12)


def test_forward_mode_constant_buckets_equal_constant_mode() -> None:
    opt = grid_option()
    edges = [0.0, 0.1, 0.3, 0.6, 1.0]
    fwd = spread_law(opt, ForwardVols.constant(LOOSE, edges))
    const = spread_law(opt, LOOSE)
    for name in ("mean_near", "mean_far", "var_near", "var_far", "cov"):
        np.testing.assert_allclose(getattr(fwd, name), getattr(const, name), rtol=1e-12)
    # Diagonal bucket coefficients agree with twofactor.bucket_coefficients.
    near, _, _ = law_coefficients(opt, ForwardVols.constant(LOOSE, edges))
    for ours, theirs in zip(
        near, bucket_coefficients(opt.t_expiry, opt.t_near, edges, LOOSE.kappa), strict=True
    ):
        np.testing.assert_allclose(ours, theirs, rtol=1e-14, atol=1e-16)


# --- derivatives --------------------------------------------------------------------------------


def _fd(f, x: float, h: float) -> float:  # type: ignore[no-untyped-def]
    return float((f(x + h) - f(x - h)) / (2.0 * h))


def test_hedge_ratios_match_finite_differences() -> None:
    opt = grid_option()
    law = spread_law(opt, DECAY)
    g = spread_greeks(law, opt.strike, opt.is_call, opt.discount)
    dn, df = g.delta_near, g.delta_far

    def bumped(leg: str, h: float) -> np.ndarray:
        F1 = opt.near_price * (1 + h) if leg == "near" else opt.near_price
        F2 = opt.far_price * (1 + h) if leg == "far" else opt.far_price
        moved = SpreadLaw(
            np.log(F1) - 0.5 * law.var_near,
            np.log(F2) - 0.5 * law.var_far,
            law.var_near,
            law.var_far,
            law.cov,
        )
        return price_exact(moved, opt.strike, opt.is_call, opt.discount)

    h = 1e-5
    fd_near = (bumped("near", h) - bumped("near", -h)) / (2 * h * opt.near_price)
    fd_far = (bumped("far", h) - bumped("far", -h)) / (2 * h * opt.far_price)
    np.testing.assert_allclose(dn, fd_near, rtol=FD_REL, atol=1e-9)
    np.testing.assert_allclose(df, fd_far, rtol=FD_REL, atol=1e-9)


@pytest.mark.parametrize("mode", ["constant", "forward"])
def test_vol_sensitivities_match_finite_differences(mode: str) -> None:
    opt = grid_option()
    edges = np.array([0.0, 0.1, 0.3, 1.0])
    base = (
        LOOSE
        if mode == "constant"
        else ForwardVols(
            kappa=LOOSE.kappa,
            edges=edges,
            sigma_spot=[0.4, 0.35, 0.3],
            sigma_yield=[0.35, 0.3, 0.25],
            rho=[0.9, 0.85, 0.8],
        )
    )
    sens = vol_sensitivities(opt, base)
    h = 1e-5

    def value(vols: TwoFactorParams | ForwardVols) -> np.ndarray:
        return price_exact(spread_law(opt, vols), opt.strike, opt.is_call, opt.discount)

    for name in ("sigma_spot", "sigma_yield", "rho"):
        got = getattr(sens, name)
        if isinstance(base, TwoFactorParams):
            x = getattr(base, name)
            up = base.with_vols(**{**_vols(base), name: x + h})
            dn = base.with_vols(**{**_vols(base), name: x - h})
            fd = (value(up) - value(dn)) / (2 * h)
            np.testing.assert_allclose(got, fd, rtol=FD_REL, atol=1e-8)
        else:
            for k in range(edges.size - 1):
                arrs = {n: np.array(getattr(base, n)) for n in ("sigma_spot", "sigma_yield", "rho")}
                up, dn = dict(arrs), dict(arrs)
                up[name] = arrs[name].copy()
                up[name][k] += h
                dn[name] = arrs[name].copy()
                dn[name][k] -= h
                fd = (
                    value(ForwardVols(base.kappa, edges, **up))
                    - value(ForwardVols(base.kappa, edges, **dn))
                ) / (2 * h)
                np.testing.assert_allclose(got[:, k], fd, rtol=FD_REL, atol=1e-8)


def _vols(p: TwoFactorParams) -> dict[str, float]:
    return {"sigma_spot": p.sigma_spot, "sigma_yield": p.sigma_yield, "rho": p.rho}


def test_price_is_homogeneous_in_prices_and_strike() -> None:
    # Euler: V = F1 dV/dF1 + F2 dV/dF2 + K dV/dK, and scaling F1, F2, K by 2 doubles V.
    opt = grid_option()
    law = spread_law(opt, DECAY)
    g = spread_greeks(law, opt.strike, opt.is_call, opt.discount)
    doubled = SpreadLaw(
        law.mean_near + math.log(2), law.mean_far + math.log(2), law.var_near, law.var_far, law.cov
    )
    np.testing.assert_allclose(
        price_exact(doubled, 2 * opt.strike, opt.is_call, opt.discount), 2 * g.price, rtol=1e-12
    )
    assert DEFAULT_NODES == 64


# --- validation ---------------------------------------------------------------------------------


def test_bad_inputs_are_rejected() -> None:
    kw = dict(
        t_near=0.5,
        t_far=1.0,
        t_expiry=0.4,
        strike=1.0,
        is_call="call",
        near_price=50.0,
        far_price=52.0,
        discount=1.0,
    )
    with pytest.raises(ParameterError, match=r"far = .* must not mature before the near"):
        SpreadOption(**{**kw, "t_far": 0.3})
    with pytest.raises(ParameterError, match=r"near = .* must not mature before expiry"):
        SpreadOption(**{**kw, "t_expiry": 0.6})
    with pytest.raises(ParameterError, match=r"near_price .* must be > 0"):
        SpreadOption(**{**kw, "near_price": -1.0})
    with pytest.raises(ParameterError, match="kind"):
        SpreadOption(**{**kw, "is_call": "straddle"})
    law = SpreadLaw.black(50.0, 52.0, 0.3, 0.3, 0.9, 0.5)
    with pytest.raises(ParameterError, match="Kirk's approximation needs"):
        price_kirk(law, -60.0, "call")
    with pytest.raises(ParameterError, match="Cauchy-Schwarz"):
        SpreadLaw(0.0, 0.0, 0.1, 0.1, 0.2)
    with pytest.raises(ParameterError, match="last edge must reach"):
        spread_law(SpreadOption(**kw), ForwardVols.constant(LOOSE, [0.0, 0.2]))
