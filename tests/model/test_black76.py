"""Black-76 prices, greeks and implied volatility against published values and QuantLib."""

from __future__ import annotations

import math

import numpy as np
import pytest
import QuantLib as ql  # noqa: N813 (the library's own convention)
from scipy.special import ndtr

from calib.errors import ImpliedVolError, ParameterError
from calib.model import black76
from calib.model.black76 import ImpliedVolCode
from calib.types import ArrayLike

EPS = np.finfo(np.float64).eps
# implied-vol error, volatility units, where the premium fixes the vol sharply: a converged
# third-order step leaves rounding (a few eps times a vol <= 1.5, ~1e-15); a search one step
# short of convergence (relative step ~1e-11, the stopping rule) shows above 1e-12
IV_TOL = 1e-12
PRICE_REL_TOL = 1e-12  # agreement with QuantLib's blackFormula, relative


def _grid(n: int, seed: int) -> dict[str, np.ndarray]:
    """A seeded grid from deep in to deep out of the money, a day to 10 years."""
    g = np.random.default_rng(seed)
    F = g.uniform(5.0, 200.0, n)
    return {
        "F": F,
        "K": F * np.exp(g.uniform(-1.5, 1.5, n)),
        "T": np.exp(g.uniform(math.log(1.0 / 365.0), math.log(10.0), n)),
        "r": g.uniform(-0.01, 0.08, n),
        "vol": g.uniform(0.05, 1.5, n),
        "call": g.random(n) < 0.5,
    }


def _term_scale(
    F: ArrayLike, K: ArrayLike, T: ArrayLike, r: ArrayLike, vol: ArrayLike, call: ArrayLike
) -> np.ndarray:
    """``D (F N(+-d1) + K N(+-d2))``: the size of the two terms the Black formula subtracts.

    Any float evaluation of the premium is uncertain by a few eps times this (and an
    implied vol, by that over vega): the conditioning no implementation can beat.
    """
    F, K, T, r, vol = (np.asarray(a, dtype=np.float64) for a in (F, K, T, r, vol))
    s = vol * np.sqrt(T)
    d1 = np.log(F / K) / s + 0.5 * s
    sign = np.where(call, 1.0, -1.0)
    return np.exp(-r * T) * (F * ndtr(sign * d1) + K * ndtr(sign * (d1 - s)))


@pytest.fixture(scope="module")
def grid() -> dict[str, np.ndarray]:
    return _grid(20_000, seed=7)


def test_haug_black76_example() -> None:
    # Haug, The Complete Guide to Option Pricing Formulas, 2nd ed., Black-76 example:
    # F = K = 19, T = 0.75, r = 0.10, vol = 0.28 gives 1.7011 for the call and the put.
    for kind in ("call", "put"):
        assert float(black76.price(19.0, 19.0, 0.75, 0.10, 0.28, kind)) == pytest.approx(
            1.7011, abs=5e-5
        )


def test_price_matches_quantlib_blackformula(grid: dict[str, np.ndarray]) -> None:
    # QuantLib ql.blackFormula(type, strike, forward, stdDev, discount), 20,000 seeded points.
    F, K, T, r, vol, call = (grid[k] for k in ("F", "K", "T", "r", "vol", "call"))
    ours = black76.price(F, K, T, r, vol, call)
    std, disc = vol * np.sqrt(T), np.exp(-r * T)
    ref = np.array(
        [
            ql.blackFormula(ql.Option.Call if c else ql.Option.Put, k, f, s, d)
            for f, k, s, d, c in zip(F, K, std, disc, call, strict=True)
        ]
    )
    # QuantLib's normal CDF is 0.5 (1 + erf(z / sqrt 2)): accurate to eps absolutely, not
    # relatively, so its premiums are uncertain by ~eps D (F + K). The 1e-12 relative check
    # holds wherever that is below 1e-13 of the premium; everywhere the two agree within it.
    floor = 8.0 * EPS * disc * (F + K)
    well = floor < 1e-1 * PRICE_REL_TOL * ref
    assert well.sum() > 10_000
    np.testing.assert_allclose(ours[well], ref[well], rtol=PRICE_REL_TOL, atol=0.0)
    assert np.all(np.abs(ours - ref) <= PRICE_REL_TOL * ref + floor)


