"""The direct Clarabel re-solve gives what cvxpy's own ``Problem.solve`` gives."""

from __future__ import annotations

from typing import Any

import cvxpy
import numpy as np
import pytest

from calib.calibrate import conic

cp: Any = cvxpy
OPTIONS = {"tol_gap_abs": 1e-10, "tol_gap_rel": 1e-10, "tol_feas": 1e-10}
AGREE_TOL = 1e-12  # the same data to the same solver: equal up to round-off


def _problem() -> tuple[Any, Any, dict[str, Any], list[Any]]:
    x = cp.Variable(4)
    M, y = cp.Parameter((6, 4)), cp.Parameter(6)
    w, lo = cp.Parameter(nonneg=True), cp.Parameter(nonneg=True)
    cons = [cp.SOC(x[0] + x[1], cp.hstack([x[2], x[0] - x[1]])), x[3] >= lo]
    objective = cp.sum_squares(M @ x - y) - w * cp.sum(cp.sqrt(x[:2]))
    problem = cp.Problem(cp.Minimize(objective), cons)
    assert problem.is_dcp(dpp=True)
    return problem, x, {"M": M, "y": y, "w": w, "lo": lo}, cons


def _flat(dual: Any) -> Any:
    parts = dual if isinstance(dual, list) else [dual]
    return np.concatenate([np.ravel(p) for p in parts])


def _set(params: dict[str, Any], rng: np.random.Generator) -> None:
    params["M"].value = rng.standard_normal((6, 4))
    params["y"].value = rng.standard_normal(6)
    params["w"].value = rng.uniform(0.0, 1.0)
    params["lo"].value = rng.uniform(0.0, 1.0)


def test_direct_resolve_matches_cvxpy_solve() -> None:
    rng = np.random.default_rng(7)
    problem, x, params, cons = _problem()
    _set(params, rng)
    program = conic.ConeProgram(problem, OPTIONS)
    for _ in range(5):
        _set(params, rng)
        problem.solve(solver="CLARABEL", warm_start=False, **OPTIONS)  # a fresh Clarabel
        ref = (problem.status, x.value.copy(), [_flat(c.dual_value) for c in cons])
        problem.solve(method=conic.METHOD, program=program)
        assert problem.status == ref[0] == cp.OPTIMAL
        np.testing.assert_allclose(x.value, ref[1], atol=AGREE_TOL)
        for c, dual in zip(cons, ref[2], strict=True):
            np.testing.assert_allclose(_flat(c.dual_value), dual, atol=AGREE_TOL)
        assert problem.solver_stats.solver_name == "CLARABEL"


def test_direct_resolve_reports_infeasible_as_cvxpy_does() -> None:
    x, lo = cp.Variable(2), cp.Parameter()
    problem = cp.Problem(cp.Minimize(cp.sum_squares(x)), [x >= lo, x <= 1.0])
    lo.value = 0.0
    program = conic.ConeProgram(problem, OPTIONS)
    lo.value = 2.0  # now x >= 2 and x <= 1 conflict
    problem.solve(method=conic.METHOD, program=program)
    assert problem.status == cp.INFEASIBLE and x.value is None


def test_direct_resolve_maps_limits_and_failures_as_cvxpy_does(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    rng = np.random.default_rng(8)
    problem, _, params, _ = _problem()
    _set(params, rng)
    program = conic.ConeProgram(problem, {**OPTIONS, "max_iter": 1})
    with pytest.warns(UserWarning, match="may be inaccurate"):  # cvxpy's caution, as ever
        problem.solve(method=conic.METHOD, program=program)
    assert problem.status == cp.USER_LIMIT  # Clarabel's MaxIterations, as cvxpy maps it

    class Failed:
        status, x, z, obj_val, solve_time, iterations = "NumericalError", None, None, 0, 0, 0

    class Broken:
        def __init__(self, *args: object) -> None:
            pass

        def solve(self) -> Failed:
            return Failed()

    monkeypatch.setattr(conic.clarabel, "DefaultSolver", Broken)
    with pytest.raises(cvxpy.error.SolverError, match="Solver 'CLARABEL' failed"):
        problem.solve(method=conic.METHOD, program=program)
