"""American options on futures: prices, greeks and implied vols against QuantLib and properties."""

from __future__ import annotations

import math

import numpy as np
import pytest
import QuantLib as ql  # noqa: N813 (the library's own convention)
from hypothesis import given
from hypothesis import strategies as st

from calib.errors import ImpliedVolError
from calib.model import american, black76
from calib.model.black76 import ImpliedVolCode

EPS = np.finfo(np.float64).eps
# premium error against QdFp high precision: the accuracy american.price states (its Notes),
# relative (a premium of 5 right to 5e-6, under a thousandth of a 0.01 tick) ...
PRICE_REL_TOL = 1e-6
PRICE_ABS_TOL = 1e-8  # ... or absolute in units of F for tiny premiums
# implied-vol round trip, volatility units: the inversion solves american.price's own root, to
# about eps premium / vega (at most 8e-13 measured, implied_vol_detail's Notes); a search that
# stopped early (its secant stops at 1e-12 relative) or a wrong bracket shows above 1e-10
IV_TOL = 1e-10
# QuantLib's finite-difference engine on a 2,000 x 2,000 grid is itself up to 4e-5 away from its
# QdFp high-precision premiums on these cases (the obstacle makes it first order near the boundary)
FD_REL_TOL = 1e-4
GREEK_REL_TOL = 1e-5  # a central difference of premiums good to ~1e-10, over steps of 1e-4
PROPERTY_TOL = 1e-9  # discretisation noise allowed in the monotonicity properties, units of F

_TODAY = ql.Date(15, 6, 2026)
_DAY_COUNT = ql.Actual365Fixed()


def _quantlib_american(
    F: float, K: float, days: int, r: float, vol: float, call: bool, engine: str = "qdfp-high"
) -> float:
    """QuantLib's American premium: the future as a stock paying a dividend yield equal to r.

    ``engine``: ``qdfp-high`` (QdFpAmericanEngine, high-precision scheme) or ``fd`` (its
    FdBlackScholesVanillaEngine, 2,000 time steps x 2,000 space points).
    """
    ql.Settings.instance().evaluationDate = _TODAY
    expiry = _TODAY + days
    curve = ql.YieldTermStructureHandle(ql.FlatForward(_TODAY, r, _DAY_COUNT))
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(ql.SimpleQuote(F)),
        curve,  # dividend yield = r: cost of carry zero
        curve,
        ql.BlackVolTermStructureHandle(
            ql.BlackConstantVol(_TODAY, ql.NullCalendar(), vol, _DAY_COUNT)
        ),
    )
    if engine == "qdfp-high":
        pricer = ql.QdFpAmericanEngine(process, ql.QdFpAmericanEngine.highPrecisionScheme())
    else:
        pricer = ql.FdBlackScholesVanillaEngine(process, 2000, 2000)
    option = ql.VanillaOption(
        ql.PlainVanillaPayoff(ql.Option.Call if call else ql.Option.Put, K),
        ql.AmericanExercise(_TODAY, expiry),
    )
    option.setPricingEngine(pricer)
    return float(option.NPV())


def _domain(n: int, seed: int) -> dict[str, np.ndarray]:
    """The domain american.price states its accuracy on: F/K 0.5-2, T 1 day-5 years (whole
    days), vol 0.05-1.5, r 0-10 %, calls and puts; log-uniform in moneyness, expiry and vol."""
    g = np.random.default_rng(seed)
    F = np.full(n, 100.0)
    days = np.maximum(1, np.round(np.exp(g.uniform(0.0, math.log(5 * 365), n)))).astype(int)
    return {
        "F": F,
        "K": F / np.exp(g.uniform(math.log(0.5), math.log(2.0), n)),
        "days": days,
        "T": days / 365.0,
        "r": g.uniform(0.0, 0.10, n),
        "vol": np.exp(g.uniform(math.log(0.05), math.log(1.5), n)),
        "call": g.random(n) < 0.5,
    }


