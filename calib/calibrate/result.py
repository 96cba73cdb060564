"""Read-only results of a calibration and of a trade-off frontier."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from calib.calibrate.quotes import SCREENED, DroppedQuote
from calib.calibrate.settings import CalibrationSettings
from calib.model.twofactor import TwoFactorParams
from calib.record.fit import BucketVols, ConstraintReport
from calib.types import BoolArray, FloatArray, IntArray

__all__ = ["BucketVols", "CalibrationResult", "ConstraintReport", "FrontierPoint"]


@dataclass(frozen=True, slots=True, eq=False)
class CalibrationResult:
    """A fit of the volatilities to one day's quotes (read-only).

    Per-quote arrays follow ``quote_index`` (positions in the input quotes of the usable
    quotes). Residuals are model minus market: ``price_residual`` in premium (currency) units,
    ``vol_residual`` in volatility (decimal; 0.01 = one vol point).

    Attributes
    ----------
    params : the calibrated parameter set; in forward mode the front bucket's (see ``buckets``).
    buckets : the volatilities per calendar bucket (one bucket outside forward mode).
    objective : the minimised ``sum_i w_i e_i^2 + anchor + smoothness``.
    fit : its first term, the weighted mean square error ``sum_i w_i e_i^2``.
    rmse, max_error : unweighted root mean square and largest absolute error in the settings'
        error measure (price in currency, vol in decimal).
    constraints : every constraint the solver used, with slack, tolerance, binding, dual and
        re-fit cost.
    solver, status : the conic solver and cvxpy status of the final solve, the one the
        returned solution comes from (``"scan"``/``"optimal"`` for the held-rho scan).
    iterations : Gauss-Newton iterations (held-rho mode: at the optimal ratio).
    converged : Gauss-Newton met ``step_tol``; ``flags`` lists the cautions on the final
        solution (``"inaccurate"``: the final solve stopped short of its tolerances;
        ``"not_converged"``).
    inaccurate_steps : earlier Gauss-Newton sub-solves flagged inaccurate (their steps were
        checked against the true objective, so they do not taint the final solution).
    solver_precision : the feasibility resolution of the final solve in variance units (the
        constraints' ``tolerance`` derive from it).
    anchor_scale : the factor of ``anchor_weight`` for the error measure (1 in price).
    anchor_penalty : the anchor term at the solution.
    anchor_fit_cost : the fit term's increase caused by the anchor (this fit's ``fit`` minus
        that of the same fit with ``anchor_weight = 0``), with the re-fit costs; ``None`` when
        not computed (no anchor, ``refit_costs`` off, or that re-fit cannot run).
    not_identified : parameters the quotes do not identify (warned), ``not_identified_reason``
        says why; the buckets carry the standard errors.
    residual_variance : ``sum_i w_i e_i^2 / (n - p)``, the scale of the standard errors.
    american : per fitted quote, ``True`` for an American-style one (priced by
        :mod:`calib.model.american` at the model's constant-volatility equivalent).
    early_exercise : per fitted quote, its early-exercise premium at its market implied vol
        (American premium less Black-76 premium; 0 for a European quote).
    """

    params: TwoFactorParams
    buckets: tuple[BucketVols, ...]
    quote_index: IntArray
    labels: tuple[str, ...]
    market_price: FloatArray
    model_price: FloatArray
    market_vol: FloatArray
    model_vol: FloatArray
    price_residual: FloatArray
    vol_residual: FloatArray
    weight: FloatArray
    objective: float
    fit: float
    rmse: float
    max_error: float
    constraints: tuple[ConstraintReport, ...]
    solver: str
    status: str
    iterations: int
    converged: bool
    flags: tuple[str, ...]
    settings: CalibrationSettings
    historical: TwoFactorParams
    dropped: tuple[DroppedQuote, ...]
    inaccurate_steps: int = 0
    solver_precision: float = 0.0
    anchor_scale: float = 1.0
    anchor_penalty: float = 0.0
    anchor_fit_cost: float | None = None
    not_identified: tuple[str, ...] = ()
    not_identified_reason: str = ""
    residual_variance: float = float("nan")
    american: BoolArray | None = None
    early_exercise: FloatArray | None = None

    @property
    def final_optimal(self) -> bool:
        """The final solution is optimal to the solver's precision and Gauss-Newton converged."""
        return self.status == "optimal" and "inaccurate" not in self.flags and self.converged

    @property
    def constraints_met(self) -> bool:
        """Every listed constraint holds within its tolerance."""
        return all(c.met for c in self.constraints)

    @property
    def screened(self) -> tuple[DroppedQuote, ...]:
        """The quotes the smile screen set aside (also in ``dropped``)."""
        return tuple(d for d in self.dropped if d.reason.startswith(SCREENED))

    @property
    def binding(self) -> tuple[str, ...]:
        """Labels of the binding constraints (:attr:`ConstraintReport.label`)."""
        return tuple(c.label for c in self.constraints if c.binds)

    def to_dict(self) -> dict[str, Any]:
        """Plain values (lists, floats, strings) for JSON; a standard error that is not finite
        (a parameter not identified) is ``None``."""
        return {
            "params": self.params.to_dict(),
            "buckets": [
                {
                    "start": b.start,
                    "end": b.end,
                    "params": b.params.to_dict(),
                    "std_errors": None
                    if b.std_errors is None
                    else dict(
                        zip(
                            ("sigma_spot", "sigma_yield", "rho"),
                            (_finite(v) for v in b.std_errors),
                            strict=True,
                        )
                    ),
                    "yield_set_by": b.yield_set_by,
                }
                for b in self.buckets
            ],
            "quotes": {
                "index": self.quote_index.tolist(),
                "label": list(self.labels),
                "market_price": self.market_price.tolist(),
                "model_price": self.model_price.tolist(),
                "market_vol": self.market_vol.tolist(),
                "model_vol": self.model_vol.tolist(),
                "price_residual": self.price_residual.tolist(),
                "vol_residual": self.vol_residual.tolist(),
                "weight": self.weight.tolist(),
                "exercise": [
                    "american" if a else "european"
                    for a in (
                        self.american.tolist()
                        if self.american is not None
                        else [False] * len(self.labels)
                    )
                ],
                "early_exercise": (
                    self.early_exercise.tolist()
                    if self.early_exercise is not None
                    else [0.0] * len(self.labels)
                ),
            },
            "objective": self.objective,
            "fit": self.fit,
            "rmse": self.rmse,
            "max_error": self.max_error,
            "constraints": [c.to_dict() for c in self.constraints],
            "solver": self.solver,
            "status": self.status,
            "iterations": self.iterations,
            "converged": self.converged,
            "flags": list(self.flags),
            "settings": self.settings.to_dict(),
            "historical": self.historical.to_dict(),
            "dropped": [
                {"index": d.index, "label": d.label, "reason": d.reason} for d in self.dropped
            ],
            "inaccurate_steps": self.inaccurate_steps,
            "solver_precision": self.solver_precision,
            "anchor_scale": self.anchor_scale,
            "anchor_penalty": self.anchor_penalty,
            "anchor_fit_cost": self.anchor_fit_cost,
            "not_identified": list(self.not_identified),
            "not_identified_reason": self.not_identified_reason,
            "residual_variance": _finite(self.residual_variance),
        }


def _finite(x: float) -> float | None:
    """``x``, or ``None`` where JSON has no number (a parameter not identified: ``inf``)."""
    return x if math.isfinite(x) else None


@dataclass(frozen=True, slots=True)
class FrontierPoint:
    """One anchor weight of the frontier: the fit it buys and how far sigma_yield moved."""

    anchor_weight: float
    distance: float
    rmse: float
    fit: float
    result: CalibrationResult
