"""Two-factor closed forms against quadrature of their defining integrals."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.integrate import quad

from calib.errors import ParameterError
from calib.model import twofactor as tf
from calib.model.twofactor import TwoFactorParams

QUAD_REL_TOL = 1e-11  # closed form vs scipy.integrate.quad (quad itself reaches ~1e-14)

PARAMS = TwoFactorParams(
    mu=0.08, kappa=1.3, alpha=0.06, lam=0.03, sigma_spot=0.38, sigma_yield=0.45, rho=0.75
)
R = 0.04


def _B(tau: float, kappa: float) -> float:
    return -math.expm1(-kappa * tau) / kappa


def _q(f: object, a: float, b: float) -> float:
    value, _ = quad(f, a, b, epsabs=0.0, epsrel=1e-13, limit=200)
    return float(value)


def test_params_validation_messages() -> None:
    base = PARAMS.to_dict()
    cases = [
        ("kappa", 0.0, r"kappa = 0.0 is invalid: mean reversion must be > 0"),
        ("kappa", -1.0, r"kappa = -1.0 is invalid"),
        ("sigma_spot", -0.1, r"sigma_spot = -0.1 is invalid: a volatility must be >= 0"),
        ("sigma_yield", -0.2, r"sigma_yield = -0.2 is invalid: a volatility must be >= 0"),
        ("rho", 1.01, r"rho = 1.01 is invalid: a correlation must lie in \[-1, 1\]"),
        ("mu", math.nan, r"mu = nan is invalid: must be finite"),
        ("alpha", "0.1", r"alpha = '0.1' is invalid: must be a real number"),
    ]
    for name, value, message in cases:
        with pytest.raises(ParameterError, match=message):
            TwoFactorParams(**{**base, name: value})
    with pytest.raises(ParameterError, match="missing rho"):
        TwoFactorParams.from_dict({k: v for k, v in base.items() if k != "rho"})
    assert TwoFactorParams.from_dict(base) == PARAMS
    assert tf.PARAM_NAMES == ("mu", "kappa", "alpha", "lam", "sigma_spot", "sigma_yield", "rho")


def test_futures_price_vs_quadrature_of_log_spot_moments() -> None:
    # Under the risk-neutral measure F(0, T) = E[S_T] = exp(E[ln S_T] + Var[ln S_T] / 2), with
    # E[d_u] = ah + (d0 - ah) e^{-kappa u}, ln S_T = X0 + int (r - d_u - s1^2/2) du + s1 W1(T)
    # - s2 int B(T - v) dW2(v): both moments by quadrature (Schwartz 1997, model 2).
    p, d0, X0 = PARAMS, 0.02, math.log(63.0)
    k, ah, s1, s2 = p.kappa, p.alpha_hat, p.sigma_spot, p.sigma_yield
    for T in (0.01, 0.4, 2.0, 9.0):
        mean = X0 + (R - 0.5 * s1 * s1) * T - _q(lambda u: ah + (d0 - ah) * math.exp(-k * u), 0, T)
        var = _q(
            lambda v, T=T: s1 * s1 - 2 * p.rho * s1 * s2 * _B(T - v, k) + (s2 * _B(T - v, k)) ** 2,
            0,
            T,
        )
        expected = mean + 0.5 * var
        got = float(tf.log_futures(X0, d0, T, R, p))
        assert got == pytest.approx(expected, rel=QUAD_REL_TOL, abs=1e-13)
        assert float(tf.futures_price(63.0, d0, T, R, p)) == pytest.approx(
            math.exp(expected), rel=1e-11
        )


def test_total_variance_and_covariance_vs_quad() -> None:
    p = PARAMS
    for t, T in [(0.1, 0.1), (0.5, 1.0), (1.0, 3.5), (4.0, 10.0)]:
        got = float(tf.total_variance(t, T, p))
        ref = _q(lambda u, T=T: float(tf.instantaneous_variance(T - u, p)), 0, t)
        assert got == pytest.approx(ref, rel=QUAD_REL_TOL)
        assert float(tf.implied_black_vol(t, T, p)) == pytest.approx(math.sqrt(ref / t), rel=1e-11)
    k, s1, s2, rho = p.kappa, p.sigma_spot, p.sigma_yield, p.rho
    for t, T1, T2 in [(0.25, 0.5, 2.0), (1.0, 1.0, 1.5), (3.0, 7.0, 3.2)]:

        def integrand(u: float, T1: float = T1, T2: float = T2) -> float:
            b1, b2 = _B(T1 - u, k), _B(T2 - u, k)
            return s1 * s1 - rho * s1 * s2 * (b1 + b2) + s2 * s2 * b1 * b2

        got = float(tf.covariance(t, T1, T2, p))
        assert got == pytest.approx(_q(integrand, 0, t), rel=QUAD_REL_TOL)
    # the covariance of a future with itself is its variance
    assert float(tf.covariance(1.0, 2.0, 2.0, p)) == pytest.approx(
        float(tf.total_variance(1.0, 2.0, p)), rel=1e-15
    )


@pytest.mark.parametrize("kappa", [1e-12, 1e-8, 1e-4, 0.3, 0.999, 1.001, 4.0])
def test_small_kappa_precision(kappa: float) -> None:
    # the integrals of B, B^2 against quadrature, across the series cut (kappa tau = 1)
    for tau in (0.25, 1.0, 2.5):
        assert float(tf.integral_B(tau, kappa)) == pytest.approx(
            _q(lambda s: _B(s, kappa), 0, tau), rel=QUAD_REL_TOL
        )
        assert float(tf.integral_B2(tau, kappa)) == pytest.approx(
            _q(lambda s: _B(s, kappa) ** 2, 0, tau), rel=QUAD_REL_TOL
        )
    if kappa <= 1e-8:  # the limits tau^2/2 and tau^3/3 (B(s) -> s)
        assert float(tf.integral_B(2.0, kappa)) == pytest.approx(2.0, rel=1e-7)
        assert float(tf.integral_B2(2.0, kappa)) == pytest.approx(8.0 / 3.0, rel=1e-7)


def test_bucket_coefficients_sum_to_whole_life() -> None:
    expiry = np.array([0.1, 0.5, 0.9, 1.7, 2.0])
    maturity = expiry + np.array([0.0, 0.1, 0.5, 0.05, 1.0])
    edges = np.array([0.0, 0.25, 0.5, 1.0, 2.0])
    whole = tf.variance_coefficients(expiry, maturity, PARAMS.kappa)
    parts = tf.bucket_coefficients(expiry, maturity, edges, PARAMS.kappa)
    for w, b in zip(whole, parts, strict=True):
        np.testing.assert_allclose(b.sum(axis=1), w, rtol=1e-13)
    # buckets after an option's expiry contribute nothing
    assert parts[0][0, 1:].tolist() == [0.0, 0.0, 0.0]
    with pytest.raises(ParameterError, match="last edge must reach"):
        tf.bucket_coefficients(expiry, maturity, [0.0, 1.0], PARAMS.kappa)
    with pytest.raises(ParameterError, match="first edge must be 0"):
        tf.check_bucket_edges([0.5, 1.0])
    with pytest.raises(ParameterError, match="strictly increasing"):
        tf.check_bucket_edges([0.0, 1.0, 1.0])


vol = st.floats(0.05, 1.5)
taus = np.linspace(0.0, 40.0, 801)


@given(kappa=st.floats(0.05, 5.0), s1=vol, rho=st.floats(0.05, 1.0), share=st.floats(0.0, 1.0))
def test_decay_bound_gives_non_increasing_vol(
    kappa: float, s1: float, rho: float, share: float
) -> None:
    # DESIGN §3: dv/dB = 2 s2 (s2 B - rho s1) <= 0 on B in [0, 1/kappa] iff s2 <= rho kappa s1
    s2 = share * rho * kappa * s1
    p = TwoFactorParams(0.0, kappa, 0.0, 0.0, s1, s2, rho)
    assert tf.decay_bound_holds(p) and tf.decay_bound_slack(p) >= 0.0
    v = tf.instantaneous_variance(taus, p)
    assert np.all(np.diff(v) <= 1e-15 * s1 * s1)  # rounding of v = s1^2 (1 - ...) only


@given(kappa=st.floats(0.2, 5.0), s1=vol, rho=st.floats(-1.0, 1.0), excess=st.floats(0.05, 3.0))
def test_broken_decay_bound_gives_a_rising_stretch(
    kappa: float, s1: float, rho: float, excess: float
) -> None:
    # s2 > rho kappa s1: the vol dips to s1 sqrt(1 - rho^2) at B = rho s1 / s2 and rises again
    s2 = max(rho * kappa * s1, 0.0) + excess * kappa * s1
    p = TwoFactorParams(0.0, kappa, 0.0, 0.0, s1, s2, rho)
    assert not tf.decay_bound_holds(p) and tf.decay_bound_slack(p) < 0.0
    v = tf.futures_vol(taus, p)
    rising = np.flatnonzero(np.diff(v) > 1e-12)
    assert rising.size > 0  # a generated counter-example to monotone decay
    assert v[rising[-1] + 1] > v.min()


def test_contango_and_backwardation() -> None:
    # Common practice: futures curves are in contango (rising) when storage is plentiful and
    # the convenience yield low, backwardated (falling) when the yield is high.
    taus_ = np.linspace(0.0, 3.0, 13)
    plentiful = TwoFactorParams(0.08, 1.3, 0.0, -0.02, 0.38, 0.45, 0.3)  # low long-run yield
    contango = tf.futures_price(50.0, 0.0, taus_, R, plentiful)
    backward = tf.futures_price(50.0, 0.30, taus_, R, PARAMS)
    assert np.all(np.diff(contango) > 0.0)
    assert np.all(np.diff(backward) < 0.0)
    assert contango[0] == pytest.approx(50.0, rel=1e-15)  # tau = 0 is the spot


def _moments_by_quad(
    p: TwoFactorParams, h: float, m: float, a: float, z0: tuple[float, float]
) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance of (X_h, d_h) from (X0, d0) by quadrature of the SDE solution."""
    k, s1, s2, rho = p.kappa, p.sigma_spot, p.sigma_yield, p.rho
    X0, d0 = z0
    mean_d = a + (d0 - a) * math.exp(-k * h)
    mean_x = X0 + (m - 0.5 * s1 * s1) * h - _q(lambda u: a + (d0 - a) * math.exp(-k * u), 0, h)
    var_x = _q(
        lambda v: s1 * s1 - 2 * rho * s1 * s2 * _B(h - v, k) + (s2 * _B(h - v, k)) ** 2, 0, h
    )
    var_d = _q(lambda v: (s2 * math.exp(-k * (h - v))) ** 2, 0, h)
    cov = _q(lambda v: (rho * s1 * s2 - s2 * s2 * _B(h - v, k)) * math.exp(-k * (h - v)), 0, h)
    return np.array([mean_x, mean_d]), np.array([[var_x, cov], [cov, var_d]])


