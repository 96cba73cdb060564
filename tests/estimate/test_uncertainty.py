"""Delta method against sampling from the estimate's asymptotic normal law, on the covariance
of a real fit of a simulated panel (the model's exact transition)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from calib.estimate import fit
from calib.estimate.uncertainty import delta_method, sample
from calib.model.black76 import undiscounted_price
from calib.model.spread import SpreadOption, spread_greeks, spread_law
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams, total_variance
from tests.estimate.conftest import RATE, business_days, simulate_panel


@pytest.fixture(scope="module")
def estimate():  # type: ignore[no-untyped-def]
    return fit(simulate_panel(business_days(260), 21), RATE, min_days=200)


def _spread_price(params: TwoFactorParams) -> float:
    # a calendar-spread call at the money, half a year out, under the parameters themselves
    one = np.array([1.0])
    option = SpreadOption(
        t_near=0.55 * one, t_far=0.8 * one, t_expiry=0.5 * one, strike=0.0 * one,
        is_call=np.array([True]), near_price=60.0 * one, far_price=61.0 * one, discount=one,
    )  # fmt: skip
    law = spread_law(option, params)
    return float(spread_greeks(law, 1.0, "call", 1.0).price[0])


def _vanilla_price(params: TwoFactorParams) -> float:
    # Black-76 on the closed-form total variance (calib.model.twofactor): an independent path
    v = float(total_variance(0.5, 0.55, params)[()])
    return float(undiscounted_price(60.0, 62.0, math.sqrt(v), np.array([True]))[0])


@pytest.mark.parametrize("g", [_spread_price, _vanilla_price], ids=["spread", "vanilla"])
def test_delta_method_agrees_with_sampling_within_ten_percent(estimate, g) -> None:  # type: ignore[no-untyped-def]
    cov = np.asarray(estimate.covariance)[:7, :7]
    d = delta_method(g, estimate.params, cov)
    s = sample(g, estimate.params, cov, 2000, seed=5)
    # 2000 draws: the sampled sd has a relative s.e. of about 1/sqrt(2 n) = 1.6 %; measured
    # sampled / delta: 1.011 (spread), 1.013 (vanilla)
    assert s.outside_domain + s.failed < 40
    assert s.sd == pytest.approx(d.se, rel=0.10)
    assert float(np.mean(s.values)) == pytest.approx(
        d.value, abs=3 * s.sd / math.sqrt(2000) + 0.1 * d.se
    )
    assert sum(d.contribution.values()) == pytest.approx(1.0, abs=1e-9)
    # drifts do not move an option price on futures: zero gradient (the closed forms ignore them)
    for name in ("mu", "alpha", "lam"):
        assert d.gradient[name] == 0.0


def test_delta_method_gradient_matches_a_hand_derivative(estimate) -> None:  # type: ignore[no-untyped-def]
    # g linear in sigma_spot: g = 3 sigma_spot + 2 kappa -> se^2 = grad' Sigma grad exactly
    cov = np.asarray(estimate.covariance)[:7, :7]

    def g(p: TwoFactorParams) -> float:
        return 3.0 * p.sigma_spot + 2.0 * p.kappa

    d = delta_method(g, estimate.params, cov)
    grad = np.zeros(7)
    grad[PARAM_NAMES.index("sigma_spot")] = 3.0
    grad[PARAM_NAMES.index("kappa")] = 2.0
    assert d.se == pytest.approx(math.sqrt(grad @ cov @ grad), rel=1e-9)
    assert d.gradient["sigma_spot"] == pytest.approx(3.0, rel=1e-9)


def test_draws_outside_the_domain_and_failures_are_counted() -> None:
    p = TwoFactorParams(
        mu=0.0, kappa=1.0, alpha=0.0, lam=0.0, sigma_spot=0.3, sigma_yield=0.3, rho=0.99
    )
    cov = np.diag([0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.01**2])  # rho beyond 1 about 16 % of draws

    def g(q: TwoFactorParams) -> float:
        return math.nan if q.rho > 0.995 else q.rho

    s = sample(g, p, cov, 1000, seed=1)
    assert 100 < s.outside_domain < 220 and s.failed > 100
    assert s.values.size + s.outside_domain + s.failed == 1000
