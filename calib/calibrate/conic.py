"""Re-solve a compiled DPP cvxpy problem with Clarabel, without cvxpy's per-solve pass.

``Problem.solve`` re-applies every parameter through cvxpy's reduction chain on each call,
building and slicing a dozen sparse matrices (about 2 ms a solve here, against 0.1 ms in
Clarabel for the constant-mode sub-problem). For a DPP problem the cone program is an affine
function of the parameter values with a fixed sparsity pattern. :class:`ConeProgram` takes that
map from cvxpy once (``Problem.get_problem_data``) and then, per re-solve, forms Clarabel's data
with one sparse product, calls ``clarabel.DefaultSolver`` and hands the solution back through
cvxpy's own inversion (``Problem.unpack_results``). Variable values, duals, status (mapped by
cvxpy's Clarabel table), ``solver_stats`` and ``cvxpy.error.SolverError`` are exactly what
``Problem.solve`` would give: cvxpy stays the modelling layer.

The re-solve is a registered cvxpy solve method, ``problem.solve(method=METHOD, program=...)``,
so it runs inside ``Problem.solve`` like any other.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import clarabel  # type: ignore[import-untyped]
import cvxpy
import numpy as np
import scipy.sparse as sp
from cvxpy.cvxcore.python import canonInterface
from cvxpy.reductions.solvers.conic_solvers import clarabel_conif

from calib.types import FloatArray

METHOD = "calib_cone_program"
_SOLVER = "CLARABEL"
_LAYOUT_TOL = 1e-12  # relative: the cached map reproduces cvxpy's own data to round-off


@dataclass(frozen=True, slots=True)
class _AffineCSC:
    """A sparse matrix of fixed pattern whose stored values are ``T @ theta`` (in CSC order)."""

    T: Any  # scipy CSR: one row per stored value, one column per entry of theta
    indices: Any  # int array: the row of each stored value
    indptr: Any  # int array: CSC column pointers
    shape: tuple[int, int]

    @classmethod
    def from_tensor(cls, tensor: Any, shape: tuple[int, int], *, upper: bool = False) -> _AffineCSC:
        """From cvxpy's tensor, whose rows index the matrix entries column-major.

        Only the entries some parameter (or the constant) reaches are stored; column-major
        order is CSC order. ``upper`` keeps the upper triangle (as Clarabel takes ``P``).
        """
        T = sp.csr_array(tensor)
        flat = np.flatnonzero(np.diff(T.indptr))
        col, row = np.divmod(flat, shape[0])
        keep = row <= col if upper else np.ones(flat.size, dtype=bool)
        indptr = np.concatenate(([0], np.cumsum(np.bincount(col[keep], minlength=shape[1]))))
        return cls(sp.csr_array(T[flat[keep]]), row[keep], indptr, shape)

    def values(self, theta: FloatArray) -> FloatArray:
        return np.asarray(self.T @ theta, dtype=np.float64)


class ConeProgram:
    """The Clarabel cone program of ``problem``, re-solvable for new parameter values.

    Parameters
    ----------
    problem : a DPP problem whose parameters all have values (the map is taken at them).
    solver_options : Clarabel settings, as they would be passed to ``problem.solve``.

    Notes
    -----
    cvxpy's compiled program (after its reductions, with ``theta`` the parameter values
    flattened column-major with a trailing ``1``) is ``min x'Px/2 + c(theta)'x + d(theta)``
    s.t. ``b(theta) - A(theta) x in K`` with ``vec [A | b] = T_A theta``, ``vec P = T_P theta``
    and ``(c, d) = T_q theta``. Clarabel takes ``A x + s = b, s in K`` with ``-A`` in cvxpy's
    sign and the upper triangle of ``P``. The map is checked against cvxpy's own
    ``apply_parameters`` when built.
    """

    def __init__(self, problem: Any, solver_options: dict[str, float]) -> None:
        data, self._chain, self._inverse_data = problem.get_problem_data(
            _SOLVER, solver_opts=dict(solver_options)
        )
        prog = data["param_prob"]
        self._prog = prog
        n, m = prog.x.size, prog.constr_size
        self._n = n
        self._Ab = _AffineCSC.from_tensor(prog.A, (m, n + 1))  # [A | b], b the last column
        self._cut = int(self._Ab.indptr[n])  # stored values of A, then those of b
        T_P = prog.P if prog.P is not None else sp.csr_array((n * n, prog.total_param_size + 1))
        self._P = _AffineCSC.from_tensor(T_P, (n, n), upper=True)
        self._q = sp.csr_array(prog.q)
        cones_of: Any = clarabel_conif.dims_to_solver_cones  # untyped in cvxpy
        self._cones = cones_of(data["dims"])
        settings = clarabel.DefaultSettings()
        settings.verbose = False
        for key, value in solver_options.items():
            setattr(settings, key, value)
        self._settings = settings
        self._check_layout()

    def _theta(self) -> FloatArray:
        prog = self._prog
        return np.asarray(
            canonInterface.get_parameter_vector(
                prog.total_param_size,
                prog.param_id_to_col,
                prog.param_id_to_size,
                lambda pid: np.asarray(prog.id_to_param[pid].value, dtype=np.float64),
            ),
            dtype=np.float64,
        )

    def data(self) -> tuple[sp.csc_array, FloatArray, float, sp.csc_array, FloatArray]:
        """Clarabel's ``(P, q, offset, A, b)`` at the parameters' current values."""
        theta = self._theta()
        n, m, cut, Ab = self._n, self._Ab.shape[0], self._cut, self._Ab
        values = Ab.values(theta)
        A = sp.csc_array((-values[:cut], Ab.indices[:cut], Ab.indptr[: n + 1]), shape=(m, n))
        b = np.zeros(m)
        b[Ab.indices[cut:]] = values[cut:]
        P = sp.csc_array((self._P.values(theta), self._P.indices, self._P.indptr), shape=(n, n))
        qd = np.asarray(self._q @ theta, dtype=np.float64)
        return P, qd[:n], float(qd[n]), A, b

    def _check_layout(self) -> None:
        """Fail loudly if the cached map does not reproduce cvxpy's own data."""
        P, q, _, A, b = self.data()
        P_ref, q_ref, _, A_ref, b_ref = self._prog.apply_parameters(quad_obj=True)
        pairs = [
            (P.toarray(), sp.triu(P_ref).toarray()),
            (q, np.asarray(q_ref)),
            (A.toarray(), -A_ref.toarray()),
            (b, np.asarray(b_ref)),
        ]
        for ours, ref in pairs:
            if ours.shape != ref.shape or not np.allclose(
                ours, ref, rtol=_LAYOUT_TOL, atol=_LAYOUT_TOL * np.max(np.abs(ref), initial=1.0)
            ):
                raise AssertionError("cvxpy's cone-program layout is not the one expected")

    def solve(self, problem: Any) -> None:
        """Solve at the current parameter values and unpack into ``problem`` as cvxpy does."""
        P, q, offset, A, b = self.data()
        self._inverse_data[-1].inverse_data[cvxpy.settings.OFFSET] = offset
        solution = clarabel.DefaultSolver(P, q, A, b, self._cones, self._settings).solve()
        # cvxpy re-evaluates the objective on unpacking; sqrt of a variance a round-off below
        # zero there is harmless (the fit uses the solution, not that value)
        with np.errstate(invalid="ignore"):
            problem.unpack_results(solution, self._chain, self._inverse_data)


def _solve_method(problem: Any, *, program: ConeProgram) -> None:
    program.solve(problem)


cvxpy.Problem.register_solve(METHOD, _solve_method)