def _within_tolerance(ours: np.ndarray, ref: np.ndarray, F: np.ndarray) -> np.ndarray:
    return np.abs(ours - ref) <= np.maximum(PRICE_REL_TOL * np.abs(ref), PRICE_ABS_TOL * F)


def test_prices_match_quantlib_qdfp_high_precision() -> None:
    # QuantLib QdFpAmericanEngine, highPrecisionScheme (Andersen, Lake and Offengenden's
    # method with tanh-sinh quadrature), over the whole domain of the stated accuracy.
    d = _domain(150, seed=14)
    ref = np.array(
        [
            _quantlib_american(
                d["F"][i], d["K"][i], d["days"][i], d["r"][i], d["vol"][i], d["call"][i]
            )
            for i in range(d["F"].size)
        ]
    )
    ours = american.price(d["F"], d["K"], d["T"], d["r"], d["vol"], d["call"])
    bad = ~_within_tolerance(ours, ref, d["F"])
    assert not bad.any(), list(zip(ours[bad], ref[bad], strict=True))


@pytest.mark.parametrize(
    ("F", "K", "days", "r", "vol", "call"),
    [
        (100.0, 100.0, 365, 0.05, 0.30, False),
        (100.0, 120.0, 730, 0.08, 0.25, False),
        (100.0, 80.0, 1095, 0.10, 0.45, True),
        (60.0, 50.0, 180, 0.04, 0.60, False),
    ],
)
def test_prices_match_quantlib_finite_differences(
    F: float, K: float, days: int, r: float, vol: float, call: bool
) -> None:
    # QuantLib FdBlackScholesVanillaEngine (Douglas scheme), 2,000 x 2,000 grid: an independent
    # method (a PDE with an obstacle), good to about FD_REL_TOL on this grid (see above).
    ref = _quantlib_american(F, K, days, r, vol, call, engine="fd")
    ours = float(american.price(F, K, days / 365.0, r, vol, "call" if call else "put"))
    assert ours == pytest.approx(ref, rel=FD_REL_TOL)


# Haug (1998), Option Pricing Formulas, p. 24 (as carried by QuantLib's test suite): American
# options with r = q = 10 % (cost of carry zero, i.e. on a future), K = 100, by the
# Barone-Adesi-Whaley approximation: (kind, F, T, vol, value).
_HAUG_BAW_ZERO_CARRY = [
    ("call", 90.0, 0.1, 0.15, 0.0206),
    ("call", 100.0, 0.1, 0.25, 3.1280),
    ("call", 110.0, 0.1, 0.35, 11.1679),
    ("call", 90.0, 0.5, 0.25, 2.7437),
    ("call", 100.0, 0.5, 0.35, 9.5106),
    ("put", 90.0, 0.1, 0.25, 10.2533),
    ("put", 110.0, 0.1, 0.15, 0.0410),
    ("put", 100.0, 0.5, 0.15, 4.0842),
    ("put", 110.0, 0.5, 0.35, 5.8823),
]
# Barone-Adesi-Whaley is an approximation: its values sit up to 0.037 (1.1 %) away from the
# exact premium on this table (measured against our pricer, itself checked against QdFp above),
# so the table only catches gross errors (a wrong rate, carry or symmetry).
BAW_TABLE_ABS_TOL = 0.04


@pytest.mark.parametrize(("kind", "F", "T", "vol", "value"), _HAUG_BAW_ZERO_CARRY)
def test_haug_barone_adesi_whaley_table(
    kind: str, F: float, T: float, vol: float, value: float
) -> None:
    ours = float(american.price(F, 100.0, T, 0.10, vol, kind))
    assert ours == pytest.approx(value, abs=BAW_TABLE_ABS_TOL)


def test_haug_zero_rate_row() -> None:
    # Haug (1998), p. 24, last row: put, F = K = 100, r = q = 0, T = 0.5, vol = 0.15: 4.2294
    # (exact: nothing is exercised early at zero rate).
    assert float(american.price(100.0, 100.0, 0.5, 0.0, 0.15, "put")) == pytest.approx(
        4.2294, abs=5e-5
    )


