"""Maximum-likelihood estimate of the two-factor model from daily futures curves.

The public entry points take :class:`~calib.estimate.curves.Curves` (numpy arrays, no I/O):
:func:`log_likelihood`, :func:`filter_states` and :func:`fit`, which returns a frozen
:class:`Estimate`.

Notes
-----
Parameters ``theta = (mu, kappa, alpha, lam, sigma_spot, sigma_yield, rho, xi_1..xi_m)`` are
searched in the unconstrained ``u``: ``kappa, sigma_spot, sigma_yield, xi_j = e^u`` and
``rho = tanh u`` (so ``kappa, sigma > 0``, ``|rho| < 1``); ``mu, alpha, lam`` are free.

1. *Global stage.* A few starts that differ where the likelihood has separate basins (the
   mean-reversion speed ``kappa`` and the sign of ``rho``), each run briefly by L-BFGS-B on
   ``-loglik / n_obs`` with the compiled central-difference gradient. A single start (a
   warm start from a nearby optimum) skips this stage: there is nothing to choose, and a
   restart would discard the curvature L-BFGS-B has learnt.
2. *Local stage.* The best start is run to convergence, then polished by Newton steps on the
   finite-difference Hessian in ``u``. Converged means the Newton decrement
   ``g' (-H)^{-1} g / 2`` (the log-likelihood still to gain, to second order) is below
   ``loglik_tol`` with ``-H`` positive definite. Given ``start_covariance`` (a nearby
   optimum's, with a start there), L-BFGS-B searches in coordinates where that optimum's
   curvature is the identity (:func:`_whitening`): a few iterations instead of dozens.
3. *Standard errors.* ``Cov(theta) = J (-H_u)^{-1} J`` with ``J = d theta / d u`` (diagonal);
   at a stationary point this equals the inverse of the observed information in ``theta``.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any

import numpy as np
from scipy.optimize import minimize
from threadpoolctl import threadpool_limits

from calib.errors import EstimationError, EstimationWarning
from calib.estimate import kalman
from calib.estimate.curves import Curves
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.types import ArrayLike, FloatArray, IntArray, readonly

GRAD_STEP = 6e-6
"""Relative central-difference step of the gradient (about ``eps^(1/3)``)."""

HESS_STEP = 1e-4
"""Relative step of the Hessian's second differences (about ``eps^(1/4)``)."""

LOCAL_FTOL = 1e-10
"""Relative objective reduction at which L-BFGS-B hands over to the Newton polish."""

# Box in u that keeps the search away from overflow: kappa in [1e-3, 50], vols in [1e-4, 5],
# |rho| <= tanh(5) = 0.99991, xi in [1e-6, 1], drifts and lam within +-10 per year.
_U_BOUNDS: tuple[tuple[float, float], ...] = (
    (-10.0, 10.0),
    (math.log(1e-3), math.log(50.0)),
    (-10.0, 10.0),
    (-10.0, 10.0),
    (math.log(1e-4), math.log(5.0)),
    (math.log(1e-4), math.log(5.0)),
    (-5.0, 5.0),
)
_XI_BOUNDS = (math.log(1e-6), 0.0)


def noise_names(n_contracts: int) -> tuple[str, ...]:
    """Names of the measurement-noise standard deviations: ``xi_1 .. xi_n``."""
    return tuple(f"xi_{j + 1}" for j in range(n_contracts))


def _theta(params: TwoFactorParams, noise_sd: ArrayLike) -> FloatArray:
    xi = np.atleast_1d(np.asarray(noise_sd, dtype=np.float64))
    return np.concatenate([[getattr(params, n) for n in PARAM_NAMES], xi])


def _params(theta: FloatArray) -> TwoFactorParams:
    return TwoFactorParams(**{n: float(theta[i]) for i, n in enumerate(PARAM_NAMES)})


