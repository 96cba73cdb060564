"""Simulated futures panels for the estimation tests (invented market: deliveries every two
months on the 20th, business days Monday to Friday).

The states come from :mod:`calib.model.simulate` (exact transition), an independent path from
the filter under test.
"""

from __future__ import annotations

import numpy as np

from calib.estimate import Curves, curves_from_quotes
from calib.model.simulate import futures_curves, simulate_states
from calib.model.twofactor import TwoFactorParams

# Schwartz (1997), J. Finance 52(3), Table IV, crude oil, model 2 (from memory); mu is our choice.
TRUTH = TwoFactorParams(
    mu=0.15, kappa=1.876, alpha=0.106, lam=0.198, sigma_spot=0.393, sigma_yield=0.527, rho=0.766
)
NOISE_SD = np.array([0.010, 0.004, 0.002, 0.003, 0.005])  # our choice, per slot
RATE = 0.05  # our choice
START = np.datetime64("2031-01-02")


def business_days(n_days: int, start: np.datetime64 = START) -> np.ndarray:
    cal = np.arange(start, start + 2 * n_days + 10, dtype="datetime64[D]")
    return cal[np.is_busday(cal)][:n_days]


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
    rng = np.random.default_rng(seed)
    years = (days - days[0]).astype(np.float64) / 365.0
    paths = simulate_states(params, years, np.log(60.0), params.alpha, 1, rng=rng)
    first = days[0].astype("datetime64[M]")
    months = np.arange(first, days[-1].astype("datetime64[M]") + 24, 2)
    deliveries = months.astype("datetime64[D]") + 19
    tau = (deliveries[None, :] - days[:, None]).astype(np.float64) / 365.0
    price = futures_curves(paths, np.maximum(tau, 0.0), params, rate)[0]
    keep = (tau > 0.0) & (tau < 1.5)
    td = np.broadcast_to(days[:, None], tau.shape)[keep]
    dl = np.broadcast_to(deliveries[None, :], tau.shape)[keep]
    clean = curves_from_quotes(td, dl, price[keep], n_contracts=noise_sd.size)
    y = clean.log_price + noise_sd * rng.standard_normal(clean.log_price.shape)
    if missing:
        drop = rng.random(y.shape) < missing
        drop[0] = False
        y[drop] = np.nan
    return Curves(clean.dates, clean.tau, y, delivery=clean.delivery)