def test_put_call_symmetry_holds_in_quantlib_and_here() -> None:
    # McDonald and Schroder (1998): C(F, K) = P(K, F) at cost of carry zero. The relation is
    # first checked on QuantLib's own call and put (so it is a valid one), then on ours, whose
    # calls are computed through it.
    for F, K, days, r, vol in [(100.0, 90.0, 500, 0.07, 0.35), (40.0, 55.0, 1500, 0.09, 0.2)]:
        call = _quantlib_american(F, K, days, r, vol, True)
        put = _quantlib_american(K, F, days, r, vol, False)
        assert call == pytest.approx(put, rel=1e-9)
        ours_call = float(american.price(F, K, days / 365.0, r, vol, "call"))
        ours_put = float(american.price(K, F, days / 365.0, r, vol, "put"))
        assert ours_call == ours_put
        assert ours_call == pytest.approx(call, rel=PRICE_REL_TOL)


def test_zero_rate_is_black76() -> None:
    # No early exercise of an option on a future at zero rate (common practice): the premium
    # is Black-76's, computed by the same formula, so the two agree to rounding (1e-12
    # relative is a few thousand eps). Just above zero the boundary iteration runs, and the
    # early-exercise premium must stay within its bound 0 <= e <= r T K (the integrand of the
    # premium never exceeds r K).
    d = _domain(500, seed=3)
    F, K, T, vol, call = d["F"], d["K"], d["T"], d["vol"], d["call"]
    euro = black76.price(F, K, T, 0.0, vol, call)
    np.testing.assert_allclose(american.price(F, K, T, 0.0, vol, call), euro, rtol=1e-12, atol=0)
    r = 1e-9
    eep = american.early_exercise_premium(F, K, T, r, vol, call)
    strike = np.where(call, F, K)  # the put's strike after the call-put symmetry
    assert (eep >= -PRICE_ABS_TOL * F).all()
    assert (eep <= r * T * strike + PRICE_ABS_TOL * F).all()


def test_edge_inputs() -> None:
    # At expiry and at zero volatility the premium is the undiscounted intrinsic value
    # (exercise now) when r > 0; bad inputs give NaN.
    assert float(american.price(90.0, 100.0, 0.0, 0.05, 0.3, "put")) == 10.0
    assert float(american.price(90.0, 100.0, 1.0, 0.05, 0.0, "put")) == 10.0
    assert float(american.price(110.0, 100.0, 1.0, 0.05, 0.0, "call")) == 10.0
    assert float(american.price(110.0, 100.0, 1.0, -0.01, 0.0, "call")) == pytest.approx(
        10.0 * math.exp(0.01)
    )
    out = american.price(
        [-1.0, 100.0, 100.0], [100.0, 100.0, 100.0], 1.0, 0.05, [0.3, np.nan, -1], "put"
    )
    assert np.isnan(out).all()
    assert american.price(np.ones((2, 3)) * 100.0, 100.0, 1.0, 0.05, 0.3, "put").shape == (2, 3)


def test_deep_in_the_money_is_exercised_now() -> None:
    # Far inside the exercise region the American premium is exactly the intrinsic value.
    assert float(american.price(20.0, 100.0, 1.0, 0.08, 0.2, "put")) == 80.0
    assert float(american.price(100.0, 20.0, 1.0, 0.08, 0.2, "call")) == 80.0
    assert float(american.greeks(20.0, 100.0, 1.0, 0.08, 0.2, "put")["delta"]) == -1.0


# --- properties (hypothesis) -------------------------------------------------------------------

_F = st.floats(20.0, 200.0)
_MONEYNESS = st.floats(0.5, 2.0)
_T = st.floats(1.0 / 365.0, 5.0)
_R = st.floats(0.0, 0.10)
_VOL = st.floats(0.05, 1.5)


