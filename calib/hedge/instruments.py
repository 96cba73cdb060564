"""The options a hedge study sells: a vanilla on one future, a calendar spread on two.

Times are years from the study's start (the day the option is sold). Each option names the
futures it is written on (its *legs*, in the order of the hedge positions) and its payoff at
expiry from the legs' prices then.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.model.spread import ForwardVols, SpreadOption, spread_law
from calib.model.twofactor import TwoFactorParams
from calib.types import FloatArray


def _check_common(t_expiry: float, strike: float) -> None:
    if not (math.isfinite(t_expiry) and t_expiry > 0.0):
        raise ParameterError("t_expiry", t_expiry, "the option must expire after the start (> 0)")
    if not math.isfinite(strike):
        raise ParameterError("strike", strike, "must be finite")


@dataclass(frozen=True, slots=True)
class VanillaOption:
    """A European option on one future (Black-76 on the model's total variance).

    Attributes
    ----------
    t_delivery : the future's delivery in years (``>= t_expiry``).
    t_expiry : the option's expiry in years (> 0).
    strike : strike (> 0).
    is_call : ``True`` pays ``max(F - K, 0)``, ``False`` ``max(K - F, 0)``.
    """

    t_delivery: float
    t_expiry: float
    strike: float
    is_call: bool = True

    def __post_init__(self) -> None:
        _check_common(self.t_expiry, self.strike)
        if not self.strike > 0.0:
            raise ParameterError("strike", self.strike, "a vanilla strike must be > 0")
        if not self.t_delivery >= self.t_expiry:
            raise ParameterError(
                "t_delivery", self.t_delivery, "the future must not mature before the expiry"
            )

    @property
    def t_legs(self) -> tuple[float, ...]:
        """Deliveries of the hedge legs in years (one)."""
        return (self.t_delivery,)

    def payoff(self, legs: FloatArray) -> FloatArray:
        """Payoff from the legs' prices at expiry, ``legs`` of shape ``(n, 1)``."""
        sign = 1.0 if self.is_call else -1.0
        return np.asarray(np.maximum(sign * (legs[:, 0] - self.strike), 0.0))


@dataclass(frozen=True, slots=True)
class CalendarSpread:
    """A European option on the calendar spread ``F(far) - F(near)`` (any strike sign).

    Attributes
    ----------
    t_near, t_far : deliveries of the two futures in years (``t_expiry <= t_near < t_far``).
    t_expiry : the option's expiry in years (> 0).
    strike : strike of far minus near.
    is_call : ``True`` pays ``max(S - K, 0)``, ``False`` ``max(K - S, 0)``.
    """

    t_near: float
    t_far: float
    t_expiry: float
    strike: float
    is_call: bool = True

    def __post_init__(self) -> None:
        _check_common(self.t_expiry, self.strike)
        if not self.t_near >= self.t_expiry:
            raise ParameterError(
                "t_near", self.t_near, "the near future must not mature before expiry"
            )
        if not self.t_far > self.t_near:
            raise ParameterError("t_far", self.t_far, "the far future must mature after the near")

    @property
    def t_legs(self) -> tuple[float, ...]:
        """Deliveries of the hedge legs in years: near, then far."""
        return (self.t_near, self.t_far)

    def payoff(self, legs: FloatArray) -> FloatArray:
        """Payoff from the legs' prices at expiry, ``legs`` of shape ``(n, 2)`` (near, far)."""
        sign = 1.0 if self.is_call else -1.0
        return np.asarray(np.maximum(sign * (legs[:, 1] - legs[:, 0] - self.strike), 0.0))


HedgedOption = VanillaOption | CalendarSpread


@dataclass(frozen=True, slots=True)
class RemainingLaw:
    """Variances and covariance of the legs' log prices from each grid date to expiry.

    Arrays of shape ``(n_dates,)``; for a vanilla the far entries repeat the near one.
    """

    var_near: FloatArray
    var_far: FloatArray
    cov: FloatArray


def remaining_law(
    option: HedgedOption, vols: TwoFactorParams | ForwardVols, times: FloatArray
) -> RemainingLaw:
    """The pricing set's law of the legs over ``[t, expiry]`` for each date ``t`` in ``times``.

    Notes
    -----
    With ``W(t)`` the covariance of the legs' log prices accumulated over ``[0, t]`` (calendar
    time from the start, so forward buckets keep their calendar edges), the law over the
    remaining life is ``W(expiry) - W(t)``. ``W`` comes from :func:`calib.model.spread.spread_law`
    (DESIGN section 3), evaluated at every grid date in one vectorised call.
    """
    t = np.asarray(times, dtype=np.float64)
    legs = option.t_legs
    near, far = legs[0], legs[-1]
    points = np.concatenate([t, [option.t_expiry]])
    positive = points > 0.0
    accrued = np.zeros((3, points.size))
    if positive.any():
        dates = points[positive]
        ones = np.ones_like(dates)
        law = spread_law(
            SpreadOption(
                t_near=near * ones,
                t_far=far * ones,
                t_expiry=dates,
                strike=0.0 * ones,
                is_call=ones > 0.0,
                near_price=ones,
                far_price=ones,
                discount=ones,
            ),
            vols,
        )
        accrued[:, positive] = np.stack([law.var_near, law.var_far, law.cov])
    rest = accrued[:, -1:] - accrued[:, :-1]
    rest[:2] = np.maximum(rest[:2], 0.0)  # variances: rounding must not make them negative
    rest[:, t >= option.t_expiry] = 0.0
    return RemainingLaw(var_near=rest[0], var_far=rest[1], cov=rest[2])
