"""Read-only results of a calibration and of a trade-off frontier."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from calib.calibrate.quotes import DroppedQuote
from calib.calibrate.settings import CalibrationSettings
from calib.model.twofactor import TwoFactorParams
from calib.record.codec import encode
from calib.record.fit import BucketVols, ConstraintReport
from calib.types import FloatArray, IntArray

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
        """Plain values (lists, floats, strings) for JSON: every field, by name
        (:func:`calib.record.codec.encode`). What a run stores of it is
        :class:`~calib.record.fit.FitRecord`."""
        return encode(self)  # type: ignore[no-any-return]


@dataclass(frozen=True, slots=True)
class FrontierPoint:
    """One anchor weight of the frontier: the fit it buys and how far sigma_yield moved."""

    anchor_weight: float
    distance: float
    rmse: float
    fit: float
    result: CalibrationResult
