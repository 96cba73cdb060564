"""The compiled filter against statsmodels' Kalman filter and smoother on the same system.

Reference: statsmodels.tsa.statespace (KalmanFilter / KalmanSmoother), fed by the vectorised
numpy closed forms of calib.model.twofactor (A, B, transition): the same state-space form,
built by a second code path.
"""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.tsa.statespace.kalman_smoother import KalmanSmoother

from calib.estimate import Curves, filter_states, kalman, log_likelihood
from calib.estimate.mle import GRAD_STEP, _Problem, _theta
from calib.estimate.statespace import system_matrices
from calib.model.twofactor import B, TwoFactorParams
from tests.estimate.conftest import NOISE_SD, RATE, TRUTH, business_days, simulate_panel

# likelihood, relative: the two filters sum the same 400 days' terms in different orders and
# factorisations (rounding: far below 1e-8); one day's term wrong (a gap, a missing price
# mishandled) moves the total by the order of 1/400
LOGLIK_RTOL = 1e-8
STATE_ATOL = 1e-9  # states are O(1) (log prices) and O(0.1) (yields)


def statsmodels_run(
    params: TwoFactorParams, xi: np.ndarray, curves: Curves, rate: float
) -> tuple[float, np.ndarray, np.ndarray]:
    """Log-likelihood, filtered and smoothed states from statsmodels.

    The same initialisation as calib: the day-0 state is the generalised least-squares fit of
    the first curve, given to statsmodels as a known initial state with day 0 missing.
    """
    sm = system_matrices(params, xi, curves, rate)
    ks = KalmanSmoother(k_endog=curves.n_contracts, k_states=2)
    ks.bind(sm.endog)  # time-varying matrices need the sample length first
    for name in ("design", "obs_intercept", "obs_cov", "transition", "state_intercept"):
        ks[name] = getattr(sm, name)
    ks["selection"] = np.eye(2)
    ks["state_cov"] = sm.state_cov
    ks.initialize_known(sm.initial_state, sm.initial_state_cov)
    res = ks.smooth()
    return float(np.sum(res.llf_obs)), res.filtered_state.T, res.smoothed_state.T


def irregular_days(n: int, seed: int) -> np.ndarray:
    """Business days with one in ten dropped (holidays) and three week-long closures."""
    rng = np.random.default_rng(seed)
    days = business_days(int(n * 1.2))
    keep = rng.random(days.size) > 0.1
    keep[0] = True
    for k in (100, 220, 330):
        keep[k : k + 4] = False
    return days[keep][:n]


CASES = {
    "regular": lambda: simulate_panel(business_days(400), seed=11),
    "irregular, missing": lambda: simulate_panel(irregular_days(400, 12), seed=12, missing=0.05),
}


@pytest.fixture(scope="module", params=sorted(CASES))
def case(request: pytest.FixtureRequest) -> Curves:
    return CASES[request.param]()


# Off the truth, so nothing special about the point.
OFF = TwoFactorParams(
    mu=0.05, kappa=1.2, alpha=0.02, lam=0.3, sigma_spot=0.35, sigma_yield=0.6, rho=0.7
)
OFF_XI = np.array([0.012, 0.005, 0.0025, 0.002, 0.006])


@pytest.mark.parametrize(("params", "xi"), [(TRUTH, NOISE_SD), (OFF, OFF_XI)])
def test_loglik_equals_statsmodels(case: Curves, params: TwoFactorParams, xi: np.ndarray) -> None:
    ours = log_likelihood(params, xi, case, RATE)
    ref, _, _ = statsmodels_run(params, xi, case, RATE)
    assert ours == pytest.approx(ref, rel=LOGLIK_RTOL)


def test_states_equal_statsmodels(case: Curves) -> None:
    states = filter_states(TRUTH, NOISE_SD, case, RATE)
    _, filtered, smoothed = statsmodels_run(TRUTH, NOISE_SD, case, RATE)
    # statsmodels' day 0 is "missing", so its filtered state there is the known prior: ours too
    np.testing.assert_allclose(states.filtered, filtered, rtol=0, atol=STATE_ATOL)
    np.testing.assert_allclose(states.smoothed, smoothed, rtol=0, atol=STATE_ATOL)
    assert states.loglik == pytest.approx(log_likelihood(TRUTH, NOISE_SD, case, RATE), rel=1e-15)
    # smoothing cannot increase the variance
    assert np.all(states.smoothed_cov[:, 0, 0] <= states.filtered_cov[:, 0, 0] * (1 + 1e-12))


def test_gradient_matches_statsmodels_differences() -> None:
    """Compiled gradient (in u, mapped to theta) vs central differences of statsmodels."""
    curves = simulate_panel(irregular_days(300, 13), seed=13, missing=0.05)
    theta = _theta(OFF, OFF_XI)
    u = kalman.to_unconstrained(theta)
    problem = _Problem.of(curves, RATE)
    _, grad_u = kalman.loglik_grad_u(u, problem.args(), GRAD_STEP)
    ours = grad_u / kalman.jacobian_diag(u)
    ref = np.empty_like(theta)
    for i in range(theta.size):
        h = 1e-5 * max(abs(theta[i]), 1e-2)
        up, dn = theta.copy(), theta.copy()
        up[i] += h
        dn[i] -= h
        fp = statsmodels_run(_params(up), up[7:], curves, RATE)[0]
        fm = statsmodels_run(_params(dn), dn[7:], curves, RATE)[0]
        ref[i] = (fp - fm) / (2 * h)
    # two finite-difference estimates: agreement to 1e-5 of each component (or of the norm)
    np.testing.assert_allclose(ours, ref, rtol=1e-5, atol=1e-7 * np.linalg.norm(ref))


def _params(theta: np.ndarray) -> TwoFactorParams:
    names = ("mu", "kappa", "alpha", "lam", "sigma_spot", "sigma_yield", "rho")
    return TwoFactorParams(**{n: float(theta[i]) for i, n in enumerate(names)})


def test_outside_domain_is_minus_infinity(case: Curves) -> None:
    problem = _Problem.of(case, RATE)
    theta = _theta(TRUTH, NOISE_SD)
    theta[6] = 1.5  # |rho| > 1: an indefinite step covariance
    assert kalman.loglik(theta, problem.args()) == -np.inf


def test_series_and_direct_branches_of_the_basis_agree() -> None:
    """Both sides of the series cut against twofactor's B and integrals (numpy path)."""
    from calib.model.twofactor import integral_B, integral_B2

    kappa = 2.0
    tau = np.array([0.0, 1e-9, 0.01, 0.049999, 0.05, 0.050001, 0.3, 3.0])
    got = kalman.basis(kappa, tau)
    np.testing.assert_allclose(got[0], B(tau, kappa), rtol=1e-14, atol=0)
    np.testing.assert_allclose(got[1], integral_B(tau, kappa), rtol=1e-13, atol=0)
    np.testing.assert_allclose(got[2], integral_B2(tau, kappa), rtol=1e-12, atol=0)
