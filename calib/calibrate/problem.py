"""The convex sub-problem of a Gauss-Newton step, built once in cvxpy with DPP parameters.

Variables ``x = (P_1..P_K, Q_1..Q_K, C_1..C_K)`` with ``P = s1^2``, ``Q = s2^2``,
``C = rho s1 s2`` per bucket. The constraints are the terms of the active families of
:mod:`calib.calibrate.constraints`. Data (rows, targets, the families' bounds, anchor
weights) enter as :class:`cvxpy.Parameter`, so a new day or a new Gauss-Newton step re-solves
the same canonicalised problem: its cone program is taken from cvxpy once, at the first solve, and
every solve goes to Clarabel directly (:mod:`calib.calibrate.conic`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import clarabel  # type: ignore[import-untyped]
import cvxpy
import numpy as np

from calib.calibrate import conic
from calib.calibrate.constraints import Constraint, Limits, Variables
from calib.calibrate.penalties import Anchor, huber
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


REDUCED_TOL_FEAS = float(clarabel.DefaultSettings().reduced_tol_feas)
"""Clarabel's feasibility tolerance of an "almost solved" (``optimal_inaccurate``) return."""

HUBER_MIN_TOL = 1e-9
"""Tightest solver tolerance of a Huber sub-problem (see :class:`ConvexStep`)."""

HUBER_MIN_ROWS = 16
"""Smallest row capacity of a Huber sub-problem (capacities are powers of two)."""


def huber_capacity(n_quotes: int) -> int:
    """Rows of the Huber sub-problem for ``n_quotes``: the next power of two (zero rows pad)."""
    return max(HUBER_MIN_ROWS, 1 << max(n_quotes - 1, 0).bit_length())


