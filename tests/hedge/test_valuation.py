"""Values and hedge ratios of the hedge engine against the pricers of calib.model."""

from __future__ import annotations

import numpy as np
import pytest

from calib.hedge.engine import hedge_paths
from calib.hedge.instruments import CalendarSpread, VanillaOption, remaining_law
from calib.hedge.valuation import NODE_TOL, value_and_ratios
from calib.model import black76
from calib.model.spread import ForwardVols, SpreadOption, price_exact, spread_greeks, spread_law
from calib.model.twofactor import TwoFactorParams, covariance, total_variance

# An invented set with a strong Samuelson effect and a loose yield volatility.
SET = TwoFactorParams(
    mu=0.06, kappa=1.2, alpha=0.03, lam=0.01, sigma_spot=0.35, sigma_yield=0.3, rho=0.6
)
RATE = 0.03
VALUE_REL = 1e-12  # the fused kernel sums the same quadrature (pruned nodes: < 1e-16 of F)
FD_REL = 1e-6  # central differences of a smooth function, step 1e-5 relative


def _spreads() -> list[CalendarSpread]:
    return [
        CalendarSpread(t_near=0.55, t_far=0.8, t_expiry=0.5, strike=k, is_call=c)
        for k in (-2.0, 0.0, 0.7, 3.0)
        for c in (True, False)
    ]


def _spec(option: CalendarSpread, F: np.ndarray, t: float = 0.0) -> SpreadOption:
    """calib.model.spread's description of the option seen from ``t``, one per row of F."""
    n = F.shape[0]
    return SpreadOption(
        t_near=option.t_near - t,
        t_far=option.t_far - t,
        t_expiry=option.t_expiry - t,
        strike=np.full(n, option.strike),
        is_call=option.is_call,
        near_price=F[:, 0],
        far_price=F[:, 1],
        discount=np.exp(-RATE * (option.t_expiry - t)),
    )


def _exact(option: CalendarSpread, vols: TwoFactorParams | ForwardVols, F: np.ndarray) -> float:
    spec = _spec(option, F)
    return float(price_exact(spread_law(spec, vols), spec.strike, spec.is_call, spec.discount)[0])


