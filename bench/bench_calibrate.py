"""Calibration re-solves (problem built once) against scipy SLSQP from 20 starts.

One invented day: 12 expiries x 15 strikes of a fictional commodity, premiums from known
volatilities plus seeded noise. Constant mode and forward mode (12 buckets) re-solve the same
:class:`~calib.calibrate.Calibrator` on perturbed days; the peer is SLSQP with an analytic
gradient in ``(s1, s2, rho)`` per bucket from 20 starts, on the same data and objective.
The same fits are also timed with every step through cvxpy's own ``Problem.solve`` (what
:mod:`calib.calibrate.conic` bypasses).
"""

from __future__ import annotations

import time
from dataclasses import replace
from typing import Any

import numpy as np
from scipy.optimize import minimize

from calib.calibrate import CalibrationSettings, Calibrator, OptionQuotes, bucket_edges
from calib.calibrate.objective import errors
from calib.calibrate.problem import SOLVER
from calib.calibrate.quotes import prepare
from calib.model import black76
from calib.model.twofactor import TwoFactorParams, bucket_coefficients, total_variance
from calib.types import FloatArray

TRUE = TwoFactorParams(
    mu=0.04, kappa=1.2, alpha=0.03, lam=0.0, sigma_spot=0.38, sigma_yield=0.3, rho=0.75
)
HIST = TRUE.with_vols(0.35, 0.45, 0.75)  # the anchor pulls sigma_yield up onto the decay bound
N_DAYS = 10
N_STARTS = 20


def _day(rng: np.random.Generator) -> OptionQuotes:
    t = np.repeat(np.linspace(0.1, 2.0, 12), 15)
    T = t + 0.08
    K = 60.0 * np.tile(np.linspace(0.75, 1.3, 15), 12)
    F = np.full(t.size, 60.0)
    vol = np.sqrt(total_variance(t, T, TRUE) / t) * (1.0 + 0.01 * rng.standard_normal(t.size))
    call = K > F
    disc = np.exp(-0.03 * t)
    premium = black76.price(F, K, t, 0.03, vol, call)
    return OptionQuotes(
        t_expiry=t, t_delivery=T, is_call=call, strike=K, forward=F, discount=disc, premium=premium
    )


