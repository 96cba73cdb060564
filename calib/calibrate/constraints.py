"""The constraints of the fit as objects: one class per family.

Each family says, once: its name (the setting or mode that switches it, so a report, a gate
and a settings file use one word), its form, its switch (:meth:`Constraint.applies`) and the
settings without it (:meth:`Constraint.without`, for the re-fit that prices it), the
conversion of its setting into the day's bound (:class:`Limits`, built once from the settings
and the historical estimate), its cvxpy term over the variance variables ``P = s1^2``,
``Q = s2^2``, ``C = rho s1 s2``, its slack in natural units and the tolerance of that slack at
the solver's stated precision, and the largest ``sigma_yield`` it allows (the feasibility
pre-check, :func:`check_feasible`, compares the floor with the smallest of those).

The held-correlation scan's own ranges (``sigma_spot <= 10`` without a cap,
``sigma_yield / sigma_spot <= max_vol_ratio`` without the decay bound) are families too:
listed, with their slack, and reported binding when they bind.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any, ClassVar

import cvxpy
import numpy as np

from calib.calibrate.settings import CalibrationSettings
from calib.errors import InfeasibleSettingsError
from calib.model.twofactor import TwoFactorParams

cp: Any = cvxpy

SPOT_VOL_LIMIT = 10.0
"""Upper end of ``sigma_spot`` in the held-correlation scan when no cap is set (1000 % a year)."""

BIND_TOL = 1e-7
"""Slack (natural units) below which a constraint counts as binding, unless its tolerance is
larger."""


@dataclass(frozen=True, slots=True)
class Limits:
    """A day's constraint settings converted once into bounds on the volatilities.

    Attributes
    ----------
    kappa : the historical mean reversion (the decay bound's slope).
    held_rho : the correlation held at history (held-correlation mode), else ``None``.
    floor : ``sigma_yield >= floor`` (``yield_floor x`` historical ``sigma_yield``; 0 = off).
    cap : ``sigma_spot <= cap``: the ``sigma_spot_cap`` setting, else the held-correlation
        scan's :data:`SPOT_VOL_LIMIT`, else infinite.
    ratio_max : ``sigma_yield <= ratio_max sigma_spot`` of the held-correlation scan without
        the decay bound (``max_vol_ratio``), else infinite.
    """

    kappa: float
    held_rho: float | None
    floor: float
    cap: float
    ratio_max: float

    @classmethod
    def of(cls, s: CalibrationSettings, hist: TwoFactorParams) -> Limits:
        held = s.mode == "held_rho"
        if s.sigma_spot_cap is not None:
            cap = s.sigma_spot_cap
        else:
            cap = SPOT_VOL_LIMIT if held else math.inf
        return cls(
            kappa=hist.kappa,
            held_rho=hist.rho if held else None,
            floor=s.yield_floor * hist.sigma_yield,
            cap=cap,
            ratio_max=s.max_vol_ratio if held and not s.decay_bound else math.inf,
        )

    @property
    def ratio_top(self) -> float:
        """The held scan's upper end of ``r = sigma_yield / sigma_spot``."""
        if math.isfinite(self.ratio_max):
            return self.ratio_max
        return max(self.kappa * (self.held_rho or 0.0), 0.0)


@dataclass(frozen=True, slots=True)
class Variables:
    """The convex sub-problem's variables (per bucket) and parameters, by name."""

    P: Any
    Q: Any
    C: Any
    parameters: dict[str, Any]


class Constraint:
    """One constraint family (subclasses fill in the class attributes and methods)."""

    name: ClassVar[str]
    form: ClassVar[str]
    parameter: ClassVar[str | None] = None
    """Name of its cvxpy parameter (``None``: the term has no data)."""

    def applies(self, s: CalibrationSettings) -> bool:
        """Its switch: whether the settings impose it."""
        raise NotImplementedError

    def without(self, s: CalibrationSettings) -> CalibrationSettings | None:
        """The settings with it switched off (``None``: no switch, e.g. a scan range)."""
        return None

    def parameter_value(self, lim: Limits) -> float:
        """The value of its cvxpy parameter for the day (variance units)."""
        raise NotImplementedError

    def term(self, v: Variables) -> Any:
        """Its cvxpy constraint (``None``: enforced by the held scan, not a conic solve)."""
        return None

    def slack(self, p: TwoFactorParams, lim: Limits) -> float | None:
        """Distance to its boundary in natural units, >= 0 when met (``None``: an equality)."""
        raise NotImplementedError

    def tolerance(self, p: TwoFactorParams, lim: Limits, var_tol: float) -> float:
        """The slack's resolution for a solve feasible to ``var_tol`` in variance units."""
        return 0.0

    def ceiling(self, lim: Limits) -> float:
        """The largest ``sigma_yield`` it allows (with the spot cap); ``inf``: no limit."""
        return math.inf


class Psd(Constraint):
    """``|rho| <= 1``: the covariance ``[[P, C], [C, Q]]`` is positive semidefinite."""

    name = "psd"
    form = "|rho| <= 1  ([[P, C], [C, Q]] >= 0)"

    def applies(self, s: CalibrationSettings) -> bool:
        return s.mode != "held_rho"

    def term(self, v: Variables) -> Any:
        # [[P, C], [C, Q]] >= 0 is the second-order cone |(2C, P - Q)| <= P + Q
        return cp.SOC(v.P + v.Q, cp.vstack([2.0 * v.C, v.P - v.Q]), axis=0)

    def slack(self, p: TwoFactorParams, lim: Limits) -> float:
        return 1.0 - abs(p.rho)

    def tolerance(self, p: TwoFactorParams, lim: Limits, var_tol: float) -> float:
        return var_tol / max(p.sigma_spot * p.sigma_yield, var_tol)


class DecayBound(Constraint):
    """``sigma_yield <= rho kappa sigma_spot``: futures volatility falls with maturity."""

    name = "decay_bound"
    form = "sigma_yield <= rho kappa sigma_spot  (Q <= kappa C)"
    parameter = "kappa"

    def applies(self, s: CalibrationSettings) -> bool:
        return s.decay_bound

    def without(self, s: CalibrationSettings) -> CalibrationSettings:
        return replace(s, decay_bound=False)

    def parameter_value(self, lim: Limits) -> float:
        return lim.kappa

    def term(self, v: Variables) -> Any:
        return v.parameters["kappa"] * v.C - v.Q >= 0.0

    def slack(self, p: TwoFactorParams, lim: Limits) -> float:
        return p.rho * lim.kappa * p.sigma_spot - p.sigma_yield

    def tolerance(self, p: TwoFactorParams, lim: Limits, var_tol: float) -> float:
        # slack = (kappa C - Q) / s2, and rho is clipped to [-1, 1] by up to the psd tolerance
        psd = Psd().tolerance(p, lim, var_tol)
        s2 = max(p.sigma_yield, math.sqrt(var_tol))
        return (1.0 + lim.kappa) * var_tol / s2 + lim.kappa * p.sigma_spot * psd

    def ceiling(self, lim: Limits) -> float:
        rho = 1.0 if lim.held_rho is None else lim.held_rho
        return max(rho, 0.0) * lim.kappa * lim.cap


class _VolBound(Constraint):
    """A bound between one volatility and the day's limit, ``low <= high``, imposed on their
    squares (the variance variable against the squared limit, a cvxpy parameter).

    Subclasses say which side is which, in natural units (:meth:`sides`) and in the
    sub-problem's variance units (:meth:`variance_sides`).
    """

    def sides(self, p: TwoFactorParams, lim: Limits) -> tuple[float, float]:
        """``(low, high)`` in natural units."""
        raise NotImplementedError

    def variance_sides(self, v: Variables) -> tuple[Any, Any]:
        """``(low, high)`` squared: a variance variable and the squared limit."""
        raise NotImplementedError

    def term(self, v: Variables) -> Any:
        low, high = self.variance_sides(v)
        return high - low >= 0.0

    def slack(self, p: TwoFactorParams, lim: Limits) -> float:
        low, high = self.sides(p, lim)
        return high - low

    def tolerance(self, p: TwoFactorParams, lim: Limits, var_tol: float) -> float:
        # high - low = (high^2 - low^2) / (high + low): a variance error var_tol moves the
        # slack by var_tol / (high + low), at most sqrt(var_tol) where both sides are near 0
        low, high = self.sides(p, lim)
        return var_tol / max(high + low, math.sqrt(var_tol))


class YieldFloor(_VolBound):
    """``sigma_yield >= yield_floor x`` the historical ``sigma_yield``."""

    name = "yield_floor"
    form = "sigma_yield >= q sigma_yield_hist"
    parameter = "floor"

    def applies(self, s: CalibrationSettings) -> bool:
        return s.yield_floor > 0.0

    def without(self, s: CalibrationSettings) -> CalibrationSettings:
        return replace(s, yield_floor=0.0)

    def parameter_value(self, lim: Limits) -> float:
        return lim.floor * lim.floor

    def sides(self, p: TwoFactorParams, lim: Limits) -> tuple[float, float]:
        return lim.floor, p.sigma_yield

    def variance_sides(self, v: Variables) -> tuple[Any, Any]:
        return v.parameters["floor"], v.Q


class SpotCap(_VolBound):
    """``sigma_spot <= sigma_spot_cap``."""

    name = "sigma_spot_cap"
    form = "sigma_spot <= sigma_spot_cap"
    parameter: ClassVar[str | None] = "cap"

    def applies(self, s: CalibrationSettings) -> bool:
        return s.sigma_spot_cap is not None

    def without(self, s: CalibrationSettings) -> CalibrationSettings | None:
        return replace(s, sigma_spot_cap=None)

    def parameter_value(self, lim: Limits) -> float:
        return lim.cap * lim.cap

    def sides(self, p: TwoFactorParams, lim: Limits) -> tuple[float, float]:
        return p.sigma_spot, lim.cap

    def variance_sides(self, v: Variables) -> tuple[Any, Any]:
        return v.P, v.parameters["cap"]


class SpotLimit(SpotCap):
    """The held-correlation scan's range ``sigma_spot <= 10`` when no cap is set."""

    name = "spot_limit"
    form = f"sigma_spot <= {SPOT_VOL_LIMIT:g}  (held-correlation scan range, no cap set)"
    parameter = None

    def applies(self, s: CalibrationSettings) -> bool:
        return s.mode == "held_rho" and s.sigma_spot_cap is None

    def without(self, s: CalibrationSettings) -> CalibrationSettings | None:
        return None

    def term(self, v: Variables) -> Any:
        return None


class HeldRho(Constraint):
    """``rho = rho_hist``: the correlation held at history."""

    name = "held_rho"
    form = "rho = rho_hist"

    def applies(self, s: CalibrationSettings) -> bool:
        return s.mode == "held_rho"

    def without(self, s: CalibrationSettings) -> CalibrationSettings:
        return replace(s, mode="constant")

    def slack(self, p: TwoFactorParams, lim: Limits) -> None:
        return None


class RatioLimit(Constraint):
    """The held-correlation scan's range ``sigma_yield <= max_vol_ratio sigma_spot``."""

    name = "ratio_limit"
    form = "sigma_yield <= max_vol_ratio sigma_spot  (held-correlation scan range)"

    def applies(self, s: CalibrationSettings) -> bool:
        return s.mode == "held_rho" and not s.decay_bound

    def slack(self, p: TwoFactorParams, lim: Limits) -> float:
        return lim.ratio_max * p.sigma_spot - p.sigma_yield

    def ceiling(self, lim: Limits) -> float:
        return lim.ratio_max * lim.cap


FAMILIES: tuple[Constraint, ...] = (
    Psd(),
    DecayBound(),
    YieldFloor(),
    SpotCap(),
    SpotLimit(),
    HeldRho(),
    RatioLimit(),
)
"""Every family, in report order."""


def active(s: CalibrationSettings) -> tuple[Constraint, ...]:
    """The families the settings impose."""
    return tuple(c for c in FAMILIES if c.applies(s))


def by_name(name: str) -> Constraint:
    """The family called ``name``."""
    for c in FAMILIES:
        if c.name == name:
            return c
    raise KeyError(name)


def check_feasible(settings: CalibrationSettings, historical: TwoFactorParams) -> Limits:
    """The day's :class:`Limits`, or :class:`InfeasibleSettingsError` when they conflict.

    Notes
    -----
    The checks use the bounds the fit itself uses (the held scan's ranges included):

    * held correlation ``rho_hist <= 0`` with the decay bound: ``sigma_yield <= rho kappa
      sigma_spot`` then admits only ``sigma_yield = 0`` (and ``sigma_spot = 0`` when
      ``rho < 0``), a degenerate model, so it is refused with that reason;
    * the floor ``sigma_yield >= q sigma_yield_hist`` against the smallest ceiling of the
      other families (the decay bound ``rho_max kappa cap`` with ``rho_max = 1`` or the held
      ``rho``; the held scan's ``max_vol_ratio cap``).

    Without a floor (or with ``sigma_yield_hist = 0``) ``sigma_yield = 0`` meets the rest.
    """
    s = settings
    lim = Limits.of(s, historical)
    cons = active(s)
    cap_text = (
        f"sigma_spot_cap {lim.cap:.6g}"
        if s.sigma_spot_cap is not None
        else (f"scan limit sigma_spot <= {lim.cap:g}" if math.isfinite(lim.cap) else "no cap")
    )
    decay = any(isinstance(c, DecayBound) for c in cons)
    if decay and lim.held_rho is not None and lim.held_rho <= 0.0 and lim.floor <= 0.0:
        raise InfeasibleSettingsError(
            f"decay_bound sigma_yield <= rho kappa sigma_spot with rho held at "
            f"{lim.held_rho:.6g} <= 0 admits only sigma_yield = 0 (a degenerate model): "
            "switch the decay bound off or hold a positive correlation",
            0.0,
        )
    if lim.floor <= 0.0:
        return lim
    for c in cons:
        top = c.ceiling(lim)
        if lim.floor <= top:
            continue
        if isinstance(c, DecayBound):
            rho_text = f"rho held at {lim.held_rho:.6g}" if lim.held_rho is not None else "rho <= 1"
            conflict = (
                f"yield_floor sigma_yield >= {lim.floor:.6g} (q {s.yield_floor:g} x historical "
                f"{historical.sigma_yield:.6g}) vs decay_bound sigma_yield <= rho kappa "
                f"sigma_spot <= {top:.6g} ({rho_text}, kappa {lim.kappa:.6g}, {cap_text})"
            )
        else:
            conflict = (
                f"yield_floor sigma_yield >= {lim.floor:.6g} vs {c.name} max_vol_ratio "
                f"{s.max_vol_ratio:g} x {cap_text}: sigma_yield <= {top:.6g}"
            )
        raise InfeasibleSettingsError(
            f"{conflict}: short by {lim.floor - top:.6g}", lim.floor - top
        )
    return lim


def variance_tolerance(solver_tol: float, x: Any) -> float:
    """Feasibility resolution in variance units of a conic solve at ``solver_tol``.

    Clarabel's feasibility tolerance is relative to the size of the data and iterate
    (``tol_feas * max(1, |x|)``); :data:`FEAS_MARGIN` covers its internal equilibration.
    """
    size = float(np.max(np.abs(x), initial=1.0))
    return FEAS_MARGIN * solver_tol * max(size, 1.0)


FEAS_MARGIN = 100.0
"""Margin over the solver's stated feasibility tolerance (its equilibration rescales rows by
up to about two orders of magnitude on these problems; measured in the stress test)."""

SCAN_VAR_TOL = 1e-13
"""The held scan's bounds are exact (clipping); its tolerance is round-off in ``P r^2``."""
