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

The constraints are the objects of :mod:`calib.calibrate.constraints`; the fit, the held
scan, the re-fits and the reports all read them. A numerical failure inside a fit (an
overflow, a division by zero, a singular system, a non-finite result) is raised as
:class:`~calib.errors.CalibrationNumericalError` with its reason, never as a bare Python error.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from calib.calibrate import held
from calib.calibrate.constraints import (
    BIND_TOL,
    SCAN_VAR_TOL,
    Constraint,
    Limits,
    active,
    check_feasible,
    variance_tolerance,
)
from calib.calibrate.objective import errors, fit_term
from calib.calibrate.penalties import Anchor
from calib.calibrate.problem import SOLVER, ConvexStep, Solved, huber_capacity
from calib.calibrate.quotes import FitData, OptionQuotes, equivalent_vol, prepare
from calib.calibrate.result import BucketVols, CalibrationResult, ConstraintReport, FrontierPoint
from calib.calibrate.settings import CalibrationSettings
from calib.calibrate.uncertainty import (
    Uncertainty,
    profile_curvature,
    standard_errors,
    theta_jacobian,
)
from calib.errors import (
    CALIBRATION_ERRORS,
    CalibrationNotConvergedWarning,
    CalibrationNotIdentifiedWarning,
    CalibrationNumericalError,
    CalibrationShapeError,
    CalibWarning,
    InfeasibleSettingsError,
    ParameterError,
    TooFewQuotesError,
)
from calib.model import black76
from calib.model.twofactor import TwoFactorParams, bucket_coefficients, variance_coefficients
from calib.types import FloatArray, readonly

__all__ = ["BIND_TOL", "Calibrator", "bucket_edges", "check_feasible", "fit", "frontier"]

_BACKTRACKS = 30
_MIN_OBJECTIVE = 1e-12  # sub-problem scale limit: rows at most 1e6 times the data
_EXACT = 1e-20  # RMS error 1e-10 (per unit forward, or vol): below any quote precision; stop
_MIN_QUOTES = {"constant": 3, "held_rho": 2, "forward": 3}
_NUMERICAL = (ArithmeticError, np.linalg.LinAlgError, ParameterError)
"""Python and numpy failures that mean numerical trouble inside a fit."""


def _scale(J: float) -> float:
    """Objective scale of a sub-problem, ``1 / J`` bounded to keep the data representable."""
    return 1.0 / min(max(J, _MIN_OBJECTIVE), 1.0)


def bucket_edges(t_expiry: FloatArray) -> FloatArray:
    """Forward-mode calendar edges ``[0, t_1, ..., t_K]`` at the distinct ``t_expiry`` (years).

    Expiries equal to 12 decimals share an edge; the last edge is the latest expiry itself
    (not its rounded value), so every option ends inside the buckets.
    """
    if t_expiry.size == 0:  # no usable quote: no bucket (the fit refuses the day)
        return np.zeros(1)
    edges = np.concatenate(([0.0], np.unique(np.round(t_expiry, 12))))
    edges[-1] = max(edges[-1], float(np.max(t_expiry)))
    return edges


