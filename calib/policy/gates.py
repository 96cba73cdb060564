"""The gates a fit must pass to be approved automatically.

Gates judge the *final* solution, at the solver's stated precision:

``solver_optimal`` (the final solve optimal, not flagged inaccurate, Gauss-Newton converged; an
earlier sub-solve flagged inaccurate is shown but does not fail it), ``decay_bound``
(``sigma_yield <= rho kappa sigma_spot`` in every bucket, value = smallest slack, met within
``max(decay_tolerance, the constraint's own tolerance)``), ``rmse_vol`` and ``max_error_vol``
(model minus market Black volatility over the fitted quotes, in vol points),
``jump_sigma_spot``, ``jump_sigma_yield`` (relative change) and ``jump_rho`` (absolute change)
against the approved set in force (with no approved set yet they pass with no value),
``constraints`` (every constraint the solver used holds within its tolerance; value = the
number that do not), ``identified`` (the quotes identify every fitted parameter) and
``curve_move`` (the day's futures curve against the previous stored trading day's: the largest
``|ln(F / F_previous)|`` over the deliveries both days carry, so a settle typed x10 or /10
moves it by ln 10 = 2.3 either way; with no earlier day, or no delivery in common, it passes
with no value). ``--auto-approve`` approves only when every gate passes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from datetime import date
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from calib.calibrate.settings import refuse_unknown_keys
from calib.errors import SettingError
from calib.model.twofactor import TwoFactorParams
from calib.record.fit import ConstraintReport, Gate

if TYPE_CHECKING:
    from calib.calibrate.result import CalibrationResult

AT_LEAST = frozenset({"decay_bound"})
"""Gates whose value must be at least the limit; every other numeric gate is "at most"."""


@dataclass(frozen=True, slots=True)
class GateLimits:
    """Limits a run must meet to be approved automatically.

    Defaults are common practice for a liquid futures-options market, not a published
    standard: the firm's model-validation policy sets the real limits.

    Attributes
    ----------
    max_rmse_vol_points : root mean square of model minus market Black vol, in vol points.
    max_error_vol_points : largest absolute vol error, in vol points.
    max_jump_sigma_spot, max_jump_sigma_yield : relative change against the approved set.
    max_jump_rho : absolute change of the correlation against the approved set.
    decay_tolerance : slack below zero still accepted by the decay-bound gate (solver noise).
    max_curve_move : largest ``|ln(F / F_previous)|`` of one delivery's settle against the
        previous stored trading day (0.2: about +22% / -18%; a day-on-day move of a futures
        settle beyond that is rare outside a market shock, common practice).
    """

    max_rmse_vol_points: float = 1.0
    max_error_vol_points: float = 3.0
    max_jump_sigma_spot: float = 0.25
    max_jump_sigma_yield: float = 0.25
    max_jump_rho: float = 0.2
    decay_tolerance: float = 1e-8
    max_curve_move: float = 0.2

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise SettingError(f"gates.{f.name}", value, "must be a real number")
            if not (math.isfinite(value) and value >= 0.0):
                raise SettingError(f"gates.{f.name}", value, "must be finite and >= 0")
            object.__setattr__(self, f.name, float(value))

    def to_dict(self) -> dict[str, float]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> GateLimits:
        refuse_unknown_keys("gates", cls, data)
        return cls(**dict(data))


@dataclass(frozen=True, slots=True)
class CurveMove:
    """The day's futures curve against the previous stored trading day's (see
    :func:`curve_move`).

    Attributes
    ----------
    previous_day : the trading day compared with.
    common : deliveries both days carry.
    size : largest ``|ln(F / F_previous)|`` over them (``inf`` where a settle is not a positive
        number; ``None`` when there is no delivery in common).
    delivery : where that largest move is (``None`` with no delivery in common).
    previous, settle : the two settles there.
    """

    previous_day: date
    common: int
    size: float | None
    delivery: date | None
    previous: float
    settle: float


def curve_move(
    delivery: npt.ArrayLike,
    settle: npt.ArrayLike,
    previous_delivery: npt.ArrayLike,
    previous_settle: npt.ArrayLike,
    previous_day: date,
) -> CurveMove:
    """The move of a futures curve (``delivery``, ``settle``) from the previous day's, per
    delivery both carry (vectorised; either curve in any order)."""
    today = np.asarray(delivery, dtype="datetime64[D]")
    before = np.asarray(previous_delivery, dtype="datetime64[D]")
    common, i, j = np.intersect1d(today, before, return_indices=True)
    if common.size == 0:
        return CurveMove(previous_day, 0, None, None, math.nan, math.nan)
    new = np.asarray(settle, dtype=np.float64)[i]
    old = np.asarray(previous_settle, dtype=np.float64)[j]
    usable = np.isfinite(new) & np.isfinite(old) & (new > 0.0) & (old > 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        size = np.where(usable, np.abs(np.log(np.where(usable, new / old, 1.0))), np.inf)
    k = int(np.argmax(size))
    return CurveMove(
        previous_day,
        int(common.size),
        float(size[k]),
        common[k].astype(date),
        float(old[k]),
        float(new[k]),
    )


def _curve_gate(move: CurveMove | None, limit: float) -> Gate:
    if move is None:
        return Gate("curve_move", None, limit, True, "no earlier trading day stored")
    if move.size is None:
        return Gate(
            "curve_move", None, limit, True, f"no delivery in common with {move.previous_day}"
        )
    detail = (
        f"|ln(F/F_prev)| at delivery {move.delivery} against {move.previous_day}: "
        f"{move.previous:.6g} -> {move.settle:.6g} ({move.common} deliveries compared)"
    )
    return Gate("curve_move", move.size, limit, move.size <= limit, detail)


def _relative(new: float, old: float) -> float:
    return abs(new - old) / abs(old) if old != 0.0 else (0.0 if new == old else math.inf)


def evaluate_gates(
    result: CalibrationResult,
    limits: GateLimits,
    approved: TwoFactorParams | None,
    move: CurveMove | None = None,
) -> tuple[Gate, ...]:
    """The gates of the module notes for ``result``, against the ``approved`` set in force;
    ``move`` is the day's curve against the previous stored day (``None``: no earlier day)."""
    flags = f" ({', '.join(result.flags)})" if result.flags else ""
    earlier = (
        f"{result.inaccurate_steps} earlier sub-solve(s) inaccurate, final solve judged"
        if result.inaccurate_steps
        else ""
    )
    gates = [
        Gate(
            "solver_optimal",
            f"{result.solver}: {result.status}{flags}",
            "optimal",
            result.final_optimal,
            earlier,
        )
    ]
    reports = [c for c in result.constraints if c.name == "decay_bound" and c.slack is not None]
    if reports:  # the bound was imposed: its reports carry the slack and the solver's tolerance
        slack = min(c.slack for c in reports if c.slack is not None)
        tolerance = max([limits.decay_tolerance, *(c.tolerance for c in reports)])
    else:  # not imposed: the gate still asks that futures volatility falls with maturity
        slack = min(
            b.params.rho * b.params.kappa * b.params.sigma_spot - b.params.sigma_yield
            for b in result.buckets
        )
        tolerance = limits.decay_tolerance
    gates.append(
        Gate(
            "decay_bound",
            slack,
            -tolerance,
            slack >= -tolerance,
            "smallest rho kappa sigma_spot - sigma_yield over the buckets",
        )
    )
    vol_points = 100.0 * np.asarray(result.vol_residual)
    finite = bool(np.all(np.isfinite(vol_points))) and vol_points.size > 0
    rmse = float(np.sqrt(np.mean(vol_points**2))) if finite else math.nan
    worst = float(np.max(np.abs(vol_points))) if finite else math.nan
    gates.append(
        Gate(
            "rmse_vol",
            rmse,
            limits.max_rmse_vol_points,
            rmse <= limits.max_rmse_vol_points,
            "vol points",
        )
    )
    gates.append(
        Gate(
            "max_error_vol",
            worst,
            limits.max_error_vol_points,
            worst <= limits.max_error_vol_points,
            "vol points",
        )
    )
    new = result.params
    jumps = (
        ("jump_sigma_spot", "sigma_spot", limits.max_jump_sigma_spot, True),
        ("jump_sigma_yield", "sigma_yield", limits.max_jump_sigma_yield, True),
        ("jump_rho", "rho", limits.max_jump_rho, False),
    )
    for name, field_, limit, relative in jumps:
        if approved is None:
            gates.append(Gate(name, None, limit, True, "no approved set yet"))
            continue
        a, b = getattr(new, field_), getattr(approved, field_)
        value = _relative(a, b) if relative else abs(a - b)
        change = "relative" if relative else "absolute"
        gates.append(Gate(name, value, limit, value <= limit, f"{change}, {b:.6g} -> {a:.6g}"))
    unmet = [c for c in result.constraints if not c.met]
    gates.append(
        Gate(
            "constraints",
            float(len(unmet)),
            0.0,
            not unmet,
            "not met: " + ", ".join(_label(c) for c in unmet) if unmet else "all met",
        )
    )
    gates.append(
        Gate(
            "identified",
            ", ".join(result.not_identified) or "all",
            "all",
            not result.not_identified,
            result.not_identified_reason,
        )
    )
    gates.append(_curve_gate(move, limits.max_curve_move))
    return tuple(gates)


def _label(report: ConstraintReport) -> str:
    return f"{report.label} (slack {report.slack:.3g})"
