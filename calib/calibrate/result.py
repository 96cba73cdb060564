"""Read-only results of a calibration and of a trade-off frontier."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from calib.calibrate.quotes import DroppedQuote
from calib.calibrate.settings import CalibrationSettings
from calib.model.twofactor import TwoFactorParams
from calib.types import FloatArray, IntArray


@dataclass(frozen=True, slots=True)
class BucketVols:
    """Volatilities in force over calendar years ``[start, end)`` (forward mode: one per bucket)."""

    start: float
    end: float
    params: TwoFactorParams


@dataclass(frozen=True, slots=True)
class ConstraintReport:
    """One constraint at the solution.

    Attributes
    ----------
    name : ``psd`` (``|rho| <= 1``), ``decay_bound``, ``yield_floor``, ``spot_cap`` or
        ``rho_held``.
    form : the constraint in words and symbols.
    bucket : forward-mode bucket index, ``None`` for a constant fit.
    slack : distance to the boundary in natural units (>= 0 when met): ``1 - |rho|``,
        ``rho kappa s1 - s2``, ``s2 - q s2_hist``, ``cap - s1``; ``None`` for ``rho_held``.
    binds : whether the constraint is active (slack within 1e-7, or rho held).
    dual : the multiplier of the final convex sub-problem (objective per unit of the
        constraint in variance terms), ``None`` where the mode has no conic solve.
    refit_cost : objective saved by re-fitting without this constraint (in every bucket);
        ``None`` when not computed (not binding, ``refit_costs`` off, or ``psd``).
    """

    name: str
    form: str
    bucket: int | None
    slack: float | None
    binds: bool
    dual: float | None
    refit_cost: float | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "form": self.form,
            "bucket": self.bucket,
            "slack": self.slack,
            "binds": self.binds,
            "dual": self.dual,
            "refit_cost": self.refit_cost,
        }


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
    constraints : every constraint with slack, binding, dual and re-fit cost.
    solver, status : the conic solver and cvxpy status of the final solve
        (``"scan"``/``"optimal"`` for the held-rho scan).
    iterations : Gauss-Newton iterations (held-rho mode: at the optimal ratio).
    converged : Gauss-Newton met ``step_tol``; ``flags`` lists every caution
        (``"inaccurate"``, ``"not_converged"``).
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

    @property
    def binding(self) -> tuple[str, ...]:
        """Names of the binding constraints (with ``@k`` for forward-mode buckets)."""
        return tuple(
            c.name if c.bucket is None else f"{c.name}@{c.bucket}"
            for c in self.constraints
            if c.binds
        )

    def to_dict(self) -> dict[str, Any]:
        """Plain values (lists, floats, strings) for JSON."""
        return {
            "params": self.params.to_dict(),
            "buckets": [
                {"start": b.start, "end": b.end, "params": b.params.to_dict()} for b in self.buckets
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
        }


@dataclass(frozen=True, slots=True)
class FrontierPoint:
    """One anchor weight of the frontier: the fit it buys and how far sigma_yield moved."""

    anchor_weight: float
    distance: float
    rmse: float
    fit: float
    result: CalibrationResult
