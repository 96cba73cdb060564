"""The two-factor state-space form as plain arrays (time index last).

A second, vectorised construction of the system the compiled filter of
:mod:`calib.estimate.kalman` builds on the fly, from the numpy closed forms of
:mod:`calib.model.twofactor`. It is laid out as general-purpose state-space libraries take
it (``alpha_{t+1} = c_t + T_t alpha_t + eta_t``, ``y_t = d_t + Z_t alpha_t + e_t``), so a
cross-check or an outside filter can be fed the very same model.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calib.estimate.curves import Curves
from calib.model.twofactor import A, B, TwoFactorParams, transition
from calib.types import ArrayLike, FloatArray


@dataclass(frozen=True, slots=True, eq=False)
class SystemMatrices:
    """Time-varying system of ``n`` days and ``m`` slots; the time index is last.

    ``design`` (m, 2, n), ``obs_intercept`` (m, n), ``obs_cov`` (m, m), ``transition``
    (2, 2, n), ``state_intercept`` (2, n), ``state_cov`` (2, 2, n): column ``t`` of the
    transition maps day ``t`` to day ``t + 1`` (the last is unused). ``endog`` (n, m) is the
    data with day 0 marked missing, and ``initial_state``, ``initial_state_cov`` the known
    state of day 0: the generalised least-squares fit of the first curve (a flat prior
    updated by day 0), so a filter run on ``endog`` gives ``log p(y_1..y_{n-1} | y_0)``.
    """

    endog: FloatArray
    design: FloatArray
    obs_intercept: FloatArray
    obs_cov: FloatArray
    transition: FloatArray
    state_intercept: FloatArray
    state_cov: FloatArray
    initial_state: FloatArray
    initial_state_cov: FloatArray


def system_matrices(
    params: TwoFactorParams, noise_sd: ArrayLike, curves: Curves, rate: float = 0.0
) -> SystemMatrices:
    """The state-space form of the curves at given parameters (see :class:`SystemMatrices`)."""
    xi = np.asarray(noise_sd, dtype=np.float64)
    y = np.array(curves.log_price)
    n, m = y.shape
    tau = np.where(np.isnan(curves.tau), 1.0, curves.tau)  # unused where the price is missing
    design = np.zeros((m, 2, n))
    design[:, 0, :] = 1.0
    design[:, 1, :] = -B(tau, params.kappa).T
    obs_intercept = np.ascontiguousarray(A(tau, params, rate).T)
    step = transition(params, curves.gaps)
    trans = np.repeat(np.eye(2)[:, :, None], n, axis=2)
    trans[:, :, :-1] = step.Phi.transpose(1, 2, 0)
    state_intercept = np.zeros((2, n))
    state_intercept[:, :-1] = step.c.T
    state_cov = np.zeros((2, 2, n))
    state_cov[:, :, :-1] = step.cov.transpose(1, 2, 0)
    present = ~np.isnan(y[0])
    z0 = design[present, :, 0]
    w = 1.0 / xi[present] ** 2
    p0 = np.linalg.inv(z0.T @ (w[:, None] * z0))
    a0 = p0 @ z0.T @ (w * (y[0, present] - obs_intercept[present, 0]))
    y[0] = np.nan
    return SystemMatrices(
        endog=y,
        design=design,
        obs_intercept=obs_intercept,
        obs_cov=np.diag(xi**2),
        transition=trans,
        state_intercept=state_intercept,
        state_cov=state_cov,
        initial_state=a0,
        initial_state_cov=p0,
    )