def _round_trip_error(g: dict[str, np.ndarray]) -> tuple[np.ndarray, ...]:
    F, K, T, r, vol, call = (g[k] for k in ("F", "K", "T", "r", "vol", "call"))
    premium = black76.price(F, K, T, r, vol, call)
    vega = black76.greeks(F, K, T, r, vol, call)["vega"]
    iv = black76.implied_vol(premium, F, K, T, r, call)
    otm = np.where(call, K >= F, K <= F)
    return np.abs(iv - vol), premium, vega, otm, iv


def test_implied_vol_round_trip(grid: dict[str, np.ndarray]) -> None:
    err, _, vega, _, iv = _round_trip_error(grid)
    F = grid["F"]
    # where the float premium carries the vol: its rounding moves the vol by about eps (size
    # of the formula's terms) / vega, up to ~1e-8 at this vega (below it a premium barely
    # tells nearby vols apart)
    solvable = vega > 1e-8 * F
    assert solvable.sum() > 10_000
    assert not np.isnan(iv[solvable]).any()
    # The float premium fixes the volatility only to about eps * (size of the formula's terms)
    # / vega: deep in the money that is up to 1e-8 when vega = 1e-8 F. No inversion can beat
    # the data, so the bound is 1e-12 on top of 8 times that conditioning, and plain 1e-12
    # wherever the conditioning is below 1e-13.
    scale = _term_scale(*(grid[k] for k in ("F", "K", "T", "r", "vol", "call")))
    conditioning = 8.0 * EPS * scale[solvable] / vega[solvable]
    assert np.all(err[solvable] <= IV_TOL + conditioning)
    sharp = conditioning < 1e-13
    assert sharp.sum() > 10_000 and err[solvable][sharp].max() <= IV_TOL


def test_implied_vol_extremes_grid() -> None:
    # A day to 10 years, strikes from e^-3 F to e^3 F, vols 1% to 300%, quoted out of the
    # money: every point with vega > 1e-8 F inverts to 1e-12 beyond the premium's conditioning
    # (which matters only close to the upper bound, e.g. 300% for 10 years).
    T, m, v = np.meshgrid(
        [1 / 365, 1 / 52, 0.25, 1.0, 3.0, 10.0],
        np.linspace(-3.0, 3.0, 61),
        [0.01, 0.05, 0.2, 0.5, 1.0, 2.0, 3.0],
        indexing="ij",
    )
    F = 70.0
    K = F * np.exp(m)
    call = K >= F
    premium = black76.price(F, K, T, 0.02, v, call)
    vega = black76.greeks(F, K, T, 0.02, v, call)["vega"]
    iv, code = black76.implied_vol_detail(premium, F, K, T, 0.02, call)
    solvable = vega > 1e-8 * F
    assert solvable.sum() > 1000
    assert np.all(code[solvable] == ImpliedVolCode.OK)
    with np.errstate(divide="ignore", invalid="ignore"):  # vega underflows to 0 far out
        conditioning = 8.0 * EPS * _term_scale(F, K, T, 0.02, v, call) / vega
    assert np.all(np.abs(iv - v)[solvable] <= IV_TOL + conditioning[solvable])
    sharp = solvable & (conditioning < 1e-13)
    assert sharp.sum() > 1000 and np.abs(iv - v)[sharp].max() <= IV_TOL


def test_implied_vol_matches_quantlib(grid: dict[str, np.ndarray]) -> None:
    # QuantLib ql.blackFormulaImpliedStdDev(type, strike, forward, price, discount, 0, guess,
    # accuracy, maxIterations) at accuracy 1e-14, on 1,000 points of the grid.
    n = 1000
    F, K, T, r, vol, call = (grid[k][:n] for k in ("F", "K", "T", "r", "vol", "call"))
    premium = black76.price(F, K, T, r, vol, call)
    vega = black76.greeks(F, K, T, r, vol, call)["vega"]
    otm = np.where(call, K >= F, K <= F)
    keep = (vega > 1e-4 * F) & otm  # where QuantLib's solver converges from its own guess
    disc = np.exp(-r * T)
    ref = np.array(
        [
            ql.blackFormulaImpliedStdDev(
                ql.Option.Call if c else ql.Option.Put, k, f, p, d, 0.0, ql.nullDouble(), 1e-14, 200
            )
            for f, k, p, d, c in zip(
                F[keep], K[keep], premium[keep], disc[keep], call[keep], strict=True
            )
        ]
    )
    ours = black76.implied_vol(premium[keep], F[keep], K[keep], T[keep], r[keep], call[keep])
    assert keep.sum() > 300
    np.testing.assert_allclose(ours * np.sqrt(T[keep]), ref, rtol=0.0, atol=IV_TOL)