@pytest.mark.parametrize("measure", ["real", "risk_neutral"])
def test_transition_vs_quadrature_moments(measure: str) -> None:
    p, z0 = PARAMS, (math.log(40.0), 0.07)
    m, a = (p.mu, p.alpha) if measure == "real" else (R, p.alpha_hat)
    steps = np.array([1.0 / 365.0, 0.1, 1.0, 5.0])
    tr = tf.transition(p, steps, measure=measure, r=R)
    for i, h in enumerate(steps):
        mean, cov = _moments_by_quad(p, float(h), m, a, z0)
        np.testing.assert_allclose(tr.c[i] + tr.Phi[i] @ np.array(z0), mean, rtol=1e-12)
        np.testing.assert_allclose(tr.cov[i], cov, rtol=QUAD_REL_TOL)


def test_transition_euler_limit() -> None:
    # over a tiny step h the exact transition approaches the Euler step, to O(kappa h)
    p, h = PARAMS, 1e-7
    tr = tf.transition(p, [h], measure="real")
    s1, s2, rho = p.sigma_spot, p.sigma_yield, p.rho
    euler_cov = h * np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])
    np.testing.assert_allclose(tr.cov[0], euler_cov, rtol=1e-6)
    np.testing.assert_allclose(tr.Phi[0], [[1.0, -h], [0.0, 1.0 - p.kappa * h]], rtol=1e-6)
    with pytest.raises(ParameterError, match="measure"):
        tf.transition(p, [h], measure="physical")
    with pytest.raises(ParameterError, match="time steps must be finite and >= 0"):
        tf.transition(p, [-1.0])
