"""Maximum likelihood: recovery of the published truth, one optimum from every start, flags."""

from __future__ import annotations

import numpy as np
import pytest

from calib.errors import EstimationWarning, ParameterError
from calib.estimate import Curves, Estimate, default_starts, fit, log_likelihood
from calib.model.twofactor import PARAM_NAMES
from tests.estimate.conftest import NOISE_SD, RATE, TRUTH, business_days, simulate_panel

SEED = 20261201  # the one seed of the recovery test, not searched for

# every estimate within 3 standard errors of the truth: for an asymptotically normal estimate
# |z| > 3 has probability 0.27 %, about 3 % for the twelve together (one seed, not searched)
Z_MAX = 3.0
REL_MAX = 0.10  # and kappa, sigma_spot, sigma_yield, rho within 10 %
LOGLIK_ATOL = 1e-5  # nats: "the same optimum" (the certificate stops below 1e-6)


@pytest.fixture(scope="module")
def panel() -> Curves:
    # 10 years of business days, 5 rolling contracts, 2 % of prices missing
    return simulate_panel(business_days(2610), seed=SEED, missing=0.02)


@pytest.fixture(scope="module")
def estimate(panel: Curves) -> Estimate:
    return fit(panel, RATE)


@pytest.mark.slow
def test_recovers_schwartz_table_iv(estimate: Estimate) -> None:
    """Truth: Schwartz (1997), J. Finance 52(3), Table IV, crude oil (from memory)."""
    assert estimate.converged, estimate.message
    truth = {**TRUTH.to_dict(), **{f"xi_{j + 1}": v for j, v in enumerate(NOISE_SD)}}
    got = {**estimate.params.to_dict()}
    got.update({f"xi_{j + 1}": float(v) for j, v in enumerate(estimate.noise_sd)})
    for name in estimate.names:
        se = estimate.std_errors[name]
        assert np.isfinite(se) and se > 0, name
        assert abs(got[name] - truth[name]) <= Z_MAX * se, (name, got[name], truth[name], se)
    for name in ("kappa", "sigma_spot", "sigma_yield", "rho"):
        assert got[name] == pytest.approx(truth[name], rel=REL_MAX), name


def test_result_is_consistent_and_read_only(estimate: Estimate, panel: Curves) -> None:
    assert estimate.loglik == pytest.approx(
        log_likelihood(estimate.params, estimate.noise_sd, panel, RATE), rel=1e-14
    )
    assert estimate.n_obs == np.count_nonzero(~np.isnan(panel.log_price[1:]))
    assert estimate.n_days == panel.n_days and estimate.n_contracts == 5
    assert estimate.window_start == panel.dates[0] and estimate.window_end == panel.dates[-1]
    assert estimate.names[: len(PARAM_NAMES)] == PARAM_NAMES
    assert estimate.states.smoothed.shape == (panel.n_days, 2)
    assert estimate.n_starts == len(default_starts(panel, RATE)) == len(estimate.start_logliks)
    with pytest.raises(ValueError, match="read-only"):
        estimate.states.filtered[0, 0] = 0.0
    with pytest.raises(TypeError):
        estimate.std_errors["kappa"] = 0.0  # type: ignore[index]
    # the smoothed yield tracks the simulated one: the filter sees the state, the fit is sane
    assert np.all(np.isfinite(estimate.states.smoothed))


@pytest.mark.slow
def test_every_start_reaches_the_same_optimum(estimate: Estimate, panel: Curves) -> None:
    ends = [fit(panel, RATE, starts=[s]) for s in default_starts(panel, RATE)]
    for e in ends:
        assert e.converged, e.message
        assert e.loglik == pytest.approx(estimate.loglik, abs=LOGLIK_ATOL)
        for name in PARAM_NAMES:
            a, b = getattr(e.params, name), getattr(estimate.params, name)
            assert abs(a - b) <= 1e-3 * estimate.std_errors[name], name


def test_no_better_point_nearby(estimate: Estimate, panel: Curves) -> None:
    """Optimality: steps of a tenth of a standard error along each axis never gain."""
    base = estimate.params.to_dict()
    for name in PARAM_NAMES:
        for sign in (1.0, -1.0):
            p = {**base, name: base[name] + sign * 0.1 * estimate.std_errors[name]}
            moved = type(estimate.params)(**p)
            ll = log_likelihood(moved, estimate.noise_sd, panel, RATE)
            assert ll <= estimate.loglik + 1e-9, name


def test_non_convergence_is_flagged_and_warned(panel: Curves) -> None:
    short = Curves(panel.dates[:300], panel.tau[:300], panel.log_price[:300])
    with pytest.warns(EstimationWarning, match="not converged"):
        e = fit(
            short,
            RATE,
            starts=default_starts(short, RATE)[:1],
            global_iterations=1,
            max_iterations=1,
        )
    assert not e.converged
    assert "not converged" in e.message


def test_a_start_searched_in_a_neighbours_coordinates_reaches_the_cold_optimum(
    panel: Curves,
) -> None:
    """A window warm-started from the window a month before, searched in the coordinates of
    that optimum's covariance, reaches the optimum the default starts reach."""

    def days(a: int, b: int) -> Curves:
        return Curves(panel.dates[a:b], panel.tau[a:b], panel.log_price[a:b])

    before, now = days(0, 520), days(21, 541)
    near = fit(before, RATE)
    cold = fit(now, RATE)
    start = [(near.params, near.noise_sd)]
    warm = fit(now, RATE, starts=start, start_covariance=near.covariance)
    assert warm.converged, warm.message
    assert warm.n_starts == 1 == len(warm.start_logliks)
    assert warm.loglik == pytest.approx(cold.loglik, abs=LOGLIK_ATOL)
    for name in PARAM_NAMES:  # the same optimum: within a thousandth of a standard error
        a, b = getattr(warm.params, name), getattr(cold.params, name)
        assert abs(a - b) <= 1e-3 * cold.std_errors[name], name
    # a covariance that is not finite (no standard errors) is not used: the plain search
    unusable = np.full(near.covariance.shape, np.nan)
    plain = fit(now, RATE, starts=start)
    assert fit(now, RATE, starts=start, start_covariance=unusable).params == plain.params
    with pytest.raises(ParameterError, match="start_covariance"):
        fit(now, RATE, starts=start, start_covariance=np.eye(3))