def _spread_pricer(
    option: CalendarSpread, F: np.ndarray, t: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """calib.model.spread's exact pricer and hedge ratios for the option seen from ``t``."""
    spec = _spec(option, F, t)
    g = spread_greeks(spread_law(spec, SET), spec.strike, spec.is_call, spec.discount)
    return g.price, g.delta_near, g.delta_far


@pytest.mark.parametrize("t", [0.0, 0.3, 0.49])
def test_remaining_law_equals_the_closed_form_from_t(t: float) -> None:
    # DESIGN section 3: the model is time-homogeneous, so the law over [t, expiry] is the
    # closed-form covariance over a life of expiry - t with maturities shifted by t.
    option = CalendarSpread(t_near=0.55, t_far=0.8, t_expiry=0.5, strike=0.0)
    law = remaining_law(option, SET, np.array([t]))
    life = option.t_expiry - t
    want = (
        total_variance(life, option.t_near - t, SET),
        total_variance(life, option.t_far - t, SET),
        covariance(life, option.t_near - t, option.t_far - t, SET),
    )
    got = (law.var_near[0], law.var_far[0], law.cov[0])
    np.testing.assert_allclose(got, np.array(want, dtype=float).ravel(), rtol=1e-12)


@pytest.mark.parametrize("option", _spreads(), ids=lambda o: f"K{o.strike}-{o.is_call}")
def test_spread_values_and_ratios_equal_the_pricer(
    option: CalendarSpread, rng: np.random.Generator
) -> None:
    t = 0.2
    F = 50.0 * np.exp(0.15 * rng.standard_normal((500, 1)) + [[0.0, 0.02]])
    F[:, 1] *= np.exp(0.03 * rng.standard_normal(500))
    law = remaining_law(option, SET, np.array([t]))
    value, ratios = value_and_ratios(
        option,
        float(law.var_near[0]),
        float(law.var_far[0]),
        float(law.cov[0]),
        F,
        float(np.exp(-RATE * (option.t_expiry - t))),
    )
    price, d_near, d_far = _spread_pricer(option, F, t)
    scale = F.max()
    np.testing.assert_allclose(value, price, rtol=VALUE_REL, atol=VALUE_REL * scale)
    np.testing.assert_allclose(ratios[:, 0], d_near, atol=VALUE_REL * 10)
    np.testing.assert_allclose(ratios[:, 1], d_far, atol=VALUE_REL * 10)


@pytest.mark.parametrize("option", _spreads()[::3], ids=lambda o: f"K{o.strike}-{o.is_call}")
def test_spread_ratios_equal_finite_differences_of_the_pricer(option: CalendarSpread) -> None:
    # Central differences of calib.model.spread.price_exact in each future (STYLE 10).
    F = np.array([[48.0, 50.5]])
    law = remaining_law(option, SET, np.array([0.0]))
    _, ratios = value_and_ratios(
        option,
        float(law.var_near[0]),
        float(law.var_far[0]),
        float(law.cov[0]),
        F,
        float(np.exp(-RATE * option.t_expiry)),
    )
    for leg in (0, 1):
        h = 1e-5 * F[0, leg]
        bumped = []
        for sign in (1.0, -1.0):
            G = F.copy()
            G[0, leg] += sign * h
            bumped.append(_exact(option, SET, G))
        fd = (bumped[0] - bumped[1]) / (2.0 * h)
        assert ratios[0, leg] == pytest.approx(fd, rel=FD_REL, abs=FD_REL)


@pytest.mark.parametrize("call", [True, False])
def test_vanilla_values_and_ratios_equal_black76(call: bool, rng: np.random.Generator) -> None:
    # calib.model.black76.greeks with the model's Black volatility over the remaining life.
    option = VanillaOption(t_delivery=0.6, t_expiry=0.5, strike=50.0, is_call=call)
    t = 0.1
    F = 50.0 * np.exp(0.2 * rng.standard_normal((300, 1)))
    law = remaining_law(option, SET, np.array([t]))
    var = float(law.var_near[0])
    value, ratios = value_and_ratios(
        option, var, var, var, F, float(np.exp(-RATE * (option.t_expiry - t)))
    )
    life = option.t_expiry - t
    g = black76.greeks(F[:, 0], 50.0, life, RATE, np.sqrt(var / life), "call" if call else "put")
    np.testing.assert_allclose(value, g["price"], rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(ratios[:, 0], g["delta"], rtol=1e-13, atol=1e-13)
    # Central differences of the Black-76 price in the future.
    h = 1e-5 * F[:, 0]
    up = black76.price(
        F[:, 0] + h, 50.0, life, RATE, np.sqrt(var / life), "call" if call else "put"
    )
    dn = black76.price(
        F[:, 0] - h, 50.0, life, RATE, np.sqrt(var / life), "call" if call else "put"
    )
    np.testing.assert_allclose(ratios[:, 0], (up - dn) / (2.0 * h), rtol=FD_REL, atol=FD_REL)


def test_value_at_time_zero_equals_the_pricers() -> None:
    # The premium the engine sells for is calib.model.spread's exact price (64 nodes), with
    # constant and with forward volatilities.
    option = CalendarSpread(t_near=0.55, t_far=0.8, t_expiry=0.5, strike=0.7)
    forward = ForwardVols(
        kappa=SET.kappa,
        edges=np.array([0.0, 0.2, 0.5]),
        sigma_spot=np.array([0.4, 0.3]),
        sigma_yield=np.array([0.25, 0.35]),
        rho=np.array([0.5, 0.7]),
    )
    times = np.linspace(0.0, option.t_expiry, 5)
    F = np.tile(np.array([50.0, 51.0]), (3, times.size, 1))
    for vols in (SET, forward):
        result = hedge_paths(option, vols, times, F, RATE)
        want = _exact(option, vols, np.array([[50.0, 51.0]]))
        np.testing.assert_allclose(result.premium, want, rtol=VALUE_REL)


# Sharp integrands (DESIGN section 3 law, module Notes of calib.model.spread): correlation
# near one with unequal leg volatilities, a large strike against the spread's deviation, and
# a short remaining life; plus a smooth one.
SHARP_CASES = [
    (SET, CalendarSpread(t_near=0.55, t_far=0.8, t_expiry=0.5, strike=0.5)),
    (SET, CalendarSpread(t_near=0.51, t_far=0.52, t_expiry=0.5, strike=0.05, is_call=False)),
    (
        TwoFactorParams(
            mu=0.0, kappa=3.0, alpha=0.0, lam=0.0, sigma_spot=0.6, sigma_yield=1.2, rho=0.95
        ),
        CalendarSpread(t_near=0.3, t_far=1.5, t_expiry=0.25, strike=-6.0),
    ),
    (SET, CalendarSpread(t_near=0.55, t_far=0.8, t_expiry=0.5, strike=8.0)),
]


@pytest.mark.parametrize("case", range(len(SHARP_CASES)))
@pytest.mark.parametrize("t", [0.0, 0.2, 0.24])
def test_adaptive_node_count_matches_the_full_count_on_every_path(
    case: int, t: float, rng: np.random.Generator
) -> None:
    params, option = SHARP_CASES[case]
    F = 50.0 * np.exp(0.3 * rng.standard_normal((4_000, 1)) + [[0.0, 0.02]])
    F[:, 1] *= np.exp(0.05 * rng.standard_normal(4_000))
    law = remaining_law(option, params, np.array([t]))
    args = (float(law.var_near[0]), float(law.var_far[0]), float(law.cov[0]), F, 0.99)
    full = value_and_ratios(option, *args)
    fewer = value_and_ratios(option, *args, adaptive=True)
    # NODE_TOL holds on the probes; on every path allow 10x (tolerance loosened because the
    # check runs on probe paths only)
    np.testing.assert_allclose(fewer[0], full[0], rtol=0, atol=10 * NODE_TOL * F.max())
    np.testing.assert_allclose(fewer[1], full[1], rtol=0, atol=10 * NODE_TOL)


def test_serial_and_parallel_kernels_keep_apart_in_the_compiled_cache() -> None:
    # numba keys its on-disk cache by qualified name and argument types, not by ``parallel``:
    # one function object under both would have the many-path study load the serial code
    from calib.hedge import valuation

    names = {
        valuation._spread_kernel.py_func.__qualname__,
        valuation._spread_kernel_serial.py_func.__qualname__,
    }
    assert len(names) == 2
