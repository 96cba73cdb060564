"""Settings of a calibration: which constraints, how quotes are weighted and filtered.

One frozen, validated object; ``to_dict`` / ``from_dict`` give plain values (str, float, bool,
lists) that TOML and JSON store as they are.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, fields
from typing import Any, Literal, get_args

from calib.errors import SettingError

Mode = Literal["constant", "held_rho", "forward"]
Weighting = Literal["equal", "vega", "spread"]
ErrorMeasure = Literal["price", "vol"]
Loss = Literal["squares", "huber"]

MODES: tuple[str, ...] = get_args(Mode)
WEIGHTINGS: tuple[str, ...] = get_args(Weighting)
ERROR_MEASURES: tuple[str, ...] = get_args(ErrorMeasure)
LOSSES: tuple[str, ...] = get_args(Loss)


@dataclass(frozen=True, slots=True)
class CalibrationSettings:
    """How to fit the volatilities to one day's option quotes.

    Attributes
    ----------
    mode : ``"constant"`` (``sigma_spot, sigma_yield, rho`` free), ``"held_rho"`` (``rho``
        held at its historical value) or ``"forward"`` (piecewise-constant per expiry bucket).
    decay_bound : impose ``sigma_yield <= rho kappa sigma_spot`` (futures volatility falls
        with maturity), per bucket in forward mode.
    yield_floor : ``q``: impose ``sigma_yield >= q * sigma_yield_hist``; ``0`` switches it off.
    anchor_weight : ``w`` of the penalty ``w m (sigma_yield - sigma_yield_hist)^2`` (averaged
        over the buckets in forward mode); ``0`` switches it off. ``m`` is ``1`` in the price
        error measure and ``1 / sum_i w_i nu_i^2`` in the vol measure (``nu_i`` the market vega
        per unit mean forward), so the weight pulls equally in either measure.
    smoothness : weight of ``sum_k |x_{k+1} - x_k|^2`` over neighbouring buckets'
        ``x_k = (P_k, Q_k, C_k)`` (forward mode only).
    sigma_spot_cap : optional upper bound on ``sigma_spot`` (per bucket).
    weighting : ``"equal"``, ``"vega"`` (market vega per unit forward) or ``"spread"`` (each
        residual divided by its bid-ask spread in the error measure's units).
    error_measure : ``"price"`` (premium per unit of the mean forward) or ``"vol"`` (Black
        volatility, decimal: 0.01 is one vol point).
    loss : ``"squares"`` (weighted least squares) or ``"huber"`` (squares up to
        ``huber_threshold``, linear beyond: one bad quote pulls with a bounded force; the
        problem stays conic).
    huber_threshold : the Huber threshold in vol points (in the price measure: times each
        quote's vega per unit mean forward).
    screen_vol_points : set aside, before the fit, quotes whose implied vol is more than this
        many vol points from the median of their nearest neighbours on the day's own smile
        (:func:`calib.calibrate.quotes.screen`); ``0`` switches the screen off.
    moneyness_band : keep quotes with ``lo <= strike / forward <= hi``.
    min_vega : keep quotes with market vega per unit forward ``D n(d1) sqrt(T) >= min_vega``.
    min_days_to_expiry : keep quotes expiring at least this many days (ACT/365) ahead.
    max_iterations : Gauss-Newton iteration limit.
    step_tol : Gauss-Newton stops when the step in ``(P, Q, C)`` is below this (variance units).
    solver_tol : the conic solver's feasibility and gap tolerances.
    max_vol_ratio : bound of the ``sigma_yield / sigma_spot`` scan of held-rho mode when the
        decay bound is off (with it on the bound is ``kappa rho``).
    ratio_grid : number of points of the held-rho scan.
    refit_costs : also price each binding constraint by re-fitting without it.

    Notes
    -----
    The objective is ``sum_i w_i e_i^2 + anchor + smoothness`` with the weights ``w_i``
    normalised to sum to one, so the fit term is the weighted mean square error.
    """

    mode: Mode = "constant"
    decay_bound: bool = True
    yield_floor: float = 0.5
    anchor_weight: float = 1e-4
    smoothness: float = 1e-4
    sigma_spot_cap: float | None = None
    weighting: Weighting = "vega"
    error_measure: ErrorMeasure = "price"
    loss: Loss = "squares"
    huber_threshold: float = 2.0
    screen_vol_points: float = 0.0
    moneyness_band: tuple[float, float] = (0.5, 2.0)
    min_vega: float = 1e-3
    min_days_to_expiry: float = 7.0
    max_iterations: int = 50
    step_tol: float = 1e-10
    solver_tol: float = 1e-10
    max_vol_ratio: float = 20.0
    ratio_grid: int = 401
    refit_costs: bool = True

    def __post_init__(self) -> None:
        _choice("mode", self.mode, MODES)
        _choice("weighting", self.weighting, WEIGHTINGS)
        _choice("error_measure", self.error_measure, ERROR_MEASURES)
        _choice("loss", self.loss, LOSSES)
        _real("huber_threshold", self.huber_threshold, lo=0.0, open_lo=True)
        _real("screen_vol_points", self.screen_vol_points, lo=0.0)
        for name in ("decay_bound", "refit_costs"):
            if not isinstance(getattr(self, name), bool):
                raise SettingError(name, getattr(self, name), "must be true or false")
        _real("yield_floor", self.yield_floor, lo=0.0, hi=1.0)
        _real("anchor_weight", self.anchor_weight, lo=0.0)
        _real("smoothness", self.smoothness, lo=0.0)
        if self.sigma_spot_cap is not None:
            _real("sigma_spot_cap", self.sigma_spot_cap, lo=0.0, open_lo=True)
        band = tuple(self.moneyness_band)
        if len(band) != 2:
            raise SettingError("moneyness_band", self.moneyness_band, "must be [lo, hi]")
        lo = _real("moneyness_band", band[0], lo=0.0, open_lo=True)
        hi = _real("moneyness_band", band[1], lo=lo)
        object.__setattr__(self, "moneyness_band", (lo, hi))
        _real("min_vega", self.min_vega, lo=0.0)
        _real("min_days_to_expiry", self.min_days_to_expiry, lo=0.0)
        _integer("max_iterations", self.max_iterations, lo=1)
        _real("step_tol", self.step_tol, lo=0.0, open_lo=True)
        _real("solver_tol", self.solver_tol, lo=1e-14, hi=1e-3)
        _real("max_vol_ratio", self.max_vol_ratio, lo=0.0, open_lo=True)
        _integer("ratio_grid", self.ratio_grid, lo=3)

    def to_dict(self) -> dict[str, Any]:
        """Plain values by name (``sigma_spot_cap`` is omitted when unset, as TOML has no null)."""
        out = asdict(self)
        out["moneyness_band"] = list(self.moneyness_band)
        if self.sigma_spot_cap is None:
            del out["sigma_spot_cap"]
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> CalibrationSettings:
        """Build from a mapping; missing keys take their defaults, unknown keys are an error."""
        refuse_unknown_keys("settings", cls, data)
        values = dict(data)
        if "moneyness_band" in values:
            values["moneyness_band"] = tuple(values["moneyness_band"])
        return cls(**values)


def refuse_unknown_keys(section: str, cls: type[Any], data: Mapping[str, Any]) -> None:
    """A :class:`SettingError` naming the keys of ``data`` that are no field of ``cls``."""
    known = {f.name for f in fields(cls)}
    unknown = sorted(set(data) - known)
    if unknown:
        raise SettingError(section, unknown, f"unknown key(s); known: {sorted(known)}")


def _choice(name: str, value: object, allowed: tuple[str, ...]) -> None:
    if value not in allowed:
        raise SettingError(name, value, f"must be one of {', '.join(allowed)}")


def _real(
    name: str,
    value: object,
    lo: float | None = None,
    hi: float | None = None,
    open_lo: bool = False,
) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SettingError(name, value, "must be a real number")
    v = float(value)
    if not math.isfinite(v):
        raise SettingError(name, value, "must be finite")
    if lo is not None and (v < lo or (open_lo and v == lo)):
        raise SettingError(name, value, f"must be {'>' if open_lo else '>='} {lo:g}")
    if hi is not None and v > hi:
        raise SettingError(name, value, f"must be <= {hi:g}")
    return v


def _integer(name: str, value: object, lo: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int):
        raise SettingError(name, value, "must be an integer")
    if value < lo:
        raise SettingError(name, value, f"must be >= {lo}")
