"""Noise-free option quotes from known volatilities, by a code path independent of calib.

Total variance: ``scipy.integrate.quad`` of the instantaneous variance
``v(u) = s1^2 + s2^2 B(T-u)^2 - 2 rho s1 s2 B(T-u)`` (Schwartz 1997, model 2; DESIGN §3), per
calendar bucket in forward mode. Premiums: QuantLib's ``blackFormula`` (Black 1976).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import QuantLib as ql  # noqa: N813 - QuantLib's own documented alias
from scipy.integrate import quad

from calib.calibrate import OptionQuotes
from calib.model.twofactor import TwoFactorParams

FORWARD = 50.0  # fictional commodity "Northgate crude", currency units per barrel
RATE = 0.03
EXPIRIES = (0.15, 0.3, 0.5, 0.75, 1.0, 1.5)
MONEYNESS = (0.8, 0.9, 0.95, 1.0, 1.05, 1.1, 1.25)
TRUE = TwoFactorParams(
    mu=0.05, kappa=1.5, alpha=0.02, lam=0.0, sigma_spot=0.35, sigma_yield=0.25, rho=0.7
)
"""The invented set the calibration tests quote from and expect to recover."""


def vols_of(p: TwoFactorParams) -> np.ndarray:
    """``(sigma_spot, sigma_yield, rho)``, the triple a fit calibrates."""
    return np.array([p.sigma_spot, p.sigma_yield, p.rho])


def quad_variance(
    expiry: float,
    maturity: float,
    kappa: float,
    vols: Sequence[tuple[float, float, float]],
    edges: Sequence[float],
) -> float:
    """``int_0^expiry v(u) du``, vols ``(s1, s2, rho)`` constant on ``[edges[k], edges[k+1])``."""

    def B(tau: float) -> float:
        return (1.0 - math.exp(-kappa * tau)) / kappa

    total = 0.0
    for k, (s1, s2, rho) in enumerate(vols):
        lo, hi = edges[k], min(edges[k + 1], expiry)
        if hi <= lo:
            continue

        def v(u: float, s1: float = s1, s2: float = s2, rho: float = rho) -> float:
            b = B(maturity - u)
            return s1 * s1 + s2 * s2 * b * b - 2.0 * rho * s1 * s2 * b

        total += quad(v, lo, hi, epsabs=1e-15, epsrel=1e-14)[0]
    return total


def make_quotes(
    params: TwoFactorParams,
    *,
    expiries: Sequence[float] = EXPIRIES,
    maturity_gaps: Sequence[float] = (0.05,),
    moneyness: Sequence[float] = MONEYNESS,
    bucket_vols: Sequence[tuple[float, float, float]] | None = None,
    spread: float = 0.0,
    forward: float = FORWARD,
) -> OptionQuotes:
    """Calls above the forward, puts at or below it, at every expiry, gap and moneyness."""
    vols = bucket_vols or [(params.sigma_spot, params.sigma_yield, params.rho)]
    edges = [0.0, *expiries] if bucket_vols is not None else [0.0, max(expiries)]
    rows = []
    for t in expiries:
        for gap in maturity_gaps:
            T = t + gap
            var = quad_variance(t, T, params.kappa, vols, edges)
            disc = math.exp(-RATE * t)
            for m in moneyness:
                K = forward * m
                call = m > 1.0
                kind = ql.Option.Call if call else ql.Option.Put
                prem = ql.blackFormula(kind, K, forward, math.sqrt(var), disc)
                rows.append((t, T, call, K, disc, prem, math.sqrt(var / t)))
    a = np.array([r[:2] + r[3:] for r in rows], dtype=float)
    half = spread * a[:, 4]
    return OptionQuotes(
        t_expiry=a[:, 0],
        t_delivery=a[:, 1],
        is_call=np.array([r[2] for r in rows]),
        strike=a[:, 2],
        forward=np.full(len(rows), forward),
        discount=a[:, 3],
        premium=a[:, 4],
        bid=a[:, 4] - half if spread else None,
        ask=a[:, 4] + half if spread else None,
        labels=tuple(f"q{i}" for i in range(len(rows))),
    )