class Calibrator:
    """A calibration problem built once and re-solved for each day of the same shape.

    Parameters
    ----------
    settings : the calibration settings (their constraint switches fix the structure).
    n_buckets : forward mode: the number of expiry buckets of every day it will see (any
        number of quotes: they enter the conic problem through a ``3K x 3K`` QR factor, or
        with the Huber loss through rows padded to a power of two).

    Examples
    --------
    >>> cal = Calibrator(CalibrationSettings())                       # doctest: +SKIP
    >>> for quotes, hist in days:                                     # doctest: +SKIP
    ...     result = cal.fit(quotes, hist)
    """

    def __init__(self, settings: CalibrationSettings, n_buckets: int = 1) -> None:
        self.settings = settings
        self.n_buckets = int(n_buckets) if settings.mode == "forward" else 1
        self.families: tuple[Constraint, ...] = active(settings)
        self._without: dict[CalibrationSettings, Calibrator] = {}
        """The re-fits' calibrators (one constraint off), built at their first use."""
        self._steps: dict[int | None, ConvexStep] = {}
        self.step: ConvexStep | None = None
        if settings.mode != "held_rho" and settings.loss == "squares":
            self.step = self._step_for(None)

    def _step_for(self, huber_rows: int | None) -> ConvexStep:
        step = self._steps.get(huber_rows)
        if step is None:
            step = self._steps[huber_rows] = ConvexStep(
                self.n_buckets,
                self.families,
                solver_tol=self.settings.solver_tol,
                huber_rows=huber_rows,
            )
        return step

    def fit(
        self,
        quotes: OptionQuotes,
        historical: TwoFactorParams,
        *,
        anchor_weight: float | None = None,
    ) -> CalibrationResult:
        """Fit one day's quotes; ``anchor_weight`` overrides the setting (the frontier's knob).

        Raises the errors of :func:`fit`; a numerical failure is a
        :class:`~calib.errors.CalibrationNumericalError` with its reason.
        """
        s = self.settings
        if anchor_weight is not None:
            s = replace(s, anchor_weight=anchor_weight)
        try:
            lim = check_feasible(s, historical)
            with np.errstate(over="ignore", under="ignore"):
                data = prepare(quotes, s)
                result = self._fit_data(data, quotes, historical, s, lim)
                if s.refit_costs:
                    result = self._with_refit_costs(result, data, quotes, historical)
        except _NUMERICAL as exc:
            raise CalibrationNumericalError(f"{type(exc).__name__}: {exc}") from exc
        return result

    def _fit_data(
        self,
        data: FitData,
        quotes: OptionQuotes,
        hist: TwoFactorParams,
        s: CalibrationSettings,
        lim: Limits,
    ) -> CalibrationResult:
        needed = _MIN_QUOTES[s.mode]
        if data.n < needed:
            counts: dict[str, int] = {}
            for d in data.dropped:
                reason = d.reason.split(":")[0] if d.reason.startswith("screened") else d.reason
                counts[reason] = counts.get(reason, 0) + 1
            raise TooFewQuotesError(data.n, len(quotes), s.mode, needed, counts)
        if s.mode == "held_rho":
            result = self._fit_held(data, s, hist, quotes, lim)
        else:
            result = self._fit_convex(data, hist, s, quotes, lim)
        if not (
            math.isfinite(result.objective)
            and np.all(np.isfinite(result.model_vol))
            and np.all(np.isfinite(result.model_price))
        ):
            raise CalibrationNumericalError(
                f"the fit's objective or model prices are not finite (objective "
                f"{result.objective!r})"
            )
        if result.not_identified:
            warnings.warn(
                CalibrationNotIdentifiedWarning(
                    CalibrationNotIdentifiedWarning.TEMPLATE.format(
                        what=", ".join(result.not_identified), reason=result.not_identified_reason
                    )
                ),
                stacklevel=3,
            )
        return result

    def _with_refit_costs(
        self,
        result: CalibrationResult,
        data: FitData,
        quotes: OptionQuotes,
        hist: TwoFactorParams,
    ) -> CalibrationResult:
        """Price each binding constraint family by re-fitting without it (refit_cost >= 0).

        Each re-fit is what :func:`fit` with that constraint off would give: its own
        :class:`Calibrator` (kept for the next day, as this one is), the same prepared
        quotes (the filters and weights do not depend on the constraints), the same checks.
        A family without a switch (``psd``, the held scan's ranges), or whose re-fit cannot
        run (e.g. too few quotes for the mode without the held correlation), gets no cost and
        a ``refit_note`` saying why; the fit itself stands.
        """
        s = result.settings
        costs: dict[str, float] = {}
        notes: dict[str, str] = {}

        def refit(off: CalibrationSettings) -> CalibrationResult:
            off = replace(off, refit_costs=False)
            other = self._without.get(off)
            if other is None:
                # the same data, so forward mode has this calibrator's buckets
                other = self._without[off] = Calibrator(off, self.n_buckets)
            with warnings.catch_warnings():
                # the re-fit's own cautions are not the fit's
                warnings.simplefilter("ignore", CalibWarning)
                lim = check_feasible(off, hist)
                return other._fit_data(data, quotes, hist, off, lim)

        for family in self.families:
            if not any(c.binds and c.name == family.name for c in result.constraints):
                continue
            off = family.without(s)
            if off is None or family.name == "psd":
                notes[family.name] = "not available: the constraint has no switch"
                continue
            try:
                costs[family.name] = result.objective - refit(off).objective
            except CALIBRATION_ERRORS as exc:
                notes[family.name] = f"not available: {exc}"
        anchor_cost = None
        if s.anchor_weight > 0.0:
            try:
                anchor_cost = result.fit - refit(replace(s, anchor_weight=0.0)).fit
            except CALIBRATION_ERRORS:
                anchor_cost = None
        reports = tuple(
            replace(
                c, refit_cost=costs.get(c.name), refit_note=notes.get(c.name) if c.binds else None
            )
            for c in result.constraints
        )
        return replace(result, constraints=reports, anchor_fit_cost=anchor_cost)

    # --- constant and forward modes: Gauss-Newton over the convex sub-problem ----------------

    def _fit_convex(
        self,
        data: FitData,
        hist: TwoFactorParams,
        s: CalibrationSettings,
        quotes: OptionQuotes,
        lim: Limits,
    ) -> CalibrationResult:
        K = self.n_buckets
        if s.mode == "forward":
            edges = bucket_edges(data.t_expiry)
            if edges.size - 1 != K:
                raise CalibrationShapeError(f"{K} expiry buckets", f"{edges.size - 1}")
            a, b, c = bucket_coefficients(data.t_expiry, data.t_delivery, edges, hist.kappa)
        else:
            edges = np.array([0.0, float(data.t_expiry.max())])
            a, b, c = (
                z[:, None]
                for z in variance_coefficients(data.t_expiry, data.t_delivery, hist.kappa)
            )
        A = np.hstack([a, b, -2.0 * c])
        step = self._step_for(None)
        s2h = hist.sigma_yield
        anchor = Anchor(s.anchor_weight * anchor_scale(data, A, hist, s.error_measure), s2h, K)
        step.set_day(lim, anchor, s.smoothness)
        w, d = data.weight, data.threshold
        huber_step = None
        if d is not None:
            huber_step = self._step_for(huber_capacity(data.n))
            huber_step.set_day(lim, anchor, s.smoothness)

        def sub_solve(
            G: FloatArray, t: FloatArray, it: int, scale: float
        ) -> tuple[Solved, bool, float, float]:
            """The sub-problem; with Huber, its squared-loss solution when every linearised
            residual stays within its threshold (where the two losses and their slopes agree,
            so it is the Huber optimum too), else the conic Huber solve."""
            used = step
            solved, inaccurate = step.solve(G, t, w, None, it, scale)
            if d is not None and huber_step is not None and np.any(np.abs(G @ solved.x - t) > d):
                used = huber_step
                solved, inaccurate = huber_step.solve(G, t, w, d, it, scale)
            return solved, inaccurate, used.solver_tol, used.feasibility(solved.status)

        def total(x: FloatArray) -> float:
            return float(fit_term(data, A @ x, s.error_measure)) + step.penalties(x)

        V_mkt = data.vol**2 * data.t_expiry
        _, g = errors(data, V_mkt, s.error_measure)
        x_hist = np.concatenate(
            [
                np.full(K, hist.sigma_spot**2),
                np.full(K, s2h**2),
                np.full(K, hist.rho * hist.sigma_spot * s2h),
            ]
        )
        solved, inaccurate, tol, feas = sub_solve(
            g[:, None] * A, g * V_mkt, 0, _scale(total(x_hist))
        )
        x_feas = feas  # the feasibility precision of the solve the solution comes from
        x = solved.x
        J = total(x)
        n_inaccurate = int(inaccurate)
        last_inaccurate, last_iteration = inaccurate, 0
        converged, it, move = False, 0, math.inf
        for it in range(1, s.max_iterations + 1):
            if J <= _EXACT:
                converged = True
                break
            V = A @ x
            e, g = errors(data, V, s.error_measure)
            G = g[:, None] * A
            target = g * V - e
            scale = _scale(J)
            solved, inaccurate, tol, feas = sub_solve(G, target, it, scale)
            n_inaccurate += int(inaccurate)
            model = step.model(G, target, w, d, solved.x)
            if J - model <= tol / scale:
                # the sub-problem (equal to J at x) predicts no decrease the solver resolves:
                # x is a KKT point to solver precision; take its answer only if no worse
                J_new = total(solved.x)
                if J_new <= J:
                    x, J = solved.x, J_new
                    last_inaccurate, last_iteration, x_feas = inaccurate, it, feas
                converged = True
                break
            dx = solved.x - x
            tau, J_new = 1.0, total(solved.x)
            for _ in range(_BACKTRACKS):
                if J_new <= J:
                    break
                tau *= 0.5
                J_new = total(x + tau * dx)
            decrease, move = 0.0, 0.0
            if J_new <= J:
                decrease, move = J - J_new, tau * float(np.max(np.abs(dx)))
                x, J = x + tau * dx, J_new
                last_inaccurate, last_iteration = inaccurate, it
                x_feas = feas if tau == 1.0 else max(feas, x_feas)  # between two feasible points
            if move <= s.step_tol or decrease == 0.0:
                converged = True  # the step vanished, or none decreases J at solver precision
                break
        flags: set[str] = set()
        if last_inaccurate:
            # the solution comes from (a step towards) an inaccurate solve: flag and warn
            flags.add("inaccurate")
            step.warn_inaccurate(solved.status, last_iteration)
        if not converged:
            flags.add("not_converged")
            warnings.warn(
                CalibrationNotConvergedWarning(
                    CalibrationNotConvergedWarning.TEMPLATE.format(iterations=it, step=move)
                ),
                stacklevel=3,
            )
        if not np.all(np.isfinite(x)):
            raise CalibrationNumericalError("the Gauss-Newton iterate is not finite")
        P, Q, C = x[:K], np.maximum(x[K : 2 * K], 0.0), x[2 * K :]
        s1, s2 = np.sqrt(np.maximum(P, 0.0)), np.sqrt(Q)
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(s1 * s2 > 0.0, C / (s1 * s2), 0.0)
        rho = np.clip(rho, -1.0, 1.0)  # |rho| may exceed 1 by the solver tolerance only
        params = [hist.with_vols(float(s1[k]), float(s2[k]), float(rho[k])) for k in range(K)]
        var_tol = variance_tolerance(x_feas, x)
        reports = self._reports(params, lim, solved.duals, var_tol)
        V = A @ x
        return _result(
            data,
            quotes,
            hist,
            s,
            edges,
            params,
            V,
            A,
            J,
            reports,
            SOLVER,
            solved.status,
            it,
            converged,
            flags,
            n_inaccurate - int(last_inaccurate),
            var_tol,
            anchor,
        )

    def _reports(
        self,
        params: list[TwoFactorParams],
        lim: Limits,
        duals: dict[str, FloatArray] | None,
        var_tol: float,
    ) -> tuple[ConstraintReport, ...]:
        """Every active family at the solution, bucket by bucket (the held rho once)."""
        per_bucket = self.settings.mode == "forward"
        out: list[ConstraintReport] = []
        for k, p in enumerate(params):
            for c in self.families:
                slack = c.slack(p, lim)
                if slack is None:
                    continue
                tol = c.tolerance(p, lim, var_tol)
                dual = None if duals is None or c.name not in duals else float(duals[c.name][k])
                out.append(
                    ConstraintReport(
                        c.name,
                        c.form,
                        k if per_bucket else None,
                        slack,
                        slack <= max(BIND_TOL, tol),
                        dual,
                        None,
                        tol,
                    )
                )
        for c in self.families:
            if c.slack(params[0], lim) is None:
                out.append(ConstraintReport(c.name, c.form, None, None, True, None, None))
        return tuple(out)

    # --- correlation held: the ratio scan ------------------------------------------------------

    def _fit_held(
        self,
        data: FitData,
        s: CalibrationSettings,
        hist: TwoFactorParams,
        quotes: OptionQuotes,
        lim: Limits,
    ) -> CalibrationResult:
        a, b, c = variance_coefficients(data.t_expiry, data.t_delivery, hist.kappa)
        A = np.stack([a, b, -2.0 * c], axis=1)
        anchor = Anchor(
            s.anchor_weight * anchor_scale(data, A, hist, s.error_measure), hist.sigma_yield, 1
        )
        problem = held.HeldProblem(
            data=data,
            a=a,
            b=b,
            c=c,
            rho=hist.rho,
            measure=s.error_measure,
            anchor=anchor,
            floor=lim.floor * lim.floor,
            P_max=lim.cap * lim.cap,
            ratio_max=lim.ratio_top,
            step_tol=s.step_tol,
            max_iterations=s.max_iterations,
        )
        best = held.scan(problem, s.ratio_grid)
        if not (math.isfinite(best.objective) and math.isfinite(best.P)):
            # check_feasible uses the scan's own bounds, so this is numerical trouble
            raise InfeasibleSettingsError(
                f"the held-correlation scan found no feasible ratio sigma_yield / sigma_spot in "
                f"[0, {lim.ratio_top:.6g}] with sigma_spot <= {lim.cap:.6g} and sigma_yield >= "
                f"{lim.floor:.6g}",
                math.nan,
            )
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
        params = [hist.with_vols(s1, best.ratio * s1, hist.rho)]
        var_tol = SCAN_VAR_TOL * max(best.P, 1.0)
        reports = self._reports(params, lim, None, var_tol)
        return _result(
            data,
            quotes,
            hist,
            s,
            np.array([0.0, float(data.t_expiry.max())]),  # one bucket: the edges
            params,
            best.P * (a + b * best.ratio**2 - 2.0 * c * hist.rho * best.ratio),  # V
            A,
            best.objective,
            reports,
            "scan",
            "optimal",
            best.iterations,
            best.converged,
            flags,
            0,
            var_tol,
            anchor,
        )


