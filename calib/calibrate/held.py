"""Correlation held at history: a scan over ``r = sigma_yield / sigma_spot`` (vectorised).

For a fixed ratio ``r`` every total variance is linear in ``P = s1^2``:
``V_i = P u_i(r)`` with ``u_i(r) = a_i + b_i r^2 - 2 c_i rho r``, and the constraints become
bounds (``P >= floor / r^2``, ``P <= cap^2``; the decay bound ``Q <= kappa C`` is
``r <= kappa rho``, the end of the scan). The bounds are those of
:class:`calib.calibrate.constraints.Limits`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import minimize_scalar

from calib.calibrate.objective import errors, fit_term
from calib.calibrate.penalties import Anchor, loss_weights
from calib.calibrate.quotes import FitData
from calib.types import FloatArray

_REFINED_MINIMA = 3  # grid local minima refined by bounded Brent
_BACKTRACKS = 30


@dataclass(frozen=True, slots=True)
class HeldScan:
    """The optimum of the scan: spot variance ``P``, ratio ``r``, objective and iterations."""

    P: float
    ratio: float
    objective: float
    iterations: int
    converged: bool


@dataclass(frozen=True, slots=True)
class HeldProblem:
    """Data of the held-rho problem (one day)."""

    data: FitData
    a: FloatArray
    b: FloatArray
    c: FloatArray
    rho: float
    measure: str
    anchor: Anchor
    floor: float  # (q s2_hist)^2, 0 when off
    P_max: float
    ratio_max: float
    step_tol: float
    max_iterations: int

    def objective(self, P: FloatArray, r: FloatArray) -> FloatArray:
        """Fit term plus anchor at ``(P, r)`` (broadcast over scan points)."""
        V = P[..., None] * self._u(r)
        return np.asarray(
            fit_term(self.data, V, self.measure) + self.anchor.value((r * r * P)[..., None])
        )

    def _u(self, r: FloatArray) -> FloatArray:
        r_ = r[..., None]
        return np.asarray(self.a + self.b * r_ * r_ - 2.0 * self.c * self.rho * r_)

    def inner(self, r: FloatArray) -> tuple[FloatArray, FloatArray, int, bool]:
        """Best ``P`` for each ratio: Gauss-Newton steps, each an exact convex 1-D solve.

        Notes
        -----
        Linearised at ``P0`` the errors are ``h_i P - y_i`` (``h = u de/dV``,
        ``y = h P0 - e``); with ``A = sum w h^2``, ``B = sum w h y`` the step minimises the
        convex ``A P^2 - 2 B P + lin r^2 P - root r sqrt P`` (the anchor's form at
        ``Q = r^2 P``) over the bounds. With the Huber loss ``w`` carries the re-weighting
        factors of :func:`~calib.calibrate.penalties.loss_weights` at ``P0``. Its
        stationary point in ``s = sqrt P`` is the unique positive root of
        ``2A s^3 + (w r^2 - 2B) s - w r s2_hist`` (one sign change), found by Newton from the
        right where the cubic is convex and increasing; clipping to the bounds is then exact.
        Each step is backtracked until the true objective does not increase.
        """
        u = self._u(r)
        with np.errstate(divide="ignore", invalid="ignore"):  # r = 0 is handled by the where
            P_lo = np.where(r > 0.0, self.floor / (r * r), np.where(self.floor > 0.0, np.inf, 0.0))
        feasible = P_lo <= self.P_max
        lo = np.where(feasible, P_lo, 0.0)
        # first step linearised at the market point, where the errors vanish: e ~ g (u P - V_mkt)
        V_mkt = self.data.vol**2 * self.data.t_expiry
        _, g_mkt = errors(self.data, V_mkt, self.measure)
        w0 = np.broadcast_to(self.data.weight, u.shape)
        P = np.clip(self._step(u * g_mkt, V_mkt * g_mkt, r, w0), lo, self.P_max)
        J = self.objective(P, r)
        converged, it = False, 0
        while it < self.max_iterations:
            it += 1
            e, g = errors(self.data, P[..., None] * u, self.measure)
            h = g * u
            # Huber: iteratively re-weighted squares (the factors majorise the loss at P)
            w = self.data.weight * loss_weights(e, self.data.threshold)
            target = np.clip(self._step(h, h * P[..., None] - e, r, w), lo, self.P_max)
            d = target - P
            tau = np.ones_like(P)
            J_new = self.objective(P + d, r)
            for _ in range(_BACKTRACKS):
                worse = J_new > J
                if not worse.any():
                    break
                tau = np.where(worse, 0.5 * tau, tau)
                J_new = np.where(worse, self.objective(P + tau * d, r), J_new)
            accept = J_new <= J
            # a point is done when its step vanished, or when no step along it decreases the
            # objective at floating-point precision (its Gauss-Newton target lies within
            # rounding of P: the optimum to the precision the objective can be evaluated at)
            done = (np.abs(d) <= self.step_tol) | ~(J_new < J)
            P = np.where(accept, P + tau * d, P)
            J = np.where(accept, J_new, J)
            if bool(np.all(done)):
                converged = True
                break
        return P, np.where(feasible, J, np.inf), it, converged

    def _step(self, h: FloatArray, y: FloatArray, r: FloatArray, w: FloatArray) -> FloatArray:
        A = np.sum(w * h * h, axis=-1)
        B = np.sum(w * h * y, axis=-1)
        beta = self.anchor.lin * r * r - 2.0 * B
        gamma = 0.5 * self.anchor.root * r
        A = np.maximum(A, 1e-300)
        s = 1.01 * np.maximum.reduce(
            [np.ones_like(A), np.sqrt(np.abs(beta) / A), np.cbrt(gamma / A)]
        )
        for _ in range(100):
            f = 2.0 * A * s**3 + beta * s - gamma
            s_new = s - f / (6.0 * A * s * s + beta)
            s_new = np.where(gamma > 0.0, np.maximum(s_new, 0.0), s_new)
            if np.all(np.abs(s_new - s) <= 1e-15 * np.maximum(s, 1.0)):
                s = s_new
                break
            s = s_new
        return np.asarray(np.where(gamma > 0.0, s * s, np.maximum(-beta / (2.0 * A), 0.0)))


def scan(problem: HeldProblem, n_grid: int) -> HeldScan:
    """Global optimum over the ratio: a fine grid, then bounded Brent at the best local minima.

    Notes
    -----
    The grid covers the whole feasible interval ``[0, ratio_max]`` with ``n_grid`` points and
    every point is solved to its inner optimum, so the profile ``J(r) = min_P J(P, r)`` is known
    on the grid; the best ``3`` grid local minima are refined by bounded Brent on their
    bracketing cells. The result is the global optimum unless the profile has a deeper
    minimum narrower than one grid cell (``ratio_max / (n_grid - 1)``); the tests cross-check
    against a brute-force grid in ``(s1, s2)`` and SLSQP from many starts.
    """
    r_max = problem.ratio_max
    grid = np.linspace(0.0, r_max, n_grid) if r_max > 0.0 else np.zeros(1)
    _, J, _, _ = problem.inner(grid)
    if not np.isfinite(J).any():
        return HeldScan(float("nan"), float("nan"), float("inf"), 0, False)
    interior = np.ones(grid.size, dtype=bool)
    if grid.size > 1:
        interior[1:] &= J[1:] <= J[:-1]
        interior[:-1] &= J[:-1] <= J[1:]
    candidates = np.flatnonzero(interior & np.isfinite(J))
    candidates = candidates[np.argsort(J[candidates])][:_REFINED_MINIMA]
    best_r, best_J = float(grid[candidates[0]]), float(J[candidates[0]])

    def profile(r: float) -> float:
        return float(problem.inner(np.array([r]))[1][0])

    for j in candidates.tolist():
        if grid.size == 1:
            break
        lo, hi = grid[max(j - 1, 0)], grid[min(j + 1, grid.size - 1)]
        res = minimize_scalar(profile, bounds=(lo, hi), method="bounded", options={"xatol": 1e-13})
        if res.fun < best_J:
            best_r, best_J = float(res.x), float(res.fun)
    P_best, J_best, iterations, converged = problem.inner(np.array([best_r]))
    return HeldScan(float(P_best[0]), best_r, float(J_best[0]), iterations, converged)
