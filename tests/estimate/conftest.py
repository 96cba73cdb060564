"""Simulated futures panels for the estimation tests (:mod:`calib.estimate.synthetic`: an
invented market, deliveries every two months on the 20th, business days Monday to Friday).

The states come from :mod:`calib.model.simulate` (exact transition), an independent path from
the filter under test.
"""

from __future__ import annotations

import numpy as np

from calib.estimate import Curves, synthetic
from calib.model.twofactor import TwoFactorParams

# Schwartz (1997), J. Finance 52(3), Table IV, crude oil, model 2 (from memory); mu is our choice.
TRUTH = TwoFactorParams(
    mu=0.15, kappa=1.876, alpha=0.106, lam=0.198, sigma_spot=0.393, sigma_yield=0.527, rho=0.766
)
NOISE_SD = np.array([0.010, 0.004, 0.002, 0.003, 0.005])  # our choice, per slot
RATE = 0.05  # our choice
START = np.datetime64("2031-01-02")


def business_days(n_days: int, start: np.datetime64 = START) -> np.ndarray:
    return synthetic.business_days(n_days, start)


def simulate_panel(
    days: np.ndarray,
    seed: int,
    *,
    params: TwoFactorParams = TRUTH,
    noise_sd: np.ndarray = NOISE_SD,
    rate: float = RATE,
    missing: float = 0.0,
) -> Curves:
    """Five-slot curves on ``days``: exact states, rolling contracts, slot noise, gaps."""
    return synthetic.simulated_curves(
        days, seed, params=params, noise_sd=noise_sd, rate=rate, missing=missing
    )