def anchor_scale(data: FitData, A: FloatArray, hist: TwoFactorParams, measure: str) -> float:
    """The factor of ``anchor_weight`` in the error measure ``measure`` (1 in price).

    Notes
    -----
    ``anchor_weight`` is stated against the price measure. The anchor pulls ``sigma_yield``
    against the fit term's curvature along ``sigma_yield`` once ``sigma_spot`` and ``rho``
    have adjusted (the profile curvature ``1 / (u' H^+ u)``, ``H = J' W J`` the Gauss-Newton
    information at the historical set and the market's variances, ``u`` the direction of
    ``sigma_yield`` in every bucket). In the vol measure the weight is multiplied by the ratio
    of that curvature in vol to that in price (about ``1 / sum_i w_i nu_i^2``, ``nu_i`` the
    vega per unit mean forward), so the same ``anchor_weight`` moves ``sigma_yield`` by about
    as much in either measure.
    """
    if measure == "price":
        return 1.0
    K = A.shape[1] // 3
    theta = np.tile([hist.sigma_spot, hist.sigma_yield, hist.rho], (K, 1))
    AT = A @ theta_jacobian(theta)
    u = np.tile([0.0, 1.0, 0.0], K)
    V_mkt = data.vol**2 * data.t_expiry
    curvature = {}
    for m in ("price", "vol"):
        _, g = errors(data, V_mkt, m)
        curvature[m] = profile_curvature(g[:, None] * AT, data.weight, u)
    ratio = curvature["vol"] / curvature["price"]
    return ratio if math.isfinite(ratio) and ratio > 0.0 else 1.0