def _slsqp(quotes: OptionQuotes, settings: CalibrationSettings, K: int) -> tuple[float, float]:
    """Best objective and wall time of SLSQP (analytic gradient) from 20 starts."""
    data = prepare(quotes, settings)
    edges = bucket_edges(data.t_expiry) if K > 1 else np.array([0.0, data.t_expiry.max()])
    a, b, c = bucket_coefficients(data.t_expiry, data.t_delivery, edges, HIST.kappa)
    w_a, s2h, kap = settings.anchor_weight, HIST.sigma_yield, HIST.kappa
    smooth = settings.smoothness if K > 1 else 0.0

    def unpack(th: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        return th[:K], th[K : 2 * K], th[2 * K :]

    def J(th: FloatArray) -> tuple[float, FloatArray]:
        s1, s2, rho = unpack(th)
        P, Q, C = s1 * s1, s2 * s2, rho * s1 * s2
        V = a @ P + b @ Q - 2.0 * c @ C
        e, g = errors(data, V, settings.error_measure)
        r = 2.0 * data.weight * e * g  # dJ/dV
        dP, dQ, dC = a.T @ r, b.T @ r, -2.0 * c.T @ r
        x = np.concatenate([P, Q, C]).reshape(3, K)
        dx = np.diff(x, axis=1)
        val = float(np.sum(data.weight * e * e) + w_a * np.mean((s2 - s2h) ** 2))
        val += smooth * float(np.sum(dx * dx))
        gs = np.zeros((3, K))
        gs[:, 1:] += 2.0 * smooth * dx
        gs[:, :-1] -= 2.0 * smooth * dx
        dP, dQ, dC = dP + gs[0], dQ + gs[1], dC + gs[2]
        grad = np.concatenate(
            [
                2.0 * s1 * dP + rho * s2 * dC,
                2.0 * s2 * dQ + rho * s1 * dC + 2.0 * w_a * (s2 - s2h) / K,
                s1 * s2 * dC,
            ]
        )
        return val, grad

    cons: list[dict[str, Any]] = [
        {"type": "ineq", "fun": lambda th: unpack(th)[2] * kap * unpack(th)[0] - unpack(th)[1]},
        {"type": "ineq", "fun": lambda th: unpack(th)[1] - settings.yield_floor * s2h},
    ]
    rng = np.random.default_rng(5)
    bounds = [(1e-3, 2.0)] * K + [(0.0, 2.0)] * K + [(-1.0, 1.0)] * K
    best = np.inf
    t0 = time.perf_counter()
    for _ in range(N_STARTS):
        start = np.concatenate(
            [rng.uniform(0.2, 0.6, K), rng.uniform(0.2, 0.6, K), rng.uniform(0.5, 1.0, K)]
        )
        out = minimize(
            J,
            start,
            jac=True,
            method="SLSQP",
            bounds=bounds,
            constraints=cons,
            options={"ftol": 1e-15, "maxiter": 1000},
        )
        feasible = all(np.all(c_["fun"](out.x) >= -1e-9) for c_ in cons)
        if feasible:
            best = min(best, float(out.fun))
    return best, time.perf_counter() - t0


def _via_cvxpy_solve(cal: Calibrator, days: list[OptionQuotes]) -> list[float]:
    """Fit times with every step through cvxpy's own ``Problem.solve`` (its per-solve pass)."""
    assert cal.step is not None
    step = cal.step
    real = step.problem.solve

    def cvxpy_solve(*args: Any, **kwargs: Any) -> Any:
        return real(solver=SOLVER, warm_start=False, **step.solver_options)

    step.problem.solve = cvxpy_solve
    cal.fit(days[0], HIST)  # first solve compiles cvxpy's own chain
    times = []
    for q in days:
        t1 = time.perf_counter()
        cal.fit(q, HIST)
        times.append(time.perf_counter() - t1)
    step.problem.solve = real
    return times


def _run(mode: str) -> None:
    rng = np.random.default_rng(20261201)
    days = [_day(rng) for _ in range(N_DAYS)]
    settings = CalibrationSettings(mode=mode, refit_costs=False)  # type: ignore[arg-type]
    K = 12 if mode == "forward" else 1
    t0 = time.perf_counter()
    cal = Calibrator(settings, n_buckets=K)
    cal.fit(days[0], HIST)  # first solve compiles the DPP problem
    build = time.perf_counter() - t0
    times, solver_times, solves, objectives = [], [], [], []
    assert cal.step is not None
    problem = cal.step.problem
    real = problem.solve
    tally = {"count": 0, "spent": 0.0}

    def counted(*args: Any, **kwargs: Any) -> Any:
        out = real(*args, **kwargs)
        tally["count"] += 1
        tally["spent"] += float(problem.solver_stats.solve_time or 0.0)
        return out

    problem.solve = counted
    for q in days:
        tally.update(count=0, spent=0.0)
        t1 = time.perf_counter()
        res = cal.fit(q, HIST)
        times.append(time.perf_counter() - t1)
        solves.append(tally["count"])
        solver_times.append(tally["spent"])
        objectives.append(res.objective)
    problem.solve = real
    via_cvxpy = _via_cvxpy_solve(cal, days)
    peer = [_slsqp(q, replace(settings), K) for q in days[:3]]
    ours = np.array(times) * 1e3
    print(f"-- {mode} mode ({K} bucket(s), {len(days[0])} quotes, {N_DAYS} days)")
    print(f"   build + first solve      {build * 1e3:8.1f} ms")
    print(
        f"   calib re-solve (median)  {np.median(ours):8.2f} ms   "
        f"({np.mean(solves):.1f} conic solves/fit, "
        f"Clarabel {np.median(solver_times) * 1e3:.2f} ms of it)"
    )
    per = np.median(ours) / np.mean(solves)
    print(
        f"   per conic solve          {per:8.2f} ms   (cvxpy overhead "
        f"{per - np.median(solver_times) * 1e3 / np.mean(solves):.2f} ms)"
    )
    print(
        f"   same fits, cvxpy's solve {np.median(via_cvxpy) * 1e3:8.2f} ms   "
        f"(Problem.solve on every step; ratio {np.median(via_cvxpy) / np.median(times):.1f}x)"
    )
    peer_ms = np.mean([p[1] for p in peer]) * 1e3
    print(
        f"   scipy SLSQP x{N_STARTS} starts     {peer_ms:8.1f} ms   "
        f"ratio SLSQP / calib {peer_ms / np.median(ours):.1f}x"
    )
    for j, (best, _) in enumerate(peer):
        gap = objectives[j] - best
        print(
            f"   day {j}: objective calib {objectives[j]:.12e}  SLSQP {best:.12e}  "
            f"gap {gap:+.2e} ({'not worse' if gap <= 1e-9 * best else 'WORSE'})"
        )


def main() -> None:
    _run("constant")
    _run("forward")


if __name__ == "__main__":
    main()
