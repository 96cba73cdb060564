"""Exact simulation against closed-form futures prices and transition moments."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from calib.errors import ParameterError
from calib.model import twofactor as tf
from calib.model.simulate import StatePaths, futures_curves, simulate_states
from calib.model.twofactor import TwoFactorParams

PARAMS = TwoFactorParams(
    mu=0.12, kappa=1.6, alpha=0.09, lam=0.05, sigma_spot=0.42, sigma_yield=0.5, rho=0.7
)
R = 0.03
X0, D0 = math.log(80.0), 0.04
TIMES = np.array([0.0, 1.0 / 365.0, 0.02, 0.3, 0.31, 1.2, 2.5])  # irregular gaps


def test_futures_price_vs_risk_neutral_monte_carlo() -> None:
    # F(0, T) = E^Q[S_T]; the sample mean must lie within 3 standard errors (seeded).
    paths = simulate_states(PARAMS, TIMES, X0, D0, 100_000, rng=2024, measure="risk_neutral", r=R)
    spot = np.exp(paths.log_spot)
    mean = spot.mean(axis=0)
    se = spot.std(axis=0, ddof=1) / math.sqrt(spot.shape[0])
    expected = tf.futures_price(80.0, D0, TIMES, R, PARAMS)
    assert np.all(np.abs(mean - expected)[1:] <= 3.0 * se[1:])
    assert mean[0] == pytest.approx(80.0, rel=1e-15)


def test_multi_step_paths_match_the_one_step_distribution() -> None:
    # Exactness on an irregular grid: after the six steps, (X, d) under the real measure has
    # the mean and covariance of a single exact step over the whole span (Euler would not).
    n = 80_000
    paths = simulate_states(PARAMS, TIMES, X0, D0, n, rng=np.random.default_rng(5))
    one = tf.transition(PARAMS, [TIMES[-1] - TIMES[0]], measure="real")
    mean = one.c[0] + one.Phi[0] @ np.array([X0, D0])
    z = np.stack([paths.log_spot[:, -1], paths.conv_yield[:, -1]])
    sd = np.sqrt(np.diag(one.cov[0]))
    assert np.all(np.abs(z.mean(axis=1) - mean) <= 3.0 * sd / math.sqrt(n))
    # sample covariance: standard error of a Gaussian covariance entry <= sd_i sd_j sqrt(2/n)
    cov = np.cov(z)
    assert np.all(np.abs(cov - one.cov[0]) <= 4.0 * np.outer(sd, sd) * math.sqrt(2.0 / n))


def test_seeded_and_frozen() -> None:
    a = simulate_states(PARAMS, TIMES, X0, D0, 50, rng=9)
    b = simulate_states(PARAMS, TIMES, X0, D0, 50, rng=np.random.default_rng(9))
    np.testing.assert_array_equal(a.log_spot, b.log_spot)
    np.testing.assert_array_equal(a.conv_yield, b.conv_yield)
    c = simulate_states(PARAMS, TIMES, X0, D0, 50, rng=10)
    assert not np.array_equal(a.log_spot, c.log_spot)
    assert a.log_spot.shape == (50, TIMES.size) and a.measure == "real"
    with pytest.raises(dataclasses.FrozenInstanceError):
        a.measure = "risk_neutral"  # type: ignore[misc]
    with pytest.raises(ValueError, match="read-only"):
        a.log_spot[0, 0] = 0.0


def test_futures_curves_from_paths_with_rolling_contracts() -> None:
    paths = simulate_states(PARAMS, TIMES, X0, D0, 7, rng=3, measure="risk_neutral", r=R)
    expiries = np.array([0.25, 0.5, 1.5, 3.0])  # fixed delivery dates
    taus = np.maximum(expiries[None, :] - TIMES[:, None], 0.0)  # (n_dates, n_contracts)
    curves = futures_curves(paths, taus, PARAMS, R)
    assert curves.shape == (7, TIMES.size, expiries.size)
    i = 3
    direct = tf.futures_price(
        np.exp(paths.log_spot[:, i]), paths.conv_yield[:, i], taus[i, 2], R, PARAMS
    )
    np.testing.assert_allclose(curves[:, i, 2], direct, rtol=1e-14)
    # a contract at delivery (tau = 0) trades at spot
    expired = taus[-1] == 0.0
    spot = np.exp(paths.log_spot[:, -1:])
    at_spot = np.broadcast_to(spot, (spot.shape[0], int(expired.sum())))
    np.testing.assert_allclose(curves[:, -1, expired], at_spot, rtol=1e-14)
    same = futures_curves(paths, [0.5, 1.0], PARAMS, R)
    assert same.shape == (7, TIMES.size, 2)


def test_input_validation() -> None:
    with pytest.raises(ParameterError, match="non-decreasing"):
        simulate_states(PARAMS, [0.0, 1.0, 0.5], X0, D0, 10, rng=1)
    with pytest.raises(ParameterError, match="at least one path"):
        simulate_states(PARAMS, TIMES, X0, D0, 0, rng=1)
    with pytest.raises(ParameterError, match="measure"):
        simulate_states(PARAMS, TIMES, X0, D0, 10, rng=1, measure="q")
    paths: StatePaths = simulate_states(PARAMS, TIMES, X0, D0, 3, rng=1)
    with pytest.raises(ParameterError, match="n_dates=7"):
        futures_curves(paths, np.ones((3, 2)), PARAMS)
    with pytest.raises(ParameterError, match="times to maturity must be >= 0"):
        futures_curves(paths, [-0.1, 1.0], PARAMS)