def _fixed_directions(
    params: list[TwoFactorParams], reports: tuple[ConstraintReport, ...], lim: Limits
) -> FloatArray:
    """Gradients in ``theta = (s1, s2, rho)_k`` of the binding constraints (and held rho)."""
    K = len(params)
    rows: list[FloatArray] = []

    def row(k: int, grad: tuple[float, float, float]) -> None:
        r = np.zeros(3 * K)
        r[3 * k : 3 * k + 3] = grad
        rows.append(r)

    for c in reports:
        if not c.binds:
            continue
        ks = range(K) if c.bucket is None else (c.bucket,)
        for k in ks:
            p = params[k]
            if c.name == "decay_bound":
                row(k, (-p.rho * lim.kappa, 1.0, -lim.kappa * p.sigma_spot))
            elif c.name == "yield_floor":
                row(k, (0.0, 1.0, 0.0))
            elif c.name in ("sigma_spot_cap", "spot_limit"):
                row(k, (1.0, 0.0, 0.0))
            elif c.name in ("psd", "held_rho"):
                row(k, (0.0, 0.0, 1.0))
            elif c.name == "ratio_limit":
                row(k, (-lim.ratio_max, 1.0, 0.0))
    return np.array(rows) if rows else np.zeros((0, 3 * K))