@dataclass(frozen=True, slots=True)
class _Problem:
    """The arrays the compiled kernels take, built once per curves."""

    r: float
    gap_index: IntArray
    gaps: FloatArray
    tau: FloatArray
    tau_index: IntArray
    y: FloatArray
    n_obs: int

    @classmethod
    def of(cls, curves: Curves, r: float) -> _Problem:
        gap_index, gaps = curves.gap_table()
        y = np.ascontiguousarray(curves.log_price)
        present = ~np.isnan(y)
        tau, index = np.unique(curves.tau[present], return_inverse=True)
        tau_index = np.full(y.shape, -1, dtype=np.int64)
        tau_index[present] = index
        n_obs = int(np.count_nonzero(present[1:]))
        return cls(float(r), gap_index, gaps, tau.astype(np.float64), tau_index, y, n_obs)

    def args(self) -> kalman.Panel:
        return self.r, self.gap_index, self.gaps, self.tau, self.tau_index, self.y

    def loglik(self, theta: FloatArray) -> float:
        return float(kalman.loglik(theta, self.args()))

    def grad_u(self, u: FloatArray) -> tuple[float, FloatArray]:
        f, g = kalman.loglik_grad_u(u, self.args(), GRAD_STEP)
        return float(f), g

    def hess_u(self, u: FloatArray) -> tuple[float, FloatArray, FloatArray]:
        f, g, h = kalman.loglik_hess_u(u, self.args(), HESS_STEP)
        return float(f), g, h


# --- states --------------------------------------------------------------------------------


def _cov3(p: FloatArray) -> FloatArray:
    """(n, 3) packed ``P00, P01, P11`` to (n, 2, 2)."""
    out = np.empty((p.shape[0], 2, 2))
    out[:, 0, 0] = p[:, 0]
    out[:, 0, 1] = out[:, 1, 0] = p[:, 1]
    out[:, 1, 1] = p[:, 2]
    return out


@dataclass(frozen=True, slots=True, eq=False)
class States:
    """Filtered and smoothed (log spot, convenience yield) by day, with their covariances.

    ``filtered``/``smoothed`` are (n_days, 2); ``filtered_cov``/``smoothed_cov`` (n_days, 2, 2).
    Day 0's filtered state is the least-squares fit of the first curve (see
    :mod:`calib.estimate.kalman`). Read-only arrays.
    """

    loglik: float
    filtered: FloatArray
    filtered_cov: FloatArray
    smoothed: FloatArray
    smoothed_cov: FloatArray


def _states(problem: _Problem, theta: FloatArray) -> States:
    ll, a_f, p_f, a_p, p_p = kalman.filter_moments(theta, problem.args())
    a_s, p_s = kalman.smooth_moments(theta, problem.gap_index, problem.gaps, a_f, p_f, a_p, p_p)
    return States(
        loglik=float(ll),
        filtered=readonly(a_f, np.float64),
        filtered_cov=readonly(_cov3(p_f), np.float64),
        smoothed=readonly(a_s, np.float64),
        smoothed_cov=readonly(_cov3(p_s), np.float64),
    )


def log_likelihood(
    params: TwoFactorParams, noise_sd: ArrayLike, curves: Curves, rate: float = 0.0
) -> float:
    """Exact Gaussian log-likelihood ``log p(y_1..y_{n-1} | y_0)`` of the curves.

    Parameters
    ----------
    params : the model parameters (real-world drifts for the transition, ``lam`` for ``A``).
    noise_sd : (n_contracts,) measurement-noise standard deviation of each slot (> 0).
    curves : the data; day 0 conditions the filter.
    rate : constant continuously compounded interest rate in ``A``.
    """
    theta = _theta(params, noise_sd)
    _check_noise(theta, curves.n_contracts)
    return _Problem.of(curves, rate).loglik(theta)


def filter_states(
    params: TwoFactorParams, noise_sd: ArrayLike, curves: Curves, rate: float = 0.0
) -> States:
    """Kalman-filtered and Rauch-Tung-Striebel-smoothed states at given parameters."""
    theta = _theta(params, noise_sd)
    _check_noise(theta, curves.n_contracts)
    return _states(_Problem.of(curves, rate), theta)


def _check_noise(theta: FloatArray, n_contracts: int) -> None:
    from calib.errors import ParameterError

    xi = theta[kalman.N_MODEL :]
    if xi.size != n_contracts:
        raise ParameterError("noise_sd", xi.tolist(), f"need one per slot ({n_contracts})")
    if not np.all(np.isfinite(xi) & (xi > 0.0)):
        raise ParameterError("noise_sd", xi.tolist(), "must be positive and finite")


