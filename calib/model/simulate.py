"""Exact joint simulation of (log spot, convenience yield) and the futures curves it implies.

The state ``z = (X, d)`` is Gaussian between any two dates, so each step draws from the exact
transition of :func:`calib.model.twofactor.transition`; the grid may be irregular and no
discretisation error arises however long the steps. Paths are vectorised; the only loop runs
over the dates.

Notes
-----
Over a step ``h`` the state moves as ``z' = c + Phi z + L e`` with ``e ~ N(0, I_2)`` and
``L`` the lower Cholesky factor of the step covariance ``Sigma``:
``L = [[sqrt(S11), 0], [S21 / sqrt(S11), sqrt(S22 - S21^2 / S11)]]`` (a zero spot variance, or
``|rho| = 1``, leaves a zero pivot, which is handled as a degenerate direction).
Futures observed at a date follow from the state: ``ln F(tau) = X - d B(tau) + A(tau)``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.model.twofactor import TwoFactorParams, log_futures, transition
from calib.types import ArrayLike, FloatArray


@dataclass(frozen=True, slots=True)
class StatePaths:
    """Simulated states on a date grid (read-only arrays).

    Attributes
    ----------
    times : ``(n_dates,)`` dates in years; ``times[0]`` holds the starting state.
    log_spot : ``(n_paths, n_dates)`` log spot price ``X``.
    conv_yield : ``(n_paths, n_dates)`` convenience yield ``d``.
    measure : ``"real"`` or ``"risk_neutral"``.
    r : the rate used by the risk-neutral drift.
    """

    times: FloatArray
    log_spot: FloatArray
    conv_yield: FloatArray
    measure: str
    r: float


def _cholesky_2x2(cov: FloatArray) -> FloatArray:
    """Lower Cholesky factors of ``(n, 2, 2)`` PSD matrices, zero pivots allowed."""
    s11 = np.maximum(cov[:, 0, 0], 0.0)
    l11 = np.sqrt(s11)
    with np.errstate(divide="ignore", invalid="ignore"):
        l21 = np.where(l11 > 0.0, cov[:, 1, 0] / l11, 0.0)
    l22 = np.sqrt(np.maximum(cov[:, 1, 1] - l21 * l21, 0.0))
    L = np.zeros_like(cov)
    L[:, 0, 0] = l11
    L[:, 1, 0] = l21
    L[:, 1, 1] = l22
    return L


def simulate_states(
    params: TwoFactorParams,
    times: ArrayLike,
    log_spot0: float,
    conv_yield0: float,
    n_paths: int,
    *,
    rng: np.random.Generator | int,
    measure: str = "real",
    r: float = 0.0,
) -> StatePaths:
    """Simulate ``n_paths`` paths of (log spot, yield) exactly on the date grid ``times``.

    Parameters
    ----------
    params : model parameters.
    times : increasing dates in years (irregular gaps allowed); the state at ``times[0]`` is
        ``(log_spot0, conv_yield0)`` on every path.
    n_paths : number of paths (>= 1).
    rng : a generator, or a seed for ``np.random.default_rng``.
    measure : ``"real"`` (drifts ``mu``, ``alpha``) or ``"risk_neutral"`` (``r``, ``alpha_hat``).
    r : continuously compounded rate of the risk-neutral spot drift.
    """
    t = np.asarray(times, dtype=np.float64)
    if t.ndim != 1 or t.size < 1 or not np.all(np.isfinite(t)):
        raise ParameterError("times", t.tolist(), "need a 1-D array of finite dates")
    if np.any(np.diff(t) < 0.0):
        raise ParameterError("times", t.tolist(), "dates must be non-decreasing")
    if n_paths < 1:
        raise ParameterError("n_paths", n_paths, "need at least one path")
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    step = transition(params, np.diff(t), measure=measure, r=r)
    L = _cholesky_2x2(step.cov)
    z = np.empty((t.size, 2, n_paths))
    z[0, 0] = log_spot0
    z[0, 1] = conv_yield0
    for i in range(t.size - 1):
        shocks = gen.standard_normal((2, n_paths))
        z[i + 1] = step.c[i][:, None] + step.Phi[i] @ z[i] + L[i] @ shocks
    log_spot = np.ascontiguousarray(z[:, 0].T)
    conv_yield = np.ascontiguousarray(z[:, 1].T)
    for a in (t, log_spot, conv_yield):
        a.setflags(write=False)
    return StatePaths(t, log_spot, conv_yield, measure, float(r))


def futures_curves(
    paths: StatePaths, taus: ArrayLike, params: TwoFactorParams, r: ArrayLike = 0.0
) -> FloatArray:
    """Futures prices implied by the simulated states.

    Parameters
    ----------
    paths : simulated states.
    taus : times to maturity in years, either ``(n_taus,)`` (the same every date) or
        ``(n_dates, n_taus)`` (contracts roll: each date's own times to maturity).
    params : model parameters (the futures formula is the risk-neutral one).
    r : rate in ``A(tau)``; scalar or broadcastable to ``(n_dates, n_taus)``.

    Returns
    -------
    ``(n_paths, n_dates, n_taus)`` futures prices.
    """
    tau = np.asarray(taus, dtype=np.float64)
    n_dates = paths.times.size
    if tau.ndim == 1:
        tau = np.broadcast_to(tau, (n_dates, tau.size))
    if tau.ndim != 2 or tau.shape[0] != n_dates:
        raise ParameterError(
            "taus", tau.shape, f"need (n_taus,) or (n_dates={n_dates}, n_taus) times to maturity"
        )
    if np.any(tau < 0.0):
        raise ParameterError("taus", float(tau.min()), "times to maturity must be >= 0")
    x = paths.log_spot[:, :, None]
    d = paths.conv_yield[:, :, None]
    return np.asarray(np.exp(log_futures(x, d, tau[None], r, params)), dtype=np.float64)