def _result(
    data: FitData,
    quotes: OptionQuotes,
    hist: TwoFactorParams,
    s: CalibrationSettings,
    edges: FloatArray,
    params: list[TwoFactorParams],
    V: FloatArray,
    A: FloatArray,
    objective: float,
    reports: tuple[ConstraintReport, ...],
    solver: str,
    status: str,
    iterations: int,
    converged: bool,
    flags: set[str],
    inaccurate_steps: int,
    var_tol: float,
    anchor: Anchor,
) -> CalibrationResult:
    std = np.sqrt(np.maximum(V, 0.0))
    model_price = data.discount * black76.undiscounted_price(
        data.forward, data.strike, std, data.is_call
    )
    model_vol = std / np.sqrt(data.t_expiry)
    fitted = quotes.take(data.index)
    early = np.zeros(data.n)
    am, prices = data.american, data.american_prices
    if am is not None and prices is not None:
        # the American pricer at the constant-volatility equivalent (as the objective priced)
        model_price[am] = prices.price(equivalent_vol(V[am], data.t_expiry[am]))
        # the quote's early-exercise premium: its premium less Black-76's at its implied vol
        early[am] = data.price[am] - data.discount[am] * black76.undiscounted_price(
            data.forward[am],
            data.strike[am],
            data.vol[am] * np.sqrt(data.t_expiry[am]),
            data.is_call[am],
        )
    price_res = model_price - data.price
    vol_res = model_vol - data.vol
    err = price_res if s.error_measure == "price" else vol_res
    K = len(params)
    unc = _uncertainty(data, s, params, V, A, reports, anchor, hist)
    buckets = tuple(
        BucketVols(
            float(edges[k]),
            float(edges[k + 1]),
            params[k],
            unc.std_errors[k],
            unc.yield_set_by[k],
        )
        for k in range(K)
    )

    def ro(x: FloatArray) -> FloatArray:
        y = np.array(x, dtype=np.float64)
        y.setflags(write=False)
        return y

    index = data.index.copy()
    index.setflags(write=False)
    Q = np.array([p.sigma_yield**2 for p in params])
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
        inaccurate_steps=int(inaccurate_steps),
        solver_precision=float(var_tol),
        anchor_scale=float(anchor.weight / s.anchor_weight) if s.anchor_weight > 0.0 else 1.0,
        anchor_penalty=float(anchor.value(Q)),
        not_identified=unc.not_identified,
        not_identified_reason=unc.reason,
        residual_variance=float(unc.residual_variance),
        american=readonly(fitted.is_american, np.bool_),
        early_exercise=ro(early),
    )