# --- the estimate --------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, eq=False)
class Estimate:
    """A maximum-likelihood estimate of the two-factor model (read-only).

    Attributes
    ----------
    params : the estimated parameter set.
    noise_sd : (n_contracts,) measurement-noise standard deviations ``xi_j``.
    std_errors : standard error by name (``PARAM_NAMES`` then ``xi_1..xi_n``); NaN when the
        observed information is not positive definite.
    covariance : (p, p) asymptotic covariance of ``(params..., xi...)`` in that order.
    loglik : log-likelihood at the estimate (conditioned on the first curve).
    n_obs : prices that enter the likelihood (day 0 conditions it, so it is not counted).
    n_days, n_contracts : size of the panel.
    window_start, window_end : first and last date as the caller gave them.
    rate : the constant interest rate used in ``A``.
    converged : whether the optimum is certified (see :mod:`calib.estimate.mle`).
    message : the optimiser's and the certificate's account.
    iterations : optimiser iterations over all stages.
    n_starts : starting points tried; ``start_logliks`` what each reached in the global stage
        (a single start: in the local stage, which it goes to directly).
    states : filtered and smoothed states at the estimate.
    """

    params: TwoFactorParams
    noise_sd: FloatArray
    std_errors: Mapping[str, float]
    covariance: FloatArray
    loglik: float
    n_obs: int
    n_days: int
    n_contracts: int
    window_start: Any
    window_end: Any
    rate: float
    converged: bool
    message: str
    iterations: int
    n_starts: int
    start_logliks: tuple[float, ...]
    states: States = field(repr=False)

    @property
    def names(self) -> tuple[str, ...]:
        """Names of the estimated quantities, in the order of ``covariance``."""
        return PARAM_NAMES + noise_names(self.n_contracts)