def test_implied_vol_reason_codes() -> None:
    F, K, T, r = 100.0, 90.0, 0.5, 0.0  # r = 0: the intrinsic value is exact in floats
    disc = math.exp(-r * T)
    premium = np.array([5.0 * disc, 10.0 * disc, 100.0 * disc, 1.0, 1.0, np.nan, 12.0])
    Fs = np.array([F, F, F, -F, F, F, F])
    Ts = np.array([T, T, T, T, 0.0, T, T])
    vol, code = black76.implied_vol_detail(premium, Fs, K, Ts, r, "call")
    assert code.tolist() == [
        ImpliedVolCode.BELOW_INTRINSIC,
        ImpliedVolCode.NO_TIME_VALUE,
        ImpliedVolCode.ABOVE_UPPER_BOUND,
        ImpliedVolCode.NON_POSITIVE_INPUT,
        ImpliedVolCode.NON_POSITIVE_INPUT,
        ImpliedVolCode.NON_FINITE_INPUT,
        ImpliedVolCode.OK,
    ]
    assert np.isnan(vol[:-1]).all() and np.isfinite(vol[-1])
    # a put's upper bound is the discounted strike
    _, put_code = black76.implied_vol_detail(K, F, K, T, 0.03, "put")
    assert put_code == ImpliedVolCode.ABOVE_UPPER_BOUND
    # arrays give NaN, never an exception
    assert np.isnan(black76.implied_vol(premium, Fs, K, Ts, r, "call")[:-1]).all()


def test_implied_vol_scalar_raises() -> None:
    with pytest.raises(ImpliedVolError, match="below the discounted intrinsic value"):
        black76.implied_vol(1.0, 100.0, 90.0, 0.5, 0.0, "call")
    with pytest.raises(ImpliedVolError, match="at or above its upper bound"):
        black76.implied_vol(101.0, 100.0, 90.0, 0.5, 0.0, "call")
    with pytest.raises(ImpliedVolError, match="must all be > 0"):
        black76.implied_vol(1.0, 100.0, 90.0, 0.0, 0.0, "call")
    assert float(black76.implied_vol(1.7011, 19.0, 19.0, 0.75, 0.10, "put")) == pytest.approx(
        0.28,
        abs=1e-4,  # Haug's example inverted; 1.7011 is given to 4 decimals
    )


def test_greeks_match_finite_differences() -> None:
    g = np.random.default_rng(11)
    n = 200
    F = g.uniform(20.0, 120.0, n)
    K = F * np.exp(g.uniform(-0.5, 0.5, n))
    T = g.uniform(0.05, 4.0, n)
    r = g.uniform(0.0, 0.06, n)
    vol = g.uniform(0.1, 0.9, n)
    call = g.random(n) < 0.5
    gr = black76.greeks(F, K, T, r, vol, call)

    def p(f: np.ndarray = F, t: np.ndarray = T, v: np.ndarray = vol) -> np.ndarray:
        return black76.price(f, K, t, r, v, call)

    # central differences, step h relative: truncation O(h^2), rounding O(eps / h) (gamma eps/h^2)
    hF, hv, hT = 1e-5 * F, 1e-6, 1e-6
    np.testing.assert_allclose(gr["price"], p(), rtol=1e-15)
    np.testing.assert_allclose(gr["delta"], (p(F + hF) - p(F - hF)) / (2 * hF), atol=1e-8)
    gamma_fd = (p(F + hF) - 2 * p() + p(F - hF)) / hF**2
    np.testing.assert_allclose(gr["gamma"], gamma_fd, rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(gr["vega"], (p(v=vol + hv) - p(v=vol - hv)) / (2 * hv), rtol=1e-7)
    theta_fd = -(p(t=T + hT) - p(t=T - hT)) / (2 * hT)
    np.testing.assert_allclose(gr["theta"], theta_fd, rtol=1e-6, atol=1e-7)


def test_kind_validation() -> None:
    with pytest.raises(ParameterError, match=r'kind = .* must be "call" or "put"'):
        black76.price(1.0, 1.0, 1.0, 0.0, 0.2, "straddle")
    with pytest.raises(ParameterError, match="kind"):
        black76.price(1.0, 1.0, 1.0, 0.0, 0.2, np.array(["call", "cal"]))
    both = black76.price(10.0, 10.0, 1.0, 0.0, 0.2, np.array(["call", "put"]))
    assert both[0] == pytest.approx(both[1], rel=1e-15)  # at the money, by put-call parity