def _uncertainty(
    data: FitData,
    s: CalibrationSettings,
    params: list[TwoFactorParams],
    V: FloatArray,
    A: FloatArray,
    reports: tuple[ConstraintReport, ...],
    anchor: Anchor,
    hist: TwoFactorParams,
) -> Uncertainty:
    K = len(params)
    lim = Limits.of(s, hist)
    e, g = errors(data, V, s.error_measure)
    inlier = np.ones_like(e)
    if data.threshold is not None:
        inlier = np.asarray(np.abs(e) <= data.threshold, dtype=np.float64)
    theta = np.array([[p.sigma_spot, p.sigma_yield, p.rho] for p in params])
    return standard_errors(
        J_V=g,
        A=A,
        theta=theta,
        e=e,
        weight=data.weight,
        inlier=inlier,
        anchor_curvature=anchor.weight / K,
        smoothness=s.smoothness if s.mode == "forward" else 0.0,
        fixed=_fixed_directions(params, reports, lim),
        per_bucket=s.mode == "forward",
    )


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
    CalibrationNumericalError : a numerical failure (overflow, a singular system, ...).

    Every one of these is in :data:`calib.errors.CALIBRATION_ERRORS`.

    Warns
    -----
    CalibrationInaccurateWarning, CalibrationNotConvergedWarning : flagged on the result too.
    CalibrationNotIdentifiedWarning : ``not_identified`` on the result names the parameters.
    """
    s = settings if settings is not None else CalibrationSettings()
    return _calibrator_for(quotes, s).fit(quotes, historical)


def _calibrator_for(quotes: OptionQuotes, s: CalibrationSettings) -> Calibrator:
    n_buckets = 1
    if s.mode == "forward":
        try:
            with np.errstate(over="ignore", under="ignore"):
                n_buckets = bucket_edges(prepare(quotes, s).t_expiry).size - 1
        except _NUMERICAL as exc:
            raise CalibrationNumericalError(f"{type(exc).__name__}: {exc}") from exc
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