def default_starts(curves: Curves, rate: float) -> list[tuple[TwoFactorParams, FloatArray]]:
    """Starting points from the data: one per basin of ``kappa`` and sign of ``rho``.

    The spot volatility starts at the annualised volatility of the nearest slot's daily log
    changes (same contract on both days), the long-run yield at the average slope of the
    curve (``ln F ~ X + (r - d) tau`` for short maturities), the noise at 1 % of the price
    (common practice for settlement noise); ``(kappa, rho)`` runs over (0.5, +0.5), (2, -0.3) and
    (6, +0.5): slow and fast mean reversion, both signs of the correlation.
    """
    y, tau, h = curves.log_price, curves.tau, curves.gaps
    same = np.isclose(tau[:-1, 0] - tau[1:, 0], h, atol=1e-9)
    dy = np.diff(y[:, 0])[same & ~np.isnan(np.diff(y[:, 0]))]
    hh = h[same & ~np.isnan(np.diff(y[:, 0]))]
    s1 = float(np.sqrt(np.mean(dy**2 / hh))) if dy.size > 1 else 0.3
    s1 = min(max(s1, 0.05), 2.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        jl = np.nanargmax(np.where(np.isnan(tau), -np.inf, tau), axis=1)
        rows = np.arange(curves.n_days)
        slope = (y[rows, jl] - y[:, 0]) / (tau[rows, jl] - tau[:, 0])
    slope = slope[np.isfinite(slope)]
    alpha = float(rate - np.median(slope)) if slope.size else 0.0
    xi = np.full(curves.n_contracts, 0.01)
    out = []
    for kappa, rho in ((0.5, 0.5), (2.0, -0.3), (6.0, 0.5)):
        p = TwoFactorParams(
            mu=0.0,
            kappa=kappa,
            alpha=alpha,
            lam=0.0,
            sigma_spot=s1,
            sigma_yield=s1,
            rho=rho,
        )
        out.append((p, xi))
    return out


def fit(
    curves: Curves,
    rate: float = 0.0,
    *,
    starts: Sequence[tuple[TwoFactorParams, ArrayLike]] | None = None,
    start_covariance: ArrayLike | None = None,
    min_days: int = 250,
    min_contracts: int = 3,
    max_gap_days: float = 14.0,
    global_iterations: int = 20,
    max_iterations: int = 1000,
    loglik_tol: float = 1e-6,
) -> Estimate:
    """Maximum-likelihood estimate of the two-factor model from daily futures curves.

    Parameters
    ----------
    curves : the data (see :class:`~calib.estimate.curves.Curves`).
    rate : constant interest rate in the futures' ``A`` (continuously compounded).
    starts : starting points ``(params, noise_sd)``; default :func:`default_starts`.
    start_covariance : the :attr:`Estimate.covariance` of a nearby optimum (the previous
        window's, for a start there): the search then runs in coordinates where that
        optimum's curvature is the identity (see :func:`_whitening`); ignored where not
        finite or not positive definite.
    min_days, min_contracts : the least data accepted (a year of business days, three
        maturities: common practice for a two-factor fit).
    max_gap_days : longest calendar gap between consecutive days the filter may bridge.
    global_iterations : L-BFGS-B iterations per start in the global stage (not run for a
        single start).
    max_iterations : iterations of the local stage.
    loglik_tol : convergence certificate: the Newton decrement must fall below this (nats).

    Returns
    -------
    Estimate
        With ``converged=False`` (and an :class:`~calib.errors.EstimationWarning`) when the
        certificate fails.

    Raises
    ------
    EstimationDataError
        Subclasses naming the problem: too few days or contracts, a gap too long.
    EstimationError
        No start gives a finite likelihood.
    """
    curves.check_usable(min_days=min_days, min_contracts=min_contracts, max_gap_days=max_gap_days)
    problem = _Problem.of(curves, rate)
    scale = 1.0 / problem.n_obs
    start_list = list(starts) if starts is not None else default_starts(curves, rate)
    if not start_list:
        raise EstimationError("no starting point given")
    bounds = list(_U_BOUNDS) + [_XI_BOUNDS] * curves.n_contracts
    lo, hi = np.array(bounds).T
    u_starts = []
    for params, xi in start_list:
        theta0 = _theta(params, xi)
        _check_noise(theta0, curves.n_contracts)
        u_starts.append(np.clip(kalman.to_unconstrained(theta0), lo, hi))
    whiten = _whitening(start_covariance, u_starts[0])

    def objective(u: FloatArray) -> tuple[float, FloatArray]:
        f, g = problem.grad_u(u)
        if not (math.isfinite(f) and np.all(np.isfinite(g))):
            return 1e10, np.zeros_like(u)
        return -f * scale, -g * scale

    def whitened(v: FloatArray, u0: FloatArray, w: FloatArray) -> tuple[float, FloatArray]:
        u = u0 + w @ v
        if np.any(u < lo) or np.any(u > hi):  # the box, as a wall the line search backs from
            return 1e10, np.zeros_like(v)
        f, g = objective(u)
        return f, w.T @ g

    def run(u0: FloatArray, maxiter: int, ftol: float) -> Any:
        options = {"maxiter": maxiter, "ftol": ftol, "gtol": 1e-9, "maxls": 40}
        # L-BFGS-B's 12-dimensional BLAS calls only lose to thread start-up: one thread
        with threadpool_limits(limits=1, user_api="blas"):
            if whiten is None:
                return minimize(
                    objective, u0, jac=True, method="L-BFGS-B", bounds=bounds, options=options
                )
            res = minimize(
                whitened,
                np.zeros_like(u0),
                args=(u0, whiten),
                jac=True,
                method="L-BFGS-B",
                options=options,
            )
            res.x = np.clip(u0 + whiten @ res.x, lo, hi)
            return res

    def reached(res: Any) -> float:
        ll = -float(res.fun) / scale
        return ll if math.isfinite(ll) and res.fun < 1e10 else -math.inf

    if len(u_starts) == 1:
        # nothing to choose between: straight to the local stage, which keeps the curvature
        # L-BFGS-B learns instead of restarting without it after ``global_iterations``
        res = run(u_starts[0], max_iterations, LOCAL_FTOL)
        iterations = int(res.nit)
        start_logliks: tuple[float, ...] = (reached(res),)
    else:
        stage = [run(u0, global_iterations, 1e-12) for u0 in u_starts]
        iterations = sum(int(r.nit) for r in stage)
        start_logliks = tuple(reached(r) for r in stage)
        best = int(np.argmax(start_logliks))
        # to the Newton basin; the polish below converges quadratically from there
        res = run(stage[best].x, max_iterations, LOCAL_FTOL)
        iterations += int(res.nit)
    if not math.isfinite(max(start_logliks)):
        raise EstimationError("the likelihood is not finite at any starting point")
    u, ll, _, hess, decrement, newton_steps = _newton_polish(problem, res.x, bounds)
    iterations += newton_steps
    info = -hess
    pd = bool(np.all(np.isfinite(info))) and bool(np.all(np.linalg.eigvalsh(info) > 0.0))
    converged = pd and decrement < loglik_tol
    opt_msg = str(res.message)
    if converged:
        message = f"converged: Newton decrement {decrement:.2e} < {loglik_tol:g} ({opt_msg})"
    elif not pd:
        message = f"not converged: the Hessian is not negative definite ({opt_msg})"
    else:
        message = f"not converged: Newton decrement {decrement:.2e} >= {loglik_tol:g} ({opt_msg})"
    theta = kalman.to_natural(u)
    jac = kalman.jacobian_diag(u)
    cov = jac[:, None] * np.linalg.inv(info) * jac[None, :] if pd else np.full(info.shape, np.nan)
    names = PARAM_NAMES + noise_names(curves.n_contracts)
    se = MappingProxyType(
        {
            n: float(math.sqrt(v)) if v >= 0 else math.nan
            for n, v in zip(names, np.diag(cov), strict=True)
        }
    )
    if not converged:
        warnings.warn(EstimationWarning(f"maximum likelihood {message}"), stacklevel=2)
    states = _states(problem, theta)
    return Estimate(
        params=_params(theta),
        noise_sd=readonly(theta[kalman.N_MODEL :], np.float64),
        std_errors=se,
        covariance=readonly(cov, np.float64),
        loglik=float(ll),
        n_obs=problem.n_obs,
        n_days=curves.n_days,
        n_contracts=curves.n_contracts,
        window_start=curves.dates[0],
        window_end=curves.dates[-1],
        rate=float(rate),
        converged=converged,
        message=message,
        iterations=iterations,
        n_starts=len(start_list),
        start_logliks=start_logliks,
        states=states,
    )


def _whitening(covariance: ArrayLike | None, u: FloatArray) -> FloatArray | None:
    """``W`` (lower triangular) with ``W W' = Cov(u)``, from a nearby optimum's ``Cov(theta)``.

    ``Cov(u)_ij = Cov(theta)_ij / (J_i J_j)`` with ``J = d theta / d u`` at ``u`` (the start:
    that optimum). In ``v`` with ``u = u_0 + W v`` the likelihood's curvature at that optimum
    is the identity (``Cov(u) = (-H_u)^{-1}``) and a unit step is one standard error in every
    direction. L-BFGS-B starts from a scaled identity for its Hessian and takes a unit first
    step, so near that optimum it needs a few iterations where in ``u``, whose curvatures span
    orders of magnitude, it needs dozens. ``None`` where the covariance is not finite and
    positive definite (the search then runs in ``u``).

    Raises
    ------
    ParameterError
        ``covariance`` is not ``(p, p)`` for the ``p`` estimated quantities.
    """
    if covariance is None:
        return None
    from calib.errors import ParameterError

    cov = np.asarray(covariance, dtype=np.float64)
    if cov.shape != (u.size, u.size):
        raise ParameterError("start_covariance", cov.shape, f"need ({u.size}, {u.size})")
    if not np.all(np.isfinite(cov)):
        return None
    jac = kalman.jacobian_diag(u)
    try:
        return np.asarray(np.linalg.cholesky(cov / np.outer(jac, jac)), dtype=np.float64)
    except np.linalg.LinAlgError:
        return None


def _newton_polish(
    problem: _Problem, u: FloatArray, bounds: Sequence[tuple[float, float]], max_steps: int = 4
) -> tuple[FloatArray, float, FloatArray, FloatArray, float, int]:
    """Newton steps on the finite-difference Hessian (halving until the likelihood rises).

    Returns ``(u, loglik, grad, hess, decrement, steps)`` at the last point, with the
    Newton decrement ``g' (-H)^{-1} g / 2`` there (``inf`` if ``-H`` is not positive definite).
    """
    lo, hi = np.array(bounds).T
    steps = 0
    while True:
        f, g, h = problem.hess_u(u)
        try:
            c = np.linalg.cholesky(-h)
        except np.linalg.LinAlgError:
            return u, f, g, h, math.inf, steps
        step = np.linalg.solve(c.T, np.linalg.solve(c, g))
        decrement = 0.5 * float(g @ step)
        if steps >= max_steps or decrement < 1e-9:
            return u, f, g, h, decrement, steps
        t = 1.0
        while t > 1e-3:
            trial = np.clip(u + t * step, lo, hi)
            if problem.loglik(kalman.to_natural(trial)) > f:
                break
            t *= 0.5
        else:
            return u, f, g, h, decrement, steps
        u = trial
        steps += 1