@given(F=_F, m=_MONEYNESS, T=_T, r=_R, vol=_VOL, call=st.booleans())
def test_bounds(F: float, m: float, T: float, r: float, vol: float, call: bool) -> None:
    # Common practice: an American premium is at least the European one and at least the
    # undiscounted intrinsic value (exercise now), and at most F (call) or K (put).
    K = F / m
    kind = "call" if call else "put"
    p = float(american.price(F, K, T, r, vol, kind))
    assert p >= float(black76.price(F, K, T, r, vol, kind)) - PROPERTY_TOL * F
    assert p >= max(F - K if call else K - F, 0.0) - 4 * EPS * F  # Black-76 rounds at r = 0
    assert p <= (F if call else K)
    assert float(american.early_exercise_premium(F, K, T, r, vol, kind)) >= -PROPERTY_TOL * F


@given(F=_F, m=_MONEYNESS, T=_T, r=_R, vol=_VOL, call=st.booleans(), bump=st.floats(1e-3, 0.3))
def test_increasing_in_vol_and_expiry(
    F: float, m: float, T: float, r: float, vol: float, call: bool, bump: float
) -> None:
    # Common practice: more volatility or more time never lowers an American premium.
    K = F / m
    kind = "call" if call else "put"
    p = float(american.price(F, K, T, r, vol, kind))
    assert float(american.price(F, K, T, r, vol * (1 + bump), kind)) >= p - PROPERTY_TOL * F
    assert float(american.price(F, K, T * (1 + bump), r, vol, kind)) >= p - PROPERTY_TOL * F


@given(F=_F, m=_MONEYNESS, T=_T, r=_R, vol=_VOL)
def test_put_call_bounds(F: float, m: float, T: float, r: float, vol: float) -> None:
    # Hull, Options, Futures and Other Derivatives, American futures options (from memory):
    # F e^{-rT} - K <= C - P <= F - K e^{-rT}.
    K = F / m
    c = float(american.price(F, K, T, r, vol, "call"))
    p = float(american.price(F, K, T, r, vol, "put"))
    disc = math.exp(-r * T)
    assert F * disc - K - PROPERTY_TOL * F <= c - p <= F - K * disc + PROPERTY_TOL * F


# --- greeks ------------------------------------------------------------------------------------


def test_delta_against_central_differences() -> None:
    # STYLE.md 10: the closed-form delta against a central difference of our own price.
    d = _domain(300, seed=5)
    F, K, T, r, vol, call = d["F"], d["K"], d["T"], d["r"], d["vol"], d["call"]
    g = american.greeks(F, K, T, r, vol, call)
    h = 1e-4 * F
    fd = (american.price(F + h, K, T, r, vol, call) - american.price(F - h, K, T, r, vol, call)) / (
        2 * h
    )
    smooth = np.abs(g["price"] - np.maximum(np.where(call, F - K, K - F), 0.0)) > 1e-3 * F
    np.testing.assert_allclose(g["delta"][smooth], fd[smooth], rtol=GREEK_REL_TOL, atol=1e-7)


def test_vega_against_quantlib_differences() -> None:
    # A central difference (step 1e-4 vol) of QuantLib's QdFp high-precision premiums.
    for F, K, days, r, vol, call in [
        (100.0, 105.0, 365, 0.05, 0.3, False),
        (100.0, 70.0, 1200, 0.09, 0.2, True),
        (100.0, 150.0, 90, 0.03, 0.8, False),
    ]:
        h = 1e-4
        ref = (
            _quantlib_american(F, K, days, r, vol + h, call)
            - _quantlib_american(F, K, days, r, vol - h, call)
        ) / (2 * h)
        ours = float(american.greeks(F, K, days / 365.0, r, vol, "call" if call else "put")["vega"])
        assert ours == pytest.approx(ref, rel=GREEK_REL_TOL)


