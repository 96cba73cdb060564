"""What an estimate's uncertainty does to a quantity computed from it (numpy only, no I/O).

The quantity is any function ``g`` of the seven model parameters (a price after the morning
fit held them fixed, say). With ``theta_hat ~ N(theta, Sigma)`` asymptotically:

* :func:`delta_method`: ``se(g) = sqrt(grad' Sigma grad)``, the gradient by central finite
  differences with a step of :data:`STEP_IN_SE` standard errors per parameter;
* :func:`sample`: ``g`` at draws from ``N(theta_hat, Sigma)``; their standard deviation is
  the check on the delta method (they agree when ``g`` is close to linear over a few
  standard errors). Draws outside the parameters' domain (``kappa <= 0``, ``|rho| >= 1``, a
  volatility ``<= 0``) and draws where ``g`` fails (returns NaN) are counted, not used.

Notes
-----
Both are asymptotic: they inherit the normal approximation of the likelihood (see
:mod:`calib.estimate.stability`) and say nothing of model risk.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.types import ArrayLike, FloatArray, readonly

STEP_IN_SE = 0.05
"""Central-difference step of the gradient, in standard errors of each parameter: large
enough to stay above the re-calibration's solver tolerance, small against the curvature."""

PriceOf = Callable[[TwoFactorParams], float]


def _params(theta: FloatArray) -> TwoFactorParams:
    return TwoFactorParams(**{n: float(theta[i]) for i, n in enumerate(PARAM_NAMES)})


def _theta(params: TwoFactorParams) -> FloatArray:
    return np.array([getattr(params, n) for n in PARAM_NAMES], dtype=np.float64)


@dataclass(frozen=True, slots=True, eq=False)
class DeltaMethod:
    """``value = g(theta_hat)``, its standard error and the gradient by parameter."""

    value: float
    se: float
    gradient: dict[str, float]
    contribution: dict[str, float]
    """``grad_i (Sigma grad)_i / se^2``: each parameter's share of the variance (sums to 1)."""


def delta_method(g: PriceOf, params: TwoFactorParams, cov: ArrayLike) -> DeltaMethod:
    """Standard error of ``g(params)`` from the (7, 7) covariance ``cov`` of the parameters.

    Parameters with zero or unknown variance are not perturbed (their gradient is 0). ``g``
    returns NaN where it cannot be computed; a NaN at the estimate or a step is propagated.
    """
    sigma = np.asarray(cov, dtype=np.float64)
    theta = _theta(params)
    sd = np.sqrt(np.clip(np.diag(sigma), 0.0, None))
    value = g(params)
    grad = np.zeros(theta.size)
    for i in range(theta.size):
        h = STEP_IN_SE * sd[i]
        if not (math.isfinite(h) and h > 0.0):
            continue
        up, down = theta.copy(), theta.copy()
        up[i] += h
        down[i] -= h
        grad[i] = (g(_params(up)) - g(_params(down))) / (2.0 * h)
    usable = np.isfinite(sigma)
    s = np.where(usable, sigma, 0.0)
    var = float(grad @ s @ grad)
    share = grad * (s @ grad) / var if var > 0.0 else np.zeros_like(grad)
    return DeltaMethod(
        value=float(value),
        se=math.sqrt(max(var, 0.0)),
        gradient={n: float(grad[i]) for i, n in enumerate(PARAM_NAMES)},
        contribution={n: float(share[i]) for i, n in enumerate(PARAM_NAMES)},
    )


@dataclass(frozen=True, slots=True, eq=False)
class Sampled:
    """``g`` at draws from the estimate's asymptotic normal law."""

    values: FloatArray
    n_draws: int
    outside_domain: int
    failed: int
    seed: int

    @property
    def sd(self) -> float:
        return float(np.std(self.values, ddof=1)) if self.values.size > 1 else math.nan


def sample(g: PriceOf, params: TwoFactorParams, cov: ArrayLike, n_draws: int, seed: int) -> Sampled:
    """``g`` at ``n_draws`` seeded draws of ``N(params, cov)`` (see the module notes)."""
    sigma = np.asarray(cov, dtype=np.float64)
    sigma = np.where(np.isfinite(sigma), sigma, 0.0)
    rng = np.random.default_rng(seed)
    # eigen-decomposition: a covariance that is only semi-definite (a parameter held) is fine
    w, v = np.linalg.eigh((sigma + sigma.T) / 2.0)
    root = v * np.sqrt(np.clip(w, 0.0, None))
    draws = _theta(params) + rng.standard_normal((n_draws, sigma.shape[0])) @ root.T
    values: list[float] = []
    outside = failed = 0
    for theta in draws:
        try:
            p = _params(theta)
        except ParameterError:
            outside += 1
            continue
        value = g(p)
        if math.isfinite(value):
            values.append(value)
        else:
            failed += 1
    return Sampled(readonly(np.array(values), np.float64), n_draws, outside, failed, seed)
