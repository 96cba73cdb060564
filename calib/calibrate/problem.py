"""The convex sub-problem of a Gauss-Newton step, built once in cvxpy with DPP parameters.

Variables ``x = (P_1..P_K, Q_1..Q_K, C_1..C_K)`` with ``P = s1^2``, ``Q = s2^2``,
``C = rho s1 s2`` per bucket. Data (rows, targets, kappa, floor, cap, anchor weights) enter as
:class:`cvxpy.Parameter`, so a new day or a new Gauss-Newton step re-solves the same
canonicalised problem: its cone program is taken from cvxpy once, at the first solve, and
every solve goes to Clarabel directly (:mod:`calib.calibrate.conic`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import cvxpy
import numpy as np

from calib.calibrate import conic
from calib.errors import (
    CalibrationInaccurateWarning,
    CalibrationSolverError,
)
from calib.types import FloatArray

cp: Any = cvxpy  # cvxpy's partial annotations miss its atoms (sum_squares, sqrt, ...)

SOLVER = "CLARABEL"  # interior point: accurate on the cone, unlike the first-order default

_INFEASIBLE_CAUSE = (
    "the constraints were checked feasible beforehand, so this is numerical trouble; "
    "loosen solver_tol or check the quotes"
)


@dataclass(frozen=True, slots=True)
class Solved:
    """Solution of one sub-problem: ``x``, the status and the duals by constraint name."""

    x: FloatArray
    status: str
    duals: dict[str, FloatArray]


class ConvexStep:
    """``min |M x - y|^2 + anchor + smoothness`` over the cone, decay, floor and cap constraints.

    Parameters
    ----------
    n_buckets : number of calendar buckets ``K``.
    decay_bound, floor, cap : which constraints exist (structure, fixed at build time).
    solver_tol : Clarabel's gap and feasibility tolerances.

    Notes
    -----
    The smoothness penalty ``s sum_k |x_{k+1} - x_k|^2 = |sqrt(s) D x|^2`` (``D`` the
    differences of neighbouring buckets of ``P``, ``Q`` and ``C``) is stacked under the quote
    rows, ``M_s = [M; sqrt(s) D]``, ``y_s = [y; 0]``; both enter through the QR factor: with
    ``M_s = U R`` (``R`` is ``3K x 3K``) ``|M_s x - y_s|^2 = |R x - U^T y_s|^2 + |y_s|^2 -
    |U^T y_s|^2``, so the conic problem has ``3K`` least-squares rows whatever the number of
    quotes (same minimiser and duals; the constant is dropped).
    ``[[P, C], [C, Q]] >= 0`` is the second-order cone ``|(2C, P - Q)| <= P + Q``. The anchor
    ``w mean_k (s2_k - s2_hist)^2 = w mean_k (Q_k - 2 s2_hist sqrt(Q_k)) + const`` is convex
    because ``-sqrt`` is; it enters as ``lin * sum(Q) - root * sum(sqrt(Q))`` with the two
    non-negative parameters ``lin = w / K`` and ``root = 2 w s2_hist / K``.
    """

    def __init__(
        self,
        n_buckets: int,
        *,
        decay_bound: bool,
        floor: bool,
        cap: bool,
        solver_tol: float,
    ) -> None:
        K = n_buckets
        self.n_buckets = K
        self.x = cp.Variable(3 * K)
        P, Q, C = self.x[:K], self.x[K : 2 * K], self.x[2 * K :]
        self.M = cp.Parameter((3 * K, 3 * K))
        self.y = cp.Parameter(3 * K)
        self.anchor_lin = cp.Parameter(nonneg=True)
        self.anchor_root = cp.Parameter(nonneg=True)
        self.kappa = cp.Parameter(nonneg=True)
        self.floor = cp.Parameter(nonneg=True)
        self.cap = cp.Parameter(nonneg=True)
        objective = (
            cp.sum_squares(self.M @ self.x - self.y)
            + self.anchor_lin * cp.sum(Q)
            - self.anchor_root * cp.sum(cp.sqrt(Q))
        )
        self.constraints: dict[str, Any] = {
            "psd": cp.SOC(P + Q, cp.vstack([2.0 * C, P - Q]), axis=0)
        }
        if decay_bound:
            self.constraints["decay_bound"] = self.kappa * C - Q >= 0.0
        if floor:
            self.constraints["yield_floor"] = Q - self.floor >= 0.0
        if cap:
            self.constraints["spot_cap"] = self.cap - P >= 0.0
        self.problem = cp.Problem(cp.Minimize(objective), list(self.constraints.values()))
        if not self.problem.is_dcp(dpp=True):  # pragma: no cover - a construction bug
            raise AssertionError("calibration sub-problem is not DPP")
        self.solver_options = {
            "tol_gap_abs": solver_tol,
            "tol_gap_rel": solver_tol,
            "tol_feas": solver_tol,
            "tol_ktratio": max(solver_tol, 1e-8),
        }
        for p in (self.anchor_lin, self.anchor_root, self.kappa, self.floor, self.cap):
            p.value = 0.0
        self._weights = (0.0, 0.0, 0.0)
        # neighbouring-bucket differences of P, Q and C: the rows of the smoothness penalty
        self._diff = np.kron(np.eye(3), np.diff(np.eye(K), axis=0))
        self._program: conic.ConeProgram | None = None

    def set_day(
        self,
        *,
        kappa: float,
        floor: float,
        cap: float,
        anchor_weight: float,
        s2_hist: float,
        smoothness: float,
    ) -> None:
        """The day's constraint data (variance units) and penalty weights."""
        self.kappa.value = kappa
        self.floor.value = floor
        self.cap.value = cap
        K = self.n_buckets
        self._weights = (anchor_weight / K, 2.0 * anchor_weight * s2_hist / K, smoothness)

    def solve(
        self, M: FloatArray, y: FloatArray, iteration: int, scale: float
    ) -> tuple[Solved, bool]:
        """Solve ``scale * (|M x - y|^2 + penalties)``; returns the solution and its inaccuracy.

        ``scale`` (about ``1 / J`` at the current point) brings the objective to order one, so
        the solver's gap tolerance is relative to the current error rather than absolute;
        duals are returned for the unscaled objective. Raises :class:`CalibrationSolverError`
        for every status without a usable solution and warns
        :class:`CalibrationInaccurateWarning` for ``optimal_inaccurate``.
        """
        K = self.n_buckets
        root = np.sqrt(scale)
        lin, sq, smooth = self._weights
        if K > 1 and smooth > 0.0:
            M = np.vstack([M, np.sqrt(smooth) * self._diff])
            y = np.concatenate([y, np.zeros(self._diff.shape[0])])
        U, R = np.linalg.qr(M, mode="reduced")
        rows = np.zeros((3 * K, 3 * K))
        rows[: R.shape[0]] = root * R
        target = np.zeros(3 * K)
        target[: R.shape[0]] = root * (U.T @ y)
        self.M.value = rows
        self.y.value = target
        self.anchor_lin.value = scale * lin
        self.anchor_root.value = scale * sq
        try:
            with warnings.catch_warnings():  # cvxpy's own caution; ours follows below
                warnings.filterwarnings("ignore", "Solution may be inaccurate", UserWarning)
                if self._program is None:  # compile once, at the first parameter values
                    self._program = conic.ConeProgram(self.problem, self.solver_options)
                # a fresh Clarabel solver each time, no warm start: a solver re-used from the
                # day before would make a day's result depend on what was solved earlier; a
                # rerun must be bit-identical
                self.problem.solve(method=conic.METHOD, program=self._program)
        except cp.error.SolverError as exc:
            raise CalibrationSolverError(SOLVER, "solver_error", str(exc)) from exc
        status = str(self.problem.status)
        x = self.x.value
        if status in (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE):
            raise CalibrationSolverError(SOLVER, status, _INFEASIBLE_CAUSE)
        if status in (cp.UNBOUNDED, cp.UNBOUNDED_INACCURATE):
            raise CalibrationSolverError(
                SOLVER, status, "the objective is bounded below, so this is numerical trouble"
            )
        if x is None or status not in (cp.OPTIMAL, cp.OPTIMAL_INACCURATE, cp.USER_LIMIT):
            raise CalibrationSolverError(SOLVER, status, "no solution returned")
        inaccurate = status != cp.OPTIMAL
        if inaccurate:
            warnings.warn(
                CalibrationInaccurateWarning(
                    CalibrationInaccurateWarning.TEMPLATE.format(
                        solver=SOLVER, status=status, iteration=iteration
                    )
                ),
                stacklevel=3,
            )
        duals = {
            name: np.atleast_1d(
                np.asarray(c.dual_value[0] if name == "psd" else c.dual_value, dtype=np.float64)
                / scale
            )
            for name, c in self.constraints.items()
        }
        return Solved(np.asarray(x, dtype=np.float64), status, duals), inaccurate
