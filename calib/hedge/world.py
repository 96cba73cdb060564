"""Futures paths of the model's own world, under the real-world measure.

The state (log spot, convenience yield) moves by the exact Gaussian transition of
:func:`calib.model.simulate.simulate_states` (drifts ``mu`` and ``alpha`` of the world's set);
each leg's price follows from the closed form ``ln F = X - d B(T - t) + A(T - t)`` of the same
set, scaled once so that it starts at the leg's observed price.
"""

from __future__ import annotations

import numpy as np

from calib.errors import ParameterError
from calib.model.simulate import futures_curves, simulate_states
from calib.model.twofactor import A, B, TwoFactorParams
from calib.types import ArrayLike, FloatArray


def initial_state(
    params: TwoFactorParams, taus: ArrayLike, prices: ArrayLike, rate: float
) -> tuple[float, float]:
    """``(X, d)`` whose closed-form curve is nearest (least squares in logs) to today's futures.

    Notes
    -----
    ``ln F_j - A(tau_j) = X - d B(tau_j)`` is linear in ``(X, d)``. With a single future (or
    maturities too close to tell the slope) the yield is taken at its long-run level ``alpha``.
    """
    tau = np.atleast_1d(np.asarray(taus, dtype=np.float64))
    F = np.atleast_1d(np.asarray(prices, dtype=np.float64))
    if tau.shape != F.shape or tau.size < 1 or np.any(F <= 0.0) or np.any(tau < 0.0):
        raise ParameterError("futures", F.tolist(), "need positive prices, one per maturity")
    y = np.log(F) - A(tau, params, rate)
    b = B(tau, params.kappa)
    if tau.size >= 2 and float(np.ptp(b)) > 1e-8:
        design = np.column_stack([np.ones_like(b), -b])
        (x0, d0), *_ = np.linalg.lstsq(design, y, rcond=None)
        return float(x0), float(d0)
    d0 = params.alpha
    return float(np.mean(y + d0 * b)), float(d0)


def simulate_futures(
    world: TwoFactorParams,
    t_legs: ArrayLike,
    times: ArrayLike,
    prices0: ArrayLike,
    state0: tuple[float, float],
    rate: float,
    n_paths: int,
    *,
    rng: np.random.Generator | int,
) -> FloatArray:
    """``(n_paths, n_dates, n_legs)`` prices of futures delivering at ``t_legs``.

    Parameters
    ----------
    world : the parameter set that moves the world (real-world drifts ``mu``, ``alpha``).
    t_legs : the legs' deliveries in years from ``times[0] = 0``.
    times : dates in years (non-decreasing, starting at 0).
    prices0 : the legs' prices at ``t = 0`` (every path starts there).
    state0 : ``(X, d)`` at ``t = 0`` (e.g. from :func:`initial_state`).
    rate : the rate in the closed form's ``A``.
    n_paths : number of paths; ``rng`` a generator or a seed.
    """
    T = np.asarray(t_legs, dtype=np.float64)
    t = np.asarray(times, dtype=np.float64)
    F0 = np.asarray(prices0, dtype=np.float64)
    if np.any(T[None, :] < t[:, None]):
        raise ParameterError("t_legs", T.tolist(), "a leg matures before the last date")
    paths = simulate_states(world, t, state0[0], state0[1], n_paths, rng=rng, measure="real")
    curves = futures_curves(paths, T[None, :] - t[:, None], world, rate)
    model0 = curves[0, 0].copy()  # the same on every path at t = 0
    curves /= model0[None, None, :]  # exactly 1 at t = 0
    curves *= F0[None, None, :]
    return curves