def test_greeks_at_zero_rate_are_black76() -> None:
    d = _domain(50, seed=9)
    ours = american.greeks(d["F"], d["K"], d["T"], 0.0, d["vol"], d["call"])
    ref = black76.greeks(d["F"], d["K"], d["T"], 0.0, d["vol"], d["call"])
    for name in ("price", "delta", "vega"):
        np.testing.assert_allclose(ours[name], ref[name], rtol=1e-12, atol=1e-14)


# --- implied volatility ------------------------------------------------------------------------


def test_implied_vol_round_trip() -> None:
    # The volatility recovered to IV_TOL wherever the premium carries it (vega > 1e-8 F; the
    # round trip's error is about eps premium / vega, see IV_TOL).
    d = _domain(2000, seed=21)
    F, K, T, r, vol, call = d["F"], d["K"], d["T"], d["r"], d["vol"], d["call"]
    premium = american.price(F, K, T, r, vol, call)
    iv, code = american.implied_vol_detail(premium, F, K, T, r, call)
    vega = american.greeks(F, K, T, r, vol, call)["vega"]
    well = vega > 1e-8 * F
    assert well.sum() > 1000  # the rest lie deep in the exercise region or expire in days
    assert (code[well] == ImpliedVolCode.OK).all()
    assert np.abs(iv[well] - vol[well]).max() <= IV_TOL


def test_implied_vol_reason_codes() -> None:
    F, K, T, r = 100.0, 110.0, 1.0, 0.05
    premium = [9.0, 10.0, 110.0, 12.0, np.nan, 12.0]
    strikes = [K, K, K, K, K, -1.0]
    vol, code = american.implied_vol_detail(premium, F, strikes, T, r, "put")
    assert list(code) == [
        ImpliedVolCode.BELOW_INTRINSIC,  # 9 < undiscounted intrinsic 10 (Black-76 accepts it)
        ImpliedVolCode.NO_TIME_VALUE,
        ImpliedVolCode.ABOVE_UPPER_BOUND,  # at the strike
        ImpliedVolCode.OK,
        ImpliedVolCode.NON_FINITE_INPUT,
        ImpliedVolCode.NON_POSITIVE_INPUT,
    ]
    assert np.isnan(vol[[0, 1, 2, 4, 5]]).all()
    # a premium between the discounted and the undiscounted strike still has a volatility
    high = 0.5 * (K * math.exp(-r * T) + K)
    v = float(american.implied_vol(high, F, K, T, r, "put"))
    assert float(american.price(F, K, T, r, v, "put")) == pytest.approx(high, rel=1e-12)


def test_implied_vol_scalar_raises_with_the_american_reason() -> None:
    with pytest.raises(ImpliedVolError, match="undiscounted intrinsic"):
        american.implied_vol(9.0, 100.0, 110.0, 1.0, 0.05, "put")


def test_implied_vol_at_non_positive_rate_is_black76() -> None:
    d = _domain(200, seed=2)
    F, K, T, vol, call = d["F"], d["K"], d["T"], d["vol"], d["call"]
    premium = black76.price(F, K, T, -0.01, vol, call)
    ours = american.implied_vol_detail(premium, F, K, T, -0.01, call)
    ref = black76.implied_vol_detail(premium, F, K, T, -0.01, call)
    np.testing.assert_array_equal(ours[1], ref[1])
    np.testing.assert_array_equal(ours[0], ref[0])


def test_implied_vol_just_outside_the_exercise_region() -> None:
    # A put 8e-6 above its intrinsic value of 24.35: the premium is flat (intrinsic) below the
    # volatility sought and steep in early-exercise premium above it, where a solver that
    # models the early-exercise premium linearly must not stall on the flat side.
    F, K, T, r, vol = 64.99659129779637, 89.35025782659957, 2.16986301369863, 0.05, 0.1485574048
    premium = float(american.price(F, K, T, r, vol, "put"))
    assert premium - (K - F) < 1e-5
    assert float(american.implied_vol(premium, F, K, T, r, "put")) == pytest.approx(vol, abs=IV_TOL)
