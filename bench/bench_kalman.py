"""Kalman-filter likelihood and full estimate: calib against statsmodels, same model, same run.

Data: 3,000 business days of an invented commodity, five rolling contracts (deliveries every
two months), states simulated exactly at the Schwartz (1997) Table IV crude-oil parameters
(from memory; mu our choice), 0.2-1 % measurement noise.

* one log-likelihood: calib's compiled filter vs statsmodels' ``KalmanFilter`` on the same
  time-varying system matrices (statsmodels timed on the filter alone, matrices prebuilt);
* a full estimate: :func:`calib.estimate.fit` vs statsmodels ``MLEModel.fit`` (L-BFGS, the
  same parameter transforms, from calib's first default start); calib's likelihood must be no
  lower than the one statsmodels reaches.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import Any

import numpy as np
from statsmodels.tsa.statespace.kalman_filter import KalmanFilter
from statsmodels.tsa.statespace.mlemodel import MLEModel

from calib.estimate import Curves, default_starts, fit, kalman, log_likelihood
from calib.estimate.mle import _Problem, _theta
from calib.estimate.statespace import SystemMatrices, system_matrices
from calib.estimate.synthetic import business_days, simulated_curves
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams

TRUTH = TwoFactorParams(
    mu=0.15, kappa=1.876, alpha=0.106, lam=0.198, sigma_spot=0.393, sigma_yield=0.527, rho=0.766
)
NOISE_SD = np.array([0.010, 0.004, 0.002, 0.003, 0.005])
RATE = 0.05
N_DAYS = 3000


def make_curves(n_days: int = N_DAYS, seed: int = 7) -> Curves:
    """Simulated curves (exact states, rolling slots, slot noise)."""
    days = business_days(n_days, np.datetime64("2031-01-02"))
    return simulated_curves(days, seed, params=TRUTH, noise_sd=NOISE_SD, rate=RATE)


def _set(ssm: Any, sm: SystemMatrices) -> None:
    for name in ("design", "obs_intercept", "obs_cov", "transition", "state_intercept"):
        ssm[name] = getattr(sm, name)
    ssm["selection"] = np.eye(2)
    ssm["state_cov"] = sm.state_cov
    ssm.initialize_known(sm.initial_state, sm.initial_state_cov)


def _theta_parts(u: np.ndarray) -> tuple[TwoFactorParams, np.ndarray]:
    theta = kalman.to_natural(np.asarray(u, dtype=np.float64))
    params = TwoFactorParams(**{n: float(theta[i]) for i, n in enumerate(PARAM_NAMES)})
    return params, theta[kalman.N_MODEL :]


class PeerModel(MLEModel):  # type: ignore[misc]
    """The same model as an statsmodels MLEModel, parameters in calib's unconstrained ``u``."""

    def __init__(self, curves: Curves, rate: float, start: np.ndarray) -> None:
        sm = system_matrices(TRUTH, NOISE_SD, curves, rate)
        super().__init__(sm.endog, k_states=2)
        self.curves, self.rate, self._start = curves, rate, start
        _set(self.ssm, sm)

    @property
    def start_params(self) -> np.ndarray:
        return self._start

    def update(self, params: Any, **kwargs: Any) -> Any:
        params = super().update(params, **kwargs)
        p, xi = _theta_parts(params)
        _set(self.ssm, system_matrices(p, xi, self.curves, self.rate))
        return params


def best_time(f: Callable[[], object], repeat: int) -> float:
    f()
    best = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        f()
        best = min(best, time.perf_counter() - t)
    return float(best)


def main() -> None:
    curves = make_curves()
    print(f"data: {curves.n_days} days x {curves.n_contracts} contracts, {curves.n_obs} prices")

    # one log-likelihood
    sm = system_matrices(TRUTH, NOISE_SD, curves, RATE)
    kf = KalmanFilter(k_endog=curves.n_contracts, k_states=2)
    kf.bind(sm.endog)
    _set(kf, sm)
    ours_ll = log_likelihood(TRUTH, NOISE_SD, curves, RATE)
    peer_ll = float(kf.loglike())
    problem = _Problem.of(curves, RATE)  # what the optimiser evaluates: arrays prepared once
    theta = _theta(TRUTH, NOISE_SD)
    t_ours = best_time(lambda: problem.loglik(theta), 500)
    t_call = best_time(lambda: log_likelihood(TRUTH, NOISE_SD, curves, RATE), 100)
    t_peer = best_time(kf.loglike, 20)
    t_build = best_time(lambda: system_matrices(TRUTH, NOISE_SD, curves, RATE), 20)
    print(
        f"log-likelihood  calib {ours_ll:.6f}  statsmodels {peer_ll:.6f}  "
        f"rel diff {abs(ours_ll - peer_ll) / abs(peer_ll):.1e}"
    )
    print(
        f"one evaluation  calib {t_ours * 1e3:.3f} ms  statsmodels filter {t_peer * 1e3:.3f} ms"
        f" (+ {t_build * 1e3:.1f} ms to build its matrices)  ratio {t_peer / t_ours:.1f}x"
    )
    print(f"                calib from Curves (array preparation included) {t_call * 1e3:.3f} ms")

    # full estimate (kernels loaded from numba's cache first, as in a long-running service)
    t = time.perf_counter()
    fit(curves, RATE)
    t_first = time.perf_counter() - t
    t = time.perf_counter()
    est = fit(curves, RATE)
    t_fit = time.perf_counter() - t
    print(
        f"calib fit       {t_fit:.3f} s  loglik {est.loglik:.6f}  converged {est.converged}"
        f"  iterations {est.iterations}  starts {est.n_starts}  (first call {t_first:.3f} s)"
    )
    params, xi = default_starts(curves, RATE)[0]
    u0 = kalman.to_unconstrained(np.concatenate([[getattr(params, n) for n in PARAM_NAMES], xi]))
    peer = PeerModel(curves, RATE, u0)
    t = time.perf_counter()
    res = peer.fit(
        start_params=u0,
        method="lbfgs",
        maxiter=1000,
        disp=False,
        optim_complex_step=False,
        cov_type="none",
    )
    t_sm = time.perf_counter() - t
    print(
        f"statsmodels fit {t_sm:.3f} s  loglik {float(res.llf):.6f}  "
        f"(MLEModel.fit, L-BFGS, one start)  ratio {t_sm / t_fit:.1f}x"
    )
    gain = est.loglik - float(res.llf)
    print(f"calib - statsmodels loglik: {gain:+.6f} nats ({'ok' if gain >= -1e-6 else 'LOWER'})")
