"""The gates a fit must pass to be approved automatically.

``solver_optimal`` (status ``optimal``, no caution flags), ``decay_bound``
(``sigma_yield <= rho kappa sigma_spot`` in every bucket, value = smallest slack),
``rmse_vol`` and ``max_error_vol`` (model minus market Black volatility over the fitted quotes,
in vol points), and ``jump_sigma_spot``, ``jump_sigma_yield`` (relative change) and
``jump_rho`` (absolute change) against the approved set in force; with no approved set yet the
jump gates pass with no value. ``--auto-approve`` approves only when every gate passes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import TYPE_CHECKING, Any

import numpy as np

from calib.errors import SettingError
from calib.model.twofactor import TwoFactorParams
from calib.record.fit import Gate

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
    """

    max_rmse_vol_points: float = 1.0
    max_error_vol_points: float = 3.0
    max_jump_sigma_spot: float = 0.25
    max_jump_sigma_yield: float = 0.25
    max_jump_rho: float = 0.2
    decay_tolerance: float = 1e-8

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
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise SettingError("gates", unknown, f"unknown key(s); known: {sorted(known)}")
        return cls(**dict(data))


def _relative(new: float, old: float) -> float:
    return abs(new - old) / abs(old) if old != 0.0 else (0.0 if new == old else math.inf)


def evaluate_gates(
    result: CalibrationResult, limits: GateLimits, approved: TwoFactorParams | None
) -> tuple[Gate, ...]:
    """The gates of the module notes for ``result``, against the ``approved`` set in force."""
    status_ok = result.status == "optimal" and not result.flags
    flags = f" ({', '.join(result.flags)})" if result.flags else ""
    gates = [
        Gate(
            "solver_optimal",
            f"{result.solver}: {result.status}{flags}",
            "optimal",
            status_ok,
            "",
        )
    ]
    slack = min(
        b.params.rho * b.params.kappa * b.params.sigma_spot - b.params.sigma_yield
        for b in result.buckets
    )
    gates.append(
        Gate(
            "decay_bound",
            slack,
            -limits.decay_tolerance,
            slack >= -limits.decay_tolerance,
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
    return tuple(gates)