class ConvexStep:
    """``min loss(G x - t) + anchor + smoothness`` over the active constraint families.

    Parameters
    ----------
    n_buckets : number of calendar buckets ``K``.
    constraints : the active families (structure, fixed at build time).
    solver_tol : Clarabel's gap and feasibility tolerances.
    huber_rows : ``None`` for the squared loss; else the row capacity of the Huber loss.

    Notes
    -----
    Squared loss: ``sum_i w_i (G_i x - t_i)^2``. The smoothness penalty
    ``s sum_k |x_{k+1} - x_k|^2 = |sqrt(s) D x|^2`` (``D`` the differences of neighbouring
    buckets of ``P``, ``Q`` and ``C``) is stacked under the weighted rows,
    ``M_s = [sqrt(w) G; sqrt(s) D]``, ``y_s = [sqrt(w) t; 0]``; both enter through the QR
    factor: with ``M_s = U R`` (``R`` is ``3K x 3K``) ``|M_s x - y_s|^2 = |R x - U^T y_s|^2 +
    |y_s|^2 - |U^T y_s|^2``, so the conic problem has ``3K`` least-squares rows whatever the
    number of quotes (same minimiser and duals; the constant is dropped).

    Huber loss with per-quote thresholds ``d_i``: ``sum_i c_i huber((G_i x - t_i) / d_i)`` with
    ``c_i = w_i d_i^2`` and ``huber`` of threshold 1, in its conic form: ``c huber(r) = min
    U^2 + 2 sqrt(c) |W|`` over ``U + W = sqrt(c) r`` (the quadratic and the linear part; e.g.
    Boyd & Vandenberghe (2004), *Convex Optimization*, exercise 4.5); the rows are padded with
    zeros to a fixed capacity so that days with different numbers of quotes
    re-solve the same compiled problem; smoothness is its own sum of squares.

    The anchor is :class:`~calib.calibrate.penalties.Anchor`'s form with its ``lin`` and
    ``root`` as parameters.
    """

    def __init__(
        self,
        n_buckets: int,
        constraints: tuple[Constraint, ...],
        *,
        solver_tol: float,
        huber_rows: int | None = None,
    ) -> None:
        K = n_buckets
        self.n_buckets = K
        self.huber_rows = huber_rows
        self.x = cp.Variable(3 * K)
        P, Q, C = self.x[:K], self.x[K : 2 * K], self.x[2 * K :]
        rows = 3 * K if huber_rows is None else huber_rows
        self.M = cp.Parameter((rows, 3 * K))
        self.y = cp.Parameter(rows)
        self.anchor_lin = cp.Parameter(nonneg=True)
        self.anchor_root = cp.Parameter(nonneg=True)
        anchor = Anchor.form(Q, self.anchor_lin, self.anchor_root, cp.sqrt, cp.sum)
        # neighbouring-bucket differences of P, Q and C: the rows of the smoothness penalty
        self._diff = np.kron(np.eye(3), np.diff(np.eye(K), axis=0))
        extra: list[Any] = []
        if huber_rows is None:
            fit = cp.sum_squares(self.M @ self.x - self.y)
        else:
            # sum_i c_i huber(rho_i) = min sum U_i^2 + 2 sqrt(c_i) |W_i| s.t. sqrt(c_i) rho_i =
            # U_i + W_i (the quadratic part U, the linear part W); M and y carry sqrt(c_i)
            self.row_root = cp.Parameter(huber_rows, nonneg=True)
            U, W = cp.Variable(huber_rows), cp.Variable(huber_rows)
            fit = cp.sum_squares(U) + 2.0 * cp.sum(cp.multiply(self.row_root, cp.abs(W)))
            extra.append(self.M @ self.x - self.y == U + W)
            if K > 1:
                self.smooth_root = cp.Parameter(nonneg=True)
                fit = fit + cp.sum_squares(self.smooth_root * (self._diff @ self.x))
        self.families = constraints
        parameters = {
            c.parameter: cp.Parameter(nonneg=True) for c in constraints if c.parameter is not None
        }
        self.parameters = parameters
        variables = Variables(P, Q, C, parameters)
        self.constraints: dict[str, Any] = {}
        for c in constraints:
            term = c.term(variables)
            if term is not None:
                self.constraints[c.name] = term
        self.problem = cp.Problem(cp.Minimize(fit + anchor), [*self.constraints.values(), *extra])
        if not self.problem.is_dcp(dpp=True):  # pragma: no cover - a construction bug
            raise AssertionError("calibration sub-problem is not DPP")
        if huber_rows is not None:
            # the Huber form's 2n extra variables: Clarabel stops at "almost solved" short of a
            # 1e-10 gap on some days (seen on the demo chain with a planted bad quote), while
            # 1e-9 solves them and gives the same objective to 1e-15 relative
            solver_tol = max(solver_tol, HUBER_MIN_TOL)
        self.solver_tol = solver_tol
        self.solver_options = {
            "tol_gap_abs": solver_tol,
            "tol_gap_rel": solver_tol,
            "tol_feas": solver_tol,
            "tol_ktratio": max(solver_tol, 1e-8),
        }
        for p in self.problem.parameters():
            p.value = np.zeros(p.shape)
        self._anchor = Anchor(0.0, 0.0, K)
        self._smooth = 0.0
        self._program: conic.ConeProgram | None = None

    def set_day(self, lim: Limits, anchor: Anchor, smoothness: float) -> None:
        """The day's bounds (each family converts its own) and penalty weights."""
        for c in self.families:
            if c.parameter is not None:
                self.parameters[c.parameter].value = c.parameter_value(lim)
        self._anchor = anchor
        self._smooth = smoothness

    def penalties(self, x: FloatArray) -> float:
        """Anchor plus smoothness at ``x`` (numpy, the same forms as the conic problem)."""
        K = self.n_buckets
        smooth = float(np.sum(np.diff(x.reshape(3, K), axis=1) ** 2)) if K > 1 else 0.0
        return float(self._anchor.value(x[K : 2 * K])) + self._smooth * smooth

    def model(
        self,
        G: FloatArray,
        t: FloatArray,
        weight: FloatArray,
        threshold: FloatArray | None,
        x: FloatArray,
    ) -> float:
        """The sub-problem's objective at ``x`` (with its constants): the linearised ``J``."""
        r = G @ x - t
        if threshold is None:
            fit = float(np.sum(weight * r * r))
        else:
            fit = float(np.sum(weight * threshold**2 * huber(r / threshold)))
        return fit + self.penalties(x)

    def solve(
        self,
        G: FloatArray,
        t: FloatArray,
        weight: FloatArray,
        threshold: FloatArray | None,
        iteration: int,
        scale: float,
    ) -> tuple[Solved, bool]:
        """Solve ``scale * (loss(G x - t) + penalties)``; returns the solution and its inaccuracy.

        ``scale`` (about ``1 / J`` at the current point) brings the objective to order one, so
        the solver's gap tolerance is relative to the current error rather than absolute;
        duals are returned for the unscaled objective. Raises :class:`CalibrationSolverError`
        for every status without a usable solution and warns
        :class:`CalibrationInaccurateWarning` for ``optimal_inaccurate``.
        """
        K = self.n_buckets
        root = np.sqrt(scale)
        if self.huber_rows is None:
            M = np.sqrt(weight)[:, None] * G
            y = np.sqrt(weight) * t
            if K > 1 and self._smooth > 0.0:
                M = np.vstack([M, np.sqrt(self._smooth) * self._diff])
                y = np.concatenate([y, np.zeros(self._diff.shape[0])])
            U, R = np.linalg.qr(M, mode="reduced")
            rows = np.zeros((3 * K, 3 * K))
            rows[: R.shape[0]] = root * R
            target = np.zeros(3 * K)
            target[: R.shape[0]] = root * (U.T @ y)
        else:
            assert threshold is not None
            n, cap = G.shape[0], self.huber_rows
            if n > cap:
                raise AssertionError("Huber sub-problem built for fewer rows")  # pragma: no cover
            c_root = np.zeros(cap)
            c_root[:n] = np.sqrt(scale * weight) * threshold  # sqrt(c_i), c_i = s w_i d_i^2
            rows = np.zeros((cap, 3 * K))
            rows[:n] = (c_root[:n] / threshold)[:, None] * G
            target = np.zeros(cap)
            target[:n] = c_root[:n] / threshold * t
            self.row_root.value = c_root
            if K > 1:
                self.smooth_root.value = np.sqrt(scale * self._smooth)
        self.M.value = rows
        self.y.value = target
        self.anchor_lin.value = scale * self._anchor.lin
        self.anchor_root.value = scale * self._anchor.root
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
        if not np.all(np.isfinite(x)):
            raise CalibrationSolverError(SOLVER, status, "the solution is not finite")
        inaccurate = status != cp.OPTIMAL
        duals = {
            name: np.atleast_1d(
                np.asarray(c.dual_value[0] if name == "psd" else c.dual_value, dtype=np.float64)
                / scale
            )
            for name, c in self.constraints.items()
        }
        return Solved(np.asarray(x, dtype=np.float64), status, duals), inaccurate

    def feasibility(self, status: str) -> float:
        """The solver's stated feasibility precision for a solve that returned ``status``."""
        return self.solver_tol if status == cp.OPTIMAL else max(self.solver_tol, REDUCED_TOL_FEAS)

    def warn_inaccurate(self, status: str, iteration: int) -> None:
        """Warn that the final sub-problem stopped short of its tolerances."""
        warnings.warn(
            CalibrationInaccurateWarning(
                CalibrationInaccurateWarning.TEMPLATE.format(
                    solver=SOLVER, status=status, iteration=iteration
                )
            ),
            stacklevel=4,
        )
