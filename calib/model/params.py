"""The parameter set of the two-factor model (no numpy: the fast store reads build it too).

:mod:`calib.model.twofactor` re-exports both names; the model's formulas live there.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import asdict, dataclass, fields, replace
from typing import Any

from calib.errors import ParameterError


@dataclass(frozen=True, slots=True)
class TwoFactorParams:
    """A frozen parameter set of the two-factor model.

    Attributes
    ----------
    mu : real-world drift of the spot price (per year).
    kappa : mean-reversion speed of the convenience yield (> 0, per year).
    alpha : real-world long-run convenience yield.
    lam : market price of convenience-yield risk.
    sigma_spot : volatility of the spot price (>= 0).
    sigma_yield : volatility of the convenience yield (>= 0).
    rho : correlation of the two Brownian motions (``|rho| <= 1``).
    """

    mu: float
    kappa: float
    alpha: float
    lam: float
    sigma_spot: float
    sigma_yield: float
    rho: float

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, numbers.Real):
                raise ParameterError(f.name, value, "must be a real number")
            if not math.isfinite(float(value)):
                raise ParameterError(f.name, value, "must be finite")
            object.__setattr__(self, f.name, float(value))
        if self.kappa <= 0.0:
            raise ParameterError(
                "kappa", self.kappa, "mean reversion must be > 0 (the yield must revert)"
            )
        if self.sigma_spot < 0.0:
            raise ParameterError("sigma_spot", self.sigma_spot, "a volatility must be >= 0")
        if self.sigma_yield < 0.0:
            raise ParameterError("sigma_yield", self.sigma_yield, "a volatility must be >= 0")
        if abs(self.rho) > 1.0:
            raise ParameterError("rho", self.rho, "a correlation must lie in [-1, 1]")

    @property
    def alpha_hat(self) -> float:
        """Risk-neutral long-run convenience yield ``alpha - lam / kappa``."""
        return self.alpha - self.lam / self.kappa

    def to_dict(self) -> dict[str, float]:
        """The parameters by name (the stable keys of every JSON output)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> TwoFactorParams:
        """Build from a mapping holding (at least) every parameter name; extra keys are ignored."""
        missing = [f.name for f in fields(cls) if f.name not in data]
        if missing:
            raise ParameterError("parameters", sorted(data), f"missing {', '.join(missing)}")
        return cls(**{f.name: data[f.name] for f in fields(cls)})

    def with_vols(self, sigma_spot: float, sigma_yield: float, rho: float) -> TwoFactorParams:
        """A copy with new volatilities and correlation (what a calibration changes)."""
        return replace(self, sigma_spot=sigma_spot, sigma_yield=sigma_yield, rho=rho)


PARAM_NAMES: tuple[str, ...] = tuple(f.name for f in fields(TwoFactorParams))
