"""Fit the volatilities to option quotes: :class:`Calibrator`, :func:`fit`, :func:`frontier`.

Notes
-----
With ``P = s1^2``, ``Q = s2^2``, ``C = rho s1 s2`` (per bucket in forward mode) each total
variance is linear, ``V = A x``. The fit minimises ``J(x) = sum_i w_i e_i(V_i)^2 + anchor +
smoothness`` over the convex set of the constraints. Gauss-Newton: linearise
``e_i(V) ~ e_i(V0) + e_i'(V0) (V - V0)`` and solve the convex sub-problem exactly (the first
linearisation is at the market variances, i.e. weighted least squares on total variance);
step towards its solution, halving the step until ``J`` does not increase (both points are
feasible, so every point between is). A fixed point is a KKT point of the true problem, and
the duals of the last sub-problem are its multipliers. The sub-problem's objective equals
``J`` at the linearisation point, so ``J - (its optimum)`` is the decrease it predicts; the
iteration stops once that is below the solver's resolution (``solver_tol / scale``, the gap
tolerance of the scaled sub-problem), or the step vanishes.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from calib.calibrate import held
from calib.calibrate.objective import errors, fit_term
from calib.calibrate.problem import SOLVER, ConvexStep
from calib.calibrate.quotes import FitData, OptionQuotes, prepare
from calib.calibrate.result import BucketVols, CalibrationResult, ConstraintReport, FrontierPoint
from calib.calibrate.settings import CalibrationSettings
from calib.errors import (
    CalibrationNotConvergedWarning,
    CalibrationShapeError,
    InfeasibleSettingsError,
    TooFewQuotesError,
)
from calib.model import black76
from calib.model.twofactor import TwoFactorParams, bucket_coefficients, variance_coefficients
from calib.types import FloatArray

BIND_TOL = 1e-7  # slack (vol units) below which a constraint counts as binding
_BACKTRACKS = 30
_MIN_OBJECTIVE = 1e-12  # sub-problem scale limit: rows at most 1e6 times the data
_EXACT = 1e-20  # RMS error 1e-10 (per unit forward, or vol): below any quote precision; stop
_MIN_QUOTES = {"constant": 3, "held_rho": 2, "forward": 3}

FORMS = {
    "psd": "|rho| <= 1  ([[P, C], [C, Q]] >= 0)",
    "decay_bound": "sigma_yield <= rho kappa sigma_spot  (Q <= kappa C)",
    "yield_floor": "sigma_yield >= q sigma_yield_hist",
    "spot_cap": "sigma_spot <= sigma_spot_cap",
    "rho_held": "rho = rho_hist",
}


def _scale(J: float) -> float:
    """Objective scale of a sub-problem, ``1 / J`` bounded to keep the data representable."""
    return 1.0 / min(max(J, _MIN_OBJECTIVE), 1.0)


def bucket_edges(expiry: FloatArray) -> FloatArray:
    """Forward-mode calendar edges ``[0, t_1, ..., t_K]`` at the distinct expiries.

    Expiries equal to 12 decimals share an edge; the last edge is the latest expiry itself
    (not its rounded value), so every option ends inside the buckets.
    """
    edges = np.concatenate(([0.0], np.unique(np.round(expiry, 12))))
    edges[-1] = max(edges[-1], float(np.max(expiry)))
    return edges


def check_feasible(settings: CalibrationSettings, historical: TwoFactorParams) -> None:
    """Raise :class:`InfeasibleSettingsError` when the constraints cannot hold together.

    Notes
    -----
    The floor asks ``s2 >= q s2_hist``; the decay bound allows at most
    ``s2 <= rho kappa s1 <= rho_max kappa cap`` (``rho_max = 1``, or ``rho_hist`` when held);
    held rho without the decay bound still limits ``s2 <= max_vol_ratio cap`` in the scan.
    Without a floor (or with ``s2_hist = 0``) the origin-side point ``s2 = 0`` is feasible.
    """
    s = settings
    floor = s.yield_floor * historical.sigma_yield
    if floor <= 0.0:
        return
    cap = math.inf if s.sigma_spot_cap is None else s.sigma_spot_cap
    cap_text = "no cap" if s.sigma_spot_cap is None else f"sigma_spot_cap {cap:.6g}"
    if s.decay_bound:
        rho = historical.rho if s.mode == "held_rho" else 1.0
        top = 0.0 if rho <= 0.0 else historical.kappa * rho * cap
        if floor > top:
            rho_text = f"rho held at {rho:.6g}" if s.mode == "held_rho" else "rho <= 1"
            raise InfeasibleSettingsError(
                f"yield_floor sigma_yield >= {floor:.6g} (q {s.yield_floor:g} x historical "
                f"{historical.sigma_yield:.6g}) vs decay_bound sigma_yield <= rho kappa "
                f"sigma_spot <= {top:.6g} ({rho_text}, kappa {historical.kappa:.6g}, "
                f"{cap_text}): short by {floor - top:.6g}",
                floor - top,
            )
    elif s.mode == "held_rho" and floor > s.max_vol_ratio * cap:
        top = s.max_vol_ratio * cap
        raise InfeasibleSettingsError(
            f"yield_floor sigma_yield >= {floor:.6g} vs max_vol_ratio {s.max_vol_ratio:g} x "
            f"{cap_text}: sigma_yield <= {top:.6g}, short by {floor - top:.6g}",
            floor - top,
        )


class Calibrator:
    """A calibration problem built once and re-solved for each day of the same shape.

    Parameters
    ----------
    settings : the calibration settings (their constraint switches fix the structure).
    n_buckets : forward mode: the number of expiry buckets of every day it will see (any
        number of quotes: they enter the conic problem through a ``3K x 3K`` QR factor).

    Examples
    --------
    >>> cal = Calibrator(CalibrationSettings())                       # doctest: +SKIP
    >>> for quotes, hist in days:                                     # doctest: +SKIP
    ...     result = cal.fit(quotes, hist)
    """

    def __init__(self, settings: CalibrationSettings, n_buckets: int = 1) -> None:
        self.settings = settings
        self.n_buckets = int(n_buckets) if settings.mode == "forward" else 1
        self.step: ConvexStep | None = None
        if settings.mode != "held_rho":
            self.step = ConvexStep(
                self.n_buckets,
                decay_bound=settings.decay_bound,
                floor=settings.yield_floor > 0.0,
                cap=settings.sigma_spot_cap is not None,
                solver_tol=settings.solver_tol,
            )

    def fit(
        self,
        quotes: OptionQuotes,
        historical: TwoFactorParams,
        *,
        anchor_weight: float | None = None,
    ) -> CalibrationResult:
        """Fit one day's quotes; ``anchor_weight`` overrides the setting (the frontier's knob)."""
        s = self.settings
        if anchor_weight is not None:
            s = replace(s, anchor_weight=anchor_weight)
        check_feasible(s, historical)
        data = prepare(quotes, s)
        needed = _MIN_QUOTES[s.mode]
        if data.n < needed:
            counts: dict[str, int] = {}
            for d in data.dropped:
                counts[d.reason] = counts.get(d.reason, 0) + 1
            raise TooFewQuotesError(data.n, len(quotes), s.mode, needed, counts)
        if s.mode == "held_rho":
            result = self._fit_held(data, historical, s, quotes)
        else:
            result = self._fit_convex(data, historical, s, quotes)
        if s.refit_costs:
            result = _with_refit_costs(result, quotes, historical)
        return result

    # --- constant and forward modes: Gauss-Newton over the convex sub-problem ----------------

    def _fit_convex(
        self,
        data: FitData,
        hist: TwoFactorParams,
        s: CalibrationSettings,
        quotes: OptionQuotes,
    ) -> CalibrationResult:
        assert self.step is not None
        K = self.n_buckets
        if s.mode == "forward":
            edges = bucket_edges(data.expiry)
            if edges.size - 1 != K:
                raise CalibrationShapeError(f"{K} expiry buckets", f"{edges.size - 1}")
            a, b, c = bucket_coefficients(data.expiry, data.maturity, edges, hist.kappa)
        else:
            edges = np.array([0.0, float(data.expiry.max())])
            a, b, c = (
                z[:, None] for z in variance_coefficients(data.expiry, data.maturity, hist.kappa)
            )
        A = np.hstack([a, b, -2.0 * c])
        step = self.step
        s2h = hist.sigma_yield
        step.set_day(
            kappa=hist.kappa,
            floor=(s.yield_floor * s2h) ** 2,
            cap=(s.sigma_spot_cap or 0.0) ** 2,
            anchor_weight=s.anchor_weight,
            s2_hist=s2h,
            smoothness=s.smoothness,
        )
        root_w = np.sqrt(data.weight)

        def penalties(x: FloatArray) -> float:
            Q = np.maximum(x[K : 2 * K], 0.0)
            dev = np.sqrt(Q) - s2h
            smooth = float(np.sum(np.diff(x.reshape(3, K), axis=1) ** 2)) if K > 1 else 0.0
            return float(s.anchor_weight * np.mean(dev * dev) + s.smoothness * smooth)

        def total(x: FloatArray) -> float:
            return float(fit_term(data, A @ x, s.error_measure)) + penalties(x)

        V_mkt = data.vol**2 * data.expiry
        _, g = errors(data, V_mkt, s.error_measure)
        x_hist = np.concatenate(
            [
                np.full(K, hist.sigma_spot**2),
                np.full(K, s2h**2),
                np.full(K, hist.rho * hist.sigma_spot * s2h),
            ]
        )
        rows = root_w[:, None] * g[:, None] * A
        solved, inaccurate = step.solve(rows, root_w * g * V_mkt, 0, _scale(total(x_hist)))
        x = solved.x
        J = total(x)
        flags: set[str] = {"inaccurate"} if inaccurate else set()
        converged, it, move = False, 0, math.inf
        for it in range(1, s.max_iterations + 1):
            if J <= _EXACT:
                converged = True
                break
            V = A @ x
            e, g = errors(data, V, s.error_measure)
            rows = root_w[:, None] * g[:, None] * A
            target = root_w * (g * V - e)
            scale = _scale(J)
            solved, inaccurate = step.solve(rows, target, it, scale)
            if inaccurate:
                flags.add("inaccurate")
            model = float(np.sum((rows @ solved.x - target) ** 2)) + penalties(solved.x)
            if J - model <= s.solver_tol / scale:
                # the sub-problem (equal to J at x) predicts no decrease the solver resolves:
                # x is a KKT point to solver precision; take its answer only if no worse
                J_new = total(solved.x)
                if J_new <= J:
                    x, J = solved.x, J_new
                converged = True
                break
            d = solved.x - x
            tau, J_new = 1.0, total(solved.x)
            for _ in range(_BACKTRACKS):
                if J_new <= J:
                    break
                tau *= 0.5
                J_new = total(x + tau * d)
            decrease, move = 0.0, 0.0
            if J_new <= J:
                decrease, move = J - J_new, tau * float(np.max(np.abs(d)))
                x, J = x + tau * d, J_new
            if move <= s.step_tol or decrease == 0.0:
                converged = True  # the step vanished, or none decreases J at solver precision
                break
        if not converged:
            flags.add("not_converged")
            warnings.warn(
                CalibrationNotConvergedWarning(
                    CalibrationNotConvergedWarning.TEMPLATE.format(iterations=it, step=move)
                ),
                stacklevel=3,
            )
        P, Q, C = x[:K], np.maximum(x[K : 2 * K], 0.0), x[2 * K :]
        s1, s2 = np.sqrt(np.maximum(P, 0.0)), np.sqrt(Q)
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(s1 * s2 > 0.0, C / (s1 * s2), 0.0)
        rho = np.clip(rho, -1.0, 1.0)  # |rho| may exceed 1 by the solver tolerance only
        buckets = tuple(
            BucketVols(
                float(edges[k]),
                float(edges[k + 1]),
                hist.with_vols(float(s1[k]), float(s2[k]), float(rho[k])),
            )
            for k in range(K)
        )
        reports = _constraint_reports(buckets, hist, s, solved.duals, s.mode == "forward")
        return _result(
            data,
            quotes,
            hist,
            s,
            buckets,
            A @ x,
            J,
            reports,
            SOLVER,
            solved.status,
            it,
            converged,
            flags,
        )

    # --- correlation held: the ratio scan ------------------------------------------------------

    def _fit_held(
        self,
        data: FitData,
        hist: TwoFactorParams,
        s: CalibrationSettings,
        quotes: OptionQuotes,
    ) -> CalibrationResult:
        a, b, c = variance_coefficients(data.expiry, data.maturity, hist.kappa)
        cap = s.sigma_spot_cap if s.sigma_spot_cap is not None else held.SPOT_VOL_LIMIT
        ratio_max = max(hist.kappa * hist.rho, 0.0) if s.decay_bound else s.max_vol_ratio
        problem = held.HeldProblem(
            data=data,
            a=a,
            b=b,
            c=c,
            rho=hist.rho,
            measure=s.error_measure,
            anchor=s.anchor_weight,
            s2_hist=hist.sigma_yield,
            floor=(s.yield_floor * hist.sigma_yield) ** 2,
            P_max=cap * cap,
            ratio_max=ratio_max,
            step_tol=s.step_tol,
            max_iterations=s.max_iterations,
        )
        best = held.scan(problem, s.ratio_grid)
        flags: set[str] = set()
        if not best.converged:
            flags.add("not_converged")
            warnings.warn(
                CalibrationNotConvergedWarning(
                    CalibrationNotConvergedWarning.TEMPLATE.format(
                        iterations=best.iterations, step=float("nan")
                    )
                ),
                stacklevel=3,
            )
        s1 = math.sqrt(best.P)
        params = hist.with_vols(s1, best.ratio * s1, hist.rho)
        edges = (0.0, float(data.expiry.max()))
        buckets = (BucketVols(edges[0], edges[1], params),)
        reports = _constraint_reports(buckets, hist, s, None, False)
        V = best.P * (a + b * best.ratio**2 - 2.0 * c * hist.rho * best.ratio)
        return _result(
            data,
            quotes,
            hist,
            s,
            buckets,
            V,
            best.objective,
            reports,
            "scan",
            "optimal",
            best.iterations,
            best.converged,
            flags,
        )


def _constraint_reports(
    buckets: tuple[BucketVols, ...],
    hist: TwoFactorParams,
    s: CalibrationSettings,
    duals: dict[str, FloatArray] | None,
    per_bucket: bool,
) -> tuple[ConstraintReport, ...]:
    out: list[ConstraintReport] = []
    floor = s.yield_floor * hist.sigma_yield
    for k, bucket in enumerate(buckets):
        p = bucket.params
        slacks: dict[str, float] = {}
        if s.mode != "held_rho":
            slacks["psd"] = 1.0 - abs(p.rho)
        if s.decay_bound:
            slacks["decay_bound"] = p.rho * p.kappa * p.sigma_spot - p.sigma_yield
        if s.yield_floor > 0.0:
            slacks["yield_floor"] = p.sigma_yield - floor
        if s.sigma_spot_cap is not None:
            slacks["spot_cap"] = s.sigma_spot_cap - p.sigma_spot
        for name, slack in slacks.items():
            dual = None if duals is None else float(duals[name][k])
            out.append(
                ConstraintReport(
                    name,
                    FORMS[name],
                    k if per_bucket else None,
                    slack,
                    slack <= BIND_TOL,
                    dual,
                    None,
                )
            )
    if s.mode == "held_rho":
        out.append(ConstraintReport("rho_held", FORMS["rho_held"], None, None, True, None, None))
    return tuple(out)


def _result(
    data: FitData,
    quotes: OptionQuotes,
    hist: TwoFactorParams,
    s: CalibrationSettings,
    buckets: tuple[BucketVols, ...],
    V: FloatArray,
    objective: float,
    reports: tuple[ConstraintReport, ...],
    solver: str,
    status: str,
    iterations: int,
    converged: bool,
    flags: set[str],
) -> CalibrationResult:
    std = np.sqrt(np.maximum(V, 0.0))
    model_price = data.discount * black76.undiscounted_price(
        data.forward, data.strike, std, data.call
    )
    model_vol = std / np.sqrt(data.expiry)
    price_res = model_price - data.price
    vol_res = model_vol - data.vol
    err = price_res if s.error_measure == "price" else vol_res

    def ro(x: FloatArray) -> FloatArray:
        y = np.array(x, dtype=np.float64)
        y.setflags(write=False)
        return y

    index = data.index.copy()
    index.setflags(write=False)
    return CalibrationResult(
        params=buckets[0].params,
        buckets=buckets,
        quote_index=index,
        labels=tuple(quotes.label(int(i)) for i in data.index),
        market_price=ro(data.price),
        model_price=ro(model_price),
        market_vol=ro(data.vol),
        model_vol=ro(model_vol),
        price_residual=ro(price_res),
        vol_residual=ro(vol_res),
        weight=ro(data.weight),
        objective=float(objective),
        fit=float(fit_term(data, V, s.error_measure)),
        rmse=float(np.sqrt(np.mean(err * err))),
        max_error=float(np.max(np.abs(err))),
        constraints=reports,
        solver=solver,
        status=status,
        iterations=int(iterations),
        converged=bool(converged),
        flags=tuple(sorted(flags)),
        settings=s,
        historical=hist,
        dropped=data.dropped,
    )


def _with_refit_costs(
    result: CalibrationResult, quotes: OptionQuotes, hist: TwoFactorParams
) -> CalibrationResult:
    """Price each binding constraint family by re-fitting without it (refit_cost >= 0)."""
    s = result.settings
    costs: dict[str, float] = {}
    for name in sorted({c.name for c in result.constraints if c.binds and c.name != "psd"}):
        off = replace(s, refit_costs=False)
        if name == "rho_held":
            off = replace(off, mode="constant")
        elif name == "decay_bound":
            off = replace(off, decay_bound=False)
        elif name == "yield_floor":
            off = replace(off, yield_floor=0.0)
        else:
            off = replace(off, sigma_spot_cap=None)
        other = fit(quotes, hist, off)
        costs[name] = result.objective - other.objective
    reports = tuple(replace(c, refit_cost=costs.get(c.name)) for c in result.constraints)
    return replace(result, constraints=reports)


def fit(
    quotes: OptionQuotes,
    historical: TwoFactorParams,
    settings: CalibrationSettings | None = None,
) -> CalibrationResult:
    """Fit the volatilities of ``historical`` to ``quotes`` (kappa and the drifts held).

    Builds a :class:`Calibrator` sized for these quotes; to re-solve many days of the same
    shape, build one :class:`Calibrator` and call its ``fit``.

    Raises
    ------
    InfeasibleSettingsError : the constraints conflict (which, and by how much).
    TooFewQuotesError : the filters left fewer quotes than the mode has parameters.
    CalibrationSolverError : the conic solver failed.

    Warns
    -----
    CalibrationInaccurateWarning, CalibrationNotConvergedWarning : flagged on the result too.
    """
    s = settings if settings is not None else CalibrationSettings()
    return _calibrator_for(quotes, s).fit(quotes, historical)


def _calibrator_for(quotes: OptionQuotes, s: CalibrationSettings) -> Calibrator:
    n_buckets = 1
    if s.mode == "forward":
        n_buckets = bucket_edges(prepare(quotes, s).expiry).size - 1
    return Calibrator(s, max(n_buckets, 1))


def frontier(
    quotes: OptionQuotes,
    historical: TwoFactorParams,
    anchor_weights: Sequence[float],
    settings: CalibrationSettings | None = None,
) -> tuple[FrontierPoint, ...]:
    """Fit error against distance from the historical yield volatility, per anchor weight.

    One :class:`Calibrator` is re-solved with each weight (only a parameter changes).
    ``distance = sqrt(mean_k (s2_k - s2_hist)^2)`` (``|s2 - s2_hist|`` outside forward mode);
    ``fit`` is the weighted mean square error, ``rmse`` as in the result.
    """
    s = replace(settings if settings is not None else CalibrationSettings(), refit_costs=False)
    cal = _calibrator_for(quotes, s)
    points = []
    for w in anchor_weights:
        res = cal.fit(quotes, historical, anchor_weight=float(w))
        s2 = np.array([b.params.sigma_yield for b in res.buckets])
        distance = float(np.sqrt(np.mean((s2 - historical.sigma_yield) ** 2)))
        points.append(FrontierPoint(float(w), distance, res.rmse, res.fit, res))
    return tuple(points)
